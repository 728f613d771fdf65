"""Training coverage, part of :mod:`discover.diagnostics`.

The training range of every state and input, and a check of a held-out run against
it (extrapolation).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .diagnostic_checks import _as_runs
from .exceptions import ConfigError, DataError

EXTRAPOLATION = ("held-out run {run}: {kind} {name} leaves the training range [{low:.4g}, {high:.4g}] by up to "
                 "{excess:.0%} of its width, for {share:.1%} of samples: the model is extrapolating there")
EXTRAPOLATION_CONSTANT = ("held-out run {run}: {kind} {name} was constant ({low:.4g}) in training but takes "
                          "other values for {share:.1%} of samples: the model is extrapolating there")


# --- coverage ----------------------------------------------------------------------------


@dataclass(frozen=True)
class TrainingRange:
    """Extremes of every state and input over the training runs.

    Built by ``training_range``, or directly from exact extremes (``Run.ranges()`` for
    runs read in chunks). Channels are the states, then the inputs.

    Attributes
    ----------
    names : tuple of str
    kinds : tuple of str
        "state" or "input", per channel.
    low, high : ndarray of shape (n_channels,)
    """

    names: tuple
    kinds: tuple
    low: np.ndarray
    high: np.ndarray


def training_range(states, inputs=None, *, state_names, input_names=()):
    """TrainingRange of runs given as lists of arrays of shape (n_samples_r, n_states) and (n_samples_r, n_inputs)."""
    state_names, input_names = tuple(state_names), tuple(input_names)
    x_runs = _as_runs(states, state_names, "states")
    u_runs = [np.empty((len(x), 0)) for x in x_runs] if inputs is None and not input_names else \
        _as_runs(inputs, input_names, "inputs")
    if not x_runs or len(u_runs) != len(x_runs):
        raise DataError(f"training_range needs the same number of state and input runs (at least one). "
                        f"Got {len(x_runs)} and {len(u_runs)}.")
    values = [np.hstack([x, u]) for x, u in zip(x_runs, u_runs)]
    return TrainingRange(names=state_names + input_names,
                         kinds=("state",) * len(state_names) + ("input",) * len(input_names),
                         low=np.min([v.min(axis=0) for v in values], axis=0),
                         high=np.max([v.max(axis=0) for v in values], axis=0))


@dataclass(frozen=True)
class Extrapolation:
    """A held-out run against the training range.

    Attributes
    ----------
    run_name : str
    training : TrainingRange
    excess : ndarray of shape (n_channels,)
        Largest distance beyond the training range as a share of its width (0 inside;
        inf for a channel constant in training that takes another value here).
    share : ndarray of shape (n_channels,)
        Share of samples beyond the range widened by ``margin`` of its width on each side.
    margin : float
    """

    run_name: str
    training: TrainingRange
    excess: np.ndarray
    share: np.ndarray
    margin: float

    @property
    def leaving(self):
        """Names of the channels that leave the (widened) training range."""
        return tuple(name for name, share in zip(self.training.names, self.share) if share > 0)

    @property
    def messages(self):
        """One warning per channel that leaves the range."""
        out, tr = [], self.training
        for k in np.flatnonzero(self.share > 0):
            fields = dict(run=self.run_name, kind=tr.kinds[k], name=tr.names[k], low=tr.low[k], high=tr.high[k],
                          excess=self.excess[k], share=self.share[k])
            out.append((EXTRAPOLATION_CONSTANT if tr.high[k] == tr.low[k] else EXTRAPOLATION).format(**fields))
        return tuple(out)


def check_extrapolation(training, states, inputs=None, *, run_name, margin=0.05):
    """Which channels of a held-out run leave the training range, by how much and how often.

    Parameters
    ----------
    training : TrainingRange
    states : ndarray of shape (n_samples, n_states)
    inputs : ndarray of shape (n_samples, n_inputs), optional
    run_name : str
    margin : float, default=0.05
        Share of the range's width on each side that still counts as inside: measurement
        noise alone takes a run of the same experiment a little past the training extremes.

    Returns
    -------
    Extrapolation
    """
    n_states = training.kinds.count("state")
    state_names, input_names = training.names[:n_states], training.names[n_states:]
    (x,) = _as_runs([states], state_names, "states", [run_name])
    (u,) = [np.empty((len(x), 0))] if inputs is None and not input_names else \
        _as_runs([inputs], input_names, "inputs", [run_name])
    if len(u) != len(x):
        raise DataError(f"run {run_name!r} has {len(x)} state rows but {len(u)} input rows; they must match.")
    if not (isinstance(margin, (float, int)) and 0 <= margin < 1):
        raise ConfigError(f"`margin` must be a number in [0, 1). Got {margin!r}.")
    values = np.hstack([x, u])
    width = training.high - training.low
    beyond = np.maximum(np.maximum(training.low - values, values - training.high), 0.0)
    largest = beyond.max(axis=0, initial=0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        excess = np.where(width > 0, largest / width, np.where(largest > 0, np.inf, 0.0))
    share = np.mean(beyond > margin * width, axis=0) if len(values) else np.zeros(len(width))
    return Extrapolation(run_name=run_name, training=training, excess=excess, share=share, margin=float(margin))
