"""Library evaluation Θ(x, u): the plain per-term path against the shared plan.

Reference path: what ``Library.evaluate`` did before issue #14, and what a user of our
parser writes: every term's parsed expression evaluated on its own over the column views,
each result copied into its column of [Θ Ẋ]. Ours: ``Library.evaluate``, the terms
compiled into one plan (discover.terms._SharedPlan): common subexpressions once, so a
monomial is one multiplication of a lower-degree one; products and sums a block of rows
at a time in a column-major scratch, moved into [Θ Ẋ] by one transposed copy per block;
functions on whole columns as before. For scale, the polynomial case
also times pysindy's ``PolynomialLibrary.transform`` on the same columns (no Ẋ appended)
and compares its values, column by column, with ours; and every case prints one Gram
product [Θ Ẋ]ᵀ[Θ Ẋ] of the same rows, the work the library evaluation feeds.

Both paths fill the same [Θ Ẋ] layout (rows of Θ side by side with Ẋ, as the Gram pass
wants it). Each time is the best of ``--repeats`` calls after one untimed call (the first
touch of fresh memory is slow on some machines and would favour whichever runs second).
The script checks that both give the same bits, and prints the largest difference in
units in the last place (ulp) if they do not. Peak memory above the result is measured
in a separate, untimed call (tracemalloc).

BLAS runs on one thread (threadpoolctl), as in the other benchmarks; neither path calls it.

Run:  python benchmarks/library.py                     # 1e5 and 1e6 rows, both libraries
      python benchmarks/library.py --rows 100000 --repeats 5
      python benchmarks/library.py --block-bytes 262144  # another block size for the plan
Times are wall-clock on this machine; nothing here is asserted in tests.
"""

from __future__ import annotations

import argparse
import functools
import time
import tracemalloc

import numpy as np
from pysindy import PolynomialLibrary
from threadpoolctl import threadpool_limits

from discover import terms
from discover.terms import build_library, columns_of, term_key

STATES, INPUTS = ["x1", "x2", "x3", "x4"], ["u"]


def libraries():
    """The two libraries timed: name -> Library."""
    return {
        "degree 3 (4 states + 1 input)": build_library(STATES, INPUTS, degree=3),
        "degree 2 + trig (f = 1, 2; x inputs)": build_library(
            STATES, INPUTS, degree=2, trig_variables=["x1", "x2"], trig_frequencies=(1, 2),
            trig_input_products=True,
        ),
    }


def make_data(n_rows, seed=0):
    """States x (n_rows, 4), input u (n_rows, 1) and Ẋ (n_rows, 4), separate arrays as in a run."""
    rng = np.random.default_rng(seed)
    z = np.cumsum(rng.uniform(-1.0, 1.0, size=(n_rows, 9)), axis=0) / np.sqrt(n_rows)
    return np.ascontiguousarray(z[:, :4]), np.ascontiguousarray(z[:, 4:5]), np.ascontiguousarray(z[:, 5:])


def reference_evaluate(library, x, u, *, append=None):
    """[Θ append], each term's expression evaluated on its own (the path before issue #14)."""
    columns = columns_of(library.state_names, library.input_names, x, u)
    extra = 0 if append is None else append.shape[1]
    theta = np.empty((x.shape[0], len(library) + extra))
    for j, term in enumerate(library.terms):
        theta[:, j] = term.expression.evaluate(columns)
    if extra:
        theta[:, len(library):] = append
    return theta


def ulp_distance(a, b):
    """Largest distance in representable doubles between a and b (0 = same bits); NaN-free input."""
    ia, ib = a.view(np.int64), b.view(np.int64)
    # Map the sign-magnitude bit patterns onto one increasing integer line.
    ia = np.where(ia < 0, np.iinfo(np.int64).min - ia, ia)
    ib = np.where(ib < 0, np.iinfo(np.int64).min - ib, ib)
    return int(np.max(np.abs(ia - ib))) if a.size else 0


def best_time(function, repeats):
    function()  # untimed: first touch of memory, plan compiled and cached
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        result = function()
        times.append(time.perf_counter() - start)
        del result
    return min(times)


def peak_extra_bytes(function, result_bytes):
    tracemalloc.start()
    result = function()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    del result
    return peak - result_bytes


def sindy_transform(z):
    return PolynomialLibrary(degree=3).fit(z).transform(z)


def pysindy_columns(library, z):
    """pysindy's degree-3 polynomial of z, its columns put in our order."""
    reference = PolynomialLibrary(degree=3).fit(z)
    values = np.asarray(reference.transform(z))
    names = library.state_names + library.input_names
    position = {}
    for c, powers in enumerate(reference.powers_):
        key = tuple(sorted((names[i], int(p)) for i, p in enumerate(powers) if p))
        position[key or ("constant",)] = c
    return values[:, [position[term_key(name)] for name in library.names]]


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, nargs="+", default=[100_000, 1_000_000])
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--block-bytes", type=int, default=terms.BLOCK_BYTES,
                        help=f"bytes of [Θ Ẋ] per block of the plan (default {terms.BLOCK_BYTES})")
    args = parser.parse_args(argv)
    terms.BLOCK_BYTES = args.block_bytes
    print(f"block of the plan: {terms.BLOCK_BYTES} bytes; best of {args.repeats} calls; BLAS on 1 thread")
    header = f"{'rows':>9}  {'library':<38} {'k':>3}  {'reference s':>11}  {'ours s':>8}  {'ratio':>6}  " \
             f"{'equal':<8}  {'extra MiB ref/ours':>18}"
    print(header)
    with threadpool_limits(limits=1), np.errstate(all="ignore"):
        for n_rows in args.rows:
            x, u, x_dot = make_data(n_rows)
            for name, library in libraries().items():
                ours = functools.partial(library.evaluate, x, u, append=x_dot)
                reference = functools.partial(reference_evaluate, library, x, u, append=x_dot)

                t_ref, t_ours = best_time(reference, args.repeats), best_time(ours, args.repeats)
                a, b = reference(), ours()
                same = np.array_equal(a.view(np.int64), b.view(np.int64))
                equal = "bitwise" if same else f"{ulp_distance(a, b)} ulp"
                extra = [peak_extra_bytes(f, a.nbytes) / 2**20 for f in (reference, ours)]
                print(f"{n_rows:>9}  {name:<38} {len(library):>3}  {t_ref:>11.3f}  {t_ours:>8.3f}  "
                      f"{t_ref / t_ours:>6.1f}  {equal:<8}  {extra[0]:>8.0f} / {extra[1]:<7.0f}")
                t_gram = best_time(functools.partial(np.dot, a.T, a), args.repeats)
                print(f"{'':>9}  {'  for scale: one [Θ Ẋ]ᵀ[Θ Ẋ] product':<38} {'':>3}  {'':>11}  {t_gram:>8.3f}  "
                      f"{t_ours / t_gram:>6.1f}  (library evaluation / Gram product)")
                del a
                if name.startswith("degree 3"):
                    z = np.hstack([x, u])
                    t_sindy = best_time(functools.partial(sindy_transform, z), args.repeats)
                    gap = np.max(np.abs(pysindy_columns(library, z) - b[:, :len(library)]) /
                                 np.maximum(np.abs(b[:, :len(library)]), np.finfo(float).tiny))
                    print(f"{'':>9}  {'  pysindy PolynomialLibrary (Θ only)':<38} {len(library):>3}  "
                          f"{t_sindy:>11.3f}  {t_ours:>8.3f}  {t_sindy / t_ours:>6.1f}  "
                          f"max relative difference {gap:.1e}")
                del b


if __name__ == "__main__":
    main()
