"""Simulated power of the normal cases against closed forms (the engine's external anchor).

Sources: the analytic power is the exact noncentral-t (or normal) power of
simpower.analytic, itself checked against statsmodels and Cohen (1988) in
test_analytic.py; the MCSE of a rejection rate is sqrt(p(1-p)/R) (Morris,
White & Crowther 2019). Tolerance: 4 MCSE.
"""

import math

import numpy as np

import simpower as sp
from simpower.planning.battery import run_battery


def test_full_battery_within_4_mcse():
    df = run_battery(reps=4000, n_jobs=1, progress=False)
    assert len(df) == 288
    exact = df[df["exact"]]
    assert len(exact) == 288 - 72  # the Welch rows compare with an approximation and are not judged
    bad = exact[~exact["pass"].astype(bool)]
    assert bad.empty, bad.to_string()
    # the type I error rows: power at effect 0 equals alpha within 4 MCSE
    null = df[df["effect"] == 0]
    assert np.all(np.abs(null["simulated"] - null["alpha"]) <= 4 * np.sqrt(null["alpha"] * (1 - null["alpha"]) / 4000))


def test_cohen_64_per_arm_gives_80_percent():
    # Cohen (1988), Table 2.4.1: d = 0.5, alpha 0.05 two-sided, n = 64 per group -> power 0.80
    res = sp.run(sp.Scenario(sp.NormalTwoArm(n=64, effect=0.5), sp.TTest()), reps=20000, seed=64, n_jobs=1)
    s = res.summaries["t_test"]
    assert abs(s["power"] - 0.80) < 4 * s["mcse"] + 0.002  # the table's 0.80 is rounded (exact 0.8015)
    assert abs(s["distance_mcse"]) <= 4


def test_one_sided_z_worked_values():
    # common practice: one-sample one-sided z at alpha 0.05, shift 0.875 SD, n = 10 -> beta ~ 0.131;
    # shift 1.0 SD -> beta ~ 0.065; at alpha 0.01 and shift 0.875 -> beta ~ 0.33.
    # each quoted beta is rounded: +-0.0005 for three decimals, +-0.005 for two
    for shift, alpha, beta, rounding in ((0.875, 0.05, 0.131, 0.0005), (1.0, 0.05, 0.065, 0.0005),
                                         (0.875, 0.01, 0.33, 0.005)):
        sc = sp.Scenario(sp.NormalOneSample(n=10, effect=shift), sp.ZTest(alternative="greater"), alpha=alpha)
        res = sp.run(sc, reps=20000, seed=10, n_jobs=1)
        mcse = math.sqrt(beta * (1 - beta) / 20000)
        assert abs((1 - res.power) - beta) < 4 * mcse + rounding


def test_cross_check_flags_a_wrong_analytic_value():
    # A scenario whose analysis ignores the SD ratio: Student t under unequal variances has
    # no analytic value in the core, so no cross-check is shown (None), never a wrong one.
    sc = sp.Scenario(sp.NormalTwoArm(n=10, ratio=3, sd_ratio=3, effect=0), sp.TTest())
    res = sp.run(sc, reps=500, seed=1, n_jobs=1)
    assert res.summaries["t_test"]["analytic_power"] is None
    assert "distance_mcse" not in res.summaries["t_test"]


class _ClaimsHalf(sp.TTest):
    """A t-test whose 'analytic' value is deliberately wrong, to exercise the flag."""

    def analytic_power(self, process, alpha):
        return 0.5


def test_cross_check_flag_fires_beyond_3_mcse():
    sc = sp.Scenario(sp.NormalTwoArm(n=64, effect=0.5), _ClaimsHalf())
    s = sp.run(sc, reps=2000, seed=2, n_jobs=1).summaries[sc.primary]
    assert s["analytic_power"] == 0.5
    assert s["distance_mcse"] > 3 and s["cross_check_flag"] is True
    s2 = sp.run(sp.Scenario(sp.NormalTwoArm(n=64, effect=0.5), sp.TTest()), reps=2000, seed=2,
                n_jobs=1).summaries["t_test"]
    assert s2["cross_check_flag"] is (abs(s2["distance_mcse"]) > 3)


def test_approximate_closed_forms_are_labelled_and_not_flagged():
    # Welch's power by the noncentral t with Satterthwaite's df is an approximation (Welch 1947),
    # which at small n with unequal SDs can sit several MCSE from a long simulation: such a
    # distance is information about the approximation, not an engine fault, so it is not flagged.
    sc = sp.Scenario(sp.NormalTwoArm(n=6, effect=1.0, sd_ratio=2.0), analyses=[sp.WelchT(), sp.TTest()])
    res = sp.run(sc, reps=40000, seed=6, n_jobs=1)
    w = res.summaries["welch_t"]
    assert w["analytic_exact"] is False and w["cross_check_flag"] is False
    assert "Approximate closed-form power" in str(res)
    assert res.summaries["t_test"]["analytic_power"] is None  # Student t under unequal SDs: no closed form here
