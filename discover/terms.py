"""Candidate term libraries Θ(x, u): polynomials, trigonometric terms, custom terms.

Every term carries its expression string in Python syntax over the column names
(the model-file contract of DESIGN.md), and is evaluated through the whitelist
parser of :mod:`discover.expressions`.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np

from .exceptions import ConfigError
from .expressions import parse_expression


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
        """
        columns = columns_of(self.state_names, self.input_names, x, u)
        extra = 0 if append is None else append.shape[1]
        theta = np.empty((x.shape[0], len(self.terms) + extra))
        for j, term in enumerate(self.terms):
            theta[:, j] = term.evaluate(columns)
        if extra:
            theta[:, len(self.terms):] = append
        return theta

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
    become one exponent matrix, evaluated for all of them in one numpy expression;
    any other term is evaluated through its parsed expression.

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
            theta[:, self.monomial] = np.prod(z[:, None, :] ** self.powers[None, :, :], axis=2)
        if self.other:
            columns = {name: z[:, i] for i, name in enumerate(self.names)}
            for j, expression in self.other:
                theta[:, j] = expression.evaluate(columns)
        return theta
