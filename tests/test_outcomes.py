"""Outcome distributions: closed-form moments, realised moments, quantiles, validation.

Realised moments are checked on 10^6 draws against the closed forms within 4
standard errors; the SEs come from the delta method (influence functions of
the sample mean, SD, skewness and kurtosis, estimated from the same sample --
common practice, e.g. Serfling 1980, Approximation Theorems of Mathematical
Statistics, sec. 2.2).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from numpy.polynomial import polynomial as P
from scipy import special, stats

import simpower as sp
from simpower.processes.outcomes import (
    ContaminatedNormal, Fleishman, Gamma, Lognormal, Normal, ScipyOutcome, SkewNormal, StudentT,
    fleishman_coefficients,
)
from simpower.registry import build

N = 1_000_000
Z = 4.0  # tolerance in standard errors


def sample_moments(x):
    """(estimate, SE) of the mean, SD, skewness and excess kurtosis of a sample (delta method)."""
    n = x.size
    d = x - x.mean()
    m2, m3, m4 = (np.mean(d**k) for k in (2, 3, 4))
    sd = math.sqrt(m2)
    if_m2 = d**2 - m2
    if_sd = if_m2 / (2 * sd)
    if_skew = (d**3 - m3 - 3 * m2 * d) / m2**1.5 - 1.5 * m3 / m2**2.5 * if_m2
    if_kurt = (d**4 - m4 - 4 * m3 * d) / m2**2 - 2 * m4 / m2**3 * if_m2
    se = lambda f: float(np.std(f) / math.sqrt(n))  # noqa: E731
    return {
        "mean": (float(x.mean()), sd / math.sqrt(n)),
        "sd": (sd, se(if_sd)),
        "skewness": (m3 / m2**1.5, se(if_skew)),
        "excess_kurtosis": (m4 / m2**2 - 3, se(if_kurt)),
    }


def assert_moments(outcome, seed, which=("mean", "sd", "skewness", "excess_kurtosis")):
    x = outcome.sample(np.random.default_rng(seed), N)
    got = sample_moments(x)
    for key in which:
        est, se = got[key]
        target = getattr(outcome, key)
        assert abs(est - target) <= Z * se, f"{outcome!r} {key}: sample {est:.5g} vs {target:.5g} (SE {se:.2g})"


# -- closed forms against scipy.stats and the handbook formulas ------------------------------

def test_lognormal_closed_forms_match_scipy_and_handbook():
    # Johnson, Kotz & Balakrishnan (1994), Continuous Univariate Distributions vol. 1, ch. 14:
    # w = exp(sigma^2); skewness (w + 2) sqrt(w - 1); excess kurtosis w^4 + 2w^3 + 3w^2 - 6.
    o = Lognormal(median=2.0, cv=0.5)
    s2 = math.log(1 + 0.25)
    assert o.log_sd == pytest.approx(math.sqrt(s2), rel=1e-12)
    assert o.mean == pytest.approx(2.0 * math.exp(s2 / 2), rel=1e-12)
    assert o.sd / o.mean == pytest.approx(0.5, rel=1e-12)
    m, v, s, k = stats.lognorm(o.log_sd, scale=2.0).stats(moments="mvsk")
    assert (o.mean, o.sd**2, o.skewness, o.excess_kurtosis) == pytest.approx((m, v, s, k), rel=1e-10)
    w = math.exp(s2)
    assert o.skewness == pytest.approx((w + 2) * math.sqrt(w - 1), rel=1e-12)
    # by mean and sigma: median = mean * exp(-sigma^2 / 2)
    o2 = Lognormal(mean=3.0, sigma=0.4)
    assert o2.mean == pytest.approx(3.0, rel=1e-12)
    assert math.exp(o2.mu) == pytest.approx(3.0 * math.exp(-0.08), rel=1e-12)


def test_gamma_closed_forms():
    # skewness 2 / sqrt(shape), excess kurtosis 6 / shape (Johnson, Kotz & Balakrishnan 1994, ch. 17)
    o = Gamma(mean=10.0, cv=0.5)
    assert o.shape_scale == pytest.approx((4.0, 2.5))
    assert o.skewness == pytest.approx(1.0) and o.excess_kurtosis == pytest.approx(1.5)
    m, v, s, k = stats.gamma(4.0, scale=2.5).stats(moments="mvsk")
    assert (o.mean, o.sd**2, o.skewness, o.excess_kurtosis) == pytest.approx((m, v, s, k), rel=1e-12)


def test_skew_normal_target_moments_reproduced_by_scipy():
    # Azzalini (1985) moments, checked by scipy.stats.skewnorm's own moments of the solved parameters
    for g in (-0.9, -0.3, 0.4, 0.8, 0.99):
        o = SkewNormal(mean=1.0, sd=2.0, skewness=g)
        xi, omega, alpha = o.direct
        m, v, s, k = stats.skewnorm(alpha, loc=xi, scale=omega).stats(moments="mvsk")
        assert (m, math.sqrt(v), s) == pytest.approx((1.0, 2.0, g), rel=1e-9, abs=1e-12)
        assert o.excess_kurtosis == pytest.approx(k, rel=1e-9)
    direct = SkewNormal(location=0.5, scale=2.0, shape=3.0)
    m, v, s, k = stats.skewnorm(3.0, loc=0.5, scale=2.0).stats(moments="mvsk")
    assert (direct.mean, direct.sd**2, direct.skewness, direct.excess_kurtosis) == pytest.approx((m, v, s, k))


def test_student_t_and_contaminated_closed_forms():
    o = StudentT(df=10, location=1.0, scale=2.0)
    m, v, s, k = stats.t(10, loc=1.0, scale=2.0).stats(moments="mvsk")
    assert (o.mean, o.sd**2, o.skewness, o.excess_kurtosis) == pytest.approx((m, v, s, k))
    assert math.isinf(StudentT(df=3).excess_kurtosis)
    # normal scale mixture: E X^2 = sum p_i s_i^2, E X^4 = 3 sum p_i s_i^4 (elementary moments of a mixture)
    c = ContaminatedNormal(location=2.0, scale=1.5, contamination=0.2, scale_factor=4.0)
    ex2 = 0.8 * 1.5**2 + 0.2 * 6.0**2
    ex4 = 3 * (0.8 * 1.5**4 + 0.2 * 6.0**4)
    assert c.sd == pytest.approx(math.sqrt(ex2))
    assert c.excess_kurtosis == pytest.approx(ex4 / ex2**2 - 3)


# -- Fleishman's power method ----------------------------------------------------------------

def _normal_moment(k):
    """E Z^k for standard normal Z: 0 for odd k, (k - 1)!! for even k (common practice)."""
    return 0.0 if k % 2 else float(special.factorial2(k - 1)) if k else 1.0


def _polynomial_moments(coef):
    """Mean, variance, skewness, excess kurtosis of sum coef[j] Z^j, by expanding its powers."""
    expect = lambda c: sum(cj * _normal_moment(j) for j, cj in enumerate(c))  # noqa: E731
    c = np.array(coef, dtype=float)
    mean = expect(c)
    c[0] -= mean
    m2, m3, m4 = (expect(P.polypow(c, k)) for k in (2, 3, 4))
    return mean, m2, m3 / m2**1.5, m4 / m2**2 - 3


@pytest.mark.parametrize("g1,g2", [(1.0, 2.0), (1.5, 3.0), (0.5, -0.5), (-1.0, 2.0), (2.0, 7.0), (0.0, 1.0)])
def test_fleishman_coefficients_solve_the_moment_equations(g1, g2):
    # Fleishman (1978): Y = a + bZ + cZ^2 + dZ^3 with a = -c; its moments, computed independently of
    # Fleishman's equations by expanding the polynomial, must be mean 0, variance 1, (g1, g2).
    a, b, c, d = fleishman_coefficients(g1, g2)
    assert a == -c
    mean, var, skew, kurt = _polynomial_moments([a, b, c, d])
    assert (mean, var, skew, kurt) == pytest.approx((0.0, 1.0, g1, g2), abs=1e-8)


def test_fleishman_normal_case_is_identity():
    assert fleishman_coefficients(0.0, 0.0) == (0.0, 1.0, 0.0, 0.0)
    o = Fleishman(mean=3.0, sd=2.0)
    z = np.linspace(-3, 3, 7)
    assert np.allclose(o.from_normal(z), 3.0 + 2.0 * z)


def test_fleishman_negative_skew_mirrors_positive():
    a, b, c, d = fleishman_coefficients(1.2, 2.5)
    assert fleishman_coefficients(-1.2, 2.5) == pytest.approx((-a, b, -c, d))


@pytest.mark.parametrize("g1,g2", [(2.0, 1.0), (2.0, 4.0), (3.0, 10.0)])
def test_fleishman_infeasible_pair_is_a_one_line_error_naming_both(g1, g2):
    with pytest.raises(sp.ParameterError) as exc:
        Fleishman(skewness=g1, excess_kurtosis=g2)
    msg = str(exc.value)
    assert "`skewness`" in msg and "`excess_kurtosis`" in msg and "\n" not in msg


# -- realised moments ------------------------------------------------------------------------

@pytest.mark.parametrize("outcome,seed", [
    (Normal(mean=1.0, sd=2.0), 11),
    (Lognormal(median=2.0, cv=0.5), 12),
    (Lognormal(mean=3.0, sigma=0.3), 13),
    (Gamma(shape=4.0, scale=2.0), 14),
    (Gamma(mean=10.0, cv=0.7), 15),
    (SkewNormal(mean=1.0, sd=2.0, skewness=0.8), 16),
    (Fleishman(mean=5.0, sd=2.0, skewness=1.0, excess_kurtosis=2.0), 17),
    (Fleishman(skewness=-0.5, excess_kurtosis=-0.5), 18),
    (ContaminatedNormal(contamination=0.1, scale_factor=3.0), 19),
    (ScipyOutcome(dist=stats.weibull_min(1.5, scale=2.0)), 20),
])
def test_realised_moments_match_closed_forms(outcome, seed):
    assert_moments(outcome, seed)


def test_student_t_realised_mean_sd_skewness():
    # df = 10: moments up to order 9 exist, so the SEs of mean, SD and skewness are finite
    assert_moments(StudentT(df=10, location=1.0, scale=2.0), 21, which=("mean", "sd", "skewness"))


# -- quantiles at normal scores (used by the baseline copula) --------------------------------

@pytest.mark.parametrize("outcome", [
    Normal(mean=1.0, sd=2.0), Lognormal(median=2.0, cv=0.5), Gamma(shape=2.0), StudentT(df=4),
    SkewNormal(skewness=0.7), ScipyOutcome(dist="beta", args=[2.0, 5.0]),
])
def test_from_normal_is_the_quantile_function(outcome):
    z = np.array([-6.0, -2.0, -0.5, 0.0, 0.3, 1.5, 6.0])
    ref = outcome.frozen().ppf(stats.norm.cdf(z))  # scipy's own quantile function
    assert np.allclose(outcome.from_normal(z), ref, rtol=1e-6, atol=1e-9)


def test_contaminated_normal_quantile_inverts_mixture_cdf():
    o = ContaminatedNormal(location=1.0, scale=2.0, contamination=0.15, scale_factor=5.0)
    z = np.array([-7.0, -3.0, -1.0, 0.0, 0.5, 2.0, 7.0])
    x = (o.from_normal(z) - 1.0) / 2.0
    cdf = 0.85 * stats.norm.cdf(x) + 0.15 * stats.norm.cdf(x / 5.0)
    assert np.allclose(cdf, stats.norm.cdf(z), rtol=1e-10, atol=1e-300)


# -- the scipy wrapper ---------------------------------------------------------------------

def test_scipy_outcome_object_and_table_forms_agree_and_spec_is_data():
    frozen = ScipyOutcome(dist=stats.gamma(2.0, scale=3.0))
    table = build("outcome", {"type": "scipy", "dist": "gamma", "args": [2.0], "kwds": {"scale": 3}})
    assert frozen == table
    spec = frozen.spec()
    assert spec == {"type": "scipy", "dist": "gamma", "args": [2.0], "kwds": {"scale": 3.0}}
    assert build("outcome", json.loads(json.dumps(spec))) == frozen
    assert (frozen.mean, frozen.sd) == pytest.approx((6.0, math.sqrt(18.0)))
    a = frozen.sample(np.random.default_rng(5), 4)
    b = stats.gamma(2.0, scale=3.0).rvs(size=4, random_state=np.random.default_rng(5))
    assert np.array_equal(a, b)


def test_scipy_outcome_through_nested_parameter():
    p = sp.Scenario(build("process", {"type": "two_arm", "n": 10}).replace(outcome=stats.lognorm(0.5)),
                    analysis=sp.WelchT())
    assert p.process.outcome.spec()["dist"] == "lognorm"


@pytest.mark.parametrize("kw,field", [
    ({"dist": "gama"}, "dist"),
    ({"dist": "gamma", "args": [-1.0]}, "args"),
    ({"dist": "gamma", "args": ["2"]}, "args"),
    ({"dist": "norm", "kwds": {"loc": "x"}}, "kwds"),
    ({"dist": 3}, "dist"),
    ({}, "dist"),
])
def test_scipy_outcome_bad_input(kw, field):
    with pytest.raises(sp.ParameterError, match=f"`{field}"):
        ScipyOutcome(**kw)


def test_scipy_unknown_name_suggests_nearest():
    with pytest.raises(sp.ParameterError, match="Did you mean 'gamma'"):
        ScipyOutcome(dist="gama")


# -- bad input -------------------------------------------------------------------------------

@pytest.mark.parametrize("cls,kw,field", [
    (Lognormal, {"median": 1.0, "cv": 0.0}, "cv"),
    (Lognormal, {"median": 1.0, "cv": -0.2}, "cv"),
    (Lognormal, {"median": 1.0, "mean": 2.0, "cv": 0.5}, "median"),
    (Lognormal, {"cv": 0.5}, "median"),
    (Lognormal, {"median": 1.0, "cv": 0.5, "sigma": 0.3}, "cv"),
    (Lognormal, {"median": 1.0}, "cv"),
    (Gamma, {"mean": 2.0, "cv": 0.0}, "cv"),
    (Gamma, {"shape": 2.0, "mean": 3.0, "cv": 0.5}, "shape"),
    (Gamma, {"mean": 3.0}, "cv"),
    (SkewNormal, {"skewness": 0.996}, "skewness"),
    (SkewNormal, {"shape": 2.0, "mean": 1.0}, "shape"),
    (Fleishman, {"skewness": 1.0, "excess_kurtosis": -1.5}, "excess_kurtosis"),
    (StudentT, {"df": 0.0}, "df"),
    (ContaminatedNormal, {"contamination": 1.0}, "contamination"),
    (Normal, {"sd": 0.0}, "sd"),
    (Normal, {"sdd": 1.0}, "sdd"),
])
def test_bad_parameters_give_one_line_error_naming_the_field(cls, kw, field):
    with pytest.raises(sp.ParameterError) as exc:
        cls(**kw)
    msg = str(exc.value)
    assert msg.startswith(f"`{field}`") and "\n" not in msg


def test_student_t_sd_needs_df_above_two():
    o = StudentT(df=2.0)
    with pytest.raises(sp.ParameterError, match="`df` must be > 2"):
        o.sd
    with pytest.raises(sp.ParameterError, match="`df` must be > 1"):
        StudentT(df=1.0).mean


def test_outcomes_are_values():
    o = build("outcome", {"type": "lognormal", "median": 2.0, "cv": 0.5})
    assert o == Lognormal(median=2.0, cv=0.5)
    assert o.replace(cv=0.7).sd / o.replace(cv=0.7).mean == pytest.approx(0.7)
    import pickle

    f = pickle.loads(pickle.dumps(Fleishman(skewness=1.0, excess_kurtosis=2.0)))
    assert f.coefficients == fleishman_coefficients(1.0, 2.0)
