"""The built-in validation battery: simulated against analytic power over a grid.

For each design (one sample, paired, two arms with equal or 2:1 allocation)
and test (z, Student t, Welch t), over n, standardised effect, alpha and
sidedness, the simulated power must lie within ``tolerance`` Monte Carlo SEs of
the closed-form power of :mod:`simpower.analytic` (including effect 0, where
power is the type I error and must equal alpha). The MCSE used is the one at
the analytic value, sqrt(p(1-p)/R) (Morris, White & Crowther 2019).

With about 300 grid points and a 4-MCSE tolerance, a correct engine fails a
point with probability about 6e-5 each; the default seed is fixed, so the
battery's outcome is reproducible.

Welch's test has no exact closed form: its rows compare against the
noncentral t with Satterthwaite's df, an approximation that is off by more
than Monte Carlo error at small n with unequal SDs once the replicates are
many. Those rows are shown with their distance and marked "approx"; they do
not decide the verdict (the Welch batch path itself is checked against scipy
replicate by replicate in the tests).
"""

from __future__ import annotations

import itertools
import math

import pandas as pd

from ..analyses.ttests import TTest, WelchT, ZTest, PairedT
from ..engine.runner import run_many
from ..processes.normal import NormalOneSample, NormalPaired, NormalTwoArm
from ..scenario import Scenario

DEFAULT_SEED = 20261201


def battery_grid(quick: bool = False) -> list[dict]:
    ns = (8, 30) if quick else (8, 20, 50)
    effects = (0.0, 0.5) if quick else (0.0, 0.25, 0.6)
    alphas = (0.05,) if quick else (0.05, 0.01)
    sides = ("two-sided", "greater")
    designs = [
        ("one-sample", "z_test"), ("one-sample", "t_test"),
        ("paired", "paired_t"),
        ("two-sample 1:1", "z_test"), ("two-sample 1:1", "t_test"), ("two-sample 1:1", "welch_t"),
        ("two-sample 2:1", "t_test"),
        ("two-sample 1:1, SD ratio 2", "welch_t"),
    ]
    rows = []
    for (design, test), n, d, a, alt in itertools.product(designs, ns, effects, alphas, sides):
        rows.append({"design": design, "test": test, "n": n, "effect": d, "alpha": a, "alternative": alt})
    return rows


def _scenario(row) -> Scenario:
    design, test, n, d, a, alt = (row[k] for k in ("design", "test", "n", "effect", "alpha", "alternative"))
    if design == "one-sample":
        proc = NormalOneSample(n=n, effect=d)
    elif design == "paired":
        proc = NormalPaired(n=n, effect=d, corr=0.5)
    elif design == "two-sample 2:1":
        proc = NormalTwoArm(n=n, effect=d, ratio=2.0)
    elif design == "two-sample 1:1, SD ratio 2":
        proc = NormalTwoArm(n=n, effect=d, sd_ratio=2.0)
    else:
        proc = NormalTwoArm(n=n, effect=d)
    an = {"z_test": ZTest, "t_test": TTest, "welch_t": WelchT, "paired_t": PairedT}[test](alternative=alt)
    return Scenario(proc, an, alpha=a)


def run_battery(reps: int = 4000, seed: int = DEFAULT_SEED, n_jobs: int = -1, quick: bool = False,
                tolerance: float = 4.0, progress: bool | None = None) -> pd.DataFrame:
    """Run the battery; one row per grid point with simulated and analytic power and pass/fail."""
    grid = battery_grid(quick)
    scenarios = [_scenario(r) for r in grid]
    results = run_many(scenarios, reps, seed=seed, n_jobs=n_jobs, progress=progress, desc="validating")
    rows = []
    for row, res in zip(grid, results):
        s = res.summaries[res.primary]
        a = s["analytic_power"]
        exact = bool(res.scenario.analyses[res.primary].analytic_exact)
        m = math.sqrt(max(a * (1 - a), 1e-12) / s["n_ok"]) if a is not None else math.nan
        dist = (s["power"] - a) / m if a is not None else math.nan
        ok = bool(a is not None and abs(dist) <= tolerance)
        rows.append({**row, "reps": s["n_ok"], "simulated": s["power"], "mcse": s["mcse"], "analytic": a,
                     "distance_mcse": dist, "exact": exact, "pass": ok if exact else None})
    return pd.DataFrame(rows)


def battery_passed(df: pd.DataFrame) -> bool:
    """True when every row with an exact closed form passed."""
    exact = df[df["exact"]]
    return bool(len(exact) and exact["pass"].astype(bool).all())


def format_battery(df: pd.DataFrame) -> str:
    cols = ["design", "test", "n", "effect", "alpha", "alternative", "simulated", "mcse", "analytic",
            "distance_mcse", "pass"]
    shown = df[cols].copy()
    shown["pass"] = [("pass" if p else "FAIL") if e else "approx" for p, e in zip(df["pass"], df["exact"])]
    text = shown.to_string(index=False, float_format=lambda x: f"{x:.4f}")
    exact = df[df["exact"]]
    n_fail = int((~exact["pass"].astype(bool)).sum())
    over3 = int((exact["distance_mcse"].abs() > 3).sum())
    approx = df[~df["exact"]]
    text += (f"\n\n{len(exact)} checks against exact closed forms, {len(exact) - n_fail} pass, {n_fail} fail "
             f"(tolerance 4 MCSE); {over3} beyond 3 MCSE (about {len(exact) * 0.0027:.1f} expected by chance).")
    if len(approx):
        worst = float(approx["distance_mcse"].abs().max())
        text += (f"\n{len(approx)} rows against an approximate closed form (Welch, Satterthwaite df), not judged; "
                 f"largest distance {worst:.2f} MCSE.")
    return text
