"""Threshold cross-validation and block bootstrap: the reference path against ours.

Reference path: pysindy's STLSQ fitted on the full library matrix for every
threshold x fold, and again on every bootstrap member's resampled rows (the same
blocks, drawn with the same seed). Ours: block Grams computed once, folds as total
minus fold, members as weighted sums of block Grams (discover.selection / bootstrap).
Both work on the same dimensionless problem (columns divided by their RMS on the
training rows), so they must select the same terms; the script checks it.

Run:  python benchmarks/selection.py                       # N = 1e5 and 1e6, k = 35 and 70
      python benchmarks/selection.py --rows 100000 --degree 3
      python benchmarks/selection.py --reference-fits 10     # time only 10 reference fits per
                                                             # group and scale up (stated)
Times are wall-clock on this machine; nothing here is asserted in tests.
"""

from __future__ import annotations

import argparse
import time
import tracemalloc
import warnings

import numpy as np

from discover import bootstrap
from discover.selection import block_grams, cross_validate, fit_scaled
from discover.terms import build_library

N_THRESHOLDS, N_FOLDS, N_MEMBERS = 20, 5, 100
RIDGE, MAX_ITER = 1e-5, 20


def make_problem(n_rows, degree, seed=0):
    """3 states + 1 input, a polynomial library, and a sparse true model plus noise."""
    rng = np.random.default_rng(seed)
    library = build_library(["x1", "x2", "x3"], ["u"], degree=degree)
    z = rng.uniform(-1.0, 1.0, size=(n_rows, 4))
    # A smooth trajectory-like signal so that neighbouring rows are correlated.
    z = np.cumsum(z, axis=0) / np.sqrt(np.arange(1, n_rows + 1))[:, None]
    z = z / np.abs(z).max(axis=0)
    theta = library.evaluate(z[:, :3], z[:, 3:])
    xi = np.zeros((len(library), 3))
    xi[[1, 2], 0] = [-1.0, 0.8]
    xi[[2, 4, 6], 1] = [0.5, -1.2, 0.3]
    xi[[3, 5], 2] = [-0.7, 0.9]
    x_dot = theta @ xi + 0.05 * rng.standard_normal((n_rows, 3))
    return library, theta, x_dot


def reference_fit(theta, x_dot, threshold):
    """pysindy STLSQ on the scaled problem of these rows (same scale as ours)."""
    from pysindy.optimizers import STLSQ

    n = len(theta)
    s_theta = np.sqrt(np.mean(theta**2, axis=0))
    s_y = np.sqrt(np.mean(x_dot**2, axis=0))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        coef = np.column_stack([
            STLSQ(threshold=float(threshold[i]), alpha=RIDGE * n, max_iter=MAX_ITER)
            .fit(theta / s_theta, x_dot[:, i] / s_y[i]).coef_[0]
            for i in range(x_dot.shape[1])
        ])
    return coef * s_y / s_theta[:, None]


def block_rows(n_rows, n_blocks):
    return np.array_split(np.arange(n_rows), n_blocks)


def cv_supports(blocks, folds, thresholds):
    """Support of every threshold x fold fit (for the comparison; same kernels as cross_validate)."""
    total, count = blocks.total()
    out = {}
    for f in np.unique(folds):
        held = blocks.grams[folds == f].sum(axis=0)
        n_held = blocks.counts[folds == f].sum()
        for t, threshold in enumerate(thresholds):
            coef, _ = fit_scaled(total - held, count - n_held, blocks.n_terms, threshold=threshold,
                                 ridge=RIDGE, max_iter=MAX_ITER)
            out[(t, f)] = coef != 0
    return out


def reference(theta, x_dot, thresholds, n_blocks, selected, weights, limit):
    """The reference path; with ``limit``, only that many fits of each kind are timed."""
    rows = block_rows(len(theta), n_blocks)
    folds = np.arange(n_blocks) * N_FOLDS // n_blocks
    jobs = [(t, f) for f in range(N_FOLDS) for t in range(len(thresholds))]
    # Evenly spaced over thresholds and folds: fits at small thresholds keep more terms and cost more.
    cv_jobs = [jobs[i] for i in np.linspace(0, len(jobs) - 1, limit).astype(int)] if limit else jobs
    supports, start = {}, time.perf_counter()
    for t, f in cv_jobs:
        train = np.concatenate([r for r, label in zip(rows, folds) if label != f])
        coef = reference_fit(theta[train], x_dot[train], np.full(3, thresholds[t]))
        supports[(t, f)] = coef != 0
    t_cv = (time.perf_counter() - start) * len(jobs) / len(cv_jobs)
    members = np.linspace(0, N_MEMBERS - 1, min(limit, N_MEMBERS)).astype(int) if limit else range(N_MEMBERS)
    member_supports, start = [], time.perf_counter()
    for m in members:
        # The member's rows: each block repeated as often as it was drawn.
        picked = np.concatenate([np.tile(rows[b], int(w)) for b, w in enumerate(weights[m]) if w])
        member_supports.append(reference_fit(theta[picked], x_dot[picked], selected) != 0)
    t_boot = (time.perf_counter() - start) * N_MEMBERS / len(members)
    return t_cv, t_boot, supports, member_supports


def best_of(repeat, fn):
    """Shortest wall-clock time of ``repeat`` calls (our path is short enough to repeat)."""
    best, value = np.inf, None
    for _ in range(repeat):
        start = time.perf_counter()
        value = fn()
        best = min(best, time.perf_counter() - start)
    return best, value


def run_case(n_rows, degree, limit, seed=0):
    library, theta, x_dot = make_problem(n_rows, degree, seed)
    k = len(library)
    thresholds = np.geomspace(1e-3, 1.0, N_THRESHOLDS)
    n_blocks = 200
    z = np.hstack([theta, x_dot])
    t_gram, _ = best_of(3, lambda: theta.T @ theta)

    rows = block_rows(n_rows, n_blocks)
    folds = np.arange(n_blocks) * N_FOLDS // n_blocks
    weights = bootstrap.member_weights(np.zeros(n_blocks, dtype=int), N_MEMBERS, "blocks",
                                       np.random.default_rng(seed))
    available = np.ones((N_MEMBERS, k), dtype=bool)

    def grams():
        # [Θ Ẋ] side by side, as the pipeline's library evaluation lays it out.
        return block_grams(((0, z[r[0]: r[-1] + 1], None) for r in rows), n_terms=k)

    def sweep():
        return cross_validate(blocks, folds, thresholds, ridge=RIDGE, max_iter=MAX_ITER, rule="min")

    def ensemble():
        return bootstrap.fit_ensemble(blocks, weights, available, cv.selected, ridge=RIDGE, max_iter=MAX_ITER)

    t_blocks, blocks = best_of(3, grams)
    t_sweep, cv = best_of(3, sweep)
    t_members, members = best_of(3, ensemble)
    tracemalloc.start()  # a separate pass: tracing slows allocations, so it is not timed
    blocks, cv, members = grams(), sweep(), ensemble()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    supports = cv_supports(blocks, folds, thresholds)

    ref_cv, ref_boot, ref_supports, ref_member_supports = reference(
        theta, x_dot, thresholds, n_blocks, cv.selected, weights, limit)
    same_cv = all(np.array_equal(supports[key], ref_supports[key]) for key in ref_supports)
    timed_members = np.linspace(0, N_MEMBERS - 1, min(limit, N_MEMBERS)).astype(int) if limit else range(N_MEMBERS)
    same_members = all(np.array_equal(members[m] != 0, s) for m, s in zip(timed_members, ref_member_supports))
    scaled = f" (timed on {limit} fits of each kind, scaled up)" if limit else ""
    print(f"\nN = {n_rows:.0e} rows, k = {k} terms, 3 targets; {N_THRESHOLDS} thresholds x {N_FOLDS} folds, "
          f"{N_MEMBERS} block-bootstrap members{scaled}")
    print(f"  one ThetaT Theta product      {t_gram:9.3f} s   (the floor)")
    print(f"  block Grams (one pass)        {t_blocks:9.3f} s")
    print(f"  CV sweep: reference {ref_cv:9.2f} s, ours {t_sweep:8.4f} s  -> {ref_cv / t_sweep:8.0f}x   "
          f"same supports: {same_cv} ({len(ref_supports)} fits compared)")
    print(f"  bootstrap: reference {ref_boot:8.2f} s, ours {t_members:8.4f} s  -> {ref_boot / t_members:8.0f}x   "
          f"same supports: {same_members} ({len(ref_member_supports)} members compared)")
    whole = t_blocks + t_sweep + t_members
    print(f"  whole selection (Grams + sweep + bootstrap) {whole:.3f} s = {whole / t_gram:.1f} x one ThetaT Theta")
    for what, value, target, at in (("CV sweep speed-up", ref_cv / t_sweep, 500, (1_000_000, 35)),
                                    ("CV sweep speed-up", ref_cv / t_sweep, 300, (100_000, 70)),
                                    ("bootstrap speed-up", ref_boot / t_members, 100, None),
                                    ("whole selection / one ThetaT Theta", whole / t_gram, 5, (1_000_000, 35))):
        if at is None or at == (n_rows, k):
            better = value <= target if "ThetaT" in what else value >= target
            sign = "<=" if "ThetaT" in what else ">="
            print(f"  target {what} {sign} {target}: {value:.1f} -> {'met' if better else 'NOT met'}")
    print(f"  peak memory of our path (tracemalloc, beyond the library matrix) {peak / 2**20:.1f} MiB; "
          f"library matrix itself {z.nbytes / 2**20:.0f} MiB")


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=float, nargs="*", default=[1e5, 1e6])
    parser.add_argument("--degree", type=int, nargs="*", default=[3, 4], help="3: 35 terms, 4: 70 terms")
    parser.add_argument("--reference-fits", type=int, default=0,
                        help="time only this many reference fits per group and scale (0: all)")
    args = parser.parse_args()
    for n_rows in args.rows:
        for degree in args.degree:
            run_case(int(n_rows), degree, args.reference_fits)


if __name__ == "__main__":
    main()
