"""Generate the two-tank demo runs in ``data_demo/tanks/``.

The scenario is invented for demos: a laboratory rig of our own. A pump fills
the upper tank; water drains from it through an orifice into the lower tank,
which drains through a second orifice. Only the lower tank's level is logged;
the upper level is a state nobody measured. Levels in cm, time in s, the pump
command in V. Torricelli's law gives the outflow of an orifice of area a under
a head h as a·sqrt(2 g h) (common practice), so with tank cross-sections A::

    d(level_upper)/dt = (PUMP_GAIN/A)*pump - (a1*sqrt(2 g)/A)*sqrt(level_upper)
    d(level_lower)/dt = (a1*sqrt(2 g)/A)*sqrt(level_upper) - (a2*sqrt(2 g)/A)*sqrt(level_lower)

with A = 50 cm² (both tanks), a1 = 0.2 cm², a2 = 0.25 cm², g = 981 cm/s² and
a pump delivering 10 cm³/s per V. The pump coefficient 0.2 cm/(s V) is what a
bench calibration gives (flow per volt over the tank area), so the demo config
treats it as known; that also sets the scale of the unmeasured level.

The pump command is a sequence of random steps in [2, 8] V, each held for
40–200 s, and is logged exactly (it is a command, not a measurement). The
lower level carries Gaussian noise of ``NOISE_FRACTION`` times its standard
deviation in the run (``demo_noise``). Truth: ``scipy.integrate.solve_ivp``
(DOP853, rtol 1e-10) from one pump step to the next, sampled every
``SAMPLE_INTERVAL``; :func:`true_levels` gives the noise-free trajectories
again, for tests.

Run ``python data_demo/make_tanks.py`` to regenerate the files; every random
draw takes a fixed seed, so the output is the same byte for byte.
"""

from pathlib import Path

import numpy as np
import pandas as pd
from scipy.integrate import solve_ivp

try:  # run as a script (python data_demo/make_*.py) or imported as data_demo.make_*
    from demo_noise import FLOAT_FORMAT, NOISE_FRACTION, check_rounding_below_noise
except ImportError:
    from data_demo.demo_noise import FLOAT_FORMAT, NOISE_FRACTION, check_rounding_below_noise

OUTPUT_DIR = Path(__file__).resolve().parent / "tanks"

AREA = 50.0  # cm², cross-section of each tank
UPPER_ORIFICE = 0.2  # cm²
LOWER_ORIFICE = 0.25  # cm²
GRAVITY = 981.0  # cm/s²
PUMP_FLOW = 10.0  # cm³/s per V

PUMP_COEFFICIENT = PUMP_FLOW / AREA
UPPER_DRAIN = UPPER_ORIFICE * np.sqrt(2.0 * GRAVITY) / AREA
LOWER_DRAIN = LOWER_ORIFICE * np.sqrt(2.0 * GRAVITY) / AREA

# True right-hand sides, keyed by state, then by term expression over the column names.
TRUE_COEFFICIENTS = {
    "level_upper": {"pump": PUMP_COEFFICIENT, "sqrt(level_upper)": -UPPER_DRAIN},
    "level_lower": {"sqrt(level_upper)": UPPER_DRAIN, "sqrt(level_lower)": -LOWER_DRAIN},
}

SAMPLE_INTERVAL = 2.0  # s
DURATION = 1600.0  # s
COLUMNS = ["t", "pump", "level_lower"]

# name -> (seed, initial upper level, initial lower level), levels in cm
RUNS = {
    "steps_a": (201, 10.0, 5.0),
    "steps_b": (202, 45.0, 30.0),
    "steps_c": (203, 25.0, 40.0),
    "heldout": (204, 60.0, 12.0),
}


def rates(t, levels, pump):
    """Right-hand side of the true model; levels clipped at 0 (an empty tank does not drain)."""
    upper, lower = np.maximum(levels, 0.0)
    return [PUMP_COEFFICIENT * pump - UPPER_DRAIN * np.sqrt(upper),
            UPPER_DRAIN * np.sqrt(upper) - LOWER_DRAIN * np.sqrt(lower)]


def pump_command(rng, t):
    """Random steps in [2, 8] V (three decimals) held 40–200 s, switching on sample times."""
    command = np.empty(len(t))
    start = 0
    while start < len(t):
        hold = int(round(rng.uniform(40.0, 200.0) / SAMPLE_INTERVAL))
        command[start:start + hold] = round(rng.uniform(2.0, 8.0), 3)  # as logged
        start += hold
    return command


def true_levels(name):
    """(t, pump, levels of shape (n_samples, 2): upper, lower) of run ``name``, noise-free."""
    seed, upper0, lower0 = RUNS[name]
    rng = np.random.default_rng(seed)
    t = np.arange(round(DURATION / SAMPLE_INTERVAL) + 1) * SAMPLE_INTERVAL
    pump = pump_command(rng, t)
    levels = np.empty((len(t), 2))
    levels[0] = upper0, lower0
    for k in range(len(t) - 1):  # the pump holds its value over each sample interval
        sol = solve_ivp(rates, (t[k], t[k + 1]), levels[k], args=(pump[k],), method="DOP853",
                        rtol=1e-10, atol=1e-10)
        levels[k + 1] = sol.y[:, -1]
    return t, pump, levels, rng


def main():
    """Simulate every run in ``RUNS`` and write it to ``OUTPUT_DIR``."""
    OUTPUT_DIR.mkdir(exist_ok=True)
    for name in RUNS:
        t, pump, levels, rng = true_levels(name)
        lower = levels[:, 1]
        noise_std = NOISE_FRACTION * lower.std()
        noisy = lower + noise_std * rng.standard_normal(len(t))
        samples = np.column_stack([t, pump, noisy])
        check_rounding_below_noise(samples[:, [0, 2]], np.array([noise_std]), name)
        frame = pd.DataFrame(samples, columns=COLUMNS)
        frame.to_csv(OUTPUT_DIR / f"{name}.csv", index=False, float_format=FLOAT_FORMAT)


if __name__ == "__main__":
    main()
