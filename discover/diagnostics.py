"""Validation diagnostics: residual correlation tests, input excitation, training coverage.

Kernels on plain arrays plus names; every result is a frozen dataclass.

* **Residual analysis** (:mod:`discover.residuals`; Ljung, *System Identification:
  Theory for the User*, 2nd ed. 1999, ch. 16): sample autocorrelation of each
  state's residual for lags 1..M, its cross-correlation with each input for lags
  −M..M, bounds ±z/√N, the Ljung–Box whiteness statistic (Ljung & Box 1978,
  Biometrika 65) and a joint test of the cross-correlations at lags 0..M, and a
  plain-language verdict per state.
* **Excitation** (:mod:`discover.excitation`): per input, the frequency band holding
  a given share of its power (Welch periodogram, ``scipy.signal.welch``) and its
  order of persistent excitation (Ljung 1999, sec. 13.2).
* **Coverage** (:mod:`discover.coverage`): the training range of every state and
  input, and a check of a held-out run against it (extrapolation).

This module gathers their warnings into the summary's lines
(:func:`diagnostic_warnings`); every public name of the three imports from here.
"""

from __future__ import annotations

from .coverage import (EXTRAPOLATION, EXTRAPOLATION_CONSTANT, Extrapolation, TrainingRange, check_extrapolation,
                       training_range)
from .excitation import (InputExcitation, excitation_order, excitation_shortfall, input_excitation,
                         on_uniform_grid, spectral_band)
from .residuals import (CONSTANT_RESIDUAL, CORRELATED, CORRELATED_JOINT, MAX_DEFAULT_LAG, NOT_WHITE, NOT_WHITE_CAVEAT,
                        PASSES, PASSES_NO_INPUTS, ResidualAnalysis, default_max_lag, lag_ranges, ljung_box, p_text,
                        residual_analysis)

__all__ = [
    "diagnostic_warnings", "CONSTANT_INPUT", "FEW_EXCITATION",
    # residuals
    "ResidualAnalysis", "residual_analysis", "ljung_box", "default_max_lag", "lag_ranges", "p_text",
    "MAX_DEFAULT_LAG", "CORRELATED", "CORRELATED_JOINT", "NOT_WHITE", "NOT_WHITE_CAVEAT", "PASSES",
    "PASSES_NO_INPUTS", "CONSTANT_RESIDUAL",
    # excitation
    "InputExcitation", "input_excitation", "excitation_order", "excitation_shortfall", "on_uniform_grid",
    "spectral_band",
    # coverage
    "TrainingRange", "training_range", "Extrapolation", "check_extrapolation", "EXTRAPOLATION",
    "EXTRAPOLATION_CONSTANT",
]


CONSTANT_INPUT = "input {input} is constant in the training runs: no term in {input} can be identified"
FEW_EXCITATION = ("input {input} is persistently exciting of order {order} only, but {count} library terms "
                  "involve it: the runs may not pin down their coefficients; add runs that excite {input} "
                  "at more frequencies or levels")


# --- summary -----------------------------------------------------------------------------


def diagnostic_warnings(*, residuals=None, excitation=None, extrapolations=(), term_counts=None):
    """The warning lines for the summary, each naming its state, input or run.

    Parameters
    ----------
    residuals : ResidualAnalysis, optional
        Contributes every finding that is not a pass.
    excitation : InputExcitation, optional
        Contributes constant inputs, and with ``term_counts`` inputs short of excitation.
    extrapolations : sequence of Extrapolation
    term_counts : mapping of str to int, optional
        Library terms per input (see ``excitation_shortfall``).

    Returns
    -------
    tuple of str
    """
    lines = list(residuals.failures) if residuals is not None else []
    if excitation is not None:
        lines += [CONSTANT_INPUT.format(input=name) for name in excitation.constant]
        if term_counts:
            lines += [FEW_EXCITATION.format(input=name, order=order, count=count)
                      for name, (order, count) in excitation_shortfall(excitation, term_counts).items()
                      if name not in excitation.constant]
    for check in extrapolations:
        lines += check.messages
    return tuple(lines)
