"""Exports of an identified model into the forms the next tool takes.

From a :class:`discover.Model` (or a ``model.json`` path):

* :func:`to_python_module`: a standalone Python module needing only numpy, with a
  vectorised ``rhs(t, x, u)`` for :func:`scipy.integrate.solve_ivp`;
* :func:`to_latex`: the equations as a LaTeX ``align`` environment;
* :func:`linear_matrices`: A, B and an offset for a model whose every term is a
  constant, a state or an input;
* :func:`linearize`: the Jacobian linearization A, B at an operating point, by
  analytic derivatives of the terms (:mod:`discover.symbolic`), with the
  equilibrium residual f(x_op, u_op);
* :func:`to_state_space`: a ``control.StateSpace`` when the optional python-control
  package is installed.

Generated code and LaTeX come from the parsed syntax trees by a whitelist walk:
names become ``x[i]`` / ``u[j]``, functions ``np.sin`` etc., numbers
``repr(float)``. No text from the model file is spliced into code, and names
appear in generated code only as ``repr()`` string literals.

Errors: :class:`~discover.exceptions.ExportError` (exit code 7) when the export's
arguments do not fit the model (operating point, format, output path, a nonlinear
model for a linear export); :class:`~discover.exceptions.ModelFileError` (exit
code 5) when the model itself is at fault. JSON is written as UTF-8 with
non-ASCII characters kept as they are, and never holds NaN or infinity.
"""

from __future__ import annotations

import ast
import json
import math
import sys
from pathlib import Path

import numpy as np

from .exceptions import ExportError, ModelFileError
from .expressions import parse_expression
from .model import Model, load_model
from .symbolic import DERIVATIVE_FUNCTIONS, column_names, derivative, depends_on

FORMATS = ("python", "latex", "linear", "linearize", "control")
LINEAR_FORMAT = "discover-linear/1"
CONTROL_HINT = "python-control is not installed; `pip install control` to get a control.StateSpace."
# Significant digits of LaTeX coefficients: those of the terminal summary
# (``:.4g`` in report.format_equation; tests/test_export.py checks that they agree).
LATEX_DIGITS = 4


class NonlinearModelError(ExportError):
    """A model has a term that is not a constant, a state or an input (for linear_matrices)."""


def _as_model(model):
    if isinstance(model, Model):
        return model
    if isinstance(model, (str, Path)):
        return load_model(model)
    raise TypeError(f"`model` must be a discover.Model or a path to model.json. Got {type(model).__name__}.")


def _trees(model):
    """``[(j, tree)]`` of the terms that any equation keeps, parsed by the whitelist parser."""
    known = tuple(model.state_names) + tuple(model.input_names)
    used = np.flatnonzero(np.any(model.coef != 0, axis=1))
    return [(int(j), parse_expression(model.terms[j], known, where=f"model term {model.terms[j]!r}"))
            for j in used]


# --------------------------------------------------------------------------- Python module


_NUMPY_FUNCTIONS = {name: f"np.{name}" for name in DERIVATIVE_FUNCTIONS}
_PYTHON_OPERATORS = {ast.Add: "+", ast.Sub: "-", ast.Mult: "*", ast.Div: "/"}


def _float_code(value):
    """A float as Python source: ``repr`` for finite values, ``np.inf``/``np.nan`` otherwise."""
    value = float(value)
    if math.isnan(value):
        return "np.nan"
    if math.isinf(value):
        return "np.inf" if value > 0 else "(-np.inf)"
    return repr(value)


def _python_code(node, variables):
    """Python source of a checked tree; ``variables`` maps column name -> ``'x[0]'`` etc."""
    if isinstance(node, ast.Constant) and isinstance(node.value, (int, float)) and not isinstance(node.value, bool):
        return _float_code(node.value)
    if isinstance(node, ast.Name) and node.id in variables:
        return variables[node.id]
    if isinstance(node, ast.UnaryOp) and isinstance(node.op, (ast.USub, ast.UAdd)):
        sign = "-" if isinstance(node.op, ast.USub) else "+"
        return f"({sign}{_python_code(node.operand, variables)})"
    if isinstance(node, ast.BinOp) and type(node.op) in _PYTHON_OPERATORS:
        left, right = _python_code(node.left, variables), _python_code(node.right, variables)
        return f"({left} {_PYTHON_OPERATORS[type(node.op)]} {right})"
    if isinstance(node, ast.BinOp) and isinstance(node.op, ast.Pow):
        base = _python_code(node.left, variables)
        exponent = node.right.value if isinstance(node.right, ast.Constant) else None
        # The same arithmetic as the model's evaluator: small integer powers of a
        # variable by repeated multiplication, everything else through np.power.
        if (base in variables.values() and isinstance(exponent, (int, float)) and not isinstance(exponent, bool)
                and float(exponent).is_integer() and 1 <= exponent <= 8):
            return "(" + " * ".join([base] * int(exponent)) + ")"
        return f"np.power({base}, {_python_code(node.right, variables)})"
    if (isinstance(node, ast.Call) and isinstance(node.func, ast.Name) and node.func.id in _NUMPY_FUNCTIONS
            and len(node.args) == 1 and not node.keywords):
        return f"{_NUMPY_FUNCTIONS[node.func.id]}({_python_code(node.args[0], variables)})"
    raise ModelFileError(f"cannot export the expression part {ast.unparse(node)!r}: not an allowed construct.")


_MODULE_TEMPLATE = '''\
"""dx/dt = f(x, u): a model identified by discover, exported as plain numpy code.

Generated by discover.export.to_python_module; edit the model, not this file.

Conventions (those of scipy.integrate.solve_ivp):

* ``x`` has shape (n_states,), or (n_states, n_points) in solve_ivp's vectorized
  mode: rows are the states in the order of STATES.
* ``u`` is the input in the order of INPUTS: a callable ``u(t)`` returning an
  array of shape (n_inputs,), or an array of shape (n_inputs,) (held constant),
  or (n_inputs, n_points) matching the columns of ``x``. ``None`` when the model
  has no inputs.
* ``rhs`` returns dx/dt with the shape of ``x``.

Example::

    from scipy.integrate import solve_ivp
    sol = solve_ivp(rhs, (0.0, 10.0), x0, args=(u_of_t,), vectorized=True)
"""

import numpy as np

STATES = {states}
INPUTS = {inputs}


def _input_values(t, u, n_points_shape):
    if u is None:
        if INPUTS:
            raise ValueError("this model has inputs %r; pass u (a callable of t or an array)." % (INPUTS,))
        return np.empty((0,) + n_points_shape)
    value = np.asarray(u(t) if callable(u) else u, dtype=float)
    if value.shape[:1] != (len(INPUTS),):
        raise ValueError("u must have %d rows (INPUTS = %r); got shape %r." % (len(INPUTS), INPUTS, value.shape))
    return value


def rhs(t, x, u=None):
    """dx/dt at time t, states x and inputs u (see the module docstring for shapes)."""
    x = np.asarray(x, dtype=float)
    if x.shape[:1] != (len(STATES),):
        raise ValueError("x must have %d rows (STATES = %r); got shape %r." % (len(STATES), STATES, x.shape))
    u = _input_values(t, u, x.shape[1:])
    dx = np.empty(x.shape)
{body}
    return dx
'''


def to_python_module(model):
    """Source of a standalone Python module (numpy only) defining ``STATES``, ``INPUTS`` and ``rhs``.

    Parameters
    ----------
    model : Model or path-like
        The model, or a path to its ``model.json``.

    Returns
    -------
    str
        Python source. ``rhs(t, x, u)`` takes x of shape (n_states,) or
        (n_states, n_points) as :func:`scipy.integrate.solve_ivp` passes it (also with
        ``vectorized=True``), and u as a callable of t, an array of shape (n_inputs,),
        or (n_inputs, n_points); it returns dx/dt with the shape of x. Every equation
        is ``sum(coefficient * term)`` over its kept terms, in the order of the
        model's terms, with the model's own arithmetic.
    """
    model = _as_model(model)
    variables = {name: f"x[{i}]" for i, name in enumerate(model.state_names)}
    variables.update({name: f"u[{j}]" for j, name in enumerate(model.input_names)})
    trees = _trees(model)
    lines = []
    for i in range(len(model.state_names)):
        parts = [f"{_float_code(model.coef[j, i])} * {_python_code(e._tree, variables)}"
                 for j, e in trees if model.coef[j, i] != 0]
        # Summed in the order of the model's terms, like its own Θ·Ξ product.
        lines.append(f"    dx[{i}] = " + (" + ".join(parts) if parts else "0.0"))
    return _MODULE_TEMPLATE.format(
        states=repr(tuple(str(s) for s in model.state_names)),
        inputs=repr(tuple(str(s) for s in model.input_names)),
        body="\n".join(lines),
    )


# --------------------------------------------------------------------------- LaTeX

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
    model = _as_model(model)
    trees = dict(_trees(model))
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


# --------------------------------------------------------------------------- linear models


def _is_number_only(node):
    return not column_names(node)


def _is_affine(node):
    """Whether a tree is affine in its columns by its structure (no products of columns)."""
    if isinstance(node, (ast.Constant, ast.Name)):
        return True
    if isinstance(node, ast.UnaryOp):
        return _is_affine(node.operand)
    if isinstance(node, ast.BinOp):
        op = type(node.op)
        if op in (ast.Add, ast.Sub):
            return _is_affine(node.left) and _is_affine(node.right)
        if op is ast.Mult:
            return ((_is_number_only(node.left) and _is_affine(node.right))
                    or (_is_number_only(node.right) and _is_affine(node.left)))
        if op is ast.Div:
            return _is_number_only(node.right) and _is_affine(node.left)
        if op is ast.Pow:
            return _is_number_only(node) or (
                isinstance(node.right, ast.Constant) and float(node.right.value) == 1.0 and _is_affine(node.left))
    return _is_number_only(node)


def _columns_at(model, x, u):
    columns = {name: np.array([float(v)]) for name, v in zip(model.state_names, x)}
    columns.update({name: np.array([float(v)]) for name, v in zip(model.input_names, u)})
    return columns


def _jacobians(model, x_op, u_op):
    """A = ∂f/∂x and B = ∂f/∂u at (x_op, u_op) from the terms' analytic derivatives."""
    n_states, n_inputs = len(model.state_names), len(model.input_names)
    columns = _columns_at(model, x_op, u_op)
    variables = list(model.state_names) + list(model.input_names)
    jacobian = np.zeros((n_states, n_states + n_inputs))
    for j, expression in _trees(model):
        for k, name in enumerate(variables):
            if not depends_on(expression._tree, name):
                continue
            slope = derivative(expression, name)
            value = float(slope.evaluate(columns)[0])
            if not np.isfinite(value):
                raise ExportError(
                    f"d({model.terms[j]})/d({name}) = {slope.text} is not finite ({value}) at the "
                    f"operating point {dict(zip(variables, np.concatenate([x_op, u_op]).tolist()))}; "
                    "the term is not differentiable there. Choose another operating point."
                )
            jacobian[:, k] += model.coef[j] * value
    return jacobian[:, :n_states], jacobian[:, n_states:]


def linear_matrices(model):
    """A, B and offset of a model linear in its states and inputs: dx/dt = A x + B u + offset.

    Every kept term must be a constant, a state or an input (or a number times one).

    Returns
    -------
    dict
        ``A`` of shape (n_states, n_states), ``B`` of shape (n_states, n_inputs),
        ``offset`` of shape (n_states,), and ``states`` / ``inputs`` (the row and
        column order).

    Raises
    ------
    NonlinearModelError
        Naming the first term (in equation order) that is not linear.
    """
    model = _as_model(model)
    trees = dict(_trees(model))
    for i, state in enumerate(model.state_names):
        for j in np.flatnonzero(model.coef[:, i]):
            if not _is_affine(trees[int(j)]._tree):
                raise NonlinearModelError(
                    f"term {model.terms[j]!r} of d({state})/dt is not linear in the states and inputs; "
                    "a linear export needs every term to be a constant, a state or an input. "
                    "Use the 'linearize' export at an operating point instead."
                )
    zero_x, zero_u = np.zeros(len(model.state_names)), np.zeros(len(model.input_names))
    a, b = _jacobians(model, zero_x, zero_u)
    offset = np.atleast_1d(model.rhs(zero_x, zero_u if len(zero_u) else None))
    return {"states": list(model.state_names), "inputs": list(model.input_names), "A": a, "B": b,
            "offset": np.asarray(offset, dtype=float)}


def _vector(values, names, label):
    if values is None:
        raise ExportError(f"`{label}` is required: {len(names)} numbers in the order {list(names)}.")
    try:
        vector = np.asarray(values, dtype=float).reshape(-1)
    except (TypeError, ValueError):
        raise ExportError(f"`{label}` must be numbers in the order {list(names)}. Got {values!r}.") from None
    if vector.shape != (len(names),):
        raise ExportError(
            f"`{label}` must have {len(names)} values (order {list(names)}). Got {vector.size}: {values!r}."
        )
    if not np.all(np.isfinite(vector)):
        raise ExportError(f"`{label}` must be finite numbers. Got {values!r}.")
    return vector


def linearize(model, x_op, u_op=None):
    """Jacobian linearization of dx/dt = f(x, u) at an operating point (analytic derivatives).

    Near (x_op, u_op), dx/dt ≈ residual + A (x - x_op) + B (u - u_op).

    Parameters
    ----------
    model : Model or path-like
    x_op : array-like of shape (n_states,)
    u_op : array-like of shape (n_inputs,), optional when the model has no inputs

    Returns
    -------
    dict
        ``A`` (n_states, n_states) = ∂f/∂x, ``B`` (n_states, n_inputs) = ∂f/∂u,
        ``residual`` (n_states,) = f(x_op, u_op), zero at an equilibrium;
        ``x_op``, ``u_op``, ``states``, ``inputs``.

    Raises
    ------
    ExportError
        If the operating point has the wrong length or a term is not
        differentiable there (e.g. sqrt at 0).
    """
    model = _as_model(model)
    x_op = _vector(x_op, model.state_names, "x_op")
    u_op = _vector([] if u_op is None and not model.input_names else u_op, model.input_names, "u_op")
    a, b = _jacobians(model, x_op, u_op)
    residual = np.atleast_1d(model.rhs(x_op, u_op if len(u_op) else None))
    return {"states": list(model.state_names), "inputs": list(model.input_names), "A": a, "B": b,
            "residual": np.asarray(residual, dtype=float), "x_op": x_op, "u_op": u_op}


def _state_space_matrices(model, x_op=None, u_op=None):
    """(matrices dict, how) for a state-space export: C = I (every state measured), D = 0."""
    model = _as_model(model)
    if x_op is None:
        matrices, how = linear_matrices(model), "linear"
    else:
        matrices, how = linearize(model, x_op, u_op), "linearized"
    n_states, n_inputs = len(model.state_names), len(model.input_names)
    matrices["C"] = np.eye(n_states)
    matrices["D"] = np.zeros((n_states, n_inputs))
    return matrices, how


def to_state_space(model, x_op=None, u_op=None):
    """A ``control.StateSpace`` (python-control, an optional extra) of the model.

    Without an operating point the model must be linear (:func:`linear_matrices`);
    with one it is linearized there (:func:`linearize`). C is the identity (every
    state is an output) and D is zero. The offset, or the residual at the operating
    point, is not part of a state-space object: read it from those functions.

    Raises
    ------
    ExportError
        If python-control is not installed (``pip install control``).
    """
    try:
        import control
    except ImportError:
        raise ExportError(CONTROL_HINT) from None
    matrices, _ = _state_space_matrices(model, x_op, u_op)
    model = _as_model(model)
    return control.ss(matrices["A"], matrices["B"], matrices["C"], matrices["D"],
                      states=list(model.state_names), inputs=list(model.input_names),
                      outputs=list(model.state_names))


# --------------------------------------------------------------------------- writers


def _refuse_non_finite(matrices, fmt):
    """One located line for the first NaN or infinity in the matrices: JSON cannot hold them.

    With an operating point (``x_op`` in ``matrices``) it is an :class:`ExportError`
    (choose another point); without one the model's own coefficients overflow
    float64, a :class:`ModelFileError`.
    """
    states, inputs = matrices["states"], matrices["inputs"]
    found = []  # (where, value, state) of every non-finite entry, in the order A, B, offset, residual
    for key, columns in (("A", states), ("B", inputs), ("offset", None), ("residual", None)):
        if key in matrices:
            values = np.asarray(matrices[key], dtype=float)
            for index in np.argwhere(~np.isfinite(values)):
                row = int(index[0])
                where = (f"{key}[{states[row]}, {columns[int(index[1])]}]" if columns is not None
                         else f"{key}[{states[row]}]")
                found.append((where, values[tuple(index)], states[row]))
    if not found:
        return
    where, value, state = found[0]
    more = f" (and {len(found) - 1} more non-finite entries)" if len(found) > 1 else ""
    what = f"the {fmt} export has {where} = {value} in the equation of d({state})/dt{more}"
    if "x_op" in matrices:
        point = dict(zip(list(states) + list(inputs), np.concatenate([matrices["x_op"], matrices["u_op"]]).tolist()))
        raise ExportError(f"{what} at the operating point {point}; JSON holds only finite numbers. "
                          "Choose an operating point where f(x, u) and its slopes are finite.")
    raise ModelFileError(f"{what}; JSON holds only finite numbers. The model's coefficients "
                         "overflow float64 there: check the model file.")


def _json_document(matrices, kind):
    document = {"format": LINEAR_FORMAT, "kind": kind, "states": matrices["states"], "inputs": matrices["inputs"]}
    if kind == "linear":
        document["equation"] = "dx/dt = A x + B u + offset"
    else:
        document["equation"] = "dx/dt ≈ residual + A (x - x_op) + B (u - u_op)"
    for key in ("A", "B", "C", "D", "offset", "residual", "x_op", "u_op"):
        if key in matrices:
            document[key] = np.asarray(matrices[key], dtype=float).tolist()
    return document


def _matrices_csv(matrices):
    """One row per state: A's columns, B's columns, then the offset or residual."""
    import csv
    import io

    extra = "offset" if "offset" in matrices else "residual"
    handle = io.StringIO()
    writer = csv.writer(handle, lineterminator="\n")
    writer.writerow(["state"] + [f"A[{s}]" for s in matrices["states"]]
                    + [f"B[{u}]" for u in matrices["inputs"]] + [extra])
    for i, state in enumerate(matrices["states"]):
        writer.writerow([state] + [repr(float(v)) for v in matrices["A"][i]]
                        + [repr(float(v)) for v in matrices["B"][i]] + [repr(float(matrices[extra][i]))])
    return handle.getvalue()


def export_text(model, fmt, *, x_op=None, u_op=None, csv=False):
    """The text of one export format (see :func:`write_export`)."""
    model = _as_model(model)
    if fmt not in FORMATS:
        raise ExportError(f"export format must be one of {', '.join(FORMATS)}. Got {fmt!r}.")
    if fmt == "python":
        return to_python_module(model)
    if fmt == "latex":
        return to_latex(model)
    if fmt == "control" and csv:
        raise ExportError("the 'control' export is JSON (A, B, C, D); write it to a .json file.")
    # An overflow or NaN is refused below in one located line, so numpy's warning would only repeat it.
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        if fmt == "linear":
            matrices, kind = linear_matrices(model), "linear"
        elif fmt == "linearize":
            matrices, kind = linearize(model, x_op, u_op), "linearized"
        else:
            matrices, kind = _state_space_matrices(model, x_op, u_op)
    _refuse_non_finite(matrices, fmt)
    if csv:
        return _matrices_csv(matrices)
    # Characters such as '≈' as they are: the file is UTF-8, as JSON between systems must
    # be (RFC 8259, section 8.1).
    return json.dumps(_json_document(matrices, kind), indent=2, allow_nan=False, ensure_ascii=False) + "\n"


def write_export(model, fmt, out_path, *, x_op=None, u_op=None):
    """Write one export of a model to ``out_path``.

    Parameters
    ----------
    model : Model or path-like
    fmt : {"python", "latex", "linear", "linearize", "control"}
        ``python``: a module (:func:`to_python_module`); ``latex``: an ``align*``
        environment (:func:`to_latex`); ``linear``: A, B, offset (:func:`linear_matrices`);
        ``linearize``: A, B, residual at ``x_op``, ``u_op`` (:func:`linearize`);
        ``control``: A, B, C, D of the state-space form (C = I, D = 0), linear or,
        given ``x_op``, linearized; load it with ``control.ss(d["A"], d["B"], d["C"], d["D"])``.
        The matrix formats are JSON (``format: discover-linear/1``), or one CSV table
        ``state, A[...], B[...], offset|residual`` when ``out_path`` ends in ``.csv``.
        Every file is written as UTF-8; JSON keeps non-ASCII characters as they are.
    out_path : path-like
    x_op, u_op : array-like, optional
        The operating point (needed by ``linearize``; optional for ``control``).

    Returns
    -------
    pathlib.Path
        The file written.

    Raises
    ------
    ExportError
        Unknown format, a bad operating point, an output that cannot be written,
        or a NaN or infinity in the matrices at the operating point.
    ModelFileError
        The model file cannot be read, or (without an operating point) its
        coefficients give a NaN or infinity in the matrices.
    """
    out_path = Path(out_path)
    text = export_text(model, fmt, x_op=x_op, u_op=u_op,
                       csv=out_path.suffix.lower() == ".csv" and fmt in ("linear", "linearize", "control"))
    try:
        out_path.write_text(text, encoding="utf-8")
    except OSError as err:
        raise ExportError(f"{out_path}: cannot write the export ({err.strerror or err}).") from None
    return out_path


def parse_point(text, names, option):
    """``"0, 1.5"`` -> array of floats for a command-line option; None stays None."""
    if text is None:
        return None
    pieces = [p.strip() for p in str(text).split(",")] if str(text).strip() else []
    try:
        values = [float(p) for p in pieces]
    except ValueError:
        raise ExportError(
            f"{option} must be comma-separated numbers in the order {', '.join(names)}. Got {text!r}."
        ) from None
    if not all(math.isfinite(v) for v in values):
        raise ExportError(f"{option} must be finite numbers (no nan or inf). Got {text!r}.")
    if len(values) != len(names):
        raise ExportError(
            f"{option} must have {len(names)} values (order {', '.join(names) or 'none'}). Got {len(values)}: {text!r}."
        )
    return np.array(values)


def _write_stdout(text):
    """Print an export; as UTF-8 bytes where the console's encoding lacks a character ('≈')."""
    try:
        sys.stdout.write(text)
    except UnicodeEncodeError:
        # The text stream encodes the whole string before writing, so nothing went out yet.
        sys.stdout.flush()
        sys.stdout.buffer.write(text.encode("utf-8"))
        sys.stdout.buffer.flush()


def export_main(args):
    """The ``discover export`` command.

    ``args`` has ``model`` (path to model.json), ``to`` (a format of :data:`FORMATS`),
    ``out`` (file to write; None or ``"-"`` prints to standard output), ``x_op`` and
    ``u_op`` (comma-separated numbers in state / input order, or None).
    Errors in these arguments raise :class:`ExportError` (exit code 7), a model
    file that cannot be read :class:`ModelFileError` (exit code 5).
    """
    model = load_model(args.model)
    x_op = parse_point(args.x_op, model.state_names, "--x-op")
    u_op = parse_point(args.u_op, model.input_names, "--u-op")
    if args.to == "linearize" and x_op is None:
        raise ExportError(f"--to linearize needs --x-op (order {', '.join(model.state_names)})"
                          + (f" and --u-op (order {', '.join(model.input_names)})." if model.input_names else "."))
    if args.out is None or args.out == "-":
        _write_stdout(export_text(model, args.to, x_op=x_op, u_op=u_op))
        return 0
    target = write_export(model, args.to, args.out, x_op=x_op, u_op=u_op)
    print(f"Wrote the {args.to} export of {args.model} to {target}")
    return 0
