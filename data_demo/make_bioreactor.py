"""Generate the photobioreactor demo runs in ``data_demo/bioreactor/``.

The scenario is invented for demos: a photobioreactor of our own whose
parameters are made up, not fitted to any real culture. States are biomass
and nitrate (both g/L); inputs are light (umol/m**2/s) and dilution (1/h);
time is in hours::

    d(biomass)/dt = a*light*nitrate*biomass - dilution*biomass - kd*biomass
    d(nitrate)/dt = -b*light*nitrate*biomass + N_in*dilution - dilution*nitrate

with a = 5e-4, b = 2.5e-4, kd = 0.02 and N_in = 1.5 (nitrate in the feed,
g/L). Growth is first order in light and in nitrate, each gram of nitrate
taken up yields a/b = 2 g of biomass, and the dilution washes both states out
while feeding fresh nitrate.

Inputs
------
Light follows a day/night schedule: 14 h on, 10 h off, with the daytime
intensity drawn for each day uniformly in [50, 300]. Dilution steps between
levels drawn uniformly in [0, 0.08] 1/h, each held for 24-72 h. Every change of
either input is a raised-cosine ramp, so both inputs are continuous (and once
differentiable) functions of time: dilution changes take ``DILUTION_RAMP`` =
0.5 h, while light dims up and down over ``LIGHT_RAMP`` = 2 h (dawn and dusk).
The light ramps are the longer ones because light switches twice a day and
each switch kinks the growth rate; over a 0.5 h ramp, one sample interval,
finite-difference derivatives of the sampled states are biased by several
per cent around every switch, enough to mask the small decay term.

Runs
----
``train_1.csv`` ... ``train_4.csv``
    300 h each, different seeds and initial conditions (biomass uniform in
    [0.3, 1.5], nitrate uniform in [0.1, 1.9]: wide, so that biomass + 2·nitrate
    starts off its balance and the dilution terms are not collinear).
``heldout.csv``
    Held-out run with a different input pattern: continuous light following a
    24 h sine between 50 and 300, and dilution pulses of 0.05 1/h for 8 h every
    60 h on a base of 0.01 1/h.

Integration
-----------
``scipy.integrate.solve_ivp`` with the DOP853 method, ``rtol=1e-10``,
``atol=1e-12`` and ``max_step`` = 0.1 h so no input ramp is stepped over, the
inputs being evaluated as continuous functions of t. The solution is sampled
every ``SAMPLE_INTERVAL`` = 0.5 h and Gaussian measurement noise of
``NOISE_FRACTION`` times each column's standard deviation is added to all four
columns, inputs included; a noisy reading of an input that is zero (light at
night, no dilution) may therefore be slightly negative.

Run ``python data_demo/make_bioreactor.py`` to regenerate the files; every
random draw takes a fixed seed, so the output is the same byte for byte.
"""

from pathlib import Path

import numpy as np
import pandas as pd
from scipy.integrate import solve_ivp

try:  # run as a script (python data_demo/make_*.py) or imported as data_demo.make_*
    from demo_noise import FLOAT_FORMAT, add_measurement_noise, check_rounding_below_noise
except ImportError:
    from data_demo.demo_noise import FLOAT_FORMAT, add_measurement_noise, check_rounding_below_noise

OUTPUT_DIR = Path(__file__).resolve().parent / "bioreactor"

GROWTH_COEFFICIENT = 5e-4  # a in L/(g h) per umol/m**2/s
UPTAKE_COEFFICIENT = 2.5e-4  # b, same units as a
DECAY_RATE = 0.02  # kd in 1/h
FEED_NITRATE = 1.5  # N_in in g/L

# True right-hand sides, keyed by state, then by term expression in Python
# syntax over the column names. Products are written in the factor order
# light, nitrate, biomass, dilution as they appear in the equations above
# ("light*nitrate*biomass", "dilution*biomass"), not sorted states-first;
# compare terms by their set of factors, not by the raw string.
TRUE_COEFFICIENTS = {
    "biomass": {
        "light*nitrate*biomass": GROWTH_COEFFICIENT,
        "dilution*biomass": -1.0,
        "biomass": -DECAY_RATE,
    },
    "nitrate": {
        "light*nitrate*biomass": -UPTAKE_COEFFICIENT,
        "dilution": FEED_NITRATE,
        "dilution*nitrate": -1.0,
    },
}

DURATION = 300.0  # h, every run
SAMPLE_INTERVAL = 0.5  # h
LIGHT_RAMP = 2.0  # h, dawn and dusk
DILUTION_RAMP = 0.5  # h, pump rate change
MAX_STEP = 0.1  # h, solver step cap, well below both ramps
COLUMNS = ["t", "biomass", "nitrate", "light", "dilution"]

HOURS_ON = 14.0  # light period per 24 h day
LIGHT_RANGE = (50.0, 300.0)  # daytime intensity, umol/m**2/s
DILUTION_RANGE = (0.0, 0.08)  # 1/h
DILUTION_HOLD_RANGE = (24.0, 72.0)  # h
BIOMASS_START_RANGE = (0.3, 1.5)  # g/L
NITRATE_START_RANGE = (0.1, 1.9)  # g/L, wide so biomass + 2·nitrate starts off its balance


def smooth_steps(t, change_times, levels, *, ramp):
    """Piecewise-constant signal whose changes are raised-cosine ramps.

    Parameters
    ----------
    t : float or ndarray of shape (n_samples,)
        Times at which to evaluate the signal.
    change_times : ndarray of shape (n_changes,)
        Start times of the ramps, increasing.
    levels : ndarray of shape (n_changes + 1,)
        ``levels[0]`` before the first change, ``levels[k]`` after change ``k``.
    ramp : float
        Length of every ramp.

    Returns
    -------
    float or ndarray of shape (n_samples,)
        The signal, continuous with a continuous first derivative.
    """
    t = np.asarray(t, dtype=float)
    progress = np.clip((t[..., None] - change_times) / ramp, 0.0, 1.0)
    weights = 0.5 * (1.0 - np.cos(np.pi * progress))
    return levels[0] + weights @ np.diff(levels)


def day_night_light(rng, *, duration=DURATION):
    """Light schedule: 14 h on from 06:00 each day, intensity drawn per day.

    Returns
    -------
    callable
        ``light(t)`` in umol/m**2/s with t in hours from midnight of day 0.
    """
    n_days = int(np.ceil(duration / 24.0)) + 1
    intensities = rng.uniform(*LIGHT_RANGE, size=n_days)
    day_starts = 24.0 * np.arange(n_days)
    # Ramps start on at 06:00 and off at 20:00 (06:00 + HOURS_ON).
    change_times = np.column_stack([day_starts + 6.0, day_starts + 6.0 + HOURS_ON]).ravel()
    levels = np.concatenate([[0.0], np.column_stack([intensities, np.zeros(n_days)]).ravel()])
    return lambda t: smooth_steps(t, change_times, levels, ramp=LIGHT_RAMP)


def random_dilution(rng, *, duration=DURATION):
    """Dilution steps with levels in DILUTION_RANGE held for DILUTION_HOLD_RANGE.

    Returns
    -------
    callable
        ``dilution(t)`` in 1/h.
    """
    change_times = [rng.uniform(*DILUTION_HOLD_RANGE)]
    while change_times[-1] < duration:
        change_times.append(change_times[-1] + rng.uniform(*DILUTION_HOLD_RANGE))
    change_times = np.array(change_times)
    levels = rng.uniform(*DILUTION_RANGE, size=change_times.size + 1)
    return lambda t: smooth_steps(t, change_times, levels, ramp=DILUTION_RAMP)


def heldout_inputs(*, duration=DURATION):
    """Input pattern of the held-out run: sine light and dilution pulses.

    Returns
    -------
    light, dilution : callable
        Functions of t in hours.
    """
    low, high = LIGHT_RANGE
    # Daily sine between low and high, at its minimum at midnight.
    light = lambda t: low + 0.5 * (high - low) * (1.0 - np.cos(2.0 * np.pi * np.asarray(t) / 24.0))
    pulse_starts = np.arange(30.0, duration, 60.0)
    change_times = np.column_stack([pulse_starts, pulse_starts + 8.0]).ravel()
    levels = np.concatenate([[0.01], np.tile([0.05, 0.01], pulse_starts.size)])
    dilution = lambda t: smooth_steps(t, change_times, levels, ramp=DILUTION_RAMP)
    return light, dilution


def reactor_rhs(t, state, light, dilution):
    """Time derivative of ``[biomass, nitrate]`` in g/L/h."""
    biomass, nitrate = state
    light_t, dilution_t = float(light(t)), float(dilution(t))
    growth = light_t * nitrate * biomass
    return [
        GROWTH_COEFFICIENT * growth - dilution_t * biomass - DECAY_RATE * biomass,
        -UPTAKE_COEFFICIENT * growth + FEED_NITRATE * dilution_t - dilution_t * nitrate,
    ]


def simulate_run(initial_state, light, dilution, *, duration=DURATION):
    """Simulate the true reactor and sample it every SAMPLE_INTERVAL.

    Returns
    -------
    ndarray of shape (n_samples, 5)
        Columns ``t, biomass, nitrate, light, dilution`` without noise.
    """
    t = SAMPLE_INTERVAL * np.arange(round(duration / SAMPLE_INTERVAL) + 1)
    solution = solve_ivp(
        reactor_rhs, (0.0, duration), initial_state, method="DOP853", t_eval=t,
        args=(light, dilution), rtol=1e-10, atol=1e-12, max_step=MAX_STEP,
    )
    if not solution.success:
        raise RuntimeError(f"solve_ivp failed: {solution.message}")
    # solve_ivp returns (n_states, n_points); rows are time here.
    return np.column_stack([t, solution.y.T, light(t), dilution(t)])


def check_plausible(samples, name):
    """Raise if a state leaves its physical range or the run sits still."""
    biomass, nitrate = samples[:, 1], samples[:, 2]
    if biomass.min() <= 0.0 or nitrate.min() <= 0.0 or nitrate.max() > FEED_NITRATE + 0.5:
        raise RuntimeError(f"{name}: states out of range, biomass {biomass.min():.3g}.."
                           f"{biomass.max():.3g}, nitrate {nitrate.min():.3g}..{nitrate.max():.3g}")
    # A run at steady state would leave the growth term indistinguishable from a constant.
    if min(biomass.std() / biomass.mean(), nitrate.std() / nitrate.mean()) < 0.1:
        raise RuntimeError(f"{name}: states barely move (coefficient of variation < 0.1)")


TRAINING_SEEDS = {"train_1": 201, "train_2": 202, "train_3": 203, "train_4": 206}
HELDOUT_SEED = 205
HELDOUT_INITIAL_STATE = (0.5, 1.0)  # biomass, nitrate in g/L


def main():
    """Simulate the training and held-out runs and write them to ``OUTPUT_DIR``."""
    OUTPUT_DIR.mkdir(exist_ok=True)
    runs = {}
    for name, seed in TRAINING_SEEDS.items():
        rng = np.random.default_rng(seed)
        initial_state = (rng.uniform(*BIOMASS_START_RANGE), rng.uniform(*NITRATE_START_RANGE))
        runs[name] = rng, initial_state, day_night_light(rng), random_dilution(rng)
    heldout_rng = np.random.default_rng(HELDOUT_SEED)
    runs["heldout"] = heldout_rng, HELDOUT_INITIAL_STATE, *heldout_inputs()
    for name, (rng, initial_state, light, dilution) in runs.items():
        samples = simulate_run(initial_state, light, dilution)
        check_plausible(samples, name)
        noisy, noise_std = add_measurement_noise(samples, rng)
        check_rounding_below_noise(noisy, noise_std, name)
        frame = pd.DataFrame(noisy, columns=COLUMNS)
        frame.to_csv(OUTPUT_DIR / f"{name}.csv", index=False, float_format=FLOAT_FORMAT)


if __name__ == "__main__":
    main()
