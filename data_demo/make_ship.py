"""Generate the ship-steering demo runs in ``data_demo/ship/``.

The scenario is invented for demos: a ship of our own, not any real vessel.
Its yaw dynamics are the first-order Nomoto model with Norrbin's cubic yaw
damping, in degrees and seconds::

    d(heading)/dt  = yaw_rate
    d(yaw_rate)/dt = -(1/T)*yaw_rate - (a/T)*yaw_rate**3 + (K/T)*rudder

with T = 20 s, K = 0.1 1/s and a = 0.125 s**2/deg**2, so that
``d(yaw_rate)/dt = -0.05*yaw_rate - 0.00625*yaw_rate**3 + 0.005*rudder``.

The rudder is driven by a steering gear that turns it at no more than
``MAX_RUDDER_RATE`` towards the commanded angle, so the recorded rudder angle
is continuous while the command jumps. The command is updated at every
integration step (a 100 Hz steering controller) and held in between.

Integration
-----------
A fixed-step classical Runge-Kutta scheme (RK4) with ``INTEGRATION_STEP`` =
0.01 s, i.e. 1/2000 of the yaw time constant. A fixed step is used rather
than ``scipy.integrate.solve_ivp`` because the zig-zag command is a feedback
law on the heading that must be evaluated as the run unfolds. Within one step
the command is constant, so the rate-limited rudder angle is known exactly at
every Runge-Kutta stage: ``rudder(s) = rudder_0 + clip(command - rudder_0,
-rate*s, rate*s)``. The simulated runs are then sampled every
``SAMPLE_INTERVAL`` and Gaussian measurement noise of ``NOISE_FRACTION``
times each column's standard deviation is added.

Runs
----
``zigzag_20.csv``, ``zigzag_10.csv``
    20/20 and 10/10 zig-zag manoeuvres: the command is +-A deg and switches
    sign when the heading passes +-A deg from the initial course.
``steps_a.csv``, ``steps_b.csv``
    Random command steps, uniform in [-25, 25] deg, held for 15-60 s.
``heldout_sine.csv``
    Held-out run with a different input: a sine sweep of the command,
    amplitude 15 deg, frequency rising linearly from 0.005 to 0.05 Hz. Above
    about 0.024 Hz the steering gear's rate limit flattens the rudder sine.

Run ``python data_demo/make_ship.py`` to regenerate the files; every random
draw takes a fixed seed, so the output is the same byte for byte.
"""

from pathlib import Path

import numpy as np
import pandas as pd
from scipy.signal import chirp

try:  # run as a script (python data_demo/make_*.py) or imported as data_demo.make_*
    from demo_noise import FLOAT_FORMAT, add_measurement_noise, check_rounding_below_noise
except ImportError:
    from data_demo.demo_noise import FLOAT_FORMAT, add_measurement_noise, check_rounding_below_noise

OUTPUT_DIR = Path(__file__).resolve().parent / "ship"

TIME_CONSTANT = 20.0  # T in s
GAIN = 0.1  # K in 1/s
NORRBIN_COEFFICIENT = 0.125  # a in s**2/deg**2

# True right-hand sides, keyed by state, then by term expression in Python
# syntax over the column names; coefficients are in degrees and seconds.
TRUE_COEFFICIENTS = {
    "heading": {"yaw_rate": 1.0},
    "yaw_rate": {
        "yaw_rate": -1.0 / TIME_CONSTANT,
        "yaw_rate**3": -NORRBIN_COEFFICIENT / TIME_CONSTANT,
        "rudder": GAIN / TIME_CONSTANT,
    },
}

# Maximum rudder rate of the steering gear in deg/s: a common steering-gear
# figure (common practice). It equals 35 deg on one side to 30 deg on the
# other in 28 s, the SOLAS main steering gear requirement (from memory).
MAX_RUDDER_RATE = 2.3

DURATION = 600.0  # s, every run
SAMPLE_INTERVAL = 0.5  # s, recorded sampling
INTEGRATION_STEP = 0.01  # s, RK4 step; divides SAMPLE_INTERVAL exactly
COLUMNS = ["t", "heading", "yaw_rate", "rudder"]


def yaw_acceleration(yaw_rate, rudder):
    """Right-hand side of the yaw-rate equation, in deg/s**2."""
    return (
        -yaw_rate - NORRBIN_COEFFICIENT * yaw_rate**3 + GAIN * rudder
    ) / TIME_CONSTANT


def rate_limited_rudder(rudder_start, command, elapsed):
    """Rudder angle ``elapsed`` seconds after ``rudder_start`` under a fixed command.

    The steering gear turns the rudder towards the command at
    ``MAX_RUDDER_RATE`` and stops on reaching it.
    """
    max_travel = MAX_RUDDER_RATE * elapsed
    return rudder_start + min(max(command - rudder_start, -max_travel), max_travel)


def rk4_step(heading, yaw_rate, rudder, command, step):
    """Advance heading, yaw rate and rudder by one RK4 step of length ``step``.

    Returns
    -------
    heading, yaw_rate, rudder : float
        The values at the end of the step.
    """
    rudder_mid = rate_limited_rudder(rudder, command, 0.5 * step)
    rudder_end = rate_limited_rudder(rudder, command, step)
    k1_heading = yaw_rate
    k1_yaw = yaw_acceleration(yaw_rate, rudder)
    k2_heading = yaw_rate + 0.5 * step * k1_yaw
    k2_yaw = yaw_acceleration(k2_heading, rudder_mid)
    k3_heading = yaw_rate + 0.5 * step * k2_yaw
    k3_yaw = yaw_acceleration(k3_heading, rudder_mid)
    k4_heading = yaw_rate + step * k3_yaw
    k4_yaw = yaw_acceleration(k4_heading, rudder_end)
    heading += step * (k1_heading + 2.0 * k2_heading + 2.0 * k3_heading + k4_heading) / 6.0
    yaw_rate += step * (k1_yaw + 2.0 * k2_yaw + 2.0 * k3_yaw + k4_yaw) / 6.0
    return heading, yaw_rate, rudder_end


def simulate_run(command_law, *, initial_heading=0.0, duration=DURATION):
    """Simulate the true ship under a rudder command law and sample it.

    Parameters
    ----------
    command_law : callable
        ``command_law(t, heading, previous_command) -> command`` in degrees,
        called at the start of every integration step.
    initial_heading : float, default=0.0
        Heading at t = 0 in degrees; yaw rate and rudder start at 0.
    duration : float, default=DURATION
        Length of the run in seconds.

    Returns
    -------
    ndarray of shape (n_samples, 4)
        Columns ``t, heading, yaw_rate, rudder`` without noise.
    """
    steps_per_sample = round(SAMPLE_INTERVAL / INTEGRATION_STEP)
    n_samples = round(duration / SAMPLE_INTERVAL) + 1
    samples = np.empty((n_samples, 4))
    heading, yaw_rate, rudder, command = initial_heading, 0.0, 0.0, 0.0
    samples[0] = 0.0, heading, yaw_rate, rudder
    for i_sample in range(1, n_samples):
        for i_step in range(steps_per_sample):
            # Integer step counts keep t free of accumulated rounding.
            t = ((i_sample - 1) * steps_per_sample + i_step) * INTEGRATION_STEP
            command = command_law(t, heading, command)
            heading, yaw_rate, rudder = rk4_step(
                heading, yaw_rate, rudder, command, INTEGRATION_STEP
            )
        samples[i_sample] = i_sample * SAMPLE_INTERVAL, heading, yaw_rate, rudder
    return samples


def zigzag_law(rudder_amplitude, heading_amplitude, initial_heading=0.0):
    """Command law of a zig-zag manoeuvre, starting with positive rudder.

    The command flips to the opposite sign once the heading has passed
    ``heading_amplitude`` degrees from the initial course in the direction
    of the current turn.
    """

    def command_law(t, heading, previous_command):
        deviation = heading - initial_heading
        if previous_command == 0.0:  # first call: start the first turn
            return rudder_amplitude
        if previous_command > 0.0 and deviation >= heading_amplitude:
            return -rudder_amplitude
        if previous_command < 0.0 and deviation <= -heading_amplitude:
            return rudder_amplitude
        return previous_command

    return command_law


def random_steps_law(rng, *, max_angle=25.0, min_hold=15.0, max_hold=60.0, duration=DURATION):
    """Open-loop command law of random steps.

    Levels are uniform in [-max_angle, max_angle] deg, each held for a time
    uniform in [min_hold, max_hold] s.
    """
    switch_times = [0.0]
    while switch_times[-1] < duration:
        switch_times.append(switch_times[-1] + rng.uniform(min_hold, max_hold))
    switch_times = np.array(switch_times)
    levels = rng.uniform(-max_angle, max_angle, size=switch_times.size)

    def command_law(t, heading, previous_command):
        return float(levels[np.searchsorted(switch_times, t, side="right") - 1])

    return command_law


def sine_sweep_law(*, amplitude=15.0, start_frequency=0.005, end_frequency=0.05, duration=DURATION):
    """Open-loop command law of a linear sine sweep starting at zero command."""

    def command_law(t, heading, previous_command):
        # phi=-90 turns chirp's cosine into a sine, so the command starts at 0.
        return amplitude * float(
            chirp(t, f0=start_frequency, t1=duration, f1=end_frequency, method="linear", phi=-90.0)
        )

    return command_law


# name -> (seed, initial heading in deg, factory of the command law from an rng)
RUNS = {
    "zigzag_20": (101, 0.0, lambda rng: zigzag_law(20.0, 20.0)),
    "zigzag_10": (102, 0.0, lambda rng: zigzag_law(10.0, 10.0)),
    "steps_a": (103, 3.0, random_steps_law),
    "steps_b": (104, -2.0, random_steps_law),
    "heldout_sine": (105, 0.0, lambda rng: sine_sweep_law()),
}


def main():
    """Simulate every run in ``RUNS`` and write it to ``OUTPUT_DIR``."""
    OUTPUT_DIR.mkdir(exist_ok=True)
    for name, (seed, initial_heading, make_law) in RUNS.items():
        rng = np.random.default_rng(seed)
        samples = simulate_run(make_law(rng), initial_heading=initial_heading)
        noisy, noise_std = add_measurement_noise(samples, rng)
        check_rounding_below_noise(noisy, noise_std, name)
        frame = pd.DataFrame(noisy, columns=COLUMNS)
        frame.to_csv(OUTPUT_DIR / f"{name}.csv", index=False, float_format=FLOAT_FORMAT)


if __name__ == "__main__":
    main()
