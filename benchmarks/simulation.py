"""Simulation: discover's solver path against ``scipy.integrate.solve_ivp`` on a plain numpy right-hand side.

The system is the two-inertia drive of ``benchmarks/end_to_end.py`` (one run of 5,000
samples, a multisine-plus-steps torque). Both sides integrate the same equations with
LSODA at discover's default tolerances (rtol 1e-5, atol 1e-6 × each state's range), the
torque interpolated linearly between samples, and sample at every time of the run.

- One model: ``Model.simulate`` (the terms of a degree-3 library's true support, Θ·Ξ
  evaluated by discover's term evaluator) against ``solve_ivp`` on the equations written
  out in numpy, with ``np.interp`` for the torque, as a careful user writes it.
- 100 members (the prediction-band and ranking case: the same terms, coefficients
  perturbed by 1 %, seeded): ``bootstrap.simulate_ensemble`` (all members in one solver
  call, one term evaluation for all of them per step) against one ``solve_ivp`` call per
  member on the same plain numpy right-hand side with the member's coefficients.

Both run in this process with BLAS on one thread. The script prints times, the ratio and
the largest difference between the two sides' trajectories (relative to each state's
range); nothing here is asserted in tests.

Run:  python benchmarks/simulation.py [--members 100] [--seed 0]
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from scipy.integrate import solve_ivp
from threadpoolctl import threadpool_limits

from discover.bootstrap import simulate_ensemble
from discover.expressions import parse_expression
from discover.model import Model
from end_to_end import ATOL_SHARE, INPUTS, RTOL, STATES, make_run

#: The drive's equations as (equation, term, coefficient): the true model of end_to_end.py.
TRUE_TERMS = [
    (0, "motor_speed", 1.0),
    (1, "motor_angle", -2.5), (1, "load_angle", 1.5), (1, "motor_speed", -0.3), (1, "motor_angle**3", -0.5),
    (1, "torque", 1.0),
    (2, "load_speed", 1.0),
    (3, "motor_angle", 1.5), (3, "load_angle", -1.5), (3, "load_speed", -0.2),
]
TERMS = tuple(dict.fromkeys(term for _, term, _ in TRUE_TERMS))


def coefficient_matrix(values):
    """Ξ of shape (n_terms, n_states) from one value per entry of TRUE_TERMS."""
    coef = np.zeros((len(TERMS), len(STATES)))
    for (i, term, _), value in zip(TRUE_TERMS, values):
        coef[TERMS.index(term), i] = value
    return coef


def plain_rhs(c, t_samples, torque):
    """The drive's right-hand side in numpy with coefficients c (one per TRUE_TERMS entry)."""
    def f(s, x):
        a, w, b, v = x
        u = np.interp(s, t_samples, torque)
        return [c[0] * w,
                c[1] * a + c[2] * b + c[3] * w + c[4] * a**3 + c[5] * u,
                c[6] * v,
                c[7] * a + c[8] * b + c[9] * v]
    return f


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--members", type=int, default=100)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    rng = np.random.default_rng(args.seed)
    run = make_run(rng)
    t, x, u = run["t"].to_numpy(), run[STATES].to_numpy(), run[INPUTS].to_numpy()
    atol = ATOL_SHARE * (x.max(axis=0) - x.min(axis=0))
    truth = np.array([value for _, _, value in TRUE_TERMS])
    members = truth * (1 + 0.01 * rng.standard_normal((args.members, len(truth))))

    with threadpool_limits(limits=1):
        model = Model(tuple(STATES), tuple(INPUTS), TERMS, coefficient_matrix(truth))
        start = time.perf_counter()
        ours_one = model.simulate(t, x[0], u, interpolation="linear", method="LSODA", rtol=RTOL, atol=atol).x
        t_ours_one = time.perf_counter() - start
        start = time.perf_counter()
        ref_one = solve_ivp(plain_rhs(truth, t, u[:, 0]), (t[0], t[-1]), x[0], t_eval=t, method="LSODA",
                            rtol=RTOL, atol=atol).y.T
        t_ref_one = time.perf_counter() - start

        expressions = [parse_expression(term, tuple(STATES) + tuple(INPUTS)) for term in TERMS]
        coef = np.stack([coefficient_matrix(m) for m in members])
        start = time.perf_counter()
        ours_many, _ = simulate_ensemble(expressions, STATES, INPUTS, coef, t, x[0], u, interpolation="linear",
                                         method="LSODA", rtol=RTOL, atol=atol, limits=None)
        t_ours_many = time.perf_counter() - start
        start = time.perf_counter()
        ref_many = np.stack([solve_ivp(plain_rhs(m, t, u[:, 0]), (t[0], t[-1]), x[0], t_eval=t, method="LSODA",
                                       rtol=RTOL, atol=atol).y.T for m in members])
        t_ref_many = time.perf_counter() - start

    spread = x.max(axis=0) - x.min(axis=0)
    print(f"one run of {len(t)} samples, {len(STATES)} states, LSODA rtol {RTOL:g}; BLAS on 1 thread")
    print(f"  one model     discover {t_ours_one:7.3f} s   solve_ivp (plain numpy rhs) {t_ref_one:7.3f} s   "
          f"ratio {t_ref_one / t_ours_one:6.2f}   largest difference "
          f"{np.max(np.abs(ours_one - ref_one) / spread):.1e} of the range")
    print(f"  {args.members} members   discover {t_ours_many:7.3f} s   solve_ivp per member        "
          f"{t_ref_many:7.3f} s   ratio {t_ref_many / t_ours_many:6.2f}   largest difference "
          f"{np.nanmax(np.abs(ours_many - ref_many) / spread):.1e} of the range")


if __name__ == "__main__":
    main()
