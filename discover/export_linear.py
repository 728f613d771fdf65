"""Linear exports of a model: A, B and offset, Jacobian linearization, python-control state space.

:func:`linear_matrices` for a model whose every term is a constant, a state or an
input; :func:`linearize` at an operating point by analytic derivatives of the terms
(:mod:`discover.symbolic`), with the equilibrium residual f(x_op, u_op);
:func:`to_state_space` a ``control.StateSpace`` when the optional python-control
package is installed. Re-exported by :mod:`discover.export`.
"""

from __future__ import annotations

import ast

import numpy as np

from .exceptions import ExportError
from .export_terms import as_model, kept_trees
from .expressions import parse_expression
from .symbolic import column_names, depends_on, derivative

CONTROL_HINT = "python-control is not installed; `pip install control` to get a control.StateSpace."


class NonlinearModelError(ExportError):
    """A model has a term that is not a constant, a state or an input (for linear_matrices)."""


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
    for j, expression in kept_trees(model):
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
        ``offset`` of shape (n_states,); for a model that records its outputs (hidden
        states) also ``outputs``, ``C`` (n_outputs, n_states), ``D`` (n_outputs, n_inputs)
        and ``output_offset`` (:func:`output_matrices`); and ``states`` / ``inputs`` (the row and
        column order).

    Raises
    ------
    NonlinearModelError
        Naming the first term (in equation order) that is not linear.
    """
    model = as_model(model)
    trees = dict(kept_trees(model))
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
    matrices = {"states": list(model.state_names), "inputs": list(model.input_names), "A": a, "B": b,
                "offset": np.asarray(offset, dtype=float)}
    if has_outputs(model):  # a model with hidden states or further outputs: y = C x + D u + output_offset
        matrices.update(output_matrices(model))
    return matrices


def has_outputs(model):
    """Whether the model file names its outputs or hidden states (else every state is measured)."""
    return bool(model.info.get("outputs") or model.hidden_states)


def output_matrices(model, x_op=None, u_op=None):
    """C, D and the output offset of y = g(x, u), with the output names.

    Without an operating point every output must be affine in the states and inputs
    (C and D exact: differences from the origin along each unit vector); with one, the
    slopes at (x_op, u_op) by central differences (exact for affine outputs), and
    ``output_offset`` = g(x_op, u_op). A model without output records: C = I, D = 0.
    """
    n_states, n_inputs = len(model.state_names), len(model.input_names)
    names = list(model.output_expressions)
    known = tuple(model.state_names) + tuple(model.input_names)
    if x_op is None:
        for name, expr in model.output_expressions.items():
            if not _is_affine(parse_expression(expr, known, where=f"output {name!r}")._tree):
                raise NonlinearModelError(
                    f"output {name!r} = {expr!r} is not linear in the states and inputs; a linear export needs "
                    "affine outputs. Use the 'linearize' export at an operating point instead.")
        x0, u0 = np.zeros(n_states), np.zeros(n_inputs)
    else:
        x0, u0 = np.asarray(x_op, dtype=float), np.asarray(u_op if u_op is not None else [], dtype=float)

    def g(x, u):
        return model.outputs(x[None, :], u[None, :])[0]

    base = g(x0, u0)
    c, d = np.zeros((len(names), n_states)), np.zeros((len(names), n_inputs))
    for columns, vector, point in ((c, x0, "x"), (d, u0, "u")):
        for j in range(len(vector)):
            step = np.zeros(len(vector))
            if x_op is None:
                step[j] = 1.0
                plus = g(x0 + step, u0) if point == "x" else g(x0, u0 + step)
                columns[:, j] = plus - base
            else:
                step[j] = 1e-6 * max(1.0, abs(vector[j]))
                plus = g(x0 + step, u0) if point == "x" else g(x0, u0 + step)
                minus = g(x0 - step, u0) if point == "x" else g(x0, u0 - step)
                columns[:, j] = (plus - minus) / (2 * step[j])
    return {"outputs": names, "C": c, "D": d, "output_offset": base}


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
    model = as_model(model)
    x_op = _vector(x_op, model.state_names, "x_op")
    u_op = _vector([] if u_op is None and not model.input_names else u_op, model.input_names, "u_op")
    a, b = _jacobians(model, x_op, u_op)
    residual = np.atleast_1d(model.rhs(x_op, u_op if len(u_op) else None))
    return {"states": list(model.state_names), "inputs": list(model.input_names), "A": a, "B": b,
            "residual": np.asarray(residual, dtype=float), "x_op": x_op, "u_op": u_op}


def state_space_matrices(model, x_op=None, u_op=None):
    """(matrices dict, how) for a state-space export: C and D of the model's outputs; C = I and D = 0
    for a model without output records (every state measured)."""
    model = as_model(model)
    if x_op is None:
        matrices, how = linear_matrices(model), "linear"
    else:
        matrices, how = linearize(model, x_op, u_op), "linearized"
    n_states, n_inputs = len(model.state_names), len(model.input_names)
    if has_outputs(model):
        matrices.update(output_matrices(model, x_op, u_op if x_op is not None else None))
    else:
        matrices["C"] = np.eye(n_states)
        matrices["D"] = np.zeros((n_states, n_inputs))
    return matrices, how


def to_state_space(model, x_op=None, u_op=None):
    """A ``control.StateSpace`` (python-control, an optional extra) of the model.

    Without an operating point the model must be linear (:func:`linear_matrices`);
    with one it is linearized there (:func:`linearize`). C is the identity (every
    state is an output) and D is zero, unless the model file records its outputs (hidden
    states, y = g(x, u)): then C and D are those of g (:func:`output_matrices`). The offset, or the residual at the operating
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
    matrices, _ = state_space_matrices(model, x_op, u_op)
    model = as_model(model)
    return control.ss(matrices["A"], matrices["B"], matrices["C"], matrices["D"],
                      states=list(model.state_names), inputs=list(model.input_names),
                      outputs=list(matrices.get("outputs", model.state_names)))
