"""The derivative stage: smooth and differentiate every run; trim the unreliable ends.

:func:`smooth_runs` takes a :class:`~discover.data.Dataset` and the
``[derivatives]`` settings and returns :class:`SmoothedRuns`, which holds every run
untrimmed (simulations start from the smoothed first sample) together with the
trim it resolved; :attr:`SmoothedRuns.trimmed` gives the runs the regression uses.
"""

from __future__ import annotations

from dataclasses import dataclass
from types import MappingProxyType

import numpy as np

from .derivatives import DERIVATIVE_METHODS, default_trim, min_samples
from .exceptions import DataError


@dataclass(frozen=True)
class Smoothed:
    """One run after the derivative stage.

    Attributes
    ----------
    t : ndarray of shape (n_samples,)
    x : ndarray of shape (n_samples, n_states)
        Smoothed states (the library is built from them).
    x_dot : ndarray of shape (n_samples, n_states)
    u : ndarray of shape (n_samples, n_inputs)
    x_raw : ndarray of shape (n_samples, n_states)
        The states as measured.
    """

    name: str
    t: np.ndarray
    x: np.ndarray
    x_dot: np.ndarray
    u: np.ndarray
    x_raw: np.ndarray

    def without_ends(self, trim):
        """The run without ``trim`` samples at each end, where smoothing is least reliable."""
        keep = slice(trim, len(self.t) - trim)
        return Smoothed(self.name, self.t[keep], self.x[keep], self.x_dot[keep], self.u[keep], self.x_raw[keep])


@dataclass(frozen=True)
class SmoothedRuns:
    """Every run of a dataset, smoothed and differentiated (untrimmed), and the trim to apply."""

    full: tuple
    trim: int
    method: str
    options: MappingProxyType

    @property
    def trimmed(self):
        """The runs without ``trim`` samples at each end (what the regression sees)."""
        return tuple(run.without_ends(self.trim) for run in self.full)

    def scoring_pairs(self):
        """(trimmed run, smoothed states on every sample) per run, for ranking scores."""
        return [(run.without_ends(self.trim), run.x) for run in self.full]

    def noise(self):
        """Per-state std of raw minus smoothed states over the trimmed runs: the noise estimate."""
        residual = np.vstack([run.x_raw - run.x for run in self.trimmed])
        return residual.std(axis=0)


def resolve_trim(derivatives):
    """The trim asked for in ``[derivatives].trim``, else the method's own."""
    if derivatives.trim is not None:
        return derivatives.trim
    return default_trim(derivatives.method, dict(derivatives.options))


def smooth_runs(dataset, derivatives, *, progress=False):
    """Smooth and differentiate every run of ``dataset`` with the ``[derivatives]`` settings.

    Raises
    ------
    DataError
        A run too short for the method and trim, or one the method cannot take
        (e.g. non-uniform time for Savitzky–Golay), named by its file.
    """
    from tqdm.auto import tqdm

    method, options = derivatives.method, dict(derivatives.options)
    trim = resolve_trim(derivatives)
    needed = max(min_samples(method, options), 2 * trim + 3)
    described = "".join(f"{key} = {value!r}, " for key, value in options.items())
    result = []
    for run in tqdm(dataset.runs, desc="derivatives", disable=None if progress else True, leave=False):
        if len(run.t) < needed:
            raise DataError(
                f"{run.source}: {len(run.t)} samples is too few for [derivatives].method = "
                f"{method!r} with {described}trim = {trim} (needs at least {needed}). "
                "Use a smaller window, another method, or drop the run."
            )
        try:
            # Time from the run's start: absolute clock stamps (1.7e9 s) lose the
            # float64 resolution a uniform-step check needs.
            x_smooth, x_dot = DERIVATIVE_METHODS[method](run.t - run.t[0], run.x, **options)
        except DataError as err:
            raise DataError(f"{run.source}: {err}") from None
        result.append(Smoothed(run.name, run.t, x_smooth, x_dot, run.u, run.x))
    return SmoothedRuns(tuple(result), trim, method, MappingProxyType(options))
