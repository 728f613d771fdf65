"""The Savitzky–Golay window rule of discover.window_choice, measured against the truth.

Systems of our own (tests/systems.py: a lightly damped Duffing-type oscillator, dt 0.02,
and Lorenz 1963 with an input, dt 0.01), noise 0.1, 1, 5 and 10 % of each state's std.

Part 1, derivative error: per state the GCV window, the window with the least true
derivative error (the oracle) and their ratio; the median ratio is printed.
Part 2, coefficient error: the largest relative error of the true structure's
coefficients fitted by least squares to the smoothed states and derivatives of three
runs, for windows of f × the median GCV window (f = 0.5, 1, 1.4) and the former fixed
window of 11 samples. The regression wants less smoothing than the derivative alone.

    python benchmarks/derivative_window.py
"""

import sys
from pathlib import Path

import numpy as np
from scipy.signal import savgol_filter

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from systems import lorenz_runs, oscillator_runs  # noqa: E402

from discover.window_choice import automatic_window, gcv_window  # noqa: E402

ORDER = 3
NOISE = (0.001, 0.01, 0.05, 0.1)


def oscillator_library(x, u):
    p, v = x.T
    return [np.column_stack([v]), np.column_stack([p, v, u, p**3])], [[1.0], [-4.0, -0.1, 1.0, -1.0]]


def lorenz_library(x, u):
    a, b, c = x.T
    return ([np.column_stack([a, b, u]), np.column_stack([a, b, a * c]), np.column_stack([a * b, c])],
            [[-10.0, 10.0, 1.0], [28.0, -1.0, -1.0], [1.0, -8.0 / 3.0]])


SYSTEMS = {
    "oscillator": (lambda noise, seed: oscillator_runs(noise=noise, seed=seed), ["x", "v"], oscillator_library),
    "lorenz": (lambda noise, seed: lorenz_runs(noise=noise, seed=seed, dt=0.01), ["x", "y", "z"], lorenz_library),
}


def _odd(value):
    value = int(round(value))
    return max(5, value if value % 2 else value + 1)


def derivative_error(x, window, step, truth, edge=101):
    d = savgol_filter(x, window, ORDER, deriv=1, delta=step, mode="interp")
    return float(np.sqrt(np.mean((d[edge:-edge] - truth[edge:-edge]) ** 2)) / np.std(truth))


def coefficient_error(runs, states, library, window):
    """Largest relative error of the true structure's least-squares coefficients."""
    h = window // 2
    rows, targets = {}, {}
    for run in runs:
        t = run["t"].to_numpy()
        x = run[states].to_numpy()
        smooth = savgol_filter(x, window, ORDER, axis=0)
        slope = savgol_filter(x, window, ORDER, deriv=1, delta=t[1] - t[0], axis=0)
        columns, truth = library(smooth[h:-h], run["u"].to_numpy()[h:-h])
        for i, block in enumerate(columns):
            rows.setdefault(i, []).append(block)
            targets.setdefault(i, []).append(slope[h:-h, i])
    worst = 0.0
    for i, true in enumerate(truth):
        coef = np.linalg.lstsq(np.vstack(rows[i]), np.concatenate(targets[i]), rcond=None)[0]
        worst = max(worst, float(np.max(np.abs(coef - true) / np.abs(true))))
    return worst


def main():
    ratios = []
    print("Part 1: derivative error (RMS / std of the true derivative), seed 0, first run")
    print(f"{'system':11s} {'noise':>6s} {'state':>5s} {'gcv':>4s} {'oracle':>6s} {'err w11':>8s} "
          f"{'err gcv':>8s} {'err oracle':>10s}")
    for name, (make, states, _) in SYSTEMS.items():
        for noise in NOISE:
            clean, noisy = make(0.0, 0)[0], make(noise, 0)[0]
            t = clean["t"].to_numpy()
            step = t[1] - t[0]
            for state in states:
                x = noisy[state].to_numpy()
                truth = np.gradient(clean[state].to_numpy(), step, edge_order=2)
                gcv = gcv_window(x, ORDER, 151)
                oracle = min(range(5, 202, 2), key=lambda w: derivative_error(x, w, step, truth))
                ratios.append(oracle / gcv)
                print(f"{name:11s} {noise:6.3f} {state:>5s} {gcv:4d} {oracle:6d} "
                      f"{derivative_error(x, 11, step, truth):8.4f} {derivative_error(x, gcv, step, truth):8.4f} "
                      f"{derivative_error(x, oracle, step, truth):10.4f}")
    print(f"median oracle/GCV window ratio for the derivative: {np.median(ratios):.2f}\n")
    print("Part 2: largest relative coefficient error of the true structure (3 runs, seed 1), in %")
    factors = (0.5, 1.0, 1.4)
    print(f"{'system':11s} {'noise':>6s} {'gcv':>4s} " + " ".join(f"{f'{f:g}x gcv':>12s}" for f in factors)
          + f" {'window 11':>10s}")
    for name, (make, states, library) in SYSTEMS.items():
        for noise in NOISE:
            runs = make(noise, 1)[:3]
            gcv, _ = automatic_window([run[states].to_numpy() for run in runs], ORDER)
            cells = []
            for f in factors:
                w = _odd(f * gcv)
                cells.append(f"{100 * coefficient_error(runs, states, library, w):7.2f} (w{w})")
            fixed = 100 * coefficient_error(runs, states, library, 11)
            print(f"{name:11s} {noise:6.3f} {gcv:4d} " + " ".join(f"{c:>12s}" for c in cells) + f" {fixed:10.2f}")


if __name__ == "__main__":
    main()
