"""The Savitzky–Golay window chosen from the data, when ``[derivatives].window`` is unset.

A fixed window suits one noise level only: too narrow at 5 % noise (the derivative is
mostly noise), too wide at 0.1 % (the window flattens the peaks and leaves a systematic
error that spurious terms then fit). Here the window is chosen by generalized
cross-validation (Craven & Wahba 1979, Numer. Math. 31): the Savitzky–Golay smoother is a
linear smoother ``x̂ = H x`` whose interior diagonal is the filter's centre coefficient
``h₀``, so

    GCV(w) = mean((x − x̂)²) / (1 − h₀(w))²,

evaluated on the interior samples, minimised over odd windows, and used as it is for both
the smoothed states (the library) and their derivative (the target).

Why not wider: the window with the least *derivative* error is about 1.4× the GCV
window (a factor that local polynomial theory says depends on the polynomial order only;
Fan & Gijbels 1996, §3.2, from memory), but the regression averages the derivative's
noise over thousands of samples while the smoothing bias (peaks flattened) is the same in
every sample, so the coefficients want less smoothing than the derivative alone would.
``benchmarks/derivative_window.py`` measured both (2026-12-02): against the true
structure's coefficients, the 1.4× window was worse than the GCV window at 0.1–5 % noise on
a Duffing-type oscillator and on Lorenz. Over both systems and 0.1–10 % noise the GCV
window's largest coefficient error was at most 5× that of the best of the windows tried
(Lorenz at 10 % noise wants a wider one), the former fixed window of 11 samples up to 12×
(Lorenz at 10 %); on the oscillator the fixed window was better by up to 2.6×.

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
    """One odd window (the median GCV window) from the states of the training runs.

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
    window = min(_odd(float(np.median(gcv))), largest)
    return max(window, _odd(order + 2)), gcv


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
    note = (f"Savitzky–Golay window {window} chosen from the data (the median GCV window over states and "
            f"training runs, from {min(gcv)} to {max(gcv)}); set [derivatives].window to fix it.")
    return replace(derivatives, options=options), note
