"""The cluster-robust option of ``cox`` (``cov_type = 'cluster'``) against statsmodels and under the null.

External references named beside each check:

* statsmodels ``PHReg(time, x, status=, ties=).fit(groups=cluster)``: the robust sandwich
  ``H^-1 (sum_g L_g L_g') H^-1`` of Lin & Wei (1989, JASA 84:1074-1078), ``L_g`` the summed score
  residuals of cluster g (``PHReg.robust_covariance``, ``PHReg.score_residuals``, read in
  statsmodels/duration/hazard_regression.py). statsmodels leaves a participant censored before
  the first event out of the fit and gives it a NaN score residual (so a NaN robust variance);
  its residual is 0 (it is in no risk set), so the references below drop such rows first.
* the sum of the score residuals at beta = 0 is the Breslow score, the log-rank ``O1 - E1``
  (Cox 1972; Collett 2015, Modelling Survival Data in Medical Research, 3rd ed., sec. 3.9 -- from
  memory), checked against :func:`statsmodels.duration.survfunc.survdiff` through ``logrank``.
* ``G / (G - 1)``: the usual small-sample factor of cluster-robust variances (common practice; the
  CR1 factor of cluster-robust regression, as statsmodels' OLS 'cluster' covariance applies it).
* under the null with clustered times a model-based Cox or log-rank test is liberal and the
  cluster-robust one keeps alpha with many clusters (Lin & Wei 1989); with few clusters the
  sandwich underestimates the variance, so the robust Wald test is liberal and the G / (G - 1)
  factor reduces the excess (Fay & Graubard 2001, Biometrics 57:1198-1206; Kauermann & Carroll
  2001, JASA 96:1387-1396 -- for sandwich estimators in general, from memory).

Tolerances: 1e-8 relative where the same formula is evaluated at the same estimate; 1e-6 where two
Newton fits of the same likelihood are compared (statsmodels' convergence); Monte Carlo checks
within 4 MCSE.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import simpower as sp
from simpower.analyses import survival as S
from simpower.analyses.survival import Cox
from simpower.registry import build


def _clustered(clusters=6, size=8, cv=0.0, resolution=None, hr=0.7, icc=0.2):
    return build("process", {
        "type": "trial",
        "design": {"type": "clusters", "clusters": clusters, "cluster_size": size, "icc": icc, "cluster_size_cv": cv},
        "outcome": {"type": "time_to_event", "median": 1.0, "hazard_ratio": hr, "follow_up": 2.0, "accrual": 1.0,
                    "time_resolution": resolution}})


def _reference(r, ties):
    """statsmodels' robust fit of one replicate (rows censored before the first event dropped)."""
    from statsmodels.duration.hazard_regression import PHReg

    time, event = np.asarray(r["time"], float), np.asarray(r["event"], float)
    keep = time >= time[event == 1].min()
    model = PHReg(time[keep], r["arm"][keep][:, None].astype(float), status=event[keep], ties=ties)
    return model, model.fit(groups=r["cluster"][keep]), r["cluster"][keep]


@pytest.mark.parametrize("ties", ["breslow", "efron"])
@pytest.mark.parametrize("cv,resolution", [(0.0, None), (0.5, 0.25)])
def test_robust_variance_is_statsmodels_sandwich(ties, cv, resolution):
    b = _clustered(cv=cv, resolution=resolution).draw_batch(np.random.default_rng(1989), 15)
    res = Cox(ties=ties, cov_type="cluster").batch(b)
    assert not res.trouble
    if resolution is not None and ties == "efron":  # tied event times: Efron's fit differs from Breslow's
        breslow = Cox(cov_type="cluster").batch(b)
        assert np.mean(np.abs(breslow["se"] - res["se"]) > 1e-8 * res["se"]) > 0.5
    for i in range(b.size):
        model, fit, _ = _reference(b.replicate(i), ties)
        # the same sandwich at the same estimate (statsmodels PHReg.robust_covariance): to 1e-8
        cov = model.robust_covariance(np.array([res["estimate"][i]]))[0, 0]
        assert res["se"][i] ** 2 == pytest.approx(cov, rel=1e-8)
        # the whole fit with groups= (two Newton fits of one likelihood): to 1e-6
        assert res["estimate"][i] == pytest.approx(fit.params[0], rel=1e-6, abs=1e-10)
        assert res["se"][i] == pytest.approx(fit.bse[0], rel=1e-6)
        assert res["pvalue"][i] == pytest.approx(fit.pvalues[0], rel=1e-6, abs=1e-12)


def test_score_residuals_are_statsmodels_and_sum_to_the_logrank_numerator():
    b = _clustered(cv=0.5, resolution=0.25).draw_batch(np.random.default_rng(7), 30)
    for i in range(b.size):
        r = b.replicate(i)
        model, _, _ = _reference(r, "breslow")
        t, e, a = (np.asarray(r[k], float) for k in ("time", "event", "arm"))
        order = np.argsort(t, kind="stable")
        for beta in (0.0, -0.4):
            ours = np.empty(t.size)
            ours[order] = S._cox_score_residuals(np.array([beta]), t[order][None], e[order][None], a[order][None])[0]
            keep = t >= t[e == 1].min()
            np.testing.assert_allclose(ours[keep], model.score_residuals(np.array([beta]))[:, 0], rtol=1e-10,
                                       atol=1e-12)
            assert np.all(ours[~keep] == 0)  # in no risk set: no part in the score
        # Cox (1972): the score at 0 is O1 - E1 of the log-rank test
        u, _ = S.logrank_terms(t, e, a)
        assert ours_sum_at_zero(t, e, a) == pytest.approx(u, rel=1e-10, abs=1e-12)


def ours_sum_at_zero(t, e, a):
    order = np.argsort(t, kind="stable")
    return float(S._cox_score_residuals(np.zeros(1), t[order][None], e[order][None], a[order][None]).sum())


@pytest.mark.parametrize("alternative", ["two-sided", "less"])
def test_robust_score_test_is_the_clustered_logrank(alternative):
    from scipy import stats

    b = _clustered(clusters=8, cv=0.4).draw_batch(np.random.default_rng(11), 20)
    res = Cox(cov_type="cluster", test="score", alternative=alternative).batch(b)
    wald = Cox(cov_type="cluster", alternative=alternative).batch(b)
    assert not res.trouble
    np.testing.assert_array_equal(res["estimate"], wald["estimate"])  # estimate, SE and CI: the Wald fit's
    np.testing.assert_array_equal(res["se"], wald["se"])
    for i in range(b.size):
        r = b.replicate(i)
        model, _, cl = _reference(r, "breslow")
        resid = model.score_residuals(np.zeros(1))[:, 0]  # statsmodels' residuals at beta = 0
        sums = np.array([resid[cl == g].sum() for g in np.unique(cl)])
        z = resid.sum() / math.sqrt(np.sum(sums**2))
        p = 2 * stats.norm.sf(abs(z)) if alternative == "two-sided" else stats.norm.cdf(z)
        assert res["pvalue"][i] == pytest.approx(p, rel=1e-9, abs=1e-14)


def test_small_sample_factor_counts_the_clusters_in_the_fit():
    proc = _clustered(clusters=5, cv=0.5)
    b = proc.draw_batch(np.random.default_rng(3), 20)
    # the whole first cluster of each replicate loses its times (a missing follow-up): G = 9
    time = np.array(b.per_rep["time"], float)
    cluster = np.broadcast_to(b.per_rep["cluster"] if "cluster" in b.per_rep else b.shared["cluster"], time.shape)
    time[cluster == 0] = np.nan
    b2 = sp.Batch(b.size, {**b.per_rep, "time": time}, b.shared, {**b.info, "missing": True})
    plain = Cox(cov_type="cluster").batch(b2)
    small = Cox(cov_type="cluster", small_sample=True).batch(b2)
    assert not plain.trouble and not small.trouble
    present = b.per_rep.get("present")
    for i in range(b.size):
        rows = np.ones(time.shape[1], bool) if present is None else present[i]
        g = np.unique(cluster[i][rows & ~np.isnan(time[i])]).size
        assert g == 9
        assert small["se"][i] ** 2 / plain["se"][i] ** 2 == pytest.approx(g / (g - 1), rel=1e-12)


@pytest.mark.parametrize("spec", [
    {"cov_type": "cluster"},
    {"cov_type": "cluster", "ties": "efron", "small_sample": True},
    {"cov_type": "cluster", "test": "score", "alternative": "greater"},
])
@pytest.mark.parametrize("cv,resolution", [(0.0, None), (0.5, 0.25)])
def test_batch_equals_per_replicate_with_padding_and_missing_times(spec, cv, resolution):
    an = Cox(**spec)
    b = _clustered(clusters=4, size=6, cv=cv, resolution=resolution).draw_batch(np.random.default_rng(5), 20)
    # 20% of the times missing (NaN): both paths leave those participants out
    time = np.array(b.per_rep["time"], float)
    time[np.random.default_rng(6).random(time.shape) < 0.2] = np.nan
    bm = sp.Batch(b.size, {**b.per_rep, "time": time}, b.shared, {**b.info, "missing": True})
    for batch in (b, bm):
        assert an.supports_batch(batch)
        res = an.batch(batch)
        for i in range(batch.size):
            try:
                ref = an(batch.replicate(i))
            except Exception as exc:  # noqa: BLE001 - the batch path must flag it with the same cause
                assert any(m[i] for c, m in res.trouble.items() if c == f"error:{type(exc).__name__}")
                continue
            for f in ("pvalue", "estimate", "se", "ci_low", "ci_high"):
                x, y = getattr(ref, f), res[f][i]
                assert (math.isnan(x) and math.isnan(y)) or y == pytest.approx(x, rel=1e-9, abs=1e-12), f


def test_replicates_without_a_finite_estimate_are_handed_over():
    # a tiny trial with few events: some replicates have an arm without events (no finite estimate)
    proc = build("process", {"type": "trial", "design": {"type": "clusters", "clusters": 2, "cluster_size": 2,
                                                         "icc": 0.1},
                             "outcome": {"type": "time_to_event", "median": 10.0, "hazard_ratio": 1.0,
                                         "follow_up": 2.0}})
    b = proc.draw_batch(np.random.default_rng(2), 200)
    an = Cox(cov_type="cluster")
    res = an.batch(b)
    ev = b.per_rep["event"]
    arm = np.broadcast_to(b.shared["arm"], ev.shape)
    none = ~np.any((ev == 1) & (arm == 0), axis=1) | ~np.any((ev == 1) & (arm == 1), axis=1)
    assert none.sum() > 10
    flagged = np.zeros(b.size, bool)
    for mask in res.trouble.values():
        flagged |= mask
    assert np.all(flagged[none])  # the per-replicate path's warning (or error), not a finite estimate


def test_options_are_checked_and_old_specs_unchanged():
    with pytest.raises(sp.ParameterError, match="`test` = 'score'.*`cov_type` = 'cluster'"):
        Cox(test="score")
    with pytest.raises(sp.ParameterError, match="`small_sample`"):
        Cox(small_sample=True)
    with pytest.raises(sp.ParameterError, match="`cov_type` must be one of"):
        Cox(cov_type="robust")
    # a cox written before the option keeps its spec (hence its fingerprint and seeds)
    assert Cox(ties="efron").spec() == {"type": "cox", "alternative": "two-sided", "ci_level": 0.95, "ties": "efron"}
    data = _clustered().draw_batch(np.random.default_rng(1), 1).replicate(0)
    del data["cluster"]
    with pytest.raises(ValueError, match="needs a 'cluster' column"):
        Cox(cov_type="cluster")(data)
    one = _clustered().draw_batch(np.random.default_rng(1), 1).replicate(0)
    one["cluster"] = np.zeros_like(one["cluster"])
    with pytest.raises(ValueError, match="at least 2 clusters"):
        Cox(cov_type="cluster")(one)


def _type1(clusters, reps, seed):
    proc = _clustered(clusters=clusters, size=10, hr=1.0)
    sc = sp.Scenario(proc, analyses={"naive": Cox(), "robust": Cox(cov_type="cluster"),
                                     "robust_g": Cox(cov_type="cluster", small_sample=True),
                                     "score": Cox(cov_type="cluster", test="score")})
    res = sp.run(sc, reps=reps, seed=seed, n_jobs=1, progress=False)
    assert set(res.paths.values()) == {"batch"}
    return {k: (s["power"], s["mcse"], s["n_ok"]) for k, s in res.summaries.items()}


@pytest.mark.slow
def test_type1_error_with_30_clusters_per_arm_icc_02():
    # Lin & Wei (1989): the robust test keeps alpha with many clusters; the naive one does not
    out = _type1(30, 3000, 20261202)
    alpha = 0.05
    mcse = math.sqrt(alpha * (1 - alpha) / 3000)
    for k in ("robust", "robust_g", "score"):
        assert abs(out[k][0] - alpha) < 4 * mcse, (k, out[k])
    assert out["naive"][0] > alpha + 4 * mcse  # the naive Cox test is liberal under clustering
    assert all(v[2] == 3000 for v in out.values())


@pytest.mark.slow
def test_few_clusters_robust_wald_is_liberal_and_the_factor_helps():
    # Fay & Graubard (2001); Kauermann & Carroll (2001): with few clusters the sandwich is too small
    few = _type1(6, 3000, 20261203)
    alpha = 0.05
    mcse = math.sqrt(alpha * (1 - alpha) / 3000)
    assert few["robust"][0] > alpha + 4 * mcse   # liberal, the known direction
    assert few["robust_g"][0] < few["robust"][0]  # G / (G - 1) moves it towards alpha
    assert few["naive"][0] > few["robust"][0]     # still far less liberal than ignoring the clusters
