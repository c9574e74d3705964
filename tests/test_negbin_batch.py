"""The batch path of ``negbin_glm`` against statsmodels and a direct scipy maximisation.

External references:
- statsmodels ``discrete_model.NegativeBinomial(loglike_method='nb2')`` (the per-replicate path,
  default BFGS fit; and its Newton fit at a tight tolerance) and its analytic Hessian
  ``_hessian_nb2`` (the observed information, which its ``bse`` inverts);
- statsmodels ``GLM`` with the ``NegativeBinomial(alpha)`` family (IRLS) at a fixed dispersion;
- the NB2 likelihood of Cameron & Trivedi (2013, Regression Analysis of Count Data, 2nd ed.,
  eq. 3.26), evaluated with ``scipy.stats.nbinom.logpmf`` and maximised with scipy.optimize.

statsmodels' default NB fit stops at gtol 1e-5 on the mean log-likelihood gradient, which
leaves b1 off by up to ~2e-4 (absolute) when exposures vary and the SE off by ~4e-5 relative;
so the 1e-6 agreement is checked against its Newton fit at tol 1e-14 and against scipy, and the
default fit (the per-replicate path) is held to identical decisions.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy import optimize, stats

from simpower.analyses.base import rowwise
from simpower.analyses.counts import _design, count_columns
from simpower.registry import build

R = 200
VARYING = {"n": 100, "rate0": 1.2, "rate_ratio": 0.7, "dispersion": 0.8, "exposure_cv": 0.5}
MCAR = {"missing": {"type": "mcar", "rate": 0.2}}


def _draw(cfg, size=R, seed=5):
    proc = build("process", {"type": "count_two_arm", **cfg})
    return proc.draw_batch(np.random.default_rng(seed), size)


def _batch(an, batch):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return an.batch(batch)


def _trouble(masks, size):
    out = np.zeros(size, bool)
    for m in masks.values():
        out |= np.asarray(m, bool)
    return out


def _rel(a, b, scale):
    return np.abs(a - b) / scale


def _sm_newton(data):
    """statsmodels' NB2 fit by Newton at a tight tolerance: (params with alpha last, bse)."""
    import statsmodels.api as sm

    y, arm, expo = count_columns(data)
    model = sm.NegativeBinomial(y, _design(arm), loglike_method="nb2", offset=np.log(expo))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fit = model.fit(method="newton", maxiter=200, tol=1e-14, disp=0)
    return np.asarray(fit.params), np.asarray(fit.bse)


@pytest.mark.parametrize("cfg", [VARYING, {**VARYING, **MCAR}], ids=["exposure", "exposure+mcar"])
def test_ml_agrees_with_statsmodels_newton_and_its_default_fit(cfg):
    an = build("analysis", {"type": "negbin_glm"})
    batch = _draw(cfg)
    out = _batch(an, batch)
    fields, trouble, _ = rowwise(an, batch, np.arange(R))
    skip = _trouble(trouble, R) | _trouble(out.trouble, R) | ~np.isfinite(fields["estimate"])
    assert _trouble(out.trouble, R).sum() <= R // 20  # the batch path settles nearly every replicate
    rows = np.flatnonzero(~skip)
    # per-replicate path (statsmodels' default fit): identical decisions on >= 99.9%
    dec_b = out["pvalue"][rows] < 0.05
    dec_r = fields["pvalue"][rows] < 0.05
    assert np.sum(dec_b != dec_r) <= int(0.001 * rows.size)
    # and within its own optimiser tolerance (gtol 1e-5 on the mean log-likelihood: ~1e-3 of an SE)
    assert np.max(np.abs(out["estimate"][rows] - fields["estimate"][rows]) / fields["se"][rows]) < 2e-3
    assert np.max(_rel(out["se"][rows], fields["se"][rows], fields["se"][rows])) < 2e-4
    # statsmodels' Newton at tol 1e-14: 1e-6 relative (a quarter of the replicates, for time)
    checked = 0
    for i in rows[::4]:
        params, bse = _sm_newton(batch.replicate(int(i)))
        if not np.all(np.isfinite(params)) or not np.all(np.isfinite(bse)):
            continue  # statsmodels' Newton in alpha (not log alpha) can step out of range and stop
        checked += 1
        assert abs(out["estimate"][i] - params[1]) <= 1e-6 * abs(params[1]) + 1e-12
        assert abs(out["se"][i] - bse[1]) <= 1e-6 * bse[1]
    assert checked >= 0.8 * rows[::4].size


def _nb2_negll(theta, y, x, offset):
    """Minus the NB2 log-likelihood (Cameron & Trivedi 2013, eq. 3.26) via scipy's nbinom pmf:
    size k = 1/alpha, success probability k / (k + mu)."""
    b0, b1, s = theta
    mu = np.exp(b0 + b1 * x + offset)
    k = np.exp(-s)
    return -np.sum(stats.nbinom.logpmf(y, k, k / (k + mu)))


def _newton_polish(f, theta, steps=4, h=1e-4):
    """A few Newton steps on ``f`` with central finite-difference gradient and Hessian (no analytic
    derivatives: independent of the code under test)."""
    e = np.eye(theta.size) * h
    for _ in range(steps):
        g = np.array([(f(theta + d) - f(theta - d)) / (2 * h) for d in e])
        H = np.array([[(f(theta + a + b) - f(theta + a - b) - f(theta - a + b) + f(theta - a - b)) / (4 * h * h)
                       for b in e] for a in e])
        theta = theta - np.linalg.solve(H, g)
    return theta


def test_ml_agrees_with_direct_scipy_maximisation():
    import statsmodels.api as sm

    an = build("analysis", {"type": "negbin_glm"})
    batch = _draw({**VARYING, **MCAR}, size=40, seed=11)
    out = _batch(an, batch)
    worst_b, worst_se = 0.0, 0.0
    for i in np.flatnonzero(~_trouble(out.trouble, batch.size)):
        y, x, expo = count_columns(batch.replicate(int(i)))
        start = np.array([0.0, 0.0, 0.0])
        res = optimize.minimize(_nb2_negll, start, args=(y, x, np.log(expo)), method="Nelder-Mead",
                                options={"xatol": 1e-7, "fatol": 1e-10, "maxiter": 5000})
        b0, b1, s = _newton_polish(lambda t: _nb2_negll(t, y, x, np.log(expo)), res.x)
        # SE of b1: statsmodels' analytic NB2 Hessian at the scipy optimum, in (b0, b1, alpha)
        model = sm.NegativeBinomial(y, _design(x), loglike_method="nb2", offset=np.log(expo))
        model._transparams = False
        se = np.sqrt(np.linalg.inv(-model.hessian(np.array([b0, b1, np.exp(s)])))[1, 1])
        worst_b = max(worst_b, abs(out["estimate"][i] - b1) / max(abs(b1), 1e-3))
        worst_se = max(worst_se, abs(out["se"][i] - se) / se)
    print(f"batch vs scipy: b1 {worst_b:.2e}, se {worst_se:.2e} relative")
    assert worst_b < 1e-6 and worst_se < 1e-6, (worst_b, worst_se)


@pytest.mark.parametrize("cfg", [{"n": 100, "rate0": 1.2, "rate_ratio": 0.7, "dispersion": 0.8},
                                 {**VARYING, **MCAR}], ids=["equal-exposure", "exposure+mcar"])
def test_fixed_dispersion_matches_statsmodels_glm(cfg):
    an = build("analysis", {"type": "negbin_glm", "dispersion": 2.0})
    batch = _draw(cfg)
    out = _batch(an, batch)
    fields, trouble, _ = rowwise(an, batch, np.arange(R))
    assert not _trouble(out.trouble, R).any() and not _trouble(trouble, R).any()
    # IRLS step for step as statsmodels GLM: agreement to rounding
    np.testing.assert_allclose(out["estimate"], fields["estimate"], rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(out["se"], fields["se"], rtol=1e-9)
    np.testing.assert_allclose(out["pvalue"], fields["pvalue"], rtol=1e-7, atol=1e-14)


def test_equal_exposures_give_the_arm_means():
    """With one exposure for everyone and a binary covariate, the score equations for (b0, b1),
    sum_i x_i (y_i - mu_i) / (1 + alpha mu_i) = 0, are solved by mu = the arm mean whatever alpha
    (common practice; it follows from the NB2 score, Cameron & Trivedi 2013, eq. 3.27)."""
    an = build("analysis", {"type": "negbin_glm"})
    batch = _draw({"n": 60, "rate0": 3.0, "rate_ratio": 0.6, "dispersion": 1.5, **MCAR}, size=100)
    out = _batch(an, batch)
    layout = batch.layout("two_arm")
    ok = layout.observed
    yy = np.where(ok, layout.y, 0.0)
    arm = np.broadcast_to(layout.arm, ok.shape) == 1
    m1 = (yy * arm).sum(1) / (ok & arm).sum(1)
    m0 = (yy * ~arm).sum(1) / (ok & ~arm).sum(1)
    good = ~_trouble(out.trouble, batch.size)
    assert good.sum() >= 95
    np.testing.assert_allclose(out["estimate"][good], np.log(m1 / m0)[good], rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("cfg", [{"n": 15, "rate0": 2.0, "rate_ratio": 1.5},        # Poisson data: alpha -> 0
                                 {"n": 8, "rate0": 0.15, "dispersion": 0.5}],       # arms without events
                         ids=["poisson-limit", "empty-arms"])
def test_awkward_replicates_get_the_per_replicate_result(cfg, monkeypatch):
    """Replicates the batch Newton does not settle (alpha at its Poisson limit, an arm without
    events, no events at all) are handed to the per-replicate fit: same fields, same trouble."""
    from simpower.analyses import counts

    handed = []

    def spy(analysis, batch, res, rows):
        handed.append(np.asarray(rows, bool).copy())
        return original(analysis, batch, res, rows)

    original = counts.hand_over
    monkeypatch.setattr(counts, "hand_over", spy)
    an = build("analysis", {"type": "negbin_glm"})
    batch = _draw(cfg, size=120, seed=5)
    out = _batch(an, batch)
    rows = handed[0]
    assert rows.any()  # the configuration does reach the awkward cases
    fields, trouble, _ = rowwise(an, batch, np.arange(batch.size))
    # an arm without events is always handed over (counted from the data)
    layout = batch.layout("two_arm")
    yy = np.where(layout.observed, layout.y, 0.0)
    arm1 = np.broadcast_to(layout.arm, yy.shape) == 1
    empty = ((yy * arm1).sum(1) == 0) | ((yy * ~arm1).sum(1) == 0)
    assert np.all(rows[empty])
    for f in ("pvalue", "estimate", "se"):
        np.testing.assert_array_equal(out[f][rows], fields[f][rows])
    for cause, mask in trouble.items():
        np.testing.assert_array_equal(out.trouble.get(cause, np.zeros(batch.size, bool))[rows], mask[rows])
    if "warning:PerfectSeparationWarning" in trouble:  # raised by simpower itself, not by an optimiser
        np.testing.assert_array_equal(out.trouble["warning:PerfectSeparationWarning"],
                                      trouble["warning:PerfectSeparationWarning"])
    # elsewhere: identical decisions where neither path reports trouble
    fine = ~rows & ~_trouble(trouble, batch.size) & ~_trouble(out.trouble, batch.size)
    assert np.sum((out["pvalue"][fine] < 0.05) != (fields["pvalue"][fine] < 0.05)) <= int(0.001 * fine.sum())


@pytest.mark.parametrize("cfg", [{"n": 40, "rate0": 3.0, "dispersion": 0.7},
                                 {"n": 40, "rate0": 3.0, "dispersion": 0.7, "exposure_cv": 0.4, **MCAR}],
                         ids=["pooled-cells", "per-observation"])
def test_integer_count_sums_equal_the_special_functions(cfg):
    """The batch likelihood sums log Gamma / psi / psi' differences of integer counts as finite sums
    (Gamma(x + 1) = x Gamma(x), Abramowitz & Stegun 1964, 6.1.15, 6.3.5, 6.4.6); they must equal
    scipy.special's gammaln, digamma and polygamma(1) evaluated per observation."""
    from simpower.analyses.counts import _NB2Data, _nb2_parts

    layout = _draw(cfg, size=30, seed=9).layout("two_arm")
    ok = layout.observed
    x = np.broadcast_to(np.asarray(layout.arm, float), ok.shape)
    off = np.where(ok, np.log(np.where(ok, np.broadcast_to(layout.column("exposure"), ok.shape), 1.0)), 0.0)
    data = _NB2Data(np.where(ok, layout.y, 0.0), x, off, ok.astype(float))
    assert data.G is not None
    rng = np.random.default_rng(0)
    b0, b1, s = rng.normal(1.0, 0.2, 30), rng.normal(0.0, 0.3, 30), rng.normal(0.0, 1.0, 30)
    fast = _nb2_parts(data, b0, b1, s)
    data.G = None
    data.y, data.w = np.where(ok, layout.y, 0.0), ok.astype(float)
    slow = _nb2_parts(data, b0, b1, s)
    for f, sl in zip(fast, slow):
        np.testing.assert_allclose(f, sl, rtol=1e-10, atol=1e-9)
