"""Multiplicity: adjusted p-values, hypotheses over tests x endpoints x arm comparisons, any/all power."""

import math

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.multitest import multipletests

import simpower as sp
from simpower._validation import Int, Real
from simpower.analyses.base import Analysis
from simpower.analyses.multiplicity import METHODS, Multiple, adjust
from simpower.analyses.resampling import PermutationTest
from simpower.errors import ParameterError, UnknownNameError
from simpower.processes.base import Batch, Process
from simpower.registry import build


class ArmsEndpoints(Process):
    """Test process: ``arms`` arms of n, three independent N(effect * [arm > 0], 1) endpoints y, y2, y3."""

    params = {"n": Int(low=2), "arms": Int(low=2), "effect": Real()}
    defaults = {"arms": 3, "effect": 0.0}

    def draw_batch(self, rng, size):
        n, k = self.n, self.arms
        arm = np.repeat(np.arange(k, dtype=np.int8), n)
        shift = self.effect * (arm > 0)
        cols = {c: rng.standard_normal((size, n * k)) + shift for c in ("y", "y2", "y3")}
        return Batch(size, cols, {"arm": arm})


@pytest.mark.parametrize("method", [m for m in METHODS if m != "none"])
def test_adjust_matches_statsmodels(method):
    # reference: statsmodels.stats.multitest.multipletests, row by row (ties included)
    rng = np.random.default_rng(0)
    p = rng.uniform(size=(80, 6)) ** 2
    p[:20, 1] = p[:20, 0]
    ref = np.array([multipletests(row, method=METHODS[method])[1] for row in p])
    np.testing.assert_allclose(adjust(p, method), ref, rtol=1e-12, atol=1e-15)


def test_adjust_marks_rows_with_a_missing_pvalue():
    out = adjust(np.array([[0.01, np.nan], [0.01, 0.02]]), "holm")
    assert np.isnan(out[0]).all() and np.isfinite(out[1]).all()


def test_per_replicate_hypotheses_and_adjustment():
    # components applied by hand to the relabelled subsets, then adjusted by statsmodels
    b = ArmsEndpoints(n=12, effect=0.5).draw_batch(np.random.default_rng(1), 3)
    a = Multiple(tests=[sp.WelchT()], endpoints=["y", "y2"], comparisons="each_vs_control", method="holm")
    for i in range(b.size):
        d = b.replicate(i)
        raw = []
        for col in ("y", "y2"):
            for j in (1, 2):
                keep = (d["arm"] == 0) | (d["arm"] == j)
                raw.append(sp.WelchT()({"y": d[col][keep], "arm": (d["arm"][keep] == j).astype(int)}).pvalue)
        r = a(d)
        assert r.names == ("y:1-0", "y:2-0", "y2:1-0", "y2:2-0")
        np.testing.assert_allclose(r.pvalues, multipletests(raw, method="holm")[1], rtol=1e-12)
        assert r.pvalue == min(r.pvalues)


@pytest.mark.parametrize("comparisons", ["each_vs_control", "all_pairs"])
@pytest.mark.parametrize("method", ["holm", "hochberg", "fdr_bh", "none"])
def test_batch_equals_per_replicate(comparisons, method):
    b = ArmsEndpoints(n=10, arms=4, effect=0.4).draw_batch(np.random.default_rng(2), 25)
    a = Multiple(tests=[sp.TTest(), {"type": "mann_whitney"}], endpoints=["y", "y3"], comparisons=comparisons,
                 method=method)
    assert a.supports_batch(b)
    out = a.batch(b)
    per = [a(b.replicate(i)) for i in range(b.size)]
    assert list(out["names"]) == list(per[0].names)
    assert len(out["names"]) == 2 * 2 * (3 if comparisons == "each_vs_control" else 6)
    np.testing.assert_allclose(out["pvalues"], [r.pvalues for r in per], rtol=1e-10, atol=1e-13)
    np.testing.assert_allclose(out["pvalue"], [r.pvalue for r in per], rtol=1e-10, atol=1e-13)
    np.testing.assert_allclose(out["estimate"], [r.estimate for r in per], rtol=1e-10)


class PerReplicatePermutation(PermutationTest):
    """The permutation test without its batch path: a component that runs per replicate only."""

    batch = Analysis.batch


def test_falls_back_to_per_replicate_when_a_component_cannot_batch():
    sc = sp.Scenario(ArmsEndpoints(n=8, arms=2), Multiple(tests=[sp.TTest(), PerReplicatePermutation(n_resamples=49)]))
    res = sp.run(sc, reps=30, seed=1, n_jobs=1)
    assert res.paths["multiple"] == "per-replicate"
    assert res.records["multiple"].hypotheses == ["t_test", "permutation_test"]
    assert res.records["multiple"].pvalues.shape == (30, 2)


def test_run_reports_per_hypothesis_any_and_all_power():
    sc = sp.Scenario(ArmsEndpoints(n=20, effect=0.6), Multiple(tests=[sp.TTest()], comparisons="each_vs_control"))
    res = sp.run(sc, reps=500, seed=3, n_jobs=1)
    rec = res.records["multiple"]
    ph = res.summaries["multiple"]["per_hypothesis"]
    rej = rec.pvalues <= 0.05
    assert set(ph) == {"1-0", "2-0", "any", "all"}
    assert ph["1-0"]["power"] == pytest.approx(rej[:, 0].mean())
    assert ph["all"]["power"] == pytest.approx(rej.all(axis=1).mean())
    assert ph["any"]["power"] == pytest.approx(res.power)  # primary p = min adjusted p
    assert ph["all"]["power"] < ph["1-0"]["power"] < ph["any"]["power"]
    frame = rec.frame()
    assert {"pvalue[1-0]", "pvalue[2-0]"} <= set(frame.columns)


@pytest.mark.parametrize("method, fwer", [("holm", 1 - (1 - 0.05 / 3) ** 3), ("bonferroni", 1 - (1 - 0.05 / 3) ** 3),
                                          ("none", 1 - 0.95**3)])
def test_familywise_error_under_the_global_null(method, fwer):
    # three independent endpoints, exact t-tests, all nulls true: the chance of any rejection is
    # 1 - (1 - alpha)^3 unadjusted, and 1 - (1 - alpha/3)^3 for Bonferroni and for Holm, whose first
    # step is Bonferroni's (Holm 1979, Scand J Stat 6:65-70)
    reps = 6000
    sc = sp.Scenario(ArmsEndpoints(n=15, arms=2), Multiple(tests=[sp.TTest()], endpoints=["y", "y2", "y3"],
                                                              method=method))
    res = sp.run(sc, reps=reps, seed=4, n_jobs=1)
    assert res.paths["multiple"] == "batch"
    assert abs(res.power - fwer) < 4 * math.sqrt(fwer * (1 - fwer) / reps)


def test_bonferroni_per_hypothesis_power_is_t_power_at_alpha_over_k():
    # a Bonferroni-adjusted p_j <= alpha iff p_j <= alpha / k: each comparison's power is the
    # noncentral-t power at alpha / 3 (computed here from scipy.stats.nct)
    n, effect, reps = 25, 0.8, 4000
    sc = sp.Scenario(ArmsEndpoints(n=n, arms=4, effect=effect),
                     Multiple(tests=[sp.TTest()], comparisons="each_vs_control", method="bonferroni"))
    res = sp.run(sc, reps=reps, seed=5, n_jobs=1)
    df, nc = 2 * n - 2, effect / math.sqrt(2 / n)
    c = stats.t.ppf(1 - 0.05 / 6, df)
    power = stats.nct.sf(c, df, nc) + stats.nct.cdf(-c, df, nc)
    for label in ("1-0", "2-0", "3-0"):
        p = res.summaries["multiple"]["per_hypothesis"][label]["power"]
        assert abs(p - power) < 4 * math.sqrt(power * (1 - power) / reps)


def test_spec_round_trip_and_names():
    a = Multiple(tests=[{"type": "welch_t"}, {"type": "welch_t", "alternative": "greater"}], method="hochberg")
    again = build("analysis", a.spec())
    assert again == a
    r = again(ArmsEndpoints(n=6, arms=2).draw_batch(np.random.default_rng(0), 1).replicate(0))
    assert r.names == ("welch_t", "welch_t_2")


def test_user_functions_as_components():
    def mean_above_zero(data):
        return stats.ttest_1samp(data["y"], 0.0).pvalue

    a = Multiple(tests=[mean_above_zero], endpoints=["y", "y2"], method="bonferroni")
    d = {"y": np.r_[np.zeros(3), np.ones(3)] + 0.1 * np.arange(6), "y2": np.arange(6.0) - 2.4}
    r = a(d)
    raw = [stats.ttest_1samp(d[c], 0.0).pvalue for c in ("y", "y2")]
    np.testing.assert_allclose(r.pvalues, np.minimum(2 * np.array(raw), 1.0))
    assert not a.supports_batch(ArmsEndpoints(n=3, arms=2).draw_batch(np.random.default_rng(0), 2))


def test_bad_parameters_name_the_field():
    with pytest.raises(ParameterError, match="tests"):
        Multiple(tests=[])
    with pytest.raises(ParameterError, match="tests"):
        Multiple(tests=sp.TTest())
    with pytest.raises(ParameterError, match=r"tests\[0\]"):
        Multiple(tests=[Multiple(tests=[sp.TTest()])])
    with pytest.raises(UnknownNameError, match="welch_t"):
        Multiple(tests=[{"type": "welch"}])
    with pytest.raises(ParameterError, match="endpoints"):
        Multiple(tests=[sp.TTest()], endpoints="y")
    with pytest.raises(ParameterError, match="method"):
        Multiple(tests=[sp.TTest()], method="holms")


def test_missing_endpoint_or_arm_is_an_error_per_replicate():
    a = Multiple(tests=[sp.TTest()], endpoints=["y", "y9"])
    with pytest.raises(ValueError, match="y9"):
        a({"y": np.arange(6.0), "arm": np.repeat([0, 1], 3)})
    with pytest.raises(ValueError, match="arm"):
        Multiple(tests=[sp.TTest()], comparisons="each_vs_control")({"y": np.arange(6.0)})


def test_time_to_event_components_without_endpoints():
    """With no ``endpoints`` the data go through as they are, so survival analyses (``time``, ``event``, no ``y``)
    can be wrapped. Bonferroni's adjusted p-value is min(1, k p) (Bonferroni; statsmodels' multipletests agrees),
    and the batch path equals the per-replicate one."""
    proc = build("process", {"type": "survival_two_arm", "n": 40, "median": 12, "hazard_ratio": 0.6,
                             "accrual": 12, "follow_up": 12})
    b = proc.draw_batch(np.random.default_rng(5), 20)
    assert "y" not in b.per_rep
    a = Multiple(tests=[{"type": "logrank"}, {"type": "cox"}], method="bonferroni")
    assert a.supports_batch(b)
    out = a.batch(b)
    per = [a(b.replicate(i)) for i in range(b.size)]
    lr = build("analysis", {"type": "logrank"})
    cx = build("analysis", {"type": "cox"})
    raw = np.array([[lr(b.replicate(i)).pvalue, cx(b.replicate(i)).pvalue] for i in range(b.size)])
    np.testing.assert_allclose([r.pvalues for r in per], np.minimum(2 * raw, 1.0), rtol=1e-9)
    np.testing.assert_allclose(out["pvalues"], [r.pvalues for r in per], rtol=1e-8, atol=1e-12)
    assert list(out["names"]) == ["logrank", "cox"]
