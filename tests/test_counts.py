"""Count outcomes: the count_two_arm process and the poisson_glm and negbin_glm analyses.

External references named beside each check: statsmodels (GLM Poisson fitted by IRLS, the discrete
Poisson model), the NB2 variance mu + mu^2/k of the gamma-Poisson mixture (Cameron & Trivedi 2013,
Regression Analysis of Count Data, 2nd ed., ch. 3; from memory), the gamma mean and CV (common
practice), Bradley's (1978) liberal criterion for type I error. Monte Carlo tolerances are 4 MCSE.
"""

import math

import numpy as np
import pytest
from scipy import stats

import simpower as sp
from _helpers import per_replicate as _per_rep
from simpower.analyses.counts import NegBinGLM, PoissonGLM
from simpower.errors import ParameterError
from simpower.processes.counts import CountTwoArm
from simpower.summaries import bradley_liberal


@pytest.mark.parametrize("kwargs, field", [
    (dict(rate0=1.0, dispersion=0.0), "dispersion"),
    (dict(rate0=1.0, dispersion=-2.0), "dispersion"),
    (dict(rate0=0.0), "rate0"),
    (dict(rate0=1.0, rate_ratio=0.0), "rate_ratio"),
    (dict(rate0=1.0, exposure=0.0), "exposure"),
    (dict(rate0=1.0, exposure_cv=-0.1), "exposure_cv"),
])
def test_bad_input_is_one_line_naming_the_field(kwargs, field):
    with pytest.raises(ParameterError) as e:
        CountTwoArm(n=20, **kwargs)
    assert f"`{field}`" in str(e.value) and "\n" not in str(e.value)


def test_null_and_estimand():
    p = CountTwoArm(n=10, rate0=2.0, rate_ratio=0.6)
    assert p.null().rate_ratio == 1.0 and p.null().rate0 == 2.0
    assert math.isclose(p.true_effect(), math.log(0.6))


def test_realised_rates_and_rate_ratio_with_varying_exposure():
    # E[y] = rate * exposure: the ratio of mean counts to mean exposures estimates the rate; its MCSE
    # is that of the linearised mean of y - rate * exposure (delta method, common practice)
    proc = CountTwoArm(n=30, rate0=0.8, rate_ratio=0.5, dispersion=2.0, exposure=2.0, exposure_cv=0.5)
    b = proc.draw_batch(np.random.default_rng(42), 2000)
    arm = b.shared["arm"]
    for a, rate in ((0, 0.8), (1, 0.4)):
        y = b.per_rep["y"][:, arm == a].sum(1)
        e = b.per_rep["exposure"][:, arm == a].sum(1)
        lin = y - rate * e
        assert abs(y.mean() / e.mean() - rate) < 4 * lin.std(ddof=1) / math.sqrt(y.size) / e.mean()
    # exposure: gamma with mean 2 and CV 0.5 (common practice: shape 1/CV^2)
    e = b.per_rep["exposure"].ravel()
    assert abs(e.mean() - 2.0) < 4 * 1.0 / math.sqrt(e.size)
    # SE of a sample CV by the delta method: (cv^2 / N) ((kurtosis - 1)/4 - cv skewness + cv^2)
    # (e.g. Kendall & Stuart, The Advanced Theory of Statistics vol. 1, ch. 10; from memory);
    # gamma with shape 4: skewness 1, kurtosis 3 + 6/4
    se_cv = math.sqrt(0.25 / e.size * ((4.5 - 1) / 4 - 0.5 * 1.0 + 0.25))
    assert abs(e.std() / e.mean() - 0.5) < 4 * se_cv
    assert np.all(b.per_rep["y"] == np.round(b.per_rep["y"])) and np.all(b.per_rep["y"] >= 0)


@pytest.mark.parametrize("k", [None, 0.5, 3.0])
def test_negative_binomial_variance_is_mu_plus_mu2_over_k(k):
    # NB2: Var = mu + mu^2 / k (Cameron & Trivedi 2013); Poisson: Var = mu. The per-replicate sample
    # variance is unbiased; its mean over R replicates has MCSE sd/sqrt(R).
    mu = 3.0
    proc = CountTwoArm(n=50, rate0=mu, dispersion=k, exposure=1.0)
    b = proc.draw_batch(np.random.default_rng(7), 4000)
    y = b.per_rep["y"][:, :50]
    v = y.var(axis=1, ddof=1)
    target = float(proc.variance(mu))
    assert math.isclose(target, mu + (0.0 if k is None else mu * mu / k))
    assert abs(v.mean() - target) < 4 * v.std(ddof=1) / math.sqrt(v.size)
    m = y.mean(axis=1)
    assert abs(m.mean() - mu) < 4 * m.std(ddof=1) / math.sqrt(m.size)




@pytest.mark.parametrize("analysis", [PoissonGLM(), PoissonGLM(scale="pearson", alternative="less")])
def test_poisson_batch_equals_per_replicate(analysis):
    # includes sparse data where an arm has no events (fit trouble in both paths)
    troubled = 0
    for proc in (CountTwoArm(n=25, rate0=1.5, rate_ratio=0.7, exposure_cv=0.4, ratio=1.6),
                 CountTwoArm(n=10, rate0=0.15, rate_ratio=0.5, dispersion=1.0)):
        b = proc.draw_batch(np.random.default_rng(3), 200)
        assert analysis.supports_batch(b)
        out = analysis.batch(b)
        ref, warned = _per_rep(analysis, b)
        for f in ref:
            np.testing.assert_allclose(out[f], ref[f], rtol=1e-9, atol=1e-12, equal_nan=True, err_msg=f)
        flagged = np.full(b.size, "", object)
        for cause, m in out.get("trouble", {}).items():
            flagged[m] = cause
        assert list(flagged) == list(warned)
        troubled += int(np.count_nonzero(flagged != "")) + int(np.isnan(out["pvalue"]).sum())
    assert troubled > 10  # the sparse setting did exercise the per-replicate fallback


def test_poisson_glm_matches_statsmodels_fitters():
    import statsmodels.api as sm

    b = CountTwoArm(n=30, rate0=1.2, rate_ratio=1.4, exposure_cv=0.3).draw_batch(np.random.default_rng(8), 30)
    for i in range(b.size):
        r = b.replicate(i)
        X = np.column_stack([np.ones(60), r["arm"]])
        off = np.log(r["exposure"])
        # statsmodels discrete Poisson (Newton) and GLM with IRLS and Pearson scale
        ref = sm.Poisson(r["y"], X, offset=off).fit(disp=0)
        res = PoissonGLM()(r)
        assert math.isclose(res.estimate, ref.params[1], rel_tol=1e-7, abs_tol=1e-10)
        assert math.isclose(res.se, ref.bse[1], rel_tol=1e-6)
        assert math.isclose(res.pvalue, ref.pvalues[1], rel_tol=1e-5, abs_tol=1e-12)
        quasi = sm.GLM(r["y"], X, family=sm.families.Poisson(), offset=off).fit(scale="X2")
        assert math.isclose(PoissonGLM(scale="pearson")(r).se, quasi.bse[1], rel_tol=1e-6)


def test_negbin_estimates_are_the_log_ratio_of_arm_means():
    # With a constant exposure and the arm as only covariate, the NB2 score equations give fitted arm
    # means equal to the sample means, whatever alpha (Lawless 1987, Can J Stat; from memory), and
    # with alpha fixed the Fisher information is sum mu / (1 + alpha mu) per arm.
    b = CountTwoArm(n=40, rate0=2.0, rate_ratio=0.7, dispersion=1.5).draw_batch(np.random.default_rng(4), 20)
    for i in range(b.size):
        r = b.replicate(i)
        y, a = r["y"], r["arm"]
        m0, m1 = y[a == 0].mean(), y[a == 1].mean()
        est = math.log(m1 / m0)
        assert math.isclose(NegBinGLM()(r).estimate, est, rel_tol=1e-4, abs_tol=1e-6)
        fixed = NegBinGLM(dispersion=1.5)(r)
        assert math.isclose(fixed.estimate, est, rel_tol=1e-7, abs_tol=1e-9)
        alpha = 1 / 1.5
        se = math.sqrt((1 + alpha * m0) / (40 * m0) + (1 + alpha * m1) / (40 * m1))
        assert math.isclose(fixed.se, se, rel_tol=1e-6)


@pytest.mark.slow
def test_poisson_is_liberal_under_overdispersion_but_negbin_is_not():
    # Overdispersed counts (k = 1, mean 2: variance 3x the mean) with no effect, 50 per arm.
    # Poisson's model SE is too small by about sqrt(3), so its type I error is near
    # 2 Phi(-1.96 / sqrt(3)) = 0.26; the negative binomial model and quasi-Poisson stay within
    # Bradley's (1978) liberal band [0.5 alpha, 1.5 alpha].
    reps = 1000
    sc = sp.Scenario(CountTwoArm(n=50, rate0=2.0, dispersion=1.0),
                     analyses={"poisson": PoissonGLM(), "quasi": PoissonGLM(scale="pearson"), "nb": NegBinGLM()})
    res = sp.run(sc, reps=reps, seed=11, n_jobs=1)
    alpha = 0.05
    pois, quasi, nb = (res.summaries[k]["power"] for k in ("poisson", "quasi", "nb"))
    expected = 2 * stats.norm.sf(1.96 / math.sqrt(3))
    assert abs(pois - expected) < 4 * math.sqrt(expected * (1 - expected) / reps)
    assert not bradley_liberal(pois, alpha)
    assert bradley_liberal(nb, alpha) and bradley_liberal(quasi, alpha)
    assert res.summaries["nb"]["n_ok"] == reps
    # and under Poisson counts the Poisson model holds its size
    res2 = sp.run(sp.Scenario(CountTwoArm(n=50, rate0=2.0), PoissonGLM()), reps=4000, seed=12, n_jobs=1)
    assert abs(res2.power - alpha) < 4 * math.sqrt(alpha * (1 - alpha) / 4000)


def test_count_scenarios_run_through_the_engine():
    sc = sp.Scenario(CountTwoArm(n=40, rate0=1.0, rate_ratio=0.6, dispersion=2.0),
                     analyses=[PoissonGLM(scale="pearson"), NegBinGLM()])
    res = sp.run(sc, reps=60, seed=5, n_jobs=1)
    assert res.paths == {"poisson_glm": "batch", "negbin_glm": "batch"}
    assert res.scenario.true_effect == pytest.approx(math.log(0.6))
    assert np.all(np.isfinite(res.records["negbin_glm"].estimate))
