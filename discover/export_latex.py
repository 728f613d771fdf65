"""Export of a model's equations as LaTeX, and the LaTeX form of names and numbers.

:func:`to_latex` writes an ``align*`` environment from the parsed syntax trees;
:func:`latex_name` and :func:`latex_number` write one column name or one number.
Re-exported by :mod:`discover.export`.
"""

from __future__ import annotations

import ast
import math

import numpy as np

from .exceptions import ModelFileError
from .export_terms import as_model, kept_trees

# Significant digits of LaTeX coefficients: those of the terminal summary
# (``:.4g`` in report.format_equation; tests/test_export.py checks that they agree).
LATEX_DIGITS = 4

_LATEX_SPECIAL = {
    "\\": r"\backslash{}", "{": r"\{", "}": r"\}", "$": r"\$", "&": r"\&", "#": r"\#",
    "_": r"\_", "%": r"\%", "^": r"\hat{}", "~": r"\sim{}",
}
_LATEX_FUNCTIONS = {"sin": r"\sin", "cos": r"\cos", "tan": r"\tan", "exp": r"\exp", "log": r"\ln",
                    "tanh": r"\tanh", "sign": r"\operatorname{sign}"}
# Binding strength, for parentheses: sums < products < unary minus < powers < atoms.
_SUM, _PRODUCT, _UNARY, _POWER, _ATOM = 1, 2, 3, 4, 5


# Greek letters with a LaTeX math command of their own name (LaTeX2e; the capitals
# that differ from Latin letters). There is no \omicron: it is a Latin o, so
# "omicron" stays upright text like any other name.
_GREEK_LETTERS = frozenset((
    "alpha", "beta", "gamma", "delta", "epsilon", "zeta", "eta", "theta", "iota", "kappa", "lambda", "mu",
    "nu", "xi", "pi", "rho", "sigma", "tau", "upsilon", "phi", "chi", "psi", "omega",
    "Gamma", "Delta", "Theta", "Lambda", "Xi", "Pi", "Sigma", "Upsilon", "Phi", "Psi", "Omega",
))


def _upright(text):
    escaped = "".join(_LATEX_SPECIAL.get(ch, ch) for ch in text)
    return rf"\mathrm{{{escaped}}}"


def latex_name(name):
    r"""A column name as a LaTeX math symbol.

    ``theta -> \theta``, ``theta_1 -> \theta_{1}``, ``omega_m -> \omega_{\mathrm{m}}``,
    ``phi_theta -> \phi_{\theta}``: a Greek letter name (see ``_GREEK_LETTERS``),
    alone or with one ``_`` suffix, becomes its command with the suffix as a subscript
    (digits as they are, a Greek name as its command, other text upright). One
    character stays as it is (italic); every other name is upright ``\mathrm{...}``
    with LaTeX's special characters escaped (``yaw_rate -> \mathrm{yaw\_rate}``).
    """
    name = str(name)
    letter, underscore, suffix = name.partition("_")
    if letter in _GREEK_LETTERS and (not underscore or suffix):
        if not underscore:
            return "\\" + letter
        if suffix.isascii() and suffix.isdigit():
            subscript = suffix
        elif suffix in _GREEK_LETTERS:
            subscript = "\\" + suffix
        else:
            subscript = _upright(suffix)
        return rf"\{letter}_{{{subscript}}}"
    if len(name) == 1:
        return _LATEX_SPECIAL.get(name, name)
    return _upright(name)


def latex_number(value, digits=LATEX_DIGITS):
    r"""A number in LaTeX with ``digits`` significant digits.

    ``0.00125 -> '1.25 \times 10^{-3}'``. A value that the digits show exactly keeps
    its short form (``1``, ``0.05``); a rounded one shows all its digits, trailing
    zeros included, so ``1.0004 -> '1.000'`` and ``0.050001 -> '0.05000'``: a
    printed ``1`` always means exactly 1.
    """
    value = float(value)
    if not math.isfinite(value):
        return r"\infty" if value > 0 else (r"-\infty" if value < 0 else r"\mathrm{NaN}")
    text = f"{value:.{digits}g}"
    if float(text) != value:
        # '#' keeps the trailing zeros; with digits=1 it also leaves a bare point ('1.').
        text = f"{value:#.{digits}g}".replace(".e", "e").rstrip(".")
    if "e" in text:
        mantissa, exponent = text.split("e")
        return rf"{mantissa} \times 10^{{{int(exponent)}}}"
    return text


def _latex(node, digits):
    """``(latex, binding)`` of a checked tree."""
    if isinstance(node, ast.Constant):
        return latex_number(node.value, digits), _ATOM if float(node.value) >= 0 else _UNARY
    if isinstance(node, ast.Name):
        return latex_name(node.id), _ATOM
    if isinstance(node, ast.UnaryOp):
        inner = _wrap(*_latex(node.operand, digits), _UNARY)
        return (f"-{inner}" if isinstance(node.op, ast.USub) else inner), _UNARY
    if isinstance(node, ast.BinOp):
        op = type(node.op)
        if op is ast.Div:
            return rf"\frac{{{_latex(node.left, digits)[0]}}}{{{_latex(node.right, digits)[0]}}}", _ATOM
        if op is ast.Pow:
            base = _wrap(*_latex(node.left, digits), _ATOM)
            return f"{base}^{{{_latex(node.right, digits)[0]}}}", _POWER
        if op is ast.Mult:
            left = _wrap(*_latex(node.left, digits), _PRODUCT)
            right = _wrap(*_latex(node.right, digits), _UNARY + 1)
            return rf"{left} \, {right}", _PRODUCT
        left = _latex(node.left, digits)[0]
        right = _wrap(*_latex(node.right, digits), _PRODUCT if op is ast.Sub else _SUM)
        return f"{left} {'-' if op is ast.Sub else '+'} {right}", _SUM
    if isinstance(node, ast.Call):
        argument = _latex(node.args[0], digits)[0]
        if node.func.id == "sqrt":
            return rf"\sqrt{{{argument}}}", _ATOM
        if node.func.id == "abs":
            return rf"\left|{argument}\right|", _ATOM
        return rf"{_LATEX_FUNCTIONS[node.func.id]}\left({argument}\right)", _ATOM
    raise ModelFileError(f"cannot write {ast.unparse(node)!r} as LaTeX: not an allowed construct.")


def _wrap(text, binding, needed):
    return text if binding >= needed else rf"\left({text}\right)"


def to_latex(model, *, digits=LATEX_DIGITS, document=False):
    """The model's equations as a LaTeX ``align*`` environment (needs ``amsmath``).

    Parameters
    ----------
    model : Model or path-like
    digits : int, default=LATEX_DIGITS (4)
        Significant digits of the coefficients and numbers, as in the terminal
        summary. A rounded number shows its trailing zeros (``1.0004 -> 1.000``);
        one the digits show exactly keeps its short form (``1``, ``0.05``), see
        :func:`latex_number`.
    document : bool, default=False
        Wrap the equations in a minimal ``article`` document that compiles on its own.

    Returns
    -------
    str
        One line ``\\dot{name} &= ...`` per state; products are written with a thin
        space ``\\,``, powers as superscripts, ``log`` as ``\\ln``; names as
        :func:`latex_name` writes them (Greek letter names as their commands).
    """
    model = as_model(model)
    trees = dict(kept_trees(model))
    lines = []
    for i, state in enumerate(model.state_names):
        parts = []
        for j in np.flatnonzero(model.coef[:, i]):
            coefficient = float(model.coef[j, i])
            tree = trees[int(j)]._tree
            magnitude = latex_number(abs(coefficient), digits)
            if isinstance(tree, ast.Constant) and float(tree.value) == 1.0:
                body = magnitude
            else:
                body = rf"{magnitude} \, {_wrap(*_latex(tree, digits), _PRODUCT)}"
            sign = "-" if coefficient < 0 else "+"
            parts.append((f"-{body}" if sign == "-" else body) if not parts else f" {sign} {body}")
        rhs = "".join(parts) if parts else "0"
        lines.append(rf"\dot{{{latex_name(state)}}} &= {rhs}")
    body = "\\begin{align*}\n" + " \\\\\n".join(lines) + "\n\\end{align*}\n"
    if document:
        return ("\\documentclass{article}\n\\usepackage{amsmath}\n\\begin{document}\n"
                + body + "\\end{document}\n")
    return body
