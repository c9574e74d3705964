"""The shared design layer: two-arm sizes in every form, parameter aliases, the one missingness step.

Sources. The allocation ratio n1 / n0 and the two-sample noncentral-t power with unequal arms,
noncentrality d / sqrt(1/n0 + 1/n1) on n0 + n1 - 2 df (Cohen 1988, Statistical Power Analysis for
the Behavioral Sciences, ch. 2; computed with scipy.stats.nct). Under MCAR the observed outcomes
are a simple random sample of the complete ones, so the share missing is Binomial(rate) and a
complete-case estimate is unbiased (Rubin 1976; Little & Rubin 2002, ch. 3). The log rate ratio
of two Poisson arms is estimated by log((Y1/E1) / (Y0/E0)) (common practice; Agresti 2013, ch. 4,
from memory). Tolerances are 4 Monte Carlo standard errors.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

import simpower as sp
from simpower.processes.design import apply_missing, missing_mask
from simpower.registry import build, lookup, names

Z = 4.0
TWO_ARM = [
    (sp.NormalTwoArm, {"effect": 0.4}),
    (sp.TwoArm, {"effect": 0.4}),
    (sp.BinaryTwoArm, {"p0": 0.3, "odds_ratio": 2.0}),
    (sp.CountTwoArm, {"rate0": 2.0, "rate_ratio": 0.7}),
    (sp.SurvivalTwoArm, {"median": 10.0, "hazard_ratio": 0.7}),
    (sp.RepeatedMeasures, {"visits": 3, "rho": 0.5, "effect": 0.4}),
]
IDS = [c.__name__ for c, _ in TWO_ARM]


# -- one arms layer: every two-arm process takes the sizes in the same forms -------------------

@pytest.mark.parametrize("cls, kw", TWO_ARM, ids=IDS)
def test_every_form_of_the_arm_sizes_builds_the_same_process(cls, kw):
    by_ratio = cls(n=20, ratio=1.5, **kw)
    assert by_ratio.sizes == (20, 30) and by_ratio.total == 50
    assert cls(n=20, allocation=[2, 3], **kw) == by_ratio  # ratio = 3 / 2: the same stored value
    direct = cls(n=20, n1=30, **kw)
    assert direct.sizes == (20, 30) and cls(sizes=[20, 30], **kw) == direct
    # same arm sizes, same draws: the form of the sizes does not enter the random numbers
    a = by_ratio.draw_batch(np.random.default_rng(3), 2)
    b = direct.draw_batch(np.random.default_rng(3), 2)
    assert a.info == b.info and a.info["n0"] == 20 and a.info["n1"] == 30
    for key in a.per_rep:
        np.testing.assert_array_equal(a.per_rep[key], b.per_rep[key])
    np.testing.assert_array_equal(a["arm"], b["arm"])


@pytest.mark.parametrize("cls, kw", TWO_ARM, ids=IDS)
def test_the_old_spec_is_unchanged_when_the_new_forms_are_not_used(cls, kw):
    """Seeds come from the spec's fingerprint: `n1` left unset must not appear in it."""
    spec = cls(n=20, ratio=2.0, **kw).spec()
    assert "n1" not in spec and spec["ratio"] == 2.0 and spec["n"] == 20


@pytest.mark.parametrize("cls, kw", TWO_ARM, ids=IDS)
@pytest.mark.parametrize("bad, field", [
    ({"n": 20, "n1": 30, "ratio": 2.0}, "`ratio`, `n1`"),
    ({"sizes": [20, 30], "n": 20}, "`sizes`, `n`"),
    ({"n": 20, "allocation": [1, 2], "n1": 30}, "`allocation`, `n1`"),
    ({"sizes": [20]}, "`sizes` must be [control, treatment]"),
    ({"sizes": [20, 1]}, "`sizes[1]` must be an integer >= 2"),
    ({"n": 20, "allocation": [1, 0]}, "`allocation[1]` must be > 0"),
    ({"n": 2, "ratio": 0.4}, "`ratio` gives a treatment arm of 1"),
])
def test_arm_sizes_in_two_forms_or_too_small_are_one_line_errors(cls, kw, bad, field):
    with pytest.raises(sp.ParameterError) as err:
        cls(**bad, **kw)
    assert str(err.value).startswith(field) and "\n" not in str(err.value)


def test_unequal_arms_given_directly_match_the_noncentral_t_power():
    """Student's t with n0 = 20, n1 = 45, d = 0.6: power from the noncentral t (Cohen 1988, ch. 2)."""
    n0, n1, d = 20, 45, 0.6
    df = n0 + n1 - 2
    nc = d / math.sqrt(1 / n0 + 1 / n1)
    crit = stats.t.ppf(0.975, df)
    exact = stats.nct.sf(crit, df, nc) + stats.nct.cdf(-crit, df, nc)
    res = sp.run(sp.Scenario(sp.NormalTwoArm(sizes=[n0, n1], effect=d), sp.TTest()), reps=4000, seed=11,
                 n_jobs=1)
    assert res.summaries["t_test"]["analytic_power"] == pytest.approx(exact, rel=1e-9)
    assert abs(res.power - exact) <= Z * math.sqrt(exact * (1 - exact) / 4000)


def test_a_search_over_n_keeps_a_directly_given_treatment_arm():
    p = sp.NormalTwoArm(n=20, n1=45)
    assert p.replace(n=30).sizes == (30, 45)
    assert sp.NormalTwoArm(n=20, ratio=2.0).replace(n=30).sizes == (30, 60)


def test_replace_with_another_form_of_the_sizes_overrides_the_stored_form():
    by_ratio = sp.NormalTwoArm(n=20, ratio=2.0)
    direct = by_ratio.replace(sizes=[15, 25])
    assert direct.sizes == (15, 25) and direct.ratio == 1.0
    assert direct.replace(allocation=[1, 3]).sizes == (15, 45)


# -- aliases: another accepted name, one stored name ---------------------------------------------

@pytest.mark.parametrize("cls, alias, stored, value, kw", [
    (sp.RepeatedMeasures, "corr", "rho", 0.3, {"n": 10, "visits": 3}),
    (sp.MultiArm, "sizes", "n", (10, 12, 14), {"effects": [0, 0.2, 0.4]}),
])
def test_an_alias_builds_the_same_object_as_the_stored_name(cls, alias, stored, value, kw):
    a, b = cls(**{alias: value}, **kw), cls(**{stored: value}, **kw)
    assert a == b and a.fingerprint() == b.fingerprint() and alias not in a.spec()
    assert b.replace(**{alias: value}) == a
    with pytest.raises(sp.ParameterError, match=f"`{alias}` and `{stored}` name the same parameter"):
        cls(**{alias: value, stored: value}, **kw)


def test_an_alias_is_named_as_written_in_errors_and_toml():
    with pytest.raises(sp.ParameterError, match=r"^`process\.corr` must be in \(-1, 1\); got 2"):
        build("process", {"type": "repeated_measures", "n": 10, "visits": 3, "corr": 2.0}, where="process")


# -- the missingness layer ------------------------------------------------------------------------

def test_missing_layer_sets_nan_observed_and_info_once():
    y = np.arange(12.0).reshape(2, 6)
    per_rep, info = {}, {}
    apply_missing(sp.MCAR(rate=0.5), np.random.default_rng(1), y, {"arm": np.array([0, 0, 0, 1, 1, 1])},
                  per_rep, info)
    obs = per_rep["observed"].astype(bool)
    assert info == {"missing": True} and per_rep["observed"].dtype == np.int8
    assert np.isnan(y[~obs]).all() and np.isfinite(y[obs]).all()
    per_rep, info = {}, {}
    apply_missing(None, np.random.default_rng(1), y, {}, per_rep, info)
    assert per_rep == {} and info == {}


def test_missing_layer_padding_rows_never_go_missing_and_never_reach_the_mechanism():
    """With `present`, the mechanism sees each replicate's real rows only (MNAR calibrates on them)."""
    rng = np.random.default_rng(2)
    y = rng.standard_normal((50, 40))
    present = np.arange(40)[None, :] < rng.integers(10, 41, size=50)[:, None]
    y[~present] = 1e6  # padding: an MNAR mechanism that saw it would hide it first
    miss = missing_mask(sp.MNAR(rate=0.3, strength=2.0), np.random.default_rng(3), y, {}, present=present)
    assert not miss[~present].any()
    share = miss[present].mean()
    assert abs(share - 0.3) <= Z * math.sqrt(0.3 * 0.7 / present.sum())


def test_missing_layer_rows_keep_the_other_rows_observed():
    y = np.random.default_rng(4).standard_normal((200, 6))
    rows = np.array([False, True, True, False, True, True])
    miss = missing_mask(sp.MCAR(rate=0.4), np.random.default_rng(5), y, {"visit": np.arange(6)}, rows=rows)
    assert not miss[:, ~rows].any()
    assert abs(miss[:, rows].mean() - 0.4) <= Z * math.sqrt(0.4 * 0.6 / miss[:, rows].size)


def test_mcar_count_outcomes_leave_the_log_rate_ratio_unbiased():
    """Complete cases under MCAR are a random subsample (Rubin 1976): the estimate stays unbiased."""
    p = sp.CountTwoArm(n=80, rate0=1.5, rate_ratio=0.6, exposure_cv=0.4, missing=sp.MCAR(rate=0.3))
    b = p.draw_batch(np.random.default_rng(6), 2000)
    y, expo, arm = b["y"], b["exposure"], b["arm"]
    ok = np.isfinite(y)
    assert abs(1 - ok.mean() - 0.3) <= Z * math.sqrt(0.21 / ok.size)
    np.testing.assert_array_equal(b["observed"].astype(bool), ok)
    yy, ee = np.where(ok, y, 0), np.where(ok, expo, 0)
    est = np.log((yy[:, arm == 1].sum(1) / ee[:, arm == 1].sum(1)) / (yy[:, arm == 0].sum(1) / ee[:, arm == 0].sum(1)))
    assert abs(est.mean() - math.log(0.6)) <= Z * est.std() / math.sqrt(est.size) + 0.01  # + O(1/Y) small-sample bias
    with pytest.raises(sp.ParameterError, match="`missing.on` = 'baseline' is not a column of count_two_arm"):
        sp.CountTwoArm(n=10, rate0=1.0, missing=sp.MAR(rate=0.2))


def test_mcar_pairs_power_is_the_noncentral_t_power_averaged_over_complete_pairs():
    """MCAR per measurement: a pair is complete with probability (1 - rate)^2, the number of complete
    pairs K is Binomial(n, (1 - rate)^2) (Rubin 1976), and given K the paired t-test has the
    one-sample noncentral-t power with K - 1 df and noncentrality d sqrt(K) (Cohen 1988, ch. 2)."""
    n, d, rate, reps = 30, 0.5, 0.2, 2000
    res = sp.run(sp.Scenario(sp.NormalPaired(n=n, effect=d, corr=0.5, missing=sp.MCAR(rate=rate)), sp.PairedT()),
                 reps=reps, seed=12, n_jobs=1)
    k = np.arange(2, n + 1)
    crit = stats.t.ppf(0.975, k - 1)
    power_k = stats.nct.sf(crit, k - 1, d * np.sqrt(k)) + stats.nct.cdf(-crit, k - 1, d * np.sqrt(k))
    expected = float(np.sum(stats.binom.pmf(k, n, (1 - rate) ** 2) * power_k))
    assert res.summaries["paired_t"]["analytic_power"] is None  # no closed form is claimed with missing outcomes
    assert abs(res.power - expected) <= Z * math.sqrt(expected * (1 - expected) / reps)


def test_every_process_that_takes_missing_goes_through_the_one_layer():
    """A NaN outcome always has observed = 0, and info says so, for every built-in process with `missing`."""
    taking = {n for n in names("process") if "missing" in getattr(lookup("process", n), "params", {})}
    known = {"two_arm", "multi_arm", "binary_two_arm", "count_two_arm", "cluster_trial", "repeated_measures", "trial",
             "normal_one_sample", "normal_paired", "normal_two_arm", "crossover", "ordinal_two_arm", "pilot_resample"}
    assert known <= taking  # a process added later with `missing`: add it to _minimal below
    for name in sorted(known):
        p = build("process", {**_minimal(name), "missing": {"type": "mcar", "rate": 0.3}})
        b = p.draw_batch(np.random.default_rng(7), 3)
        y = b.per_rep["y"]
        present = b.per_rep.get("present", np.ones(y.shape, bool))
        assert b.info.get("missing") is True, name
        np.testing.assert_array_equal(np.isnan(y) & present, (b.per_rep["observed"] == 0) & present, err_msg=name)


def _minimal(name):
    return {
        "two_arm": {"n": 10}, "multi_arm": {"n": 10, "effects": [0, 0.1]},
        "binary_two_arm": {"n": 10, "p0": 0.3, "odds_ratio": 1.5},
        "count_two_arm": {"n": 10, "rate0": 1.0}, "cluster_trial": {"clusters": 3, "cluster_size": 4, "icc": 0.1},
        "repeated_measures": {"n": 10, "visits": 3, "rho": 0.3}, "normal_one_sample": {"n": 10},
        "normal_paired": {"n": 10}, "normal_two_arm": {"n": 10}, "crossover": {"n": 10, "dropout": 0.2},
        "pilot_resample": {"n": 10, "values": [1.0, 2.5, 4.0, 3.0]},
        "ordinal_two_arm": {"n": 10, "p0": [0.3, 0.4, 0.3], "odds_ratio": 1.5},
        "trial": {"design": {"type": "clusters", "clusters": 3, "cluster_size": 5, "cluster_size_cv": 0.5,
                             "icc": 0.1}},
    }[name] | {"type": name}
