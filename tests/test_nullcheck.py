"""The type I error check under the null, judged by Bradley's (1978) liberal criterion.

Bradley (1978), Br J Math Stat Psychol 31:144-152: a test is robust (liberal
criterion) when its rejection rate under H0 lies in [0.5 alpha, 1.5 alpha].
"""

import math

import numpy as np
import pytest
from scipy import stats

import simpower as sp
from simpower.sweep import null_check


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
