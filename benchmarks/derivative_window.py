"""Measure the Savitzky–Golay window rule of discover.window_choice against true derivatives.

For systems of our own (tests/systems.py: a lightly damped Duffing-type oscillator and
Lorenz 1963 with an input), several noise levels and seeds, it prints per state: the GCV
smoothing window, the window that minimises the true derivative error (the oracle), their
ratio, and the derivative error (RMS / std of the true derivative) of the fixed window 11
(the former default), of the rule (DERIVATIVE_FACTOR × GCV window) and of the oracle.
The median oracle/GCV ratio is the measurement behind DERIVATIVE_FACTOR.

    python benchmarks/derivative_window.py
"""

import sys
from pathlib import Path

import numpy as np
from scipy.signal import savgol_filter

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from systems import lorenz_runs, oscillator_runs  # noqa: E402

from discover.window_choice import DERIVATIVE_FACTOR, automatic_window, gcv_window  # noqa: E402

ORDER = 3
SYSTEMS = {
    "oscillator": lambda noise, seed: oscillator_runs(noise=noise, seed=seed, n_runs=1),
    "lorenz": lambda noise, seed: lorenz_runs(noise=noise, seed=seed, n_runs=1, dt=0.01),
}


def error(x, window, step, truth, edge):
    d = savgol_filter(x, window, ORDER, deriv=1, delta=step, mode="interp")
    return float(np.sqrt(np.mean((d[edge:-edge] - truth[edge:-edge]) ** 2)) / np.std(truth))


def main():
    ratios = []
    print(f"{'system':11s} {'noise':>6s} {'seed':>4s} {'state':>5s} {'gcv':>4s} {'oracle':>6s} "
          f"{'rule':>4s} {'err w11':>8s} {'err rule':>8s} {'err oracle':>10s}")
    for name, make in SYSTEMS.items():
        for noise in (0.001, 0.01, 0.05, 0.1):
            for seed in (0, 1, 2):
                clean, noisy = make(0.0, seed)[0], make(noise, seed)[0]
                t = clean["t"].to_numpy()
                step = t[1] - t[0]
                states = [c for c in clean.columns if c not in ("t", "u")]
                rule, _ = automatic_window([noisy[states].to_numpy()], ORDER)
                for state in states:
                    x = noisy[state].to_numpy()
                    truth = np.gradient(clean[state].to_numpy(), step, edge_order=2)
                    edge = 101
                    gcv = gcv_window(x, ORDER, 151)
                    oracle = min(range(5, 202, 2), key=lambda w: error(x, w, step, truth, edge))
                    ratios.append(oracle / gcv)
                    print(f"{name:11s} {noise:6.3f} {seed:4d} {state:>5s} {gcv:4d} {oracle:6d} {rule:4d} "
                          f"{error(x, 11, step, truth, edge):8.4f} {error(x, rule, step, truth, edge):8.4f} "
                          f"{error(x, oracle, step, truth, edge):10.4f}")
    print(f"median oracle/GCV window ratio: {np.median(ratios):.2f} (DERIVATIVE_FACTOR = {DERIVATIVE_FACTOR})")


if __name__ == "__main__":
    main()
