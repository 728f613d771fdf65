"""End to end: one ``discover run`` against the reference library job on the same files.

The data (generated here, seeded, in a temporary folder): 3 runs x 5,000 samples of a
two-inertia drive of our own invention, a motor coupled to a load through a shaft,
with a hardening motor mount and a torque input (a multisine plus steps):

    d(motor_angle)/dt = motor_speed
    d(motor_speed)/dt = -2.5 motor_angle + 1.5 load_angle - 0.3 motor_speed - 0.5 motor_angle³ + torque
    d(load_angle)/dt  = load_speed
    d(load_speed)/dt  = 1.5 motor_angle - 1.5 load_angle - 0.2 load_speed

The config names only the files, the columns and a degree-3 library (56 terms); every
other setting is discover's default.

Ours: ``discover.run(config)`` plus ``discover.write_outputs`` (derivatives, threshold
cross-validation, a 100-member bootstrap, the ranking with its simulations, prediction
bands, figures and report.html).
Reference, as a careful pysindy user writes it: read the same CSV files, then
``SINDy`` with a degree-3 ``PolynomialLibrary`` (the same 56 terms), Savitzky–Golay
smoothed finite differences, and an ensemble of 100 bagged STLSQ models
(``EnsembleOptimizer``, threshold 0.1: pysindy's default, below the smallest true
coefficient 0.2), then ``model.simulate`` of each run discover held out, with the
recorded torque interpolated linearly and the solver tolerances discover uses
(LSODA, rtol 1e-5, atol 1e-6 x each state's range). pysindy's bagging draws from
numpy's global generator, which this script leaves alone.

Both run in this process with BLAS on one thread (threadpoolctl); the time to import
each package is measured in a fresh process and printed on its own line. Wall-clock
times are the measure; the process's CPU time is printed beside them, since a shared
machine stretches wall-clock times of whichever side runs while others are busy.

Run:  python benchmarks/end_to_end.py [--seed 0]
Times are wall-clock on this machine; nothing here is asserted in tests.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pysindy as ps
from scipy.integrate import solve_ivp
from threadpoolctl import threadpool_limits

import discover

STATES = ["motor_angle", "motor_speed", "load_angle", "load_speed"]
INPUTS = ["torque"]
N_RUNS, N_SAMPLES, DT = 3, 5000, 0.01
STEP_EVERY = 6.0  # seconds between torque steps
NOISE = 0.01  # measurement noise, as a share of each state's standard deviation
N_MODELS = 100
REFERENCE_THRESHOLD = 0.1
RTOL, ATOL_SHARE = 1e-5, 1e-6  # discover's default simulation tolerances


def drive(t, state, torque):
    motor_angle, motor_speed, load_angle, load_speed = state
    return [
        motor_speed,
        -2.5 * motor_angle + 1.5 * load_angle - 0.3 * motor_speed - 0.5 * motor_angle**3 + torque,
        load_speed,
        1.5 * motor_angle - 1.5 * load_angle - 0.2 * load_speed,
    ]


def make_run(rng):
    """One run: columns t, the four states (with noise) and the torque."""
    t = np.arange(N_SAMPLES) * DT
    frequencies = np.array([0.5, 1.3, 2.9])
    amplitudes = np.array([0.6, 0.4, 0.3])
    phases = rng.uniform(0.0, 2 * np.pi, 3)
    step_times = np.arange(0.0, t[-1] + DT, STEP_EVERY)
    levels = rng.uniform(-0.5, 0.5, len(step_times))

    def torque(time_point):
        level = levels[np.searchsorted(step_times, time_point, side="right") - 1]
        return float(amplitudes @ np.sin(frequencies * time_point + phases) + level)

    # Integrated from step to step: the torque jumps at each step time.
    x = np.empty((N_SAMPLES, 4))
    state = rng.uniform(-0.5, 0.5, 4)
    for start, stop in zip(step_times, np.append(step_times[1:], t[-1] + DT)):
        rows = np.flatnonzero((t >= start) & (t < stop))
        sol = solve_ivp(lambda s, y: drive(s, y, torque(s)), (start, stop), state,
                        t_eval=np.append(t[rows], stop), method="DOP853", rtol=1e-10, atol=1e-10)
        x[rows] = sol.y[:, :-1].T  # solve_ivp returns (n_states, n_points)
        state = sol.y[:, -1]
    x_measured = x + NOISE * x.std(axis=0) * rng.standard_normal(x.shape)
    u = np.array([torque(s) for s in t])
    return pd.DataFrame({"t": t, **dict(zip(STATES, x_measured.T)), "torque": u})


def write_case(folder, seed):
    """The runs as CSV files and a config naming only the columns and the library; returns the config path."""
    rng = np.random.default_rng(seed)
    (folder / "runs").mkdir()
    for r in range(N_RUNS):
        make_run(rng).to_csv(folder / "runs" / f"run_{r + 1}.csv", index=False)
    config = folder / "drive.toml"
    # A TOML array of strings is written as JSON writes a list.
    config.write_text(
        "[data]\n"
        'files = ["runs/*.csv"]\n'
        'time = "t"\n'
        f"states = {json.dumps(STATES)}\n"
        f"inputs = {json.dumps(INPUTS)}\n"
        "\n[terms]\ndegree = 3\n"
    )
    return config


def import_time(statement):
    """Seconds to run an import ``statement`` in a fresh interpreter."""
    code = f"import time; s = time.perf_counter(); {statement}; print(time.perf_counter() - s)"
    return float(subprocess.run([sys.executable, "-c", code], check=True, capture_output=True, text=True).stdout)


#: discover loads its modules on first use: these touch what the job calls.
DISCOVER_IMPORT = "import discover; discover.run; discover.write_outputs"


def ours(config, out_dir):
    """discover's job; returns the result and the seconds spent in ``write_outputs``."""
    result = discover.run(config)
    start = time.perf_counter()
    discover.write_outputs(result, out_dir)
    return result, time.perf_counter() - start


def reference(paths, held_out):
    """The pysindy job; returns the model, the simulated held-out runs and the seconds spent simulating."""
    frames = {path.stem: pd.read_csv(path) for path in paths}
    train = [f for name, f in frames.items() if name not in held_out]
    model = ps.SINDy(
        optimizer=ps.EnsembleOptimizer(ps.STLSQ(threshold=REFERENCE_THRESHOLD), bagging=True, n_models=N_MODELS),
        feature_library=ps.PolynomialLibrary(degree=3),
        differentiation_method=ps.SmoothedFiniteDifference(),
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model.fit([f[STATES].to_numpy() for f in train], t=[f["t"].to_numpy() for f in train],
                  u=[f[INPUTS].to_numpy() for f in train])
        x_train = np.vstack([f[STATES].to_numpy() for f in train])
        atol = ATOL_SHARE * (x_train.max(axis=0) - x_train.min(axis=0))
        simulated, start = {}, time.perf_counter()
        for name in held_out:
            f = frames[name]
            t, u = f["t"].to_numpy(), f[INPUTS].to_numpy()[:, 0]
            simulated[name] = model.simulate(
                f[STATES].to_numpy()[0], t, u=lambda s: np.array([np.interp(s, t, u)]),
                integrator_kws={"method": "LSODA", "rtol": RTOL, "atol": atol})
    return model, simulated, time.perf_counter() - start


def fit_percent(measured, simulated):
    """100 (1 − ‖y − ŷ‖ / ‖y − mean y‖) per state (common practice in system identification)."""
    n = min(len(measured), len(simulated))
    y, y_hat = measured[:n], simulated[:n]
    return 100 * (1 - np.linalg.norm(y - y_hat, axis=0) / np.linalg.norm(y - y.mean(axis=0), axis=0))


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    t_import_ours, t_import_ref = import_time(DISCOVER_IMPORT), import_time("import pysindy")
    _ = (discover.run, discover.write_outputs)  # loaded here too, so that the timed job does not pay for it
    with tempfile.TemporaryDirectory() as tmp, threadpool_limits(limits=1):
        folder = Path(tmp)
        config = write_case(folder, args.seed)
        start, cpu = time.perf_counter(), time.process_time()
        result, t_write = ours(config, folder / "out")
        t_ours, cpu_ours = time.perf_counter() - start, time.process_time() - cpu
        held_out = [run.name for run in result.held_out.runs]
        start, cpu = time.perf_counter(), time.process_time()
        model, simulated, t_simulate = reference(sorted((folder / "runs").glob("*.csv")), held_out)
        t_ref, cpu_ref = time.perf_counter() - start, time.process_time() - cpu
        measured = {name: pd.read_csv(folder / "runs" / f"{name}.csv")[STATES].to_numpy() for name in held_out}
        ours_terms = int(np.count_nonzero(result.model.coef))
        ref_terms = int(np.count_nonzero(model.coefficients()))
        ours_fit = [fit_percent(measured[item.run], item.simulation.x) for item in result.validation]
        ref_fit = [fit_percent(measured[name], simulated[name]) for name in held_out]
    print(f"{N_RUNS} runs x {N_SAMPLES} samples, {len(STATES)} states + {len(INPUTS)} input, degree-3 library "
          f"({len(result.library_terms)} terms ours, {len(model.get_feature_names())} reference); "
          f"held out: {', '.join(held_out)}; BLAS on 1 thread")
    print(f"  discover run + write_outputs   {t_ours:8.2f} s   ({ours_terms} terms kept; run {t_ours - t_write:.2f} s: "
          f"CV, {result.settings.bootstrap.members}-member bootstrap, ranking, bands; "
          f"write_outputs {t_write:.2f} s: files, figures, report)")
    print(f"  reference pysindy job          {t_ref:8.2f} s   ({ref_terms} terms kept; {N_MODELS} bagged STLSQ "
          f"models with reading the files {t_ref - t_simulate:.2f} s + simulation of each held-out run {t_simulate:.2f} s)")
    print(f"  ratio reference / ours         {t_ref / t_ours:8.2f}   (CPU time of this process: ours {cpu_ours:.2f} s, "
          f"reference {cpu_ref:.2f} s, ratio {cpu_ref / cpu_ours:.2f})")
    print(f"  import time (fresh process)    discover {t_import_ours:.2f} s, pysindy {t_import_ref:.2f} s; "
          f"with imports: ours {t_ours + t_import_ours:.2f} s, reference {t_ref + t_import_ref:.2f} s, "
          f"ratio {(t_ref + t_import_ref) / (t_ours + t_import_ours):.2f}")
    print("  discover stage seconds         " + ", ".join(f"{k} {v:.2f}" for k, v in result.timings.items()))
    for name, a, b in zip(held_out, ours_fit, ref_fit):
        print(f"  held-out {name}: fit % ours {np.array2string(a, precision=1)}, "
              f"reference {np.array2string(b, precision=1)}")


if __name__ == "__main__":
    main()
