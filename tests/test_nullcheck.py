"""The type I error check under the null, judged by Bradley's (1978) liberal criterion.

Bradley (1978), Br J Math Stat Psychol 31:144-152: a test is robust (liberal
criterion) when its rejection rate under H0 lies in [0.5 alpha, 1.5 alpha].

A test whose H0 is not "no effect" is checked on its own boundary: the TOST at
its equivalence margin, a non-inferiority test at its margin, a t-test of
H0: difference = null_mean at null_mean.
"""

import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import simpower as sp
from simpower.analyses.equivalence import TOST, NonInferiority
from simpower.analyses.resampling import LogT
from simpower.cli.main import main
from simpower.errors import ParameterError
from simpower.planning.sweep import null_check
from test_equivalence import tost_power_exact

ROOT = Path(__file__).parent.parent


def test_t_test_holds_its_level():
    # Student's t is exact under normality: the rate is alpha (Student 1908), within 4 MCSE.
    sc = sp.Scenario(sp.NormalTwoArm(n=15, effect=0.8), analyses=[sp.TTest(), sp.WelchT()], alpha=0.05)
    t = null_check(sc, reps=8000, seed=1, n_jobs=1)
    assert list(t["analysis"]) == ["t_test", "welch_t"]
    for _, row in t.iterrows():
        assert abs(row["type1_error"] - 0.05) <= 4 * math.sqrt(0.05 * 0.95 / 8000)
        assert row["meets_bradley"] and row["bradley_low"] == 0.025 and row["bradley_high"] == pytest.approx(0.075)


def _z_on_small_samples(data):
    """A deliberately liberal analysis: the pooled t statistic referred to the normal distribution."""
    y, arm = np.asarray(data["y"]), np.asarray(data["arm"])
    r = stats.ttest_ind(y[arm == 1], y[arm == 0])
    return 2 * stats.norm.sf(abs(r.statistic))


def test_liberal_analysis_fails_bradley():
    # With 3 per arm (df = 4), P(|t_4| > 1.96) = 0.1215 (scipy.stats.t): far above 1.5 alpha = 0.075.
    sc = sp.Scenario(sp.NormalTwoArm(n=3, effect=1.0), _z_on_small_samples)
    t = null_check(sc, reps=4000, seed=2, n_jobs=1)
    exact = 2 * stats.t.sf(1.959964, 4)
    row = t.iloc[0]
    assert abs(row["type1_error"] - exact) <= 4 * math.sqrt(exact * (1 - exact) / 4000)
    assert not row["meets_bradley"] and row["path"] == "per-replicate"


def test_null_keeps_everything_but_the_effect():
    sc = sp.Scenario(sp.NormalTwoArm(n=20, effect=0.8, sd=3.0, ratio=2.0), sp.TTest())
    t = null_check(sc, {"n": [10, 30]}, reps=2000, seed=3, n_jobs=1)
    assert list(t["n"]) == [10, 30]
    null = sc.null()
    assert null.process.effect == 0 and null.process.sd == 3.0 and null.process.ratio == 2.0


def test_alpha_follows_the_scenario():
    sc = sp.Scenario(sp.NormalTwoArm(n=20, effect=0.8), sp.TTest(), alpha=0.01)
    t = null_check(sc, reps=4000, seed=4, n_jobs=1)
    assert t["alpha"].iloc[0] == 0.01 and t["bradley_high"].iloc[0] == pytest.approx(0.015)


# -- the null at each analysis's own H0 boundary ---------------------------------------------------


def test_tost_is_checked_at_its_margin_against_the_exact_size():
    # At theta = margin the pooled TOST rejects with the exact probability of Phillips (1990) (0.036 here,
    # below alpha: Schuirmann 1987); at theta = 0 it would be the power (0.21), not a type I error.
    reps = 8000
    sc = sp.Scenario(sp.NormalTwoArm(n=30, effect=0.1), TOST(margin=0.5, equal_var=True))
    row = null_check(sc, reps=reps, seed=11, n_jobs=1).iloc[0]
    exact = tost_power_exact(0.5, 30, -0.5, 0.5)
    assert row["null_at"] == "upper equivalence margin 0.5: effect = 0.5" and row["null_effect"] == 0.5
    assert abs(row["type1_error"] - exact) <= 4 * math.sqrt(exact * (1 - exact) / reps)
    assert row["analytic_type1"] == pytest.approx(exact, rel=1e-7)


def test_non_inferiority_rate_at_the_margin_is_the_one_sided_t_closed_form():
    # Effect given as Cohen's d (outcome SD 2): the margin 0.6 in outcome units is d = -0.3. At the margin
    # the pooled one-sided t statistic is central t (Student 1908): P(T > t_{1-alpha, df}) = alpha, here
    # computed from scipy.stats.t; alpha = 0.025 (one-sided, common practice for non-inferiority).
    reps, alpha, n = 8000, 0.025, 25
    proc = sp.TwoArm(n=n, effect=0.2, effect_type="d", outcome=sp.Normal(sd=2.0))
    sc = sp.Scenario(proc, NonInferiority(margin=0.6, equal_var=True), alpha=alpha)
    row = null_check(sc, reps=reps, seed=12, n_jobs=1).iloc[0]
    df = 2 * n - 2
    closed = stats.t.sf(stats.t.ppf(1 - alpha, df), df)
    assert row["null_effect"] == pytest.approx(-0.3, rel=1e-12) and "non-inferiority margin -0.6" in row["null_at"]
    assert abs(row["type1_error"] - closed) <= 4 * math.sqrt(closed * (1 - closed) / reps)
    assert row["analytic_type1"] == pytest.approx(closed, rel=1e-9)


def test_superiority_by_a_margin_is_checked_at_null_mean():
    # H0: mean difference <= 0.3 (a t-test with null_mean = 0.3, one-sided): size alpha at 0.3 (Student 1908)
    reps = 6000
    sc = sp.Scenario(sp.NormalTwoArm(n=12, effect=0.9), sp.TTest(null_mean=0.3, alternative="greater"))
    row = null_check(sc, reps=reps, seed=13, n_jobs=1).iloc[0]
    assert row["null_effect"] == 0.3 and row["null_at"].startswith("`null_mean` 0.3")
    assert abs(row["type1_error"] - 0.05) <= 4 * math.sqrt(0.05 * 0.95 / reps)


def test_tests_of_no_effect_keep_their_numbers_beside_a_margin():
    # The t-test's null run is the scenario's own null with all analyses, as before margins were placed,
    # so its row equals a plain run of sc.null() with the same seed (the seed is keyed by the scenario).
    # The TOST's row is at its margin (Phillips 1990 exact size), far from its power at no difference.
    reps = 2000
    sc = sp.Scenario(sp.NormalTwoArm(n=60, effect=0.3), analyses=[sp.TTest(), TOST(margin=0.5, equal_var=True),
                                                                 NonInferiority(margin=0.4)])
    t = null_check(sc, reps=reps, seed=14, n_jobs=1).set_index("analysis")
    plain = sp.run(sc.null(), reps=reps, seed=14, n_jobs=1)
    assert t.loc["t_test", "type1_error"] == plain.summaries["t_test"]["power"]
    assert t.loc["t_test", "null_at"] == "no effect: effect = 0"
    assert list(t["null_effect"]) == [0.0, 0.5, -0.4]
    exact = tost_power_exact(0.5, 60, -0.5, 0.5)
    assert abs(t.loc["tost", "type1_error"] - exact) <= 4 * math.sqrt(exact * (1 - exact) / reps)
    assert plain.summaries["tost"]["power"] > 0.5


def test_a_grid_over_the_margin_moves_the_null():
    sc = sp.Scenario(sp.NormalTwoArm(n=40, effect=0.0), TOST(margin=0.5, equal_var=True))
    t = null_check(sc, {"tost.margin": [0.4, 0.8]}, reps=3000, seed=15, n_jobs=1)
    assert list(t["null_effect"]) == [0.4, 0.8]
    for _, row in t.iterrows():
        exact = tost_power_exact(row["tost.margin"], 40, -row["tost.margin"], row["tost.margin"])
        assert abs(row["type1_error"] - exact) <= 4 * math.sqrt(exact * (1 - exact) / 3000)


def test_a_boundary_on_another_scale_is_refused_in_one_line():
    # a ratio of geometric means (log_t) cannot be placed on a mean-difference effect; a list of arm
    # effects is not one number
    lognormal = sp.TwoArm(n=20, effect=1.2, effect_type="ratio", outcome=sp.Lognormal(mean=10.0, cv=0.5))
    with pytest.raises(ParameterError, match=r"`log_t`.*`null_ratio` 0.8.*another scale") as e:
        null_check(sp.Scenario(lognormal, LogT(null_ratio=0.8, alternative="greater")), reps=100, seed=1, n_jobs=1)
    assert "\n" not in str(e.value)
    with pytest.raises(ParameterError, match=r"`effects` is not one number"):
        null_check(sp.Scenario(sp.MultiArm(n=20, effects=[0, 0.3]), TOST(margin=0.5)), reps=100, seed=1, n_jobs=1)
    with pytest.raises(ParameterError, match=r"no value of the process's `effect`"):
        null_check(sp.Scenario(lognormal, NonInferiority(margin=12.0)), reps=100, seed=1, n_jobs=1)


def test_bundled_equivalence_report_checks_the_margin(tmp_path, capsys):
    # Acceptance: the report of scenarios/equivalence_skewed.toml gives the TOST's type I error at the
    # margin (15 L/min), within 4 MCSE of the exact TOST size for normal data with the outcome's SD
    # (Phillips 1990; contaminated normal SD^2 = (1 - p) s^2 + p (k s)^2, common practice), not the
    # power at no difference (about 0.6) that a null of 0 gave.
    rc = main(["report", str(ROOT / "scenarios" / "equivalence_skewed.toml"), "--out", str(tmp_path), "--jobs", "1",
               "-q", "--formats", "md"])
    assert rc == 0, capsys.readouterr().out
    row = pd.read_csv(tmp_path / "null_check.csv").iloc[0]
    sd = 30.0 * math.sqrt(0.9 + 0.1 * 3.0**2)
    exact = tost_power_exact(15.0, 90, -15.0, 15.0, sd=sd)
    assert row["reps"] == 10_000 and row["null_effect"] == 15.0
    assert abs(row["type1_error"] - exact) <= 4 * math.sqrt(exact * (1 - exact) / row["reps"])
    md = (tmp_path / "report.md").read_text()
    assert "upper equivalence margin 15: effect = 15" in md and "every analysis meets" in md
