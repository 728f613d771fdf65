"""Published and textbook systems with their true coefficients, and helpers to log runs.

Every system here is simulated with ``scipy.integrate.solve_ivp`` at tight
tolerances (reference library) and written as CSV runs for the pipeline.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.integrate import solve_ivp

# Lorenz (1963), J. Atmos. Sci. 20: sigma = 10, rho = 28, beta = 8/3.
SIGMA, RHO, BETA = 10.0, 28.0, 8.0 / 3.0

# dx/dt = sigma (y - x) + u, dy/dt = x (rho - z) - y, dz/dt = x y - beta z.
# The input on the first equation is ours (a forced Lorenz system).
LORENZ_INPUT_TRUTH = {
    "x": {"x": -SIGMA, "y": SIGMA, "u": 1.0},
    "y": {"x": RHO, "y": -1.0, "x*z": -1.0},
    "z": {"x*y": 1.0, "z": -BETA},
}

# Series RLC circuit, states capacitor voltage v and inductor current i, input source
# voltage vin: dv/dt = i / C, di/dt = (vin - v - R i) / L (Kirchhoff's voltage law;
# common practice). Component values are ours.
R_OHM, L_HENRY, C_FARAD = 5.0, 0.1, 1e-3


def lorenz_input(t):
    return 8.0 * np.sin(1.3 * t) + 4.0 * np.cos(3.1 * t + 0.4)


def lorenz_with_input(t, state):
    x, y, z = state
    return [SIGMA * (y - x) + lorenz_input(t), x * (RHO - z) - y, x * y - BETA * z]


def rlc_input(t):
    return 10.0 * np.sin(40.0 * t) + 6.0 * np.sin(170.0 * t + 1.0) + 3.0


def rlc(t, state):
    v, i = state
    return [i / C_FARAD, (rlc_input(t) - v - R_OHM * i) / L_HENRY]


def simulate_true(fun, x0, t):
    """Reference trajectory: rows = time (solve_ivp's (n_states, n_points) transposed)."""
    sol = solve_ivp(fun, (t[0], t[-1]), x0, t_eval=t, method="DOP853", rtol=1e-11, atol=1e-11)
    assert sol.success
    return sol.y.T


def lorenz_runs(*, noise=0.0, seed=0, n_runs=3, duration=10.0, dt=0.002):
    """Runs of the forced Lorenz system from different initial states, columns t, x, y, z, u."""
    rng = np.random.default_rng(seed)
    t = np.arange(0.0, duration, dt)
    frames = []
    for k in range(n_runs):
        x0 = [-8.0 + 4 * k, 7.0 - 3 * k, 27.0 + k]
        states = simulate_true(lorenz_with_input, x0, t)
        states = states + noise * states.std(axis=0) * rng.standard_normal(states.shape)
        frames.append(pd.DataFrame({"t": t, "x": states[:, 0], "y": states[:, 1],
                                    "z": states[:, 2], "u": lorenz_input(t)}))
    return frames


def rlc_runs(*, n_runs=2, duration=0.5, dt=1e-4):
    t = np.arange(0.0, duration, dt)
    frames = []
    for k in range(n_runs):
        states = simulate_true(rlc, [k * 2.0, -0.1 * k], t)
        frames.append(pd.DataFrame({"t": t, "v": states[:, 0], "i": states[:, 1], "vin": rlc_input(t)}))
    return frames


def write_runs(folder, frames, prefix="run"):
    """Write frames as CSV files run_0.csv, run_1.csv, ... in ``folder``; return the glob."""
    folder.mkdir(parents=True, exist_ok=True)
    for k, frame in enumerate(frames):
        frame.to_csv(folder / f"{prefix}_{k}.csv", index=False, float_format="%.12g")
    return str(folder / f"{prefix}_*.csv")


def coefficient_map(model):
    """{state: {term_key: coefficient}} of a model, for comparison with the truths above."""
    from discover.terms import term_key

    return {state: {term_key(expr): c for expr, c, _ in kept} for state, kept in model.equations()}


def truth_map(truth):
    from discover.terms import term_key

    return {state: {term_key(expr): c for expr, c in terms.items()} for state, terms in truth.items()}


# A lightly damped hardening (Duffing-type) oscillator of our own, force input:
# dx/dt = v, dv/dt = -4 x - x**3 - 0.1 v + u (a mass-spring-damper with a cubic spring;
# common practice). The damping is small: its share of dv/dt is about 2 %.
OSCILLATOR_TRUTH = {"x": {"v": 1.0}, "v": {"x": -4.0, "x**3": -1.0, "v": -0.1, "u": 1.0}}


def oscillator_input(k):
    """A multisine of five tones between 0.1 and 0.8 Hz, its phases and tones drawn per run."""
    rng = np.random.default_rng(100 + k)
    f, p = rng.uniform(0.1, 0.8, 5), rng.uniform(0.0, 2 * np.pi, 5)
    return lambda t: 0.5 * np.sum(np.sin(2 * np.pi * f[:, None] * np.atleast_1d(t)[None] + p[:, None]), axis=0)


def oscillator_runs(*, noise, seed, n_runs=4, duration=40.0, dt=0.02, damping=0.1):
    """Runs of the oscillator (columns t, x, v, u), Gaussian noise of ``noise`` x each state's std."""
    rng = np.random.default_rng(seed)
    t = np.arange(0.0, duration, dt)
    frames = []
    for k in range(n_runs):
        u = oscillator_input(k)

        def rhs(s, state, u=u):
            return [state[1], -4.0 * state[0] - state[0] ** 3 - damping * state[1] + u(s)[0]]

        states = simulate_true(rhs, [0.5 * k, 0.0], t)
        states = states + noise * states.std(axis=0) * rng.standard_normal(states.shape)
        frames.append(pd.DataFrame({"t": t, "x": states[:, 0], "v": states[:, 1], "u": u(t)}))
    return frames


# The forced Van der Pol oscillator (van der Pol 1926, Phil. Mag. 2(11): x'' - mu (1 - x**2) x' + x = 0)
# with mu = 1, the textbook value (common practice), and a force input u of our own:
# dx/dt = v, dv/dt = -x + mu v - mu x**2 v + u.
VDP_MU = 1.0
VAN_DER_POL_TRUTH = {"x": {"v": 1.0}, "v": {"x": -1.0, "v": VDP_MU, "x**2*v": -VDP_MU, "u": 1.0}}


def van_der_pol_input(k):
    """A multisine of four tones between 0.05 and 0.4 Hz, its phases and tones drawn per run."""
    rng = np.random.default_rng(200 + k)
    f, p = rng.uniform(0.05, 0.4, 4), rng.uniform(0.0, 2 * np.pi, 4)
    return lambda t: 0.5 * np.sum(np.sin(2 * np.pi * f[:, None] * np.atleast_1d(t)[None] + p[:, None]), axis=0)


def van_der_pol_runs(*, noise, seed, n_runs=3, duration=40.0, dt=0.02):
    """Runs of the forced Van der Pol oscillator (columns t, x, v, u), Gaussian noise of ``noise`` x each state's std."""
    rng = np.random.default_rng(seed)
    t = np.arange(0.0, duration, dt)
    frames = []
    for k in range(n_runs):
        u = van_der_pol_input(k)

        def rhs(s, state, u=u):
            return [state[1], VDP_MU * (1.0 - state[0] ** 2) * state[1] - state[0] + u(s)[0]]

        states = simulate_true(rhs, [2.0 - k, 0.0], t)
        states = states + noise * states.std(axis=0) * rng.standard_normal(states.shape)
        frames.append(pd.DataFrame({"t": t, "x": states[:, 0], "v": states[:, 1], "u": u(t)}))
    return frames
