"""Candidate term libraries Θ(x, u): polynomials, trigonometric terms, custom terms.

Every term carries its expression string in Python syntax over the column names
(the model-file contract of DESIGN.md), parsed by the whitelist parser of
:mod:`discover.expressions`. ``Library.evaluate`` runs all terms as one shared plan
(common subexpressions once), with the values of the per-term evaluation.
"""

from __future__ import annotations

import ast
import functools
import itertools
from dataclasses import dataclass

import numpy as np

from .exceptions import ConfigError
from .expressions import FUNCTIONS, evaluate_tree, parse_expression


@dataclass(frozen=True)
class Term:
    """One candidate term: its expression text and the parsed expression."""

    expr: str
    expression: object

    def evaluate(self, columns):
        return self.expression.evaluate(columns)


@dataclass(frozen=True)
class Library:
    """An ordered set of candidate terms over named states and inputs."""

    state_names: tuple
    input_names: tuple
    terms: tuple

    @property
    def names(self):
        return [term.expr for term in self.terms]

    def __len__(self):
        return len(self.terms)

    def evaluate(self, x, u, *, append=None):
        """Θ of shape (n_samples, n_terms) from x (n_samples, n_states), u (n_samples, n_inputs).

        With ``append`` (n_samples, n_extra), returns [Θ append] in one allocation, the
        layout the Gram products want, with no copy of Θ.

        For float64 x and u the terms are evaluated together (:class:`_SharedPlan`): a
        subexpression common to several terms is computed once, and products and sums a
        block of rows at a time. Every value has the bits the term's own expression gives
        (the same operations on the same operands, in the same order); only a NaN that two
        NaNs make may come out with another sign or payload.
        """
        columns = columns_of(self.state_names, self.input_names, x, u)
        extra = 0 if append is None else append.shape[1]
        theta = np.empty((x.shape[0], len(self.terms) + extra))
        if _plan_applies(columns, x.shape[0]):
            self._plan.fill(theta, columns, append if extra else None)
            return theta
        # Other dtypes compute in their own precision, as each expression does alone.
        for j, term in enumerate(self.terms):
            theta[:, j] = term.evaluate(columns)
        if extra:
            theta[:, len(self.terms):] = append
        return theta

    @functools.cached_property
    def _plan(self):
        return _SharedPlan([term.expression for term in self.terms])

    def subset(self, indices):
        return Library(self.state_names, self.input_names, tuple(self.terms[i] for i in indices))


def columns_of(state_names, input_names, x, u):
    """Map each column name to its 1-D array (views, no copies)."""
    columns = {name: x[:, i] for i, name in enumerate(state_names)}
    columns.update({name: u[:, i] for i, name in enumerate(input_names)})
    return columns


def monomial_text(factors):
    """``[('yaw_rate', 3), ('rudder', 1)] -> 'yaw_rate**3*rudder'``."""
    return "*".join(name if power == 1 else f"{name}**{power}" for name, power in factors)


def term_key(expr):
    """A canonical key so that ``'nitrate*light'`` and ``'light*nitrate'`` compare equal.

    Products of names and integer powers become a sorted tuple of (name, power);
    anything else is compared by its text without spaces.
    """
    text = expr.replace(" ", "")
    if text == "1":
        return ("constant",)
    powers = {}
    for factor in text.replace("**", "^").split("*"):
        name, _, power = factor.partition("^")
        if not name.isidentifier() or (power and not power.isdigit()):
            return ("text", text)
        powers[name] = powers.get(name, 0) + int(power or 1)
    return tuple(sorted(powers.items()))


def polynomial_terms(variables, input_names, *, degree, input_degree, state_input_products):
    """Monomials of total degree 1..degree in ``variables``, with input restrictions."""
    inputs = set(input_names)
    texts = []
    for d in range(1, degree + 1):
        for combo in itertools.combinations_with_replacement(variables, d):
            n_input = sum(name in inputs for name in combo)
            if n_input > input_degree:
                continue
            if not state_input_products and 0 < n_input < len(combo):
                continue
            factors = [(name, combo.count(name)) for name in dict.fromkeys(combo)]
            texts.append(monomial_text(factors))
    return texts


def trig_terms(variables, input_names, *, frequencies, input_products):
    """sin(f*v), cos(f*v) for each variable and frequency, optionally times each input."""
    texts = []
    for name in variables:
        for f in frequencies:
            arg = name if f == 1 else f"{_number(f)}*{name}"
            texts.extend([f"sin({arg})", f"cos({arg})"])
    if input_products:
        texts += [f"{trig}*{u}" for trig in list(texts) for u in input_names]
    return texts


def _number(value):
    return str(int(value)) if float(value).is_integer() else repr(float(value))


def build_library(
    state_names,
    input_names,
    *,
    degree=2,
    variables=None,
    input_degree=None,
    state_input_products=True,
    constant=True,
    trig_variables=(),
    trig_frequencies=(1,),
    trig_input_products=False,
    custom=(),
    where="[terms]",
):
    """Build the candidate library.

    Parameters
    ----------
    state_names, input_names : sequence of str
    degree : int, default=2
        Highest total degree of the polynomial terms (0 = no polynomial terms).
    variables : sequence of str or None, default=None
        Which states and inputs enter the polynomial; None means all of them.
    input_degree : int or None, default=None
        Highest total power of inputs in one term; None means ``degree``.
    state_input_products : bool, default=True
        Allow terms that multiply states with inputs.
    constant : bool, default=True
        Include the constant term ``1``.
    trig_variables, trig_frequencies, trig_input_products
        ``sin(f*v)`` and ``cos(f*v)`` for each chosen variable and frequency, and
        their products with every input when ``trig_input_products``.
    custom : sequence of str
        Extra terms as expressions over the column names (whitelist parser).

    Returns
    -------
    Library
        Terms in the order: constant, polynomial by degree, trigonometric, custom.
        A custom term equal to a generated one is kept once.
    """
    state_names, input_names = tuple(state_names), tuple(input_names)
    known = state_names + input_names
    variables = list(known if variables is None else variables)
    input_degree = degree if input_degree is None else input_degree
    texts = ["1"] if constant else []
    texts += polynomial_terms(
        variables,
        input_names,
        degree=degree,
        input_degree=input_degree,
        state_input_products=state_input_products,
    )
    texts += trig_terms(
        list(trig_variables), input_names, frequencies=trig_frequencies, input_products=trig_input_products
    )
    terms, seen = [], set()
    for i, text in enumerate(list(texts) + list(custom)):
        origin = f"{where}.custom[{i - len(texts)}]" if i >= len(texts) else where
        expression = parse_expression(text, known, where=origin)
        key = term_key(expression.text)
        if key in seen:
            continue
        seen.add(key)
        terms.append(Term(expression.text, expression))
    if not terms:
        raise ConfigError(
            f"{where}: the library is empty. Set degree >= 1, constant = true, "
            "trig variables or custom terms."
        )
    return Library(state_names, input_names, tuple(terms))


class TermEvaluator:
    """Evaluate a fixed list of terms at a few points, fast (the simulation hot path).

    Monomials (products of integer powers of the variables, the constant included)
    become one exponent matrix, evaluated for all of them in one numpy expression: a
    table of every variable's powers by repeated multiplication, gathered by the
    exponent matrix and multiplied along the variables. (Elementwise ``z ** powers``
    did the same with a float power per entry: 13 times slower for 39 points of a
    degree-3 library in 5 variables, 460 µs against 34 µs on the 2-core machine, and
    the simulations of the ranking call this once per solver step.) Any other term is
    evaluated through its parsed expression.

    Parameters
    ----------
    expressions : sequence of parsed expressions (:class:`discover.expressions.Expression`)
    names : sequence of str
        The variables, in the column order of the ``z`` passed to :meth:`__call__`.
    """

    def __init__(self, expressions, names):
        self.names = list(names)
        self.n_terms = len(expressions)
        monomial, other, powers = [], [], []
        for j, expression in enumerate(expressions):
            key = term_key(expression.text)
            if key == ("constant",) or (key[0] != "text" and all(n in self.names for n, _ in key)):
                row = np.zeros(len(self.names), dtype=int)
                for name, power in ([] if key == ("constant",) else key):
                    row[self.names.index(name)] = power
                monomial.append(j)
                powers.append(row)
            else:
                other.append(j)
        self.monomial = np.array(monomial, dtype=int)
        self.powers = np.array(powers, dtype=int).reshape(len(monomial), len(self.names))
        self.other = [(j, expressions[j]) for j in other]

    def __call__(self, z):
        """Θ of shape (n_points, n_terms) from z of shape (n_points, n_variables)."""
        theta = np.empty((len(z), self.n_terms))
        if len(self.monomial):
            top = int(self.powers.max()) if self.powers.size else 0
            table = np.empty((top + 1,) + z.shape)  # table[p] = z**p
            table[0] = 1.0
            if top:
                table[1] = z
            for p in range(2, top + 1):
                table[p] = table[p - 1] * z
            picked = table[self.powers, :, np.arange(z.shape[1])]  # (n_monomials, n_variables, n_points)
            theta[:, self.monomial] = np.prod(picked, axis=1).T
        if self.other:
            columns = {name: z[:, i] for i, name in enumerate(self.names)}
            for j, expression in self.other:
                theta[:, j] = expression.evaluate(columns)
        return theta


#: Bytes of [Θ append] plus scratch in one block of rows of the shared plan: small enough
#: to stay in one core's cache while every term of the block is computed, so each row of Θ
#: goes out to memory once (a column written over all rows at once pulls every cache line
#: of Θ in again for each column). Measured in benchmarks/library.py (--block-bytes).
BLOCK_BYTES = 1 << 20

#: Terms computed on whole columns (functions, general powers) are held until they are
#: copied into Θ block by block while they take at most this fraction of Θ's bytes; the
#: rest go into Θ a column at a time, slower but with no memory beyond one column.
KEPT_FRACTION = 0.5

# Sums, differences, products, quotients and negation are correctly rounded element by
# element (IEEE 754): any block of rows and any memory layout give the same bits. Functions
# and general powers come from math libraries whose vector and scalar code may differ; the
# plan runs them as an expression alone runs them: on whole columns, with operands of the
# same layout (a view into x or u, or a fresh array).
_EXACT = {"add": np.add, "sub": np.subtract, "mul": np.multiply, "div": np.divide, "neg": np.negative}
_BINARY_KINDS = {ast.Add: "add", ast.Sub: "sub", ast.Mult: "mul", ast.Div: "div"}
_WHOLE = ("call", "pow")


@dataclass(frozen=True)
class _Node:
    """One operation of a shared plan: ``kind`` on the nodes ``operands``.

    ``what`` is the column name ("col"), the constant's tree ("const") or the function
    name ("call").
    """

    kind: str
    operands: tuple = ()
    what: object = None


def _plan_applies(columns, n_samples):
    """Whether the shared plan gives the per-term values: float64 columns of one length."""
    return bool(columns) and all(
        isinstance(c, np.ndarray) and c.dtype == np.float64 and c.shape == (n_samples,)
        for c in columns.values()
    )


def _has_names(tree):
    return any(isinstance(node, ast.Name) for node in ast.walk(tree))


def _repeats(exponent_tree):
    """Factors multiplied for ``base ** exponent``, decided as ``expressions._power`` does; 0 for pow."""
    if _has_names(exponent_tree):
        return 0
    with np.errstate(all="ignore"):
        exponent = evaluate_tree(exponent_tree, {})
    if np.ndim(exponent) == 0 and float(exponent).is_integer() and 1 <= exponent <= 8:
        return int(exponent)
    return 0


class _SharedPlan:
    """The terms of a library as one list of operations, common subexpressions once.

    A node is an operation on earlier nodes, keyed by the operation and its operands, so
    ``x*y`` inside ``x*y*z`` and the term ``x*y`` are one node. ``x**3`` becomes
    ``(x*x)*x``, the multiplications ``expressions._power`` performs, in its order, so a
    monomial reuses the lower-degree node its own expression multiplies. Operands are
    never reordered or regrouped: every node has the bits of the plain evaluation.

    Parameters
    ----------
    expressions : sequence of parsed expressions (:class:`discover.expressions.Expression`)
    """

    def __init__(self, expressions):
        self.nodes, self._ids = [], {}
        self.roots = [self._node(expression._tree) for expression in expressions]
        self.columns_of_node = {}  # node -> the columns of Θ it fills (more than one if repeated)
        for j, i in enumerate(self.roots):
            self.columns_of_node.setdefault(i, []).append(j)
        # Functions and general powers, and every operation they read, run on whole columns.
        whole = [node.kind in _WHOLE for node in self.nodes]
        for i in reversed(range(len(self.nodes))):  # readers come after what they read
            if whole[i]:
                for o in self.nodes[i].operands:
                    whole[o] = self.nodes[o].kind not in ("col", "const")
        self.whole_steps = [i for i, w in enumerate(whole) if w]
        self.block_steps = [i for i, node in enumerate(self.nodes) if node.kind in _EXACT and not whole[i]]
        self.whole_reads = [0] * len(self.nodes)
        for i in self.whole_steps:
            for o in self.nodes[i].operands:
                self.whole_reads[o] += 1
        read_in_blocks = {o for i in self.block_steps for o in self.nodes[i].operands}
        # Whole values that blocks read and that are in no column of Θ: kept to the end.
        self.kept = {i for i in self.whole_steps if i in read_in_blocks and i not in self.columns_of_node}
        in_scratch = [i for i in self.block_steps if i not in self.columns_of_node]
        self.scratch_row = {i: row for row, i in enumerate(in_scratch)}

    def _add(self, kind, operands=(), what=None, key=None):
        node_key = (kind, operands, what if key is None else key)
        if node_key not in self._ids:
            self._ids[node_key] = len(self.nodes)
            self.nodes.append(_Node(kind, operands, what))
        return self._ids[node_key]

    def _node(self, tree):
        """Node id of a checked expression tree, built as ``expressions.evaluate_tree`` computes it."""
        if not _has_names(tree):
            return self._add("const", what=tree, key=ast.dump(tree))
        if isinstance(tree, ast.Name):
            return self._add("col", what=tree.id)
        if isinstance(tree, ast.UnaryOp):
            operand = self._node(tree.operand)
            return self._add("neg", (operand,)) if isinstance(tree.op, ast.USub) else operand
        if isinstance(tree, ast.Call):
            return self._add("call", (self._node(tree.args[0]),), what=tree.func.id)
        left = self._node(tree.left)
        if isinstance(tree.op, ast.Pow):
            times = _repeats(tree.right)
            if not times:
                return self._add("pow", (left, self._node(tree.right)))
            result = left
            for _ in range(times - 1):
                result = self._add("mul", (result, left))
            return result
        return self._add(_BINARY_KINDS[type(tree.op)], (left, self._node(tree.right)))

    def fill(self, theta, columns, append=None):
        """Write Θ into ``theta[:, :n_terms]`` and ``append`` after it.

        Parameters
        ----------
        theta : ndarray of shape (n_samples, n_terms + n_extra), float64, written in place
        columns : dict of str to ndarray of shape (n_samples,), float64
        append : ndarray of shape (n_samples, n_extra) or None
        """
        values = {i: evaluate_tree(node.what, {}) if node.kind == "const" else columns[node.what]
                  for i, node in enumerate(self.nodes) if node.kind in ("const", "col")}
        reads_left = list(self.whole_reads)
        # Whole-column terms are copied into Θ block by block (each row of Θ written once)
        # while they take at most KEPT_FRACTION of Θ's bytes; beyond that, column by column.
        copied_in_blocks, room = set(), KEPT_FRACTION * theta.nbytes
        for i in self.whole_steps:
            value = self._whole(self.nodes[i], values)
            for o in self.nodes[i].operands:
                reads_left[o] -= 1
                if not (reads_left[o] or o in self.kept or o in copied_in_blocks
                        or self.nodes[o].kind in ("col", "const")):
                    del values[o]  # freed after its last whole read
            if i in self.columns_of_node:
                if value.nbytes <= room:
                    copied_in_blocks.add(i)
                    room -= value.nbytes
                else:
                    for j in self.columns_of_node[i]:
                        theta[:, j] = value
            if reads_left[i] or i in self.kept or i in copied_in_blocks:
                values[i] = value
        self._fill_blocks(theta, values, append)

    def _fill_blocks(self, theta, values, append):
        """The exact operations, the leaves, the held terms and ``append``, a block of rows at a time.

        A block's values live in a column-major scratch (row j: term j, rows after the terms:
        operations that are no term), where each operation runs on contiguous rows; one
        transposed copy per block moves the terms into Θ (measured faster than operating on
        Θ's strided columns in place, benchmarks/library.py).
        """
        n_samples, n_terms = theta.shape[0], len(self.roots)
        n_rows = n_terms + len(self.scratch_row)
        rows = max(64, BLOCK_BYTES // (8 * (theta.shape[1] + n_rows)))
        scratch = np.empty((n_rows, min(rows, n_samples)))
        home = {i: js[0] for i, js in self.columns_of_node.items()}  # node -> its scratch row
        home.update((i, n_terms + r) for i, r in self.scratch_row.items())
        in_blocks = set(self.block_steps)
        scalars = {i: v for i, v in values.items() if np.ndim(v) == 0}
        # Columns of x and u, and whole values kept, that no term is: read from where they are.
        sliced = [(i, v) for i, v in values.items() if np.ndim(v) and i not in home]
        loads = [(home[i], values[i]) for i in self.columns_of_node if i in values]  # leaves, held terms
        # Whole-column terms that went into Θ column by column: read back (their rows are
        # written again, unchanged, by the transposed copy).
        read_back = [home[i] for i in self.columns_of_node if i not in values and i not in in_blocks]
        repeats = [(js[0], js[1:]) for js in self.columns_of_node.values() if len(js) > 1]
        program = [(_EXACT[self.nodes[i].kind], self.nodes[i].operands, i) for i in self.block_steps]
        for start in range(0, n_samples, rows):
            stop = min(start + rows, n_samples)
            block, rows_here = theta[start:stop], scratch[:, : stop - start]
            here = dict(scalars)  # node -> its values on this block's rows
            here.update((i, v[start:stop]) for i, v in sliced)
            here.update((i, rows_here[r]) for i, r in home.items())
            for r, value in loads:
                rows_here[r] = value[start:stop] if np.ndim(value) else value
            for r in read_back:
                rows_here[r] = block[:, r]
            for function, operands, i in program:
                function(*[here[o] for o in operands], out=here[i])
            for r, others in repeats:
                rows_here[others] = rows_here[r]
            block[:, :n_terms] = rows_here[:n_terms].T
            if append is not None:
                block[:, n_terms:] = append[start:stop]

    @staticmethod
    def _whole(node, values):
        """One function or operation on whole columns, with ``evaluate_tree``'s numpy calls."""
        args = [values[o] for o in node.operands]
        if node.kind == "call":
            return FUNCTIONS[node.what](args[0])
        if node.kind == "pow":
            return np.power(*args)
        if node.kind == "div":
            return np.divide(*args)
        if node.kind == "neg":
            return -args[0]
        left, right = args
        return left + right if node.kind == "add" else left - right if node.kind == "sub" else left * right
