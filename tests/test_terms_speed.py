"""The shared evaluation plan of ``Library.evaluate`` (issue #14) against plain evaluation.

The plain path evaluates every term's parsed expression on its own, as ``Library.evaluate``
did before the plan; the plan must give the same bits (the project promises the same model
bit for bit from the same config and data). Outside check: pysindy's PolynomialLibrary for
the polynomial columns (to rounding; pysindy multiplies in its own order).
"""

from __future__ import annotations

import pickle

import numpy as np
import pytest
from pysindy import PolynomialLibrary

from discover import terms
from discover.terms import Library, Term, build_library, columns_of, term_key

STATES, INPUTS = ("a", "b", "c"), ("u", "v")

CUSTOM = (
    "a*b*c", "a**2*b**2", "a*(b+c)", "(a-b)/(c+4)", "-c", "+b*2", "a**(1+1)*u", "a**10",
    "abs(a)**b", "2**a", "abs(b)**0.5", "v**-1", "sin(a*b)/(1+c**2)", "exp(-a**2)*u",
    "tanh(a)*cos(2*b)", "sqrt(abs(u))", "log(1+a**2)", "sin(cos(a))", "a*a*a*u - 3",
    "sin(a)*b**2", "1/(1+exp(-b))", "3*2", "log(1+sin(b)**2)", "cos(a)*sin(a)**3",
)


def plain_evaluate(library, x, u, append=None):
    """[Θ append] with every term's expression evaluated alone (the path before the plan)."""
    columns = columns_of(library.state_names, library.input_names, x, u)
    extra = 0 if append is None else append.shape[1]
    theta = np.empty((x.shape[0], len(library) + extra))
    for j, term in enumerate(library.terms):
        theta[:, j] = term.expression.evaluate(columns)
    if extra:
        theta[:, len(library):] = append
    return theta


def assert_same_bits(actual, expected):
    assert actual.shape == expected.shape and actual.dtype == expected.dtype
    same = actual.view(np.int64) == expected.view(np.int64)
    if not same.all():
        row, col = np.argwhere(~same)[0]
        raise AssertionError(f"column {col}, row {row}: {actual[row, col]!r} != {expected[row, col]!r}")


LIBRARIES = {
    "degree 3": {"degree": 3},
    "degree 4, one input power, no constant": {"degree": 4, "input_degree": 1, "constant": False},
    "no state-input products": {"degree": 3, "state_input_products": False},
    "chosen variables": {"degree": 3, "variables": ["c", "u", "a"]},
    "trig with input products": {"degree": 2, "trig_variables": ["a", "c"], "trig_frequencies": (1, 2.5),
                                 "trig_input_products": True},
    "custom": {"degree": 2, "custom": CUSTOM},
    "custom only": {"degree": 0, "constant": False, "custom": CUSTOM[:8]},
    "constant only": {"degree": 0},
}


def random_run(n_rows, seed, n_inputs=2):
    rng = np.random.default_rng(seed)
    x = rng.uniform(-2.0, 2.0, size=(n_rows, 3))
    u = rng.uniform(0.1, 1.5, size=(n_rows, n_inputs)) * rng.choice([-1.0, 1.0], size=(n_rows, n_inputs))
    x_dot = rng.standard_normal((n_rows, 3))
    return x, u, x_dot


@pytest.fixture
def small_blocks(monkeypatch):
    # Blocks of 64 rows (the least), so that small data crosses many block edges.
    monkeypatch.setattr(terms, "BLOCK_BYTES", 1)


@pytest.mark.parametrize("name", LIBRARIES)
@pytest.mark.parametrize("n_rows", [1, 64, 1000, 3001])
def test_plan_gives_the_plain_bits(name, n_rows, small_blocks):
    library = build_library(STATES, INPUTS, **LIBRARIES[name])
    x, u, x_dot = random_run(n_rows, seed=n_rows)
    with np.errstate(all="ignore"):
        assert_same_bits(library.evaluate(x, u, append=x_dot), plain_evaluate(library, x, u, x_dot))
        assert_same_bits(library.evaluate(x, u), plain_evaluate(library, x, u))


@pytest.mark.parametrize("seed", range(3))
def test_plan_with_default_blocks_and_kept_fraction(seed, monkeypatch):
    library = build_library(STATES, INPUTS, degree=3, trig_variables=["a", "b"], trig_input_products=True,
                            custom=CUSTOM)
    x, u, x_dot = random_run(20_000, seed)
    with np.errstate(all="ignore"):
        expected = plain_evaluate(library, x, u, x_dot)
        assert_same_bits(library.evaluate(x, u, append=x_dot), expected)
        # No room to hold whole-column terms: they go into Θ column by column.
        monkeypatch.setattr(terms, "KEPT_FRACTION", 0.0)
        assert_same_bits(library.evaluate(x, u, append=x_dot), expected)


def test_layouts_and_views(small_blocks):
    """Fortran-ordered states, inputs as a view of the same array, no inputs at all."""
    library = build_library(STATES, INPUTS, degree=3, trig_variables=["b"], custom=CUSTOM)
    x, u, x_dot = random_run(777, seed=5)
    z = np.hstack([x, u])
    with np.errstate(all="ignore"):
        for xs, us in [(np.asfortranarray(x), u), (z[:, :3], z[:, 3:]), (x[::-1], u[::-1])]:
            assert_same_bits(library.evaluate(xs, us, append=x_dot), plain_evaluate(library, xs, us, x_dot))
        no_inputs = build_library(STATES, (), degree=3, trig_variables=["a"], custom=["a*b/c", "sin(c)**2"])
        empty_u = np.empty((len(x), 0))
        assert_same_bits(no_inputs.evaluate(x, empty_u, append=x_dot),
                         plain_evaluate(no_inputs, x, empty_u, x_dot))


def test_repeated_terms_and_subsets(small_blocks):
    """A library built by hand may hold a term twice; each copy gets the same column."""
    full = build_library(STATES, INPUTS, degree=2, trig_variables=["a"], custom=["a*b*c", "exp(b)*u"])
    library = full.subset([0, 3, 3, len(full) - 1, len(full) - 1, 5, 0, len(full) - 3, len(full) - 3])
    again = Term(full.terms[4].expr, full.terms[4].expression)
    doubled = Library(STATES, INPUTS, library.terms + (again, again))
    x, u, x_dot = random_run(500, seed=7)
    for lib in (library, doubled):
        assert_same_bits(lib.evaluate(x, u, append=x_dot), plain_evaluate(lib, x, u, x_dot))


def test_empty_run_and_other_dtypes(small_blocks):
    library = build_library(STATES, INPUTS, degree=2, custom=["sin(a)*u"])
    x, u, x_dot = random_run(0, seed=0)
    assert library.evaluate(x, u, append=x_dot).shape == (0, len(library) + 3)
    # float32 columns compute in float32, as each expression alone does (the plain path).
    x, u, x_dot = random_run(300, seed=1)
    x32, u32 = x.astype(np.float32), u.astype(np.float32)
    assert_same_bits(library.evaluate(x32, u32, append=x_dot), plain_evaluate(library, x32, u32, x_dot))


def test_plan_shares_lower_degree_products():
    """Degree 3 over 4 variables: 10 products of degree 2 and 20 of degree 3, each computed once."""
    library = build_library(("a", "b", "c"), ("u",), degree=3)
    plan = library._plan
    assert len(library) == 35  # 1 + 4 + 10 + 20, C(4 + 3, 3)
    products = [plan.nodes[i] for i in plan.block_steps]
    assert all(node.kind == "mul" for node in products) and len(products) == 30
    assert not plan.whole_steps and not plan.scratch_row  # nothing outside Θ


def test_plan_survives_pickling(small_blocks):
    """Libraries travel to worker processes; the cached plan travels with them."""
    library = build_library(STATES, INPUTS, degree=2, trig_variables=["a"], custom=CUSTOM[:6])
    x, u, x_dot = random_run(200, seed=3)
    first = library.evaluate(x, u, append=x_dot)
    again = pickle.loads(pickle.dumps(library))
    assert again.names == library.names and "_plan" in vars(again)
    assert_same_bits(again.evaluate(x, u, append=x_dot), first)


def test_polynomial_columns_match_pysindy():
    """Reference library: pysindy's PolynomialLibrary (degree 3), columns matched by their powers."""
    library = build_library(STATES, INPUTS, degree=3)
    x, u, _ = random_run(2000, seed=11)
    z = np.hstack([x, u])
    reference = PolynomialLibrary(degree=3).fit(z)
    values = np.asarray(reference.transform(z))
    names = STATES + INPUTS
    position = {}
    for column, powers in enumerate(reference.powers_):
        key = tuple(sorted((names[i], int(p)) for i, p in enumerate(powers) if p))
        position[key or ("constant",)] = column
    expected = values[:, [position[term_key(name)] for name in library.names]]
    np.testing.assert_allclose(library.evaluate(x, u), expected, rtol=4 * np.finfo(float).eps, atol=0)


def test_non_finite_values(small_blocks):
    """inf and NaN in the data: the same bits wherever the value is a number, NaN where NaN.

    Where two NaNs meet in one product, the one that comes out (its sign and payload) may
    differ between vector and scalar code (x86 keeps the first operand's, and a compiler
    may swap the operands of a product); both paths then give a NaN, which the Gram pass
    refuses anyway.
    """
    library = build_library(STATES, INPUTS, degree=3, trig_variables=["a"], trig_input_products=True,
                            custom=CUSTOM)
    x, u, x_dot = random_run(3000, seed=2)
    x[::7, 0], x[::11, 1], u[::13, 0], x[::17, 2], u[::19, 1] = np.nan, np.inf, -np.inf, 0.0, 0.0
    with np.errstate(all="ignore"):
        actual, expected = library.evaluate(x, u, append=x_dot), plain_evaluate(library, x, u, x_dot)
    nan = np.isnan(expected)
    assert nan.any() and np.array_equal(np.isnan(actual), nan)
    assert_same_bits(np.where(nan, 0.0, actual), np.where(nan, 0.0, expected))
