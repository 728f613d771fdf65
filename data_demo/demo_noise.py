"""Measurement noise and CSV precision shared by the demo generators."""

import numpy as np

NOISE_FRACTION = 0.015  # noise std as a fraction of each column's std
FLOAT_FORMAT = "%.6g"


def add_measurement_noise(samples, rng):
    """Add Gaussian noise of ``NOISE_FRACTION`` x column std to every column but t."""
    noisy = samples.copy()
    noise_std = NOISE_FRACTION * samples[:, 1:].std(axis=0)
    noisy[:, 1:] += rng.standard_normal(samples[:, 1:].shape) * noise_std
    return noisy, noise_std


def check_rounding_below_noise(noisy, noise_std, name):
    """Raise if writing with ``FLOAT_FORMAT`` would round by more than 1 % of the noise."""
    # "%.6g" keeps 6 significant digits: rounding error <= 5e-6 * |value|.
    rounding = 5e-6 * np.abs(noisy[:, 1:]).max(axis=0)
    if np.any(rounding > 0.01 * noise_std):
        raise RuntimeError(
            f"{name}: {FLOAT_FORMAT} rounds by up to {rounding} which is not below 1 % of "
            f"the noise std {noise_std}; use more significant digits."
        )
