"""Missingness mechanisms: realised proportions, calibration, direction of MNAR bias, validation.

Proportions are checked within 4 binomial standard errors, sqrt(r (1 - r) / N)
(the Poisson-binomial variance of a calibrated logistic mechanism is at most
that, so the check is conservative; common practice).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, optimize, special, stats

import simpower as sp
from simpower.processes.arms import TwoArm
from simpower.processes.missing import MAR, MCAR, MNAR, calibrate_intercept, standardise_rows
from simpower.registry import build

Z = 4.0


def binomial_se(rate, n):
    return math.sqrt(rate * (1 - rate) / n)


@pytest.mark.parametrize("rate", [0.05, 0.3])
def test_mcar_realised_proportion(rate):
    y = np.random.default_rng(1).standard_normal((400, 500))
    m = MCAR(rate=rate).mask(np.random.default_rng(2), y, {})
    assert m.shape == y.shape and m.dtype == bool
    assert abs(m.mean() - rate) <= Z * binomial_se(rate, m.size)


def test_mcar_is_independent_of_the_outcome():
    rng = np.random.default_rng(3)
    y = rng.standard_normal((200, 1000))
    m = MCAR(rate=0.3).mask(rng, y, {})
    se = math.sqrt(1 / m.sum() + 1 / (~m).sum())  # SE of a difference of means of N(0, 1) values
    assert abs(y[m].mean() - y[~m].mean()) <= Z * se


def test_calibrated_intercept_matches_root_finding_row_by_row():
    # scipy's brentq on each row's mean-probability equation is the reference
    rng = np.random.default_rng(4)
    for strength, rate in ((0.5, 0.2), (3.0, 0.02), (8.0, 0.6)):
        sz = strength * standardise_rows(rng.gamma(2.0, size=(5, 300)))
        a = calibrate_intercept(sz, rate)
        for i in range(5):
            ref = optimize.brentq(lambda t: special.expit(t + sz[i]).mean() - rate, -60, 60, xtol=1e-14)
            assert a[i] == pytest.approx(ref, abs=1e-9)


@pytest.mark.parametrize("cls", [MAR, MNAR])
@pytest.mark.parametrize("rate,strength", [(0.1, 1.0), (0.4, 2.5)])
def test_logistic_mechanisms_hit_the_rate(cls, rate, strength):
    rng = np.random.default_rng(5)
    y = rng.standard_normal((300, 400))
    base = 0.6 * y + 0.8 * rng.standard_normal(y.shape)
    mech = cls(rate=rate, strength=strength)
    driver = base if cls is MAR else y
    p = mech.probabilities(driver)
    assert np.allclose(p.mean(axis=1), rate, atol=1e-10)  # calibrated per replicate, exactly in expectation
    m = mech.mask(rng, y, {"baseline": base})
    assert abs(m.mean() - rate) <= Z * binomial_se(rate, m.size)


def test_mar_depends_on_the_covariate_not_on_the_outcome():
    rng = np.random.default_rng(6)
    base = rng.standard_normal((200, 1000))
    y = rng.standard_normal(base.shape)  # independent of the baseline
    for direction, sign in (("higher", 1), ("lower", -1)):
        m = MAR(rate=0.3, strength=1.5, direction=direction).mask(rng, y, {"baseline": base})
        se = math.sqrt(1 / m.sum() + 1 / (~m).sum())
        assert sign * (base[m].mean() - base[~m].mean()) > 10 * se  # the dropouts differ at baseline
        assert abs(y[m].mean() - y[~m].mean()) <= Z * se  # but not in y beyond the baseline


def _population_mnar(rate, b):
    """Intercept and observed mean of a standard normal outcome under logistic MNAR (by quadrature)."""
    phi = stats.norm.pdf
    a = optimize.brentq(lambda t: integrate.quad(lambda z: special.expit(t + b * z) * phi(z), -12, 12)[0] - rate,
                        -40, 40, xtol=1e-13)
    kept = integrate.quad(lambda z: z * (1 - special.expit(a + b * z)) * phi(z), -12, 12)[0]
    return a, kept / (1 - rate)


@pytest.mark.parametrize("direction", ["higher", "lower"])
def test_mnar_biases_the_observed_mean_as_expected(direction):
    rate, strength = 0.3, 1.2
    rng = np.random.default_rng(7)
    y = rng.standard_normal((200, 2000))
    m = MNAR(rate=rate, strength=strength, direction=direction).mask(rng, y, {})
    obs = np.where(m, np.nan, y)
    per_rep = np.nanmean(obs, axis=1) - y.mean(axis=1)  # observed minus complete mean, each replicate
    bias, se = per_rep.mean(), per_rep.std(ddof=1) / math.sqrt(per_rep.size)
    sign = 1.0 if direction == "higher" else -1.0
    _, expected = _population_mnar(rate, sign * strength)  # independent computation by scipy quadrature
    assert sign * bias < 0  # "higher" values go missing, so the observed mean is too low (and vice versa)
    assert abs(bias - expected) <= Z * se + 1e-3  # + O(1/N) from standardising within the replicate


def test_only_the_bernoulli_draws_use_randomness():
    y = np.random.default_rng(8).standard_normal((3, 50))
    mech = MNAR(rate=0.2, strength=2.0)
    m = mech.mask(np.random.default_rng(9), y, {})
    assert np.array_equal(m, np.random.default_rng(9).random(y.shape) < mech.probabilities(y))
    assert np.array_equal(m, mech.mask(np.random.default_rng(9), y, {}))


def test_one_dimensional_outcome_and_zero_rate():
    y = np.random.default_rng(10).standard_normal(500)
    assert MNAR(rate=0.2).mask(np.random.default_rng(1), y, {}).shape == (500,)
    assert not MNAR(rate=0.0).mask(np.random.default_rng(1), y, {}).any()
    assert not MAR(rate=0.0).mask(np.random.default_rng(1), y, {"baseline": y}).any()


@pytest.mark.parametrize("spec,field", [
    ({"type": "mcar", "rate": 1.0}, "rate"),
    ({"type": "mcar", "rate": 1.5}, "rate"),
    ({"type": "mcar", "rate": -0.1}, "rate"),
    ({"type": "mar", "rate": 1.0}, "rate"),
    ({"type": "mnar", "rate": 0.1, "strength": -1.0}, "strength"),
    ({"type": "mar", "rate": 0.1, "on": 3}, "on"),
    ({"type": "mcar"}, "rate"),
])
def test_bad_parameters_name_the_field(spec, field):
    with pytest.raises(sp.ParameterError) as exc:
        build("missingness", spec)
    assert str(exc.value).startswith(f"`{field}`") and "\n" not in str(exc.value)


def test_misspelt_direction_suggests_the_nearest():
    with pytest.raises(sp.ParameterError, match="Did you mean 'lower'"):
        MNAR(rate=0.1, direction="lowr")


def test_dropout_rate_of_one_inside_a_design_names_the_nested_field():
    with pytest.raises(sp.ParameterError, match=r"^`missing\.rate` must be in \[0, 1\)"):
        TwoArm(n=10, missing={"type": "mcar", "rate": 1.0})


def test_mar_on_a_column_the_design_lacks():
    with pytest.raises(sp.ParameterError, match="`missing.on` = 'baseline'.*baseline_corr"):
        TwoArm(n=10, missing=MAR(rate=0.1))
    with pytest.raises(sp.ParameterError, match="`on` = 'visit'"):
        MAR(rate=0.1, on="visit").mask(np.random.default_rng(1), np.zeros((2, 5)), {"baseline": np.zeros((2, 5))})


@pytest.mark.parametrize("make", [
    lambda m: sp.BinaryTwoArm(n=20, p0=0.3, odds_ratio=2.0, missing=m),
    lambda m: sp.ClusterTrial(clusters=4, cluster_size=5, icc=0.1, missing=m),
])
def test_mar_on_a_missing_column_is_refused_at_construction(make):
    # the MAR mechanism depends on `baseline`, which these designs do not have
    with pytest.raises(sp.ParameterError, match="`missing.on` = 'baseline' is not a column of"):
        make(sp.MAR(rate=0.2))


def test_mar_on_baseline_visit_is_accepted_for_repeated_measures():
    p = sp.RepeatedMeasures(n=10, visits=3, rho=0.5, missing=sp.MAR(rate=0.2))
    d = p(np.random.default_rng(0))
    assert np.isnan(d["y"]).any()
    with pytest.raises(sp.ParameterError, match="`missing.on` = 'baseline'"):
        sp.RepeatedMeasures(n=10, visits=3, rho=0.5, baseline=False, missing=sp.MAR(rate=0.2))
