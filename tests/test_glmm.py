"""glmm: the random-intercept GLMM by adaptive Gauss-Hermite quadrature, checked against outside references.

External sources, named beside each check:
- the marginal likelihood of a cluster is a one-dimensional integral, computed here independently with
  scipy.integrate.quad (QUADPACK, Piessens et al. 1983) around the integrand's maximum found by
  scipy.optimize.minimize_scalar; adaptive Gauss-Hermite quadrature converges to it as the nodes grow
  (Liu & Pierce 1994, Biometrika 81:624-629; Pinheiro & Bates 1995, J Comput Graph Stat 4:12-35);
- with sigma = 0 the model is the GLM: statsmodels GLM (Binomial / Poisson families) on the pooled data;
- Wald tests and intervals with few clusters: type I error judged by Bradley's liberal criterion
  (Bradley 1978, Br J Math Stat Psychol 31:144-152: an empirical rate within [0.5 alpha, 1.5 alpha]);
- the Laplace approximation (one node) is biased downwards for the random-intercept variance of
  binary data when sigma is large (Breslow & Lin 1995, Biometrika 82:81-91; Joe 2008, Comput Stat Data
  Anal 52:5066-5074; from memory), checked here against many nodes on the same data.
Statistical tolerances are Monte Carlo standard errors (MCSE) of the replicates used.

Until a built-in clustered binary/count process exists, the data come from the small process below
(random intercepts drawn on the link scale, variable cluster sizes as padding, MCAR missingness).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, optimize, special

import simpower as sp
from simpower._validation import Choice, Int, Real
from simpower.analyses.glmm import GLMM, gauss_hermite, loglik_cells
from simpower.processes.base import Batch, Process
from simpower.testing import check_analysis

FIELDS = ("pvalue", "estimate", "se", "ci_low", "ci_high")


class ClusterCounts(Process):
    """Test process: ``clusters`` per arm, sizes ``cluster_size`` (padded, variable when ``size_cv`` > 0),
    ``y | u ~ Bernoulli(expit(b0 + effect * arm + u))`` or ``Poisson(exp(...))``, ``u ~ N(0, sigma^2)``
    per cluster, outcomes missing completely at random with probability ``missing_rate``. With
    ``within`` the arm is randomised within clusters (half of each cluster) instead of by cluster."""

    params = {"clusters": Int(low=1), "cluster_size": Int(low=1), "size_cv": Real(0.0), "sigma": Real(0.0),
              "b0": Real(), "effect": Real(), "family": Choice(("binomial", "poisson")),
              "missing_rate": Real(0.0, 1.0, high_open=True), "within": Choice((False, True))}
    defaults = {"size_cv": 0.0, "sigma": 0.5, "b0": -0.5, "effect": 0.0, "family": "binomial",
                "missing_rate": 0.0, "within": False}
    size_param = "clusters"

    @property
    def estimand_label(self) -> str:
        return "conditional log odds ratio" if self.family == "binomial" else "log rate ratio"

    def draw_batch(self, rng, size):
        G, m = 2 * self.clusters, self.cluster_size
        cluster = np.repeat(np.arange(G), m)
        arm = (np.arange(G * m) % 2 if self.within else (cluster >= self.clusters)).astype(np.int64)
        u = rng.normal(0.0, self.sigma, (size, G))[:, cluster]
        eta = self.b0 + self.effect * arm + u
        if self.family == "binomial":
            y = (rng.random((size, G * m)) < special.expit(eta)).astype(float)
        else:
            y = rng.poisson(np.exp(eta)).astype(float)
        per_rep = {"y": y}
        info = {"missing": self.missing_rate > 0}
        if self.size_cv > 0:   # cluster j keeps its first k_j rows, k_j ~ 1 + Poisson-ish spread
            k = np.clip(np.round(m * (1 + self.size_cv * rng.standard_normal((size, G)))), 1, m)
            per_rep["present"] = (np.arange(G * m) % m)[None, :] < k[:, cluster]
        if self.missing_rate > 0:
            y[rng.random(y.shape) < self.missing_rate] = np.nan
            per_rep["observed"] = np.isfinite(y)
        return Batch(size, per_rep, {"arm": arm, "cluster": cluster}, info)


def per_replicate(analysis, batch, rows=None):
    rows = range(batch.size) if rows is None else rows
    out = [analysis(batch.replicate(i)) for i in rows]
    return {f: np.array([getattr(r, f) for r in out]) for f in FIELDS}


# -- an independent marginal likelihood: scipy.integrate.quad per cluster ---------------------------
def quad_loglik(data, b0, b1, sigma, family):
    """log of prod_i int prod_j f(y_ij | b0 + b1 arm_ij + u) N(u; 0, sigma^2) du, each integral by quad."""
    y = np.asarray(data["y"], float)
    ok = np.isfinite(y)
    y, arm, cl = y[ok], np.asarray(data["arm"])[ok], np.asarray(data["cluster"])[ok]
    total = 0.0
    for c in np.unique(cl):
        yc, ac = y[cl == c], arm[cl == c]

        def logf(u):
            eta = b0 + b1 * ac + u
            if family == "binomial":
                lik = np.sum(yc * eta - np.logaddexp(0.0, eta))
            else:
                lik = np.sum(yc * eta - np.exp(eta) - special.gammaln(yc + 1.0))
            return lik - 0.5 * (u / sigma) ** 2 - math.log(sigma) - 0.5 * math.log(2 * math.pi)

        top = optimize.minimize_scalar(lambda u: -logf(u), bounds=(-20 * sigma - 20, 20 * sigma + 20),
                                       method="bounded", options={"xatol": 1e-10})
        u0, l0 = top.x, logf(top.x)
        width = 12.0 * sigma
        val, _ = integrate.quad(lambda u: math.exp(logf(u) - l0), u0 - width, u0 + width, points=[u0],
                                epsabs=0.0, epsrel=1e-13, limit=200)
        total += l0 + math.log(val)
    return total


def _cells(data, family):
    from simpower.analyses.glmm import cells_of

    n, s, lf = cells_of(data, family)
    return n[None], s[None], lf


@pytest.mark.parametrize("family", ["binomial", "poisson"])
def test_aghq_loglik_equals_direct_integration(family):
    # AGHQ with enough nodes equals the integral to 1e-8 relative (Liu & Pierce 1994); quad is independent
    proc = ClusterCounts(clusters=4, cluster_size=8, size_cv=0.4, sigma=1.0, b0=-0.3, effect=0.5, family=family,
                         missing_rate=0.2)
    batch = proc.draw_batch(np.random.default_rng(11), 3)
    for i in range(3):
        data = batch.replicate(i)
        n, s, lf = _cells(data, family)
        for theta in ((-0.3, 0.5, 1.2), (0.2, -0.4, 0.4)):
            ref = quad_loglik(data, *theta, family)
            got = loglik_cells(np.array([theta]), n, s, family, gauss_hermite(30), gradient=False)[0][0] - lf
            assert abs(got - ref) <= 1e-8 * abs(ref), (i, theta, got, ref)
            # fewer nodes approximate it, the Laplace approximation worst: the comparison can fail
            lap = loglik_cells(np.array([theta]), n, s, family, gauss_hermite(1), gradient=False)[0][0] - lf
            assert abs(lap - ref) > abs(got - ref)


@pytest.mark.parametrize("family", ["binomial", "poisson"])
def test_fitted_optimum_is_a_maximum_of_the_integrated_likelihood(family):
    # the fit (20 nodes) is a maximum of the quad-integrated likelihood: no point of a small grid around it,
    # at a tenth of a standard error, is higher
    proc = ClusterCounts(clusters=4, cluster_size=10, sigma=0.8, b0=-0.2, effect=0.6, family=family)
    batch = proc.draw_batch(np.random.default_rng(5), 2)
    an = GLMM(family=family, quadrature_points=20)
    for i in range(2):
        data = batch.replicate(i)
        fit = an.fit(data)
        assert fit.converged and not fit.boundary
        best = quad_loglik(data, fit.b0, fit.b1, fit.sigma, family)
        assert abs(best - fit.loglik) < 1e-6 * abs(best)
        steps = (0.1 * fit.se, 0.1 * fit.se, 0.05 * fit.sigma)
        grid = np.array(np.meshgrid(*[(-1, 0, 1)] * 3)).reshape(3, -1).T
        for d in grid:
            if not d.any():
                continue
            th = (fit.b0 + d[0] * steps[0], fit.b1 + d[1] * steps[1], fit.sigma + d[2] * steps[2])
            assert quad_loglik(data, *th, family) < best, (i, d)


@pytest.mark.parametrize("family", ["binomial", "poisson"])
def test_standard_error_is_from_the_hessian_of_the_integrated_likelihood(family):
    # the SE of b1 is sqrt of the b1 entry of minus the inverse Hessian of the marginal log-likelihood:
    # here that Hessian by central differences (step 1e-3) of the quad-integrated log-likelihood
    proc = ClusterCounts(clusters=4, cluster_size=10, sigma=0.8, b0=-0.2, effect=0.6, family=family)
    data = proc.draw_batch(np.random.default_rng(5), 1).replicate(0)
    fit = GLMM(family=family, quadrature_points=20).fit(data)
    th, h = np.array([fit.b0, fit.b1, fit.sigma]), 1e-3
    f = lambda x: quad_loglik(data, *x, family)  # noqa: E731
    H = np.empty((3, 3))
    for j in range(3):
        for k in range(3):
            ej, ek = np.eye(3)[j] * h, np.eye(3)[k] * h
            H[j, k] = (f(th + ej + ek) - f(th + ej - ek) - f(th - ej + ek) + f(th - ej - ek)) / (4 * h * h)
    se = math.sqrt(np.linalg.inv(-H)[1, 1])
    assert fit.se == pytest.approx(se, rel=1e-4)


@pytest.mark.parametrize("family,reps", [("binomial", 200), ("poisson", 100)])
def test_batch_equals_per_replicate_scipy_fits(family, reps):
    # the vectorised Newton fit equals scipy.optimize.minimize (BFGS) on each replicate: estimates and
    # SEs within 1e-6 relative (1e-7 absolute where the value is near 0: both optimisers stop within
    # about 1e-8 of the optimum), decisions identical; variable cluster sizes and 20% missing outcomes
    proc = ClusterCounts(clusters=10, cluster_size=12, size_cv=0.5, sigma=0.6, b0=-0.8, effect=0.4, family=family,
                         missing_rate=0.2)
    batch = proc.draw_batch(np.random.default_rng(21), reps)
    an = GLMM(family=family)
    assert an.supports_batch(batch)
    got = an.batch(batch)
    ref = per_replicate(an, batch)
    trouble = np.zeros(reps, bool)
    for mask in got.trouble.values():
        trouble |= mask
    assert trouble.mean() < 0.05
    ok = ~trouble
    for f in FIELDS:
        np.testing.assert_allclose(getattr(got, f)[ok], ref[f][ok], rtol=1e-6, atol=1e-7, err_msg=f)
    assert np.array_equal(got.pvalue[ok] <= 0.05, ref["pvalue"][ok] <= 0.05)
    fits = an.fit_batch(batch)
    assert fits["boundary"].any() and not fits["boundary"].all()   # both kinds of optimum were compared


def test_batch_equals_per_replicate_when_arms_vary_within_clusters():
    # two cells per cluster (arm 0 and arm 1 in every cluster): the general cell table
    proc = ClusterCounts(clusters=4, cluster_size=10, sigma=0.7, effect=0.5, within=True, missing_rate=0.2)
    batch = proc.draw_batch(np.random.default_rng(8), 30)
    an = GLMM(distribution="t")
    got, ref = an.batch(batch), per_replicate(an, batch)
    assert not got.trouble
    for f in FIELDS:
        np.testing.assert_allclose(getattr(got, f), ref[f], rtol=1e-6, atol=1e-7, err_msg=f)


@pytest.mark.parametrize("family", ["binomial", "poisson"])
def test_conformance_kit_on_the_test_process(family):
    proc = ClusterCounts(clusters=5, cluster_size=8, size_cv=0.3, sigma=0.5, effect=0.5, family=family,
                         missing_rate=0.1)
    info = check_analysis(GLMM(family=family), proc, size=8, rtol=1e-6, atol=1e-7)
    assert info["batch_compared"]


# -- sigma = 0: the GLM (statsmodels) ----------------------------------------------------------------
@pytest.mark.parametrize("family", ["binomial", "poisson"])
def test_tiny_sigma_is_the_glm_of_the_pooled_data(family):
    import statsmodels.api as sm

    proc = ClusterCounts(clusters=6, cluster_size=10, sigma=0.0, b0=-0.4, effect=0.5, family=family,
                         missing_rate=0.1)
    batch = proc.draw_batch(np.random.default_rng(3), 40)
    an = GLMM(family=family)
    fits = an.fit_batch(batch)
    fam = sm.families.Binomial() if family == "binomial" else sm.families.Poisson()
    boundary = np.flatnonzero(fits["boundary"] & fits["converged"])
    assert boundary.size >= 10          # with no cluster effect, many fits end on the boundary
    for i in range(batch.size):
        d = batch.replicate(i)
        ok = np.isfinite(d["y"])
        X = sm.add_constant(d["arm"][ok].astype(float))
        glm = sm.GLM(d["y"][ok], X, family=fam).fit()
        # the likelihood at sigma = 1e-7 is the GLM's (statsmodels' llf includes -sum log y!)
        n, s, lf = _cells(d, family)
        th = np.array([[glm.params[0], glm.params[1], 1e-7]])
        ll = loglik_cells(th, n, s, family, gauss_hermite(10), gradient=False)[0][0] - lf
        assert ll == pytest.approx(glm.llf, rel=1e-10)
        if i in boundary:
            assert fits["b0"][i] == pytest.approx(glm.params[0], rel=1e-6, abs=1e-7)
            assert fits["b1"][i] == pytest.approx(glm.params[1], rel=1e-6, abs=1e-7)
            # the Hessian is block diagonal at sigma = 0, so the SE of b1 is the GLM's
            assert fits["se"][i] == pytest.approx(glm.bse[1], rel=1e-5)
    res = an.batch(batch)
    assert not res.trouble           # a boundary estimate is an answer, not fit trouble


# -- trouble and parameters -------------------------------------------------------------------------
def test_separation_is_flagged_on_both_paths():
    proc = ClusterCounts(clusters=3, cluster_size=4, sigma=0.2, b0=-3.0, effect=0.0)
    batch = proc.draw_batch(np.random.default_rng(1), 40)
    y = batch.per_rep["y"]
    y[0, 12:] = 0.0                   # replicate 0: no events in arm 1
    y[0, :12] = 0.0
    y[0, 0] = 1.0
    res = GLMM().batch(batch)
    assert res.trouble["warning:PerfectSeparationWarning"][0]
    assert res.pvalue[0] == 1.0 and math.isnan(res.estimate[0])
    with pytest.warns(Warning, match="no finite maximum likelihood"):
        one = GLMM()(batch.replicate(0))
    assert one.pvalue == 1.0


def test_no_finite_sigma_is_flagged_on_both_paths():
    # every cluster all events or all non-events (both arms have both): the marginal likelihood grows
    # towards (1/2)^clusters as sigma grows (each cluster's probability tends to P(intercept on one
    # side) = 1/2, common practice), so there is no maximum; a finite quadrature may show a spurious one
    proc = ClusterCounts(clusters=4, cluster_size=5, effect=0.3)
    batch = proc.draw_batch(np.random.default_rng(0), 3)
    batch.per_rep["y"][0] = np.repeat([1.0, 0, 1, 0, 0, 1, 1, 0], 5)
    an = GLMM()
    res = an.batch(batch)
    assert res.trouble["warning:ConvergenceWarning"].tolist() == [True, False, False]
    with pytest.warns(Warning, match="sigma has no finite estimate"):
        an(batch.replicate(0))
    data = batch.replicate(0)
    near = quad_loglik(data, 0.0, 0.0, 20.0, "binomial")
    assert quad_loglik(data, 0.0, 0.0, 200.0, "binomial") > near            # still increasing in sigma
    assert near < 8 * math.log(0.5) < 0.0                                       # towards (1/2)^8 from below


def test_an_arm_without_observed_outcomes_is_an_error_on_both_paths():
    proc = ClusterCounts(clusters=3, cluster_size=4, effect=0.3, missing_rate=0.1)
    batch = proc.draw_batch(np.random.default_rng(2), 5)
    batch.per_rep["y"][1, 12:] = np.nan
    res = GLMM().batch(batch)
    assert res.trouble["error:ValueError"].tolist() == [False, True, False, False, False]
    with pytest.raises(ValueError, match="arm 1 has no observed outcome"):
        GLMM()(batch.replicate(1))


@pytest.mark.parametrize("bad,field", [({"family": "normal"}, "family"), ({"quadrature_points": 0}, "quadrature_points"),
                                       ({"distribution": "z"}, "distribution")])
def test_bad_parameters_name_the_field(bad, field):
    with pytest.raises(sp.ParameterError, match=f"`{field}`") as err:
        GLMM(**bad)
    assert "\n" not in str(err.value)


def test_outcomes_outside_the_family_are_refused():
    data = {"y": np.array([0.0, 2.0, 1.0, 0.0]), "arm": np.array([0, 0, 1, 1]), "cluster": np.array([0, 0, 1, 1])}
    with pytest.raises(ValueError, match="needs y in"):
        GLMM()(data)
    proc = ClusterCounts(clusters=3, cluster_size=4, family="poisson")
    assert not GLMM().supports_batch(proc.draw_batch(np.random.default_rng(0), 3))  # counts are not binary


def test_estimand_labels():
    assert GLMM().estimand_label == "conditional log odds ratio"
    assert GLMM(family="poisson").estimand_label == "log rate ratio"
    sc = sp.Scenario(ClusterCounts(clusters=3, cluster_size=4, effect=0.7), analyses=[GLMM(), sp.Logistic()])
    assert sc.true_effect_for("glmm") == 0.7
    assert sc.true_effect_for("logistic") is None      # a marginal log odds ratio is another estimand


def test_t_reference_uses_clusters_minus_two_df():
    proc = ClusterCounts(clusters=4, cluster_size=10, sigma=0.5, effect=0.8, missing_rate=0.1)
    data = proc.draw_batch(np.random.default_rng(4), 1).replicate(0)
    z, t = GLMM()(data), GLMM(distribution="t")(data)
    assert z.estimate == t.estimate and z.se == t.se
    from scipy import stats

    assert t.pvalue == pytest.approx(2 * stats.t.sf(abs(t.estimate / t.se), 2 * 4 - 2), rel=1e-12)
    assert t.pvalue > z.pvalue


# -- Monte Carlo properties ------------------------------------------------------------------------
@pytest.mark.slow
def test_type_one_error_and_coverage_with_ten_clusters_per_arm():
    # 10 clusters of 20 per arm, binary, sigma 0.5. Wald z-tests with few clusters are liberal (common
    # practice: hence the t reference with clusters - 2 df). Bradley's (1978) liberal criterion: a type I
    # error rate in [0.025, 0.075] at alpha 0.05; for the interval, its non-coverage in the same band.
    # Asserted with 4 MCSE inside or outside the band, so each claim is supported by these replicates.
    reps = 6000
    null = ClusterCounts(clusters=10, cluster_size=20, sigma=0.5, b0=-1.0, effect=0.0)
    batch = null.draw_batch(np.random.default_rng(2026), reps)
    out = {}
    for dist in ("normal", "t"):
        res = GLMM(distribution=dist).batch(batch)
        clean = ~np.any(list(res.trouble.values()), axis=0) if res.trouble else np.ones(reps, bool)
        assert clean.mean() > 0.99
        out[dist] = float(np.mean(res.pvalue[clean] <= 0.05))
    mcse = math.sqrt(0.05 * 0.95 / reps)
    assert out["normal"] > 0.05 + 4 * mcse                              # the z reference is liberal here
    assert 0.025 + 4 * mcse <= out["t"] <= 0.075 - 4 * mcse             # t meets Bradley's criterion
    # the 95% interval (t reference) around the conditional log odds ratio 0.5
    alt = ClusterCounts(clusters=10, cluster_size=20, sigma=0.5, b0=-1.0, effect=0.5)
    res = GLMM(distribution="t").batch(alt.draw_batch(np.random.default_rng(7), reps))
    clean = ~np.any(list(res.trouble.values()), axis=0) if res.trouble else np.ones(reps, bool)
    miss = float(np.mean((res.ci_low[clean] > 0.5) | (0.5 > res.ci_high[clean])))
    assert 0.025 + 4 * mcse <= miss <= 0.075 - 4 * mcse, miss
    print(f"type I error z {out['normal']:.4f}, t {out['t']:.4f}; non-coverage (t) {miss:.4f}; MCSE {mcse:.4f}")


def test_laplace_underestimates_a_large_sigma_for_binary_data():
    # Breslow & Lin (1995): with binary outcomes and a large random-intercept SD the Laplace
    # approximation biases sigma downwards; on the same replicates, 20 nodes give a larger estimate.
    proc = ClusterCounts(clusters=10, cluster_size=6, sigma=2.0, b0=0.0, effect=0.5)
    batch = proc.draw_batch(np.random.default_rng(9), 150)
    lap = GLMM(quadrature_points=1).fit_batch(batch)
    many = GLMM(quadrature_points=20).fit_batch(batch)
    ok = lap["converged"] & many["converged"]
    assert ok.mean() > 0.95
    diff = many["sigma"][ok] - lap["sigma"][ok]
    assert diff.mean() > 4 * diff.std(ddof=1) / math.sqrt(ok.sum())
    # and the many-node estimate is the closer one to the true sigma on average
    assert abs(many["sigma"][ok].mean() - 2.0) < abs(lap["sigma"][ok].mean() - 2.0)


# -- the compiled kernel of the batch fit (simpower.analyses._glmm_kernels) ----------------------------
def _backends(monkeypatch):
    from simpower.analyses import glmm

    if glmm.glmm_backend() != "numba":
        pytest.skip("numba not importable: the batch fit uses the numpy function")
    return glmm


@pytest.mark.parametrize("family", ["binomial", "poisson"])
def test_compiled_loglik_equals_direct_integration(family, monkeypatch):
    # the same check as above (AGHQ with 30 nodes equals scipy.integrate.quad to 1e-8, Liu & Pierce 1994)
    # on the kernel, for the whole batch of cell tables at once, with distinct clusters weighted by counts
    glmm = _backends(monkeypatch)
    proc = ClusterCounts(clusters=4, cluster_size=8, size_cv=0.4, sigma=1.0, b0=-0.3, effect=0.5, family=family,
                         missing_rate=0.2)
    batch = proc.draw_batch(np.random.default_rng(11), 3)
    n, s, ca, lf = GLMM(family=family).batch_cells(batch)
    nd, sd, cd, m = glmm.distinct_clusters(n, s, ca)
    for theta in ((-0.3, 0.5, 1.2), (0.2, -0.4, 0.4)):
        th = np.repeat([theta], 3, 0)
        got = glmm.loglik_cells_compiled(th, nd, sd, family, gauss_hermite(30), ca=cd, weights=m, gradient=False)[0]
        for i in range(3):
            ref = quad_loglik(batch.replicate(i), *theta, family)
            assert abs(got[i] - lf[i] - ref) <= 1e-8 * abs(ref), (i, theta)


@pytest.mark.parametrize("family", ["binomial", "poisson"])
@pytest.mark.parametrize("within", [False, True])
@pytest.mark.parametrize("points", [1, 2, 10])
def test_compiled_loglik_gradient_hessian_equal_numpy(family, within, points, monkeypatch):
    # the kernel computes what loglik_cells computes (log-likelihood, gradient with the moving nodes, Louis's
    # identity or the Laplace approximation), in another order: equal to rounding, here 1e-11 relative;
    # one cell per cluster (cluster-randomised) and two (arms within clusters), on distinct clusters too
    glmm = _backends(monkeypatch)
    proc = ClusterCounts(clusters=5, cluster_size=6, size_cv=0.5, sigma=0.8, effect=0.4, family=family,
                         missing_rate=0.2, within=within)
    batch = proc.draw_batch(np.random.default_rng(3), 40)
    n, s, ca, _ = GLMM(family=family).batch_cells(batch)
    assert (ca is None) == within
    theta = glmm.start_values(n, s, family, ca) + np.random.default_rng(1).normal(0.0, 0.3, (40, 3))
    nodes = gauss_hermite(points)
    ref = loglik_cells(theta, n, s, family, nodes, ca=ca, hessian=True)
    nd, sd, cd, m = glmm.distinct_clusters(n, s, ca)
    for got in (glmm.loglik_cells_compiled(theta, n, s, family, nodes, ca=ca, hessian=True),
                glmm.loglik_cells_compiled(theta, nd, sd, family, nodes, ca=cd, weights=m, hessian=True)):
        for k in (0, 1, 3):
            np.testing.assert_allclose(got[k], ref[k], rtol=1e-11, atol=1e-11 * np.abs(ref[k]).max())
    np.testing.assert_allclose(glmm.loglik_cells_compiled(theta, n, s, family, nodes, ca=ca)[2], ref[2],
                               rtol=1e-11, atol=1e-12)           # the modes


def test_distinct_clusters_keep_every_cluster_once_with_its_count(monkeypatch):
    glmm = _backends(monkeypatch)
    for missing in (0.0, 0.3):
        proc = ClusterCounts(clusters=6, cluster_size=4, size_cv=0.5 if missing else 0.0, sigma=0.5,
                             missing_rate=missing)
        batch = proc.draw_batch(np.random.default_rng(4), 30)
        n, s, ca, _ = GLMM().batch_cells(batch)
        nd, sd, cd, m = glmm.distinct_clusters(n, s, ca)
        if not missing:      # 6 clusters of 4 per arm: at most 5 event counts per arm, so at most 10 distinct
            assert nd.shape[1] <= 10 < n.shape[1]
        for r in range(30):
            full = sorted((a, b, c) for a, b, c in zip(n[r, :, 0], s[r, :, 0], ca[r, :, 0]) if a > 0)
            comp = sorted(x for a, b, c, k in zip(nd[r, :, 0], sd[r, :, 0], cd[r, :, 0], m[r])
                          for x in [(a, b, c)] * int(k))
            assert full == comp


def test_newton_step_equals_the_eigendecomposition_step():
    # the cofactor solve where -H is safely positive definite, the eigendecomposition elsewhere: both the
    # step (-H~)^-1 g of the eigenvalue-flipped Hessian (numpy.linalg.eigh as the reference)
    from simpower.analyses.glmm import _ascent_step

    rng = np.random.default_rng(0)
    X = rng.normal(size=(400, 3, 3))
    H = -(X @ np.swapaxes(X, 1, 2)) - 0.1 * np.eye(3)
    H[:100] = 0.5 * (X[:100] + np.swapaxes(X[:100], 1, 2))        # indefinite
    H[100:120, 0, :] *= 1e-12
    H[100:120, :, 0] *= 1e-12                                     # nearly singular: eigenvalues clamped
    g = rng.normal(size=(400, 3))
    lam, V = np.linalg.eigh(H)
    lam = np.maximum(np.abs(lam), 1e-8 * np.maximum(1.0, np.abs(lam).max(-1, keepdims=True)))
    ref = np.einsum("rij,rj->ri", V, np.einsum("rji,rj->ri", V, g) / lam)
    np.testing.assert_allclose(_ascent_step(H, g), ref, rtol=1e-9, atol=1e-9 * np.abs(ref).max())


def test_batch_fit_is_the_same_with_and_without_the_kernel(monkeypatch):
    # SIMPOWER_NO_NUMBA=1 switches the batch fit to the numpy function: both reach the same optimum
    # (estimates and SEs within 1e-8 relative, decisions identical)
    _backends(monkeypatch)
    proc = ClusterCounts(clusters=8, cluster_size=10, size_cv=0.4, sigma=0.6, b0=-0.6, effect=0.5, missing_rate=0.2)
    batch = proc.draw_batch(np.random.default_rng(9), 150)
    an = GLMM()
    fast = an.batch(batch)
    monkeypatch.setenv("SIMPOWER_NO_NUMBA", "1")
    from simpower.analyses.glmm import glmm_backend

    assert glmm_backend() == "numpy"
    slow = an.batch(batch)
    assert fast.trouble.keys() == slow.trouble.keys()
    for f in FIELDS:
        np.testing.assert_allclose(getattr(fast, f), getattr(slow, f), rtol=1e-8, atol=1e-10, err_msg=f)
    assert np.array_equal(fast.pvalue <= 0.05, slow.pvalue <= 0.05)
