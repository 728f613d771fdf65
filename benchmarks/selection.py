"""Threshold cross-validation and block bootstrap: the reference path against ours.

Reference path, as a careful pysindy user writes it: the library matrix Θ evaluated
once; then for every threshold x fold, the fold's training rows scaled once (each
column divided by its RMS on those rows, each target by its RMS) and one
``STLSQ(...).fit(theta_scaled, x_dot_scaled)`` for all targets at once; and the same
for every bootstrap member on the member's rows (the same blocks, drawn with the same
seed). Ours: the library evaluated side by side with Ẋ, block Grams ``[Θ Ẋ]ᵀ[Θ Ẋ]`` in
one pass, folds as total minus fold, members as weighted sums of block Grams
(discover.selection / bootstrap). Our sweep and our bootstrap each count the whole
Gram pass (library evaluation + block products); the reference counts its library
evaluation. Both work on the same dimensionless problem, so they must select the
same terms; the script checks it.

BLAS runs on one thread on both sides (threadpoolctl), so the ratio compares the
work, not the number of cores each path happens to use.

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
from pysindy.optimizers import STLSQ
from threadpoolctl import threadpool_limits

from discover import bootstrap
from discover.selection import block_grams, cross_validate, fit_scaled
from discover.terms import build_library

N_THRESHOLDS, N_FOLDS, N_MEMBERS = 20, 5, 100
RIDGE, MAX_ITER = 1e-5, 20


def make_problem(n_rows, degree, seed=0):
    """3 states + 1 input, a polynomial library, and a sparse true model plus noise.

    Returns the library, the states x (n_rows, 3), the input u (n_rows, 1) and Ẋ (n_rows, 3).
    """
    rng = np.random.default_rng(seed)
    library = build_library(["x1", "x2", "x3"], ["u"], degree=degree)
    z = rng.uniform(-1.0, 1.0, size=(n_rows, 4))
    # A smooth trajectory-like signal so that neighbouring rows are correlated.
    z = np.cumsum(z, axis=0) / np.sqrt(np.arange(1, n_rows + 1))[:, None]
    z = z / np.abs(z).max(axis=0)
    x, u = z[:, :3], z[:, 3:]
    xi = np.zeros((len(library), 3))
    xi[[1, 2], 0] = [-1.0, 0.8]
    xi[[2, 4, 6], 1] = [0.5, -1.2, 0.3]
    xi[[3, 5], 2] = [-0.7, 0.9]
    x_dot = library.evaluate(x, u) @ xi + 0.05 * rng.standard_normal((n_rows, 3))
    return library, x, u, x_dot


def reference_fit(theta, x_dot, rows, thresholds):
    """pysindy STLSQ on the scaled problem of ``rows`` (same scale as ours), all targets in one fit.

    Parameters
    ----------
    theta : ndarray of shape (n_samples, n_terms)
    x_dot : ndarray of shape (n_samples, n_targets)
    rows : ndarray of int
        The fit's rows (a member's rows may repeat).
    thresholds : ndarray of shape (n_targets,)
        Dimensionless threshold of each target.

    Returns
    -------
    coef : ndarray of shape (n_terms, n_targets), in data units
    """
    theta_scaled = theta[rows]  # the one copy of the rows; scaled in place
    n = len(rows)
    s_theta = np.sqrt(np.einsum("ij,ij->j", theta_scaled, theta_scaled) / n)
    theta_scaled /= s_theta
    y = x_dot[rows]
    s_y = np.sqrt(np.mean(y**2, axis=0))
    # pysindy takes one threshold for all targets; a per-target threshold t_i is folded into
    # the target's scale (ridge solutions are linear in the target, so thresholding y_i/(s_i t_i)
    # at 1 keeps the same terms as thresholding y_i/s_i at t_i). Ridge on the scaled rows is
    # ours times n (our Gram is a mean, pysindy's a sum).
    level = s_y * thresholds
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        opt = STLSQ(threshold=1.0, alpha=RIDGE * n, max_iter=MAX_ITER, copy_X=False)
        opt.fit(theta_scaled, y / level)
    return opt.coef_.T * level / s_theta[:, None]


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


def evenly_spaced(n_items, limit):
    """Indices of ``limit`` items spread over ``n_items`` (all when limit is 0)."""
    if not limit or limit >= n_items:
        return np.arange(n_items)
    return np.linspace(0, n_items - 1, limit).astype(int)


def reference(theta, x_dot, thresholds, n_blocks, selected, weights, limit):
    """The reference fits; with ``limit``, only that many fits of each kind are timed and scaled up."""
    rows = block_rows(len(theta), n_blocks)
    folds = np.arange(n_blocks) * N_FOLDS // n_blocks
    n_targets = x_dot.shape[1]
    jobs = [(t, f) for f in range(N_FOLDS) for t in range(len(thresholds))]
    # Evenly spaced over thresholds and folds: fits at small thresholds keep more terms and cost more.
    cv_jobs = [jobs[i] for i in evenly_spaced(len(jobs), limit)]
    supports, start = {}, time.perf_counter()
    for t, f in cv_jobs:
        train = np.concatenate([r for r, label in zip(rows, folds) if label != f])
        supports[(t, f)] = reference_fit(theta, x_dot, train, np.full(n_targets, thresholds[t])) != 0
    t_cv = (time.perf_counter() - start) * len(jobs) / len(cv_jobs)
    members = evenly_spaced(N_MEMBERS, limit)
    member_supports, start = [], time.perf_counter()
    for m in members:
        # The member's rows: each block repeated as often as it was drawn.
        picked = np.concatenate([np.tile(rows[b], int(w)) for b, w in enumerate(weights[m]) if w])
        member_supports.append(reference_fit(theta, x_dot, picked, selected) != 0)
    t_boot = (time.perf_counter() - start) * N_MEMBERS / len(members)
    return t_cv, t_boot, supports, members, member_supports


def best_of(repeat, fn):
    """Shortest wall-clock time of ``repeat`` calls."""
    best, value = np.inf, None
    for _ in range(repeat):
        start = time.perf_counter()
        value = fn()
        best = min(best, time.perf_counter() - start)
    return best, value


def run_case(n_rows, degree, limit, seed=0):
    library, x, u, x_dot = make_problem(n_rows, degree, seed)
    k = len(library)
    thresholds = np.geomspace(1e-3, 1.0, N_THRESHOLDS)
    n_blocks = 200
    rows = block_rows(n_rows, n_blocks)
    folds = np.arange(n_blocks) * N_FOLDS // n_blocks
    weights = bootstrap.member_weights(np.zeros(n_blocks, dtype=int), N_MEMBERS, "blocks",
                                       np.random.default_rng(seed))
    available = np.ones((N_MEMBERS, k), dtype=bool)

    # Ours: [Θ Ẋ] side by side, as the pipeline's library evaluation lays it out, then block Grams.
    t_library, z = best_of(3, lambda: library.evaluate(x, u, append=x_dot))

    def grams():
        return block_grams(((0, z[r[0]: r[-1] + 1], None) for r in rows), n_terms=k)

    def sweep():
        return cross_validate(blocks, folds, thresholds, ridge=RIDGE, max_iter=MAX_ITER, rule="min")

    def ensemble():
        return bootstrap.fit_ensemble(blocks, weights, available, cv.selected, ridge=RIDGE, max_iter=MAX_ITER)

    t_blocks, blocks = best_of(3, grams)
    t_sweep, cv = best_of(3, sweep)
    t_members, members = best_of(3, ensemble)
    del z
    tracemalloc.start()  # a separate pass: tracing slows allocations, so it is not timed
    z = library.evaluate(x, u, append=x_dot)
    blocks = grams()
    cv, members = sweep(), ensemble()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    z_bytes = z.nbytes
    del z
    supports = cv_supports(blocks, folds, thresholds)

    # Reference: Θ evaluated once (timed the same way), then the fits.
    t_ref_library, theta = best_of(3, lambda: library.evaluate(x, u))
    t_gram, _ = best_of(3, lambda: theta.T @ theta)  # the floor, on a contiguous Θ
    ref_cv, ref_boot, ref_supports, timed_members, ref_member_supports = reference(
        theta, x_dot, thresholds, n_blocks, cv.selected, weights, limit)
    same_cv = all(np.array_equal(supports[key], ref_supports[key]) for key in ref_supports)
    same_members = all(np.array_equal(members[m] != 0, s) for m, s in zip(timed_members, ref_member_supports))

    gram_pass = t_library + t_blocks
    ours_cv, ours_boot = gram_pass + t_sweep, gram_pass + t_members
    ref_cv_total, ref_boot_total = t_ref_library + ref_cv, t_ref_library + ref_boot
    whole = gram_pass + t_sweep + t_members
    ref_whole = t_ref_library + ref_cv + ref_boot
    scaled = f" (reference timed on {limit} fits of each kind, scaled up)" if limit else " (full reference path)"
    print(f"\nN = {n_rows:.0e} rows, k = {k} terms, 3 targets; {N_THRESHOLDS} thresholds x {N_FOLDS} folds, "
          f"{N_MEMBERS} block-bootstrap members; BLAS on 1 thread{scaled}")
    print(f"  one ThetaT Theta product       {t_gram:9.3f} s   (the floor)")
    print(f"  library evaluation             ours [Theta Xdot] {t_library:8.3f} s, reference Theta {t_ref_library:8.3f} s")
    print(f"  block Grams (one pass)         {t_blocks:9.3f} s   -> Gram pass {gram_pass:.3f} s")
    print(f"  CV sweep:  reference {ref_cv_total:9.2f} s (library + {N_THRESHOLDS * N_FOLDS} fits), "
          f"ours {ours_cv:8.3f} s (Gram pass + sweep {t_sweep:.3f} s)  -> {ref_cv_total / ours_cv:7.0f}x   "
          f"same supports: {same_cv} ({len(ref_supports)} fits compared)")
    print(f"  bootstrap: reference {ref_boot_total:9.2f} s (library + {N_MEMBERS} fits), "
          f"ours {ours_boot:8.3f} s (Gram pass + members {t_members:.3f} s)  -> {ref_boot_total / ours_boot:7.0f}x   "
          f"same supports: {same_members} ({len(ref_member_supports)} members compared)")
    print(f"  whole selection: reference {ref_whole:9.2f} s, ours {whole:8.3f} s (Gram pass + sweep + bootstrap)"
          f"  -> {ref_whole / whole:7.0f}x")
    print(f"  whole selection / one ThetaT Theta: {whole / t_gram:.1f}   "
          f"(without the library evaluation: {(whole - t_library) / t_gram:.1f})")
    for what, value, target, at in (("CV sweep speed-up", ref_cv_total / ours_cv, 500, (1_000_000, 35)),
                                    ("CV sweep speed-up", ref_cv_total / ours_cv, 300, (100_000, 70)),
                                    ("bootstrap speed-up", ref_boot_total / ours_boot, 100, None),
                                    ("whole selection / one ThetaT Theta", whole / t_gram, 5, (1_000_000, 35))):
        if at is None or at == (n_rows, k):
            better = value <= target if "ThetaT" in what else value >= target
            sign = "<=" if "ThetaT" in what else ">="
            print(f"  target {what} {sign} {target}: {value:.1f} -> {'met' if better else 'NOT met'}")
    print(f"  peak memory of our path (tracemalloc, library matrix included) {peak / 2**20:.1f} MiB; "
          f"library matrix [Theta Xdot] itself {z_bytes / 2**20:.0f} MiB")


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=float, nargs="*", default=[1e5, 1e6])
    parser.add_argument("--degree", type=int, nargs="*", default=[3, 4], help="3: 35 terms, 4: 70 terms")
    parser.add_argument("--reference-fits", type=int, default=0,
                        help="time only this many reference fits per group and scale (0: all)")
    args = parser.parse_args()
    # numpy, scipy and scikit-learn are loaded by now, so every BLAS they use is limited.
    with threadpool_limits(limits=1):
        for n_rows in args.rows:
            for degree in args.degree:
                run_case(int(n_rows), degree, args.reference_fits)


if __name__ == "__main__":
    main()
