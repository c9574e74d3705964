"""Benchmark: replicates the required-n search spends, against a uniform grid of 10 n-values.

Case: two arms, normal outcome, d = 0.5, Student's t, two-sided alpha 0.05,
target power 0.8; closed-form required n = 63.77 per arm (noncentral t,
simpower.analytic.t_n; Cohen 1988 Table 2.4.1 gives 64). Range [10, 300].

The goal (issue 4): locate the required n to within 2% of the closed-form
value using at most a third of the replicates that a uniform grid of 10
n-values at the same per-point precision would need.

Measured in replicate counts (deterministic for given seeds), not seconds:

* search: ``required_n(..., rel_tol=0.02)`` over several seeds: total
  replicates, replicates at its busiest value, and the share of seeds whose
  estimate lies within 2% of the closed form.
* grid (a), same per-point precision: 10 values, each with as many
  replicates as the search's busiest value (so every grid point has the MCSE
  the search reached at its estimate).
* grid (b), same precision of n: 10 values with the replicates per point that
  make the grid's own probit fit (the search's estimator, applied to the
  grid) give a 95% interval of +-2% for n, from the model's expected Fisher
  information (deterministic; every grid point counted, which favours the
  grid).

Usage: python scripts/bench_search.py [--quick]
"""

from __future__ import annotations

import argparse
import math

import numpy as np
from scipy import stats

import simpower as sp

LOW, HIGH, TARGET, D = 10, 300, 0.8, 0.5


def grid_info_reps(ns, n_star) -> int:
    """Replicates per point a grid needs for its probit fit to give a 95% interval of +-2% for n.

    Deterministic: the expected Fisher information of the probit model
    probit(p) = a + b sqrt(n), with p the closed-form power at each grid
    value (every grid point counted, which favours the grid), and the delta
    method for n* = ((z - a) / b)^2.
    """
    p = np.array([sp.analytic.t_power(D, n, design="two-sample") for n in ns])
    z = stats.norm.ppf(np.clip(p, 1e-12, 1 - 1e-12))
    x = np.sqrt(ns)
    X = np.column_stack([np.ones_like(x), x])
    b, a = np.polyfit(x[(p > 0.05) & (p < 0.995)], z[(p > 0.05) & (p < 0.995)], 1)
    eta = a + b * x
    mu = stats.norm.cdf(eta)
    w = stats.norm.pdf(eta) ** 2 / (mu * (1 - mu))
    info1 = (X * w[:, None]).T @ X                  # information per replicate at every point
    zt = stats.norm.ppf(TARGET)
    xs = (zt - a) / b
    grad_x = np.array([-1 / b, -(zt - a) / b**2])
    var1 = grad_x @ np.linalg.inv(info1) @ grad_x   # Var(sqrt n*) times R
    se_n = 2 * xs * math.sqrt(var1)                 # per sqrt(R)
    r = (1.959964 * se_n / (0.02 * n_star)) ** 2
    return int(math.ceil(r))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="5 seeds instead of 40")
    args = ap.parse_args()
    seeds = range(1, 6) if args.quick else range(1, 41)
    n_star = sp.analytic.t_n(D, TARGET, design="two-sample")
    sc = sp.Scenario(sp.NormalTwoArm(n=50, effect=D), sp.TTest())

    totals, busiest, within, conv = [], [], [], []
    for s in seeds:
        r = sp_search(sc, s)
        totals.append(r.reps_total)
        busiest.append(int(r.table["reps"].max()))
        within.append(abs(r.estimate / n_star - 1) <= 0.02)
        conv.append(r.converged)
    mean_total, max_total = float(np.mean(totals)), int(np.max(totals))
    grid_a = 10 * float(np.mean(busiest))

    ns = np.array([int(round(v)) for v in np.linspace(LOW, HIGH, 10)], float)
    per_point_b = grid_info_reps(ns, n_star)
    grid_b = 10 * per_point_b

    print(f"closed-form required n: {n_star:.2f} per arm (Cohen 1988: 64)")
    print(f"search over {len(seeds)} seeds: replicates mean {mean_total:.0f}, max {max_total}; "
          f"busiest value mean {np.mean(busiest):.0f}; converged {np.mean(conv):.0%}; "
          f"estimate within 2% of closed form: {np.mean(within):.0%}")
    print(f"grid (a) 10 values x the search's busiest-value replicates: {grid_a:.0f} replicates; "
          f"search/grid = {mean_total / grid_a:.3f} (max {max_total / grid_a:.3f})")
    print(f"grid (b) 10 values x {per_point_b} replicates (expected +-2% for n from its probit fit): "
          f"{grid_b} replicates; search/grid = {mean_total / grid_b:.3f} (max {max_total / grid_b:.3f})")
    # the floor: every replicate at n* itself with the slope known, R = z^2 p(1-p) / (0.02 n* dp/dn)^2
    h = 1e-3 * n_star
    slope = (sp.analytic.t_power(D, n_star + h, design="two-sample")
             - sp.analytic.t_power(D, n_star - h, design="two-sample")) / (2 * h)
    ideal = 1.959964**2 * TARGET * (1 - TARGET) / (0.02 * n_star * slope) ** 2
    print(f"floor (all replicates at n*, slope known): {ideal:.0f} replicates = {ideal / grid_a:.3f} of grid (a), "
          f"{ideal / grid_b:.3f} of grid (b)")
    print(f"goal (search <= 1/3 of the grid, mean over seeds): grid (a) {'met' if mean_total <= grid_a / 3 else 'NOT met'}"
          f", grid (b) {'met' if mean_total <= grid_b / 3 else 'NOT met'}")


def sp_search(sc, seed):
    from simpower.planning.search import required_n

    return required_n(sc, TARGET, low=LOW, high=HIGH, seed=seed, n_jobs=1, rel_tol=0.02)


if __name__ == "__main__":
    main()
