"""A whitelist parser for term expressions over column names.

User text (custom terms, hypotheses, model files) is parsed with :func:`ast.parse`
into a syntax tree and then *walked* by this module: only numbers, known column
names, ``+ - * / **`` and the functions in :data:`FUNCTIONS` are accepted. Nothing
is ever handed to ``eval`` or ``exec``.
"""

from __future__ import annotations

import ast
import unicodedata
from dataclasses import dataclass

import numpy as np

from .exceptions import ExpressionError

#: Functions an expression may call, with their numpy implementation.
FUNCTIONS = {
    "sin": np.sin,
    "cos": np.cos,
    "tan": np.tan,
    "exp": np.exp,
    "log": np.log,
    "sqrt": np.sqrt,
    "tanh": np.tanh,
    "abs": np.abs,
}

#: Longest expression text accepted, and deepest nesting of operations in it: far above
#: any term a person writes, low enough that the parser and evaluator never recurse out.
MAX_LENGTH = 2000
MAX_DEPTH = 60

_BINARY = {ast.Add: "+", ast.Sub: "-", ast.Mult: "*", ast.Div: "/", ast.Pow: "**"}
_UNARY = {ast.USub: "-", ast.UAdd: "+"}


@dataclass(frozen=True)
class Expression:
    """A parsed, checked expression.

    Attributes
    ----------
    text : str
        The expression as written (stripped).
    names : tuple of str
        The column names it uses, in order of first appearance.
    """

    text: str
    names: tuple
    _tree: ast.AST

    def evaluate(self, columns):
        """Evaluate on a mapping ``name -> ndarray of shape (n_samples,)``.

        Returns an ndarray of shape (n_samples,); a constant expression is
        broadcast to the length of the first column given.
        """
        value = evaluate_tree(self._tree, columns)
        n_samples = len(next(iter(columns.values()))) if columns else 1
        return np.broadcast_to(np.asarray(value, dtype=float), (n_samples,)).copy()


def parse_expression(text, allowed_names, *, where="expression"):
    """Parse ``text`` into an :class:`Expression` over ``allowed_names``.

    Parameters
    ----------
    text : str
        Python-syntax arithmetic, e.g. ``"yaw_rate**3"`` or ``"sin(heading)*rudder"``.
    allowed_names : iterable of str
        Column names the expression may use.
    where : str
        Where the text came from, put at the front of error messages
        (e.g. ``"configs/ship.toml: [terms].custom[0]"``).

    Raises
    ------
    ExpressionError
        With the position (1-based column) of the offending part.
    """
    if not isinstance(text, str) or not text.strip():
        raise ExpressionError(f"{where}: expected a non-empty expression string. Got {text!r}.")
    # NFKC, as Python's parser reads identifiers: "Ω" (ohm sign) and "Ω" (omega) are one name.
    stripped = unicodedata.normalize("NFKC", text).strip()
    if len(stripped) > MAX_LENGTH:
        raise ExpressionError(f"{where}: the expression is {len(stripped)} characters long; at most "
                              f"{MAX_LENGTH} are accepted. Split it into several terms.")
    try:
        tree = ast.parse(stripped, mode="eval").body
    except (RecursionError, MemoryError):
        raise ExpressionError(f"{where}: the expression is nested too deeply to parse.") from None
    except SyntaxError as err:
        column = err.offset or 1
        raise ExpressionError(
            f"{where}: {stripped!r} does not parse (at column {column}): {err.msg}."
        ) from None
    allowed = set(allowed_names)
    names = []
    _check(tree, stripped, allowed, names, where, 0)
    return Expression(text=stripped, names=tuple(names), _tree=tree)


def _fail(node, text, where, why):
    column = getattr(node, "col_offset", 0) + 1
    raise ExpressionError(f"{where}: {text!r} at column {column}: {why}")


def _check(node, text, allowed, names, where, depth):
    """Walk the tree; refuse every node type not on the whitelist."""
    if depth > MAX_DEPTH:
        _fail(node, text, where, f"nested more than {MAX_DEPTH} operations deep; write it as several terms.")
    depth += 1
    if isinstance(node, ast.Constant):
        if isinstance(node.value, bool) or not isinstance(node.value, (int, float)):
            _fail(node, text, where, f"only numbers are allowed as constants, got {node.value!r}.")
        try:
            finite = np.isfinite(float(node.value))
        except OverflowError:
            finite = False
        if not finite:
            _fail(node, text, where, "a number beyond the floating-point range (about 1.8e308).")
    elif isinstance(node, ast.Name):
        if node.id in FUNCTIONS:
            _fail(node, text, where, f"{node.id!r} is a function; call it as {node.id}(...).")
        if node.id not in allowed:
            _fail(
                node,
                text,
                where,
                f"unknown name {node.id!r}. Known columns: {', '.join(sorted(allowed))}.",
            )
        if node.id not in names:
            names.append(node.id)
    elif isinstance(node, ast.BinOp):
        if type(node.op) not in _BINARY:
            _fail(node, text, where, "only + - * / ** are allowed between terms.")
        _check(node.left, text, allowed, names, where, depth)
        _check(node.right, text, allowed, names, where, depth)
    elif isinstance(node, ast.UnaryOp):
        if type(node.op) not in _UNARY:
            _fail(node, text, where, "only unary + and - are allowed.")
        _check(node.operand, text, allowed, names, where, depth)
    elif isinstance(node, ast.Call):
        if not isinstance(node.func, ast.Name) or node.func.id not in FUNCTIONS:
            _fail(node, text, where, f"functions must be one of {', '.join(FUNCTIONS)}.")
        if node.keywords or len(node.args) != 1:
            _fail(node, text, where, f"{node.func.id}() takes exactly one argument.")
        _check(node.args[0], text, allowed, names, where, depth)
    else:
        _fail(
            node,
            text,
            where,
            f"{type(node).__name__} is not allowed; use numbers, column names, "
            f"+ - * / ** and {', '.join(FUNCTIONS)}().",
        )


def evaluate_tree(node, columns, functions=FUNCTIONS):
    """Value of a checked tree on ``name -> array`` columns, calls looked up in ``functions``."""
    if isinstance(node, ast.Constant):
        return float(node.value)
    if isinstance(node, ast.Name):
        return columns[node.id]
    if isinstance(node, ast.BinOp):
        left, right = evaluate_tree(node.left, columns, functions), evaluate_tree(node.right, columns, functions)
        op = type(node.op)
        if op is ast.Add:
            return left + right
        if op is ast.Sub:
            return left - right
        if op is ast.Mult:
            return left * right
        if op is ast.Div:
            return np.divide(left, right)  # 1/0 of two constants gives inf, not an exception
        return _power(left, right)
    if isinstance(node, ast.UnaryOp):
        value = evaluate_tree(node.operand, columns, functions)
        return -value if isinstance(node.op, ast.USub) else value
    return functions[node.func.id](evaluate_tree(node.args[0], columns, functions))


def _power(base, exponent):
    # Integer powers by repeated multiplication are exact and faster than pow.
    if np.ndim(exponent) == 0 and float(exponent).is_integer() and 1 <= exponent <= 8:
        result = base
        for _ in range(int(exponent) - 1):
            result = result * base
        return result
    return np.power(base, exponent)
