"""The Savitzky–Golay window chosen from the data, when ``[derivatives].window`` is unset.

A fixed window suits one noise level only: too narrow at 5 % noise (the derivative is
mostly noise), too wide at 0.1 % (the window flattens the peaks and leaves a systematic
error that spurious terms then fit). Here the window is chosen by generalized
cross-validation (Craven & Wahba 1979, Numer. Math. 31): the Savitzky–Golay smoother is a
linear smoother ``x̂ = H x`` whose interior diagonal is the filter's centre coefficient
``h₀``, so

    GCV(w) = mean((x − x̂)²) / (1 − h₀(w))²,

evaluated on the interior samples, minimised over odd windows. GCV targets the smoothed
states; the derivative's mean-squared-error-optimal window is wider by a factor that, in
local polynomial theory, depends on the polynomial order and not on the noise or the
number of samples (both bandwidths scale as n^(−1/(2p+3)); Fan & Gijbels 1996, Local
Polynomial Modelling, §3.2, from memory). :data:`DERIVATIVE_FACTOR` is that factor as we
measured it against true derivatives (``benchmarks/derivative_window.py``).

One window serves every state and run of a config (the median over states and training
runs, each from its first :data:`GCV_ROWS` samples), so that training and held-out runs,
in-memory and chunked reading, and later ``discover rank``/``simulate`` calls smooth alike;
the chosen window is written into the effective config of the output folder.
"""

from __future__ import annotations

from dataclasses import replace
from types import MappingProxyType

import numpy as np

#: Samples of each run the window is chosen from (bounded work on long runs).
GCV_ROWS = 20_000
#: Derivative window / GCV smoothing window: the median oracle/GCV ratio measured by
#: benchmarks/derivative_window.py was 1.43 (2026-12-02; oscillator and Lorenz, 0.1–10 % noise).
DERIVATIVE_FACTOR = 1.4
#: Widest window considered; a run must hold at least four windows.
LARGEST_WINDOW = 151


def _odd(value):
    value = int(round(value))
    return value if value % 2 else value + 1


def gcv_window(x, order, largest):
    """The odd window in ``(order + 1, largest]`` with the least GCV score for one signal ``x``."""
    from scipy.signal import savgol_coeffs, savgol_filter

    n = len(x)
    best_score, best = np.inf, None
    for window in range(_odd(order + 2), largest + 1, 2):
        centre = savgol_coeffs(window, order)[window // 2]
        interior = slice(window // 2, n - window // 2)
        smooth = savgol_filter(x, window, order, mode="interp")
        score = np.mean((x[interior] - smooth[interior]) ** 2) / (1.0 - centre) ** 2
        if score < best_score:
            best_score, best = score, window
    return best


def automatic_window(runs_x, order):
    """One odd window for the derivative, from the states of the training runs.

    Parameters
    ----------
    runs_x : sequence of ndarray of shape (n_samples, n_states)
        The measured states of each training run (their first :data:`GCV_ROWS` rows are used).
    order : int
        The Savitzky–Golay polynomial order.

    Returns
    -------
    window : int
    gcv : list of int
        The GCV smoothing window of each (run, state), for the record.
    """
    shortest = min(min(len(x), GCV_ROWS) for x in runs_x)
    largest = max(_odd(order + 2), min(LARGEST_WINDOW, _odd(shortest // 4) - 2))
    gcv = [gcv_window(np.asarray(x[:GCV_ROWS, j], dtype=np.float64), order, largest)
           for x in runs_x for j in range(x.shape[1])]
    window = min(_odd(DERIVATIVE_FACTOR * float(np.median(gcv))), largest)
    return max(window, _odd(order + 2)), gcv


def training_states(training, data):
    """The states of every training run, at most :data:`GCV_ROWS` rows each; runs read in
    chunks (``[data].chunk_rows``) contribute their first rows only."""
    if not data.chunk_rows:
        return [run.x for run in training.runs]
    from .stream import checked_chunks

    states = []
    for run in training.runs:
        chunks = checked_chunks(run.source, time=data.time, states=data.states, inputs=data.inputs,
                                rename=data.rename, chunk_rows=GCV_ROWS)
        states.append(next(chunks)[1])
        chunks.close()
    return states


def resolve_window(derivatives, states):
    """``[derivatives]`` with the window filled in where it was left to the data.

    ``states`` is a callable returning the training runs' states (called only when a
    window is to be chosen). Returns the settings unchanged (and ``None``) for other
    methods or a window set in the config; else the settings with the chosen window and
    a sentence for the record.
    """
    if derivatives.method != "savitzky_golay" or derivatives.options.get("window") is not None:
        return derivatives, None
    order = int(derivatives.options.get("order", 3))
    window, gcv = automatic_window(states(), order)
    options = MappingProxyType({**derivatives.options, "window": window})
    note = (f"Savitzky–Golay window {window} chosen from the data ({DERIVATIVE_FACTOR:g} × the median GCV "
            f"smoothing window over states and training runs, {int(np.median(gcv))}); set [derivatives].window "
            "to fix it.")
    return replace(derivatives, options=options), note
