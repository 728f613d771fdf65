"""Time the bootstrap ensemble on a demo: its stage against the threshold cross-validation,
and the vectorised simulation of all members against one solver call per member.

Run: python benchmarks/ensemble.py [configs/bioreactor.toml]
Both paths run in this process on the same data; the script prints times and ratios.
"""

import sys
import time

import numpy as np

import discover
from discover import bootstrap
from discover.expressions import parse_expression
from discover.model import Model


def timed(fn, repeat=3):
    best = np.inf
    for _ in range(repeat):
        start = time.perf_counter()
        value = fn()
        best = min(best, time.perf_counter() - start)
    return best, value


def main(path):
    result = discover.run(path)
    n = result.settings.bootstrap.members
    print(f"{path}: {len(result.library_terms)} terms; stage seconds: selection (threshold CV) "
          f"{result.timings['selection']:.3f} s, {n}-member ensemble {result.timings['ensemble']:.3f} s")

    ens, model = result.ensemble, result.model
    run = result.held_out.runs[0] if result.held_out.runs else result.training.runs[0]
    settings = result.simulation
    used = np.flatnonzero(np.any(ens.coef != 0, axis=(0, 2)))
    known = model.state_names + model.input_names
    expressions = [parse_expression(model.terms[j], known) for j in used]
    coef = ens.coef[:, used, :]
    options = dict(interpolation="linear", method=settings.method, rtol=settings.rtol,
                   atol=settings.atol, limits=settings.limits)

    def loop():
        out = []
        for m in range(len(coef)):
            member = Model(model.state_names, model.input_names, tuple(model.terms[j] for j in used), coef[m])
            out.append(member.simulate(run.t, run.x[0], run.u, **options).x)
        return np.array(out)

    def vectorised():
        return bootstrap.simulate_ensemble(expressions, model.state_names, model.input_names, coef,
                                           run.t, run.x[0], run.u, **options)[0]

    t_loop, x_loop = timed(loop, repeat=1)
    t_vec, x_vec = timed(vectorised, repeat=1)
    diverged_loop = ~np.isfinite(x_loop).all(axis=(1, 2))
    diverged_vec = ~np.isfinite(x_vec).all(axis=(1, 2))
    ok = ~diverged_loop & ~diverged_vec
    scale = np.std(x_loop[ok], axis=(0, 1))
    agree = np.max(np.abs(x_loop[ok] - x_vec[ok]) / scale) if ok.any() else np.nan
    print(f"simulate 100 members on {run.name!r} ({len(run.t)} samples): one solve per member "
          f"{t_loop:.2f} s, all members in one solve {t_vec:.2f} s, ratio {t_loop / t_vec:.1f}x")
    print(f"  diverged members: {diverged_loop.sum()} (separate) vs {diverged_vec.sum()} (together), "
          f"same members: {bool(np.array_equal(diverged_loop, diverged_vec))}; largest difference "
          f"of the others: {agree:.1e} of the state's spread (solver tolerance rtol={settings.rtol:g})")


if __name__ == "__main__":
    main(sys.argv[1] if len(sys.argv) > 1 else "configs/bioreactor.toml")
