"""Analytic derivatives of parsed term expressions.

:func:`derivative` walks the syntax tree of a :class:`discover.expressions.Expression`
(the tree the whitelist parser checked) and builds the tree of its partial
derivative by the rules of calculus: sum, product, quotient and chain rules, and
the derivatives of the functions in :data:`discover.expressions.FUNCTIONS`. The
result is simplified on the way (``0·a = 0``, ``1·a = a``, numbers folded) so
that its text stays readable, and is evaluated by a walk of the same kind as the
parser's; nothing is handed to ``eval``.

Conventions
-----------
* ``d|a|/da = sign(a)``, with ``sign(0) = 0`` (the subgradient numpy's ``np.sign``
  gives). ``sign`` exists only in derivative trees; term expressions cannot use it.
* ``a**b`` with ``b`` free of the variable follows the power rule
  ``b·a**(b - 1)·a'``; with ``b`` depending on it, ``a**b·(b'·log(a) + b·a'/a)``,
  which holds where ``a > 0``.
"""

from __future__ import annotations

import ast
from dataclasses import dataclass

import numpy as np

from .expressions import FUNCTIONS, Expression
from .expressions import evaluate_tree as _evaluate_tree

#: Functions of derivative trees: those of term expressions, plus ``sign`` (from d|a|).
DERIVATIVE_FUNCTIONS = dict(FUNCTIONS, sign=np.sign)


@dataclass(frozen=True)
class Derivative:
    """A derivative tree with its text form.

    Attributes
    ----------
    text : str
        The derivative in the syntax of term expressions (plus ``sign()``).
    names : tuple of str
        Column names it uses, in order of first appearance.
    """

    text: str
    names: tuple
    _tree: ast.AST

    @property
    def is_constant(self):
        """True when the derivative uses no column (its value is the same everywhere)."""
        return not self.names

    def evaluate(self, columns):
        """Evaluate on a mapping ``name -> ndarray of shape (n_samples,)``.

        Returns an ndarray of shape (n_samples,); a constant derivative is broadcast
        to the length of the first column given (as :meth:`Expression.evaluate` does).
        """
        with np.errstate(all="ignore"):
            value = evaluate_tree(self._tree, columns)
        n_samples = len(next(iter(columns.values()))) if columns else 1
        return np.broadcast_to(np.asarray(value, dtype=float), (n_samples,)).copy()


def derivative(expression, name):
    """Partial derivative of a parsed expression with respect to one column name.

    Parameters
    ----------
    expression : Expression or Derivative
        From :func:`discover.expressions.parse_expression` (or an earlier derivative,
        for second derivatives).
    name : str
        The column to differentiate by; a name the expression does not use gives 0.

    Returns
    -------
    Derivative

    Examples
    --------
    >>> from discover.expressions import parse_expression
    >>> derivative(parse_expression("x**3*u", ["x", "u"]), "x").text
    '3 * x ** 2.0 * u'
    """
    if not isinstance(expression, (Expression, Derivative)):
        raise TypeError(f"`expression` must be a parsed Expression. Got {type(expression).__name__}.")
    tree = _d(expression._tree, name)
    return Derivative(text=ast.unparse(tree), names=tuple(column_names(tree)), _tree=tree)


# --------------------------------------------------------------------------- evaluation


def evaluate_tree(node, columns):
    """Value of a checked tree (or a derivative tree, which may call sign()) on columns."""
    return _evaluate_tree(node, columns, DERIVATIVE_FUNCTIONS)


def column_names(node, found=None):
    """Column names of a tree in order of first appearance (function names are not columns)."""
    found = [] if found is None else found
    if isinstance(node, ast.Name):
        if node.id not in found:
            found.append(node.id)
    elif isinstance(node, ast.BinOp):
        column_names(node.left, found)
        column_names(node.right, found)
    elif isinstance(node, ast.UnaryOp):
        column_names(node.operand, found)
    elif isinstance(node, ast.Call):
        column_names(node.args[0], found)
    return found


def depends_on(node, name):
    """Whether the tree uses the column ``name``."""
    return name in column_names(node)


# --------------------------------------------------------------------------- building with simplification


def _number(node):
    """The value of a plain number node (also ``-number``), else None."""
    if isinstance(node, ast.Constant):
        return float(node.value)
    if isinstance(node, ast.UnaryOp) and isinstance(node.operand, ast.Constant):
        value = float(node.operand.value)
        return -value if isinstance(node.op, ast.USub) else value
    return None


def _const(value):
    value = float(value) + 0.0  # + 0.0 turns -0.0 into 0.0
    if value < 0:  # ast.unparse of a negative Constant is fine, but keep the usual tree shape
        return ast.UnaryOp(op=ast.USub(), operand=ast.Constant(-value))
    return ast.Constant(value)


def _add(a, b):
    na, nb = _number(a), _number(b)
    if na is not None and nb is not None:
        return _const(na + nb)
    if na == 0.0:
        return b
    if nb == 0.0:
        return a
    if nb is not None and nb < 0:
        return ast.BinOp(left=a, op=ast.Sub(), right=_const(-nb))
    return ast.BinOp(left=a, op=ast.Add(), right=b)


def _sub(a, b):
    na, nb = _number(a), _number(b)
    if na is not None and nb is not None:
        return _const(na - nb)
    if nb == 0.0:
        return a
    if na == 0.0:
        return _neg(b)
    return ast.BinOp(left=a, op=ast.Sub(), right=b)


def _neg(a):
    na = _number(a)
    if na is not None:
        return _const(-na + 0.0)
    if isinstance(a, ast.UnaryOp) and isinstance(a.op, ast.USub):
        return a.operand
    return ast.UnaryOp(op=ast.USub(), operand=a)


def _mul(a, b):
    na, nb = _number(a), _number(b)
    if na is not None and nb is not None:
        return _const(na * nb)
    if na == 0.0 or nb == 0.0:
        return ast.Constant(0.0)
    if na == 1.0:
        return b
    if nb == 1.0:
        return a
    if na == -1.0:
        return _neg(b)
    if nb == -1.0:
        return _neg(a)
    if nb is not None:  # numbers in front: 3.0 * x rather than x * 3.0
        a, b = b, a
    return ast.BinOp(left=a, op=ast.Mult(), right=b)


def _div(a, b):
    na, nb = _number(a), _number(b)
    if na == 0.0:
        return ast.Constant(0.0)
    if nb == 1.0:
        return a
    if na is not None and nb is not None and nb != 0.0:
        return _const(na / nb)
    return ast.BinOp(left=a, op=ast.Div(), right=b)


def _pow(a, b):
    nb = _number(b)
    if nb == 0.0:
        return ast.Constant(1.0)
    if nb == 1.0:
        return a
    return ast.BinOp(left=a, op=ast.Pow(), right=b)


def _call(function, argument):
    return ast.Call(func=ast.Name(id=function, ctx=ast.Load()), args=[argument], keywords=[])


# --------------------------------------------------------------------------- the rules


def _d(node, name):
    """The derivative tree of ``node`` with respect to ``name``."""
    if isinstance(node, ast.Constant):
        return ast.Constant(0.0)
    if isinstance(node, ast.Name):
        return ast.Constant(1.0 if node.id == name else 0.0)
    if isinstance(node, ast.UnaryOp):
        inner = _d(node.operand, name)
        return _neg(inner) if isinstance(node.op, ast.USub) else inner
    if isinstance(node, ast.BinOp):
        a, b = node.left, node.right
        da, db = _d(a, name), _d(b, name)
        op = type(node.op)
        if op is ast.Add:
            return _add(da, db)
        if op is ast.Sub:
            return _sub(da, db)
        if op is ast.Mult:
            return _add(_mul(da, b), _mul(a, db))
        if op is ast.Div:
            # (a/b)' = a'/b - a·b'/b**2
            return _sub(_div(da, b), _div(_mul(a, db), _pow(b, ast.Constant(2.0))))
        if op is ast.Pow:
            return _d_power(a, b, da, db, name)
    if isinstance(node, ast.Call):
        argument = node.args[0]
        inner = _d(argument, name)
        if _number(inner) == 0.0:
            return ast.Constant(0.0)
        return _mul(_outer(node.func.id, argument), inner)
    raise TypeError(f"unexpected node {ast.dump(node)} in an expression tree")


def _d_power(a, b, da, db, name):
    if not depends_on(b, name):
        # Power rule, b constant with respect to name: b·a**(b - 1)·a'.
        nb = _number(b)
        lowered = _const(nb - 1.0) if nb is not None else _sub(b, ast.Constant(1.0))
        return _mul(_mul(b, _pow(a, lowered)), da)
    # General rule for a > 0: (a**b)' = a**b·(b'·log(a) + b·a'/a).
    return _mul(ast.BinOp(left=a, op=ast.Pow(), right=b),
                _add(_mul(db, _call("log", a)), _div(_mul(b, da), a)))


def _outer(function, a):
    """f'(a) for the functions of term expressions."""
    if function == "sin":
        return _call("cos", a)
    if function == "cos":
        return _neg(_call("sin", a))
    if function == "tan":  # 1 + tan(a)**2 = 1/cos(a)**2
        return _add(ast.Constant(1.0), _pow(_call("tan", a), ast.Constant(2.0)))
    if function == "exp":
        return _call("exp", a)
    if function == "log":
        return _div(ast.Constant(1.0), a)
    if function == "sqrt":
        return _div(ast.Constant(0.5), _call("sqrt", a))
    if function == "tanh":
        return _sub(ast.Constant(1.0), _pow(_call("tanh", a), ast.Constant(2.0)))
    if function == "abs":
        return _call("sign", a)
    if function == "sign":  # piecewise constant; 0 away from a = 0
        return ast.Constant(0.0)
    raise TypeError(f"no derivative rule for {function}()")
