"""The MMRM analysis (simpower/analyses/mmrm.py) against outside references.

External facts used (each check names its own):
- with complete data and an unstructured covariance, the MMRM contrast at one visit is the
  pooled two-sample t-test at that visit (same estimate, t and df = 2n - 2): GLS with the
  same regressors in every equation is OLS equation by equation (Zellner 1962, JASA 57:348),
  and the REML covariance is the pooled within-arm covariance (common practice; Mallinckrodt
  et al. 2008, Drug Information Journal 42:303); with the baseline by visit, the same holds
  for ANCOVA at the final visit (statsmodels OLS, df = 2n - 3);
- the REML log-likelihood -2 l = (N - p) log 2 pi + log|V| + log|X'V^-1 X| + r'V^-1 r
  (Patterson & Thompson 1971; Harville 1977, JASA 72:320), written here with dense
  matrices, one subject at a time, and maximised directly with scipy;
- compound symmetry with a positive correlation is the random-intercept model
  (statsmodels MixedLM, REML);
- MAR dropout: the all-available-data likelihood analysis is unbiased, the complete-case
  final-visit analysis is not (Rubin 1976; Little & Rubin 2002, ch. 3 and 6).
Monte Carlo checks use fixed seeds and 4 MCSE.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from scipy import optimize, stats

import simpower as sp
from simpower.analyses import mmrm as M
from simpower.analyses.mmrm import MMRM
from simpower.analytic import mmrm_inflation, mmrm_n, mmrm_power, z_power
from simpower.errors import ParameterError
from simpower.registry import build


def draw(seed, size=1, **kw):
    params = {"n": 30, "visits": 4, "rho": 0.5, "effect": 0.5, **kw}
    return sp.RepeatedMeasures(**params).draw_batch(np.random.default_rng(seed), size)


def cube(data, baseline=False):
    """The standardised cube of one replicate, as the analysis builds it."""
    index, sub_arm, _ = M.design_index(data["arm"], data["visit"], data["subject"])
    an = MMRM(baseline=baseline)
    return an._cube(index, sub_arm, np.asarray(data["y"], float), data.get("baseline"))


# -- (a) complete data: the pooled t-test and ANCOVA at the final visit ---------------------------
@pytest.mark.parametrize("seed", [1, 2, 3])
def test_complete_data_unstructured_is_the_pooled_t_test_at_the_final_visit(seed):
    b = draw(seed, 2, n=25, visits=4, correlation="ar1", rho=0.6)
    d = b.replicate(0)
    last = d["visit"] == 3
    ref = stats.ttest_ind(d["y"][last & (d["arm"] == 1)], d["y"][last & (d["arm"] == 0)])
    diff = d["y"][last & (d["arm"] == 1)].mean() - d["y"][last & (d["arm"] == 0)].mean()
    for df_method in ("satterthwaite", "between_within"):
        res = MMRM(df_method=df_method)(d)
        assert res.estimate == pytest.approx(diff, rel=1e-9)
        assert res.statistic == pytest.approx(ref.statistic, rel=1e-6)
        assert res.df == pytest.approx(48.0, rel=1e-8)
        assert res.pvalue == pytest.approx(ref.pvalue, rel=1e-5)
    out = MMRM().batch(b)
    assert out.estimate[0] == pytest.approx(diff, rel=1e-9)
    assert out.pvalue[0] == pytest.approx(ref.pvalue, rel=1e-5)


def test_complete_data_with_baseline_is_ancova_at_the_final_visit():
    import statsmodels.api as sm

    b = draw(4, 1, n=30, visits=4, rho=0.6, baseline=True)
    d = b.replicate(0)
    last = d["visit"] == 3
    X = sm.add_constant(np.column_stack([d["arm"][last], d["baseline"][last]]).astype(float))
    ols = sm.OLS(d["y"][last], X).fit()
    res = MMRM(baseline=True)(d)
    assert res.estimate == pytest.approx(ols.params[1], rel=1e-8)
    assert res.se == pytest.approx(ols.bse[1], rel=1e-6)
    assert res.df == pytest.approx(ols.df_resid, rel=1e-8)     # 2n - 3
    assert res.pvalue == pytest.approx(ols.pvalues[1], rel=1e-5)


def test_average_contrast_is_the_t_test_of_the_subject_means_with_complete_data():
    """Complete data, unstructured: the average of the visit differences is the t-test on subject means
    (common practice: a linear contrast of the visit means is the t-test of that contrast per subject)."""
    b = draw(5, 1, n=20, visits=3)
    d = b.replicate(0)
    subj_mean = np.array([d["y"][d["subject"] == s].mean() for s in np.unique(d["subject"])])
    arm = np.array([d["arm"][d["subject"] == s][0] for s in np.unique(d["subject"])])
    ref = stats.ttest_ind(subj_mean[arm == 1], subj_mean[arm == 0])
    res = MMRM(contrast="average")(d)
    assert res.statistic == pytest.approx(ref.statistic, rel=1e-6)
    assert res.df == pytest.approx(38.0, rel=1e-8)


# -- (b) the REML criterion and its optimum against dense matrices --------------------------------
def dense_deviance(Sigma, Y, u):
    """-2 l_R written straightforwardly: one subject at a time, full V_i and X_i (Harville 1977)."""
    S, T = Y.shape
    q = u.shape[1]
    blocks = []
    for i in range(S):
        o = np.isfinite(Y[i])
        if not o.any():
            continue
        Xi = np.kron(np.eye(T), u[i][None, :])[o]               # rows: observed visits; columns (visit, covariate)
        blocks.append((Y[i, o], Xi, Sigma[np.ix_(o, o)]))
    N = sum(b[0].size for b in blocks)
    p = T * q
    XtVX = sum(X.T @ np.linalg.solve(V, X) for _, X, V in blocks)
    XtVy = sum(X.T @ np.linalg.solve(V, y) for y, X, V in blocks)
    beta = np.linalg.solve(XtVX, XtVy)
    quad = sum((y - X @ beta) @ np.linalg.solve(V, y - X @ beta) for y, X, V in blocks)
    logdet = sum(np.linalg.slogdet(V)[1] for _, _, V in blocks)
    return (N - p) * math.log(2 * math.pi) + logdet + np.linalg.slogdet(XtVX)[1] + quad, beta, XtVX


def dropout_replicates(seed, size, **kw):
    return draw(seed, size, n=15, visits=4, rho=0.5, dropout_rate=0.35, dropout_mar_slope=1.5, **kw)


@pytest.mark.parametrize("seed", [11, 12])
def test_reml_criterion_equals_the_dense_formula(seed):
    b = dropout_replicates(seed, 1)
    Y, u, _ = cube(b.replicate(0))
    rng = np.random.default_rng(seed)
    A = rng.normal(size=(4, 4))
    Sigma = A @ A.T + 4 * np.eye(4)
    ours = M.reml_deviance(Sigma[None], Y, u)[0]
    dense, _, _ = dense_deviance(Sigma, Y[0], u[0])
    assert ours == pytest.approx(dense, rel=1e-11)


def _dense_optimum(Y, u):
    """Direct maximisation of the dense REML log-likelihood over the Cholesky factor (scipy BFGS)."""
    T = Y.shape[1]
    tril = np.tril_indices(T)

    def sigma(x):
        L = np.zeros((T, T))
        L[tril] = x
        L[np.diag_indices(T)] = np.exp(np.diag(L))
        return L @ L.T

    x0 = np.zeros(len(tril[0]))
    f = lambda x: dense_deviance(sigma(x), Y, u)[0]  # noqa: E731
    opt = optimize.minimize(f, x0, method="BFGS", options={"gtol": 1e-9, "maxiter": 5000})
    opt = optimize.minimize(f, opt.x, method="BFGS", options={"gtol": 1e-10, "maxiter": 5000})  # restart: fresh Hessian
    Sig = sigma(opt.x)
    dev, beta, XtVX = dense_deviance(Sig, Y, u)
    return Sig, dev, beta, XtVX


@pytest.mark.parametrize("seed", [21, 22])
def test_reml_optimum_equals_a_direct_dense_maximisation(seed):
    b = dropout_replicates(seed, 1)
    d = b.replicate(0)
    Y, u, scale = cube(d)
    Sig, dev, beta, XtVX = _dense_optimum(Y[0], u[0])
    k = 3 * 2 + 1                                              # final visit, arm column
    dense_est = scale[0] * beta[k]
    dense_se = scale[0] * math.sqrt(np.linalg.inv(XtVX)[k, k])
    # the batch path's optimum (Fisher scoring) and the per-replicate path's (BFGS)
    st = M.Patterns(Y, u)
    theta, converged, _ = M.fisher_scoring(M.theta_of(M.start_sigma(st), "unstructured"), st, "unstructured")
    ev = M.Evaluation(theta, st, "unstructured", gradient=False)
    assert converged[0]
    assert ev.dev[0] <= dev + 1e-8
    np.testing.assert_allclose(ev.Sigma[0], Sig, rtol=1e-5, atol=1e-6)
    res = MMRM()(d)
    batch = MMRM().batch(b)
    for est, se in ((res.estimate, res.se), (batch.estimate[0], batch.se[0])):
        assert est == pytest.approx(dense_est, rel=1e-6, abs=1e-9)
        assert se == pytest.approx(dense_se, rel=1e-6)


def test_gradient_of_the_criterion_matches_finite_differences():
    """The analytic gradient (every structure) against central differences of the criterion itself."""
    b = dropout_replicates(31, 1)
    Y, u, _ = cube(b.replicate(0))
    st = M.Patterns(Y, u)
    for kind in M.COVARIANCES:
        theta = M.theta_of(M.start_sigma(st), kind) + 0.05
        g = M.Evaluation(theta, st, kind).grad[0]
        h = 1e-6
        fd = [(M.Evaluation(theta + h * e, st, kind, gradient=False).dev[0]
               - M.Evaluation(theta - h * e, st, kind, gradient=False).dev[0]) / (2 * h)
              for e in np.eye(theta.shape[1])[:, None, :]]
        np.testing.assert_allclose(g, fd, rtol=1e-5, atol=1e-5, err_msg=kind)


@pytest.mark.parametrize("kind", M.COVARIANCES)
def test_information_and_satterthwaite_df_equal_the_dense_formulas(kind):
    """Expected REML information 1/2 tr(P V_k P V_l), P = V^-1 - V^-1 X (X'V^-1 X)^-1 X' V^-1 (Harville 1977),
    and the Satterthwaite df 2 v^2 / (g' I^-1 g) with g_k = L'A^-1 X'V^-1 V_k V^-1 X A^-1 L (Giesbrecht &
    Burns 1985), with dense N x N matrices."""
    from scipy.linalg import block_diag

    b = dropout_replicates(71, 1)
    Y, u, _ = cube(b.replicate(0))
    st = M.Patterns(Y, u)
    theta = M.theta_of(M.start_sigma(st), kind) + 0.03
    ev = M.Evaluation(theta, st, kind, information=True)
    Sigma, J = M.sigma_of(theta, kind, 4)
    Xs, Vs, Vk = [], [], [[] for _ in range(J.shape[1])]
    for i in range(Y.shape[1]):
        o = np.isfinite(Y[0, i])
        if o.any():
            Xs.append(np.kron(np.eye(4), u[0, i][None, :])[o])
            Vs.append(Sigma[0][np.ix_(o, o)])
            for k in range(J.shape[1]):
                Vk[k].append(J[0, k][np.ix_(o, o)])
    X, V = np.vstack(Xs), block_diag(*Vs)
    Vi = np.linalg.inv(V)
    Ai = np.linalg.inv(X.T @ Vi @ X)
    P = Vi - Vi @ X @ Ai @ X.T @ Vi
    Dk = [block_diag(*v) for v in Vk]
    info = np.array([[0.5 * np.trace(P @ a @ P @ c) for c in Dk] for a in Dk])
    np.testing.assert_allclose(ev.info[0], info, rtol=1e-9, atol=1e-9)
    L = M.contrast_vector(4, 2, "final")
    v = L @ Ai @ L
    g = np.array([L @ Ai @ X.T @ Vi @ a @ Vi @ X @ Ai @ L for a in Dk])
    df = 2 * v**2 / (g @ np.linalg.solve(info, g))
    _, var, got = M.inference(ev, st, L, "satterthwaite")
    assert var[0] == pytest.approx(v, rel=1e-10)
    assert got[0] == pytest.approx(df, rel=1e-8)


# -- (c) compound symmetry = statsmodels' random intercept ----------------------------------------
@pytest.mark.parametrize("dropout", [None, 0.3])
def test_compound_symmetry_equals_statsmodels_random_intercept_reml(dropout):
    import statsmodels.api as sm

    b = draw(41, 1, n=40, visits=4, rho=0.4, correlation="exchangeable", dropout_rate=dropout)
    d = b.replicate(0)
    ok = np.isfinite(d["y"])
    visit, arm = d["visit"][ok], d["arm"][ok]
    # the same mean model: one mean per visit and arm, columns (visit j, arm difference at j)
    X = np.column_stack([c for j in range(4) for c in ((visit == j), (visit == j) & (arm == 1))]).astype(float)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fit = sm.MixedLM(d["y"][ok], X, groups=d["subject"][ok]).fit(reml=True, method="bfgs", gtol=1e-10)
    assert float(np.asarray(fit.cov_re)[0, 0]) > 0                    # positive CS correlation: the two models coincide
    res = MMRM(covariance="cs")(d)
    assert res.estimate == pytest.approx(np.asarray(fit.fe_params)[7], rel=1e-6)
    # model-based SE at statsmodels' variance components: [(X' V^-1 X)^-1]_kk
    V = float(np.asarray(fit.cov_re)[0, 0]) * np.ones((4, 4)) + fit.scale * np.eye(4)
    A = np.zeros((8, 8))
    for s in np.unique(d["subject"][ok]):
        rows = d["subject"][ok] == s
        o = visit[rows]
        A += X[rows].T @ np.linalg.solve(V[np.ix_(o, o)], X[rows])
    assert res.se == pytest.approx(math.sqrt(np.linalg.inv(A)[7, 7]), rel=1e-6)
    if dropout is None:  # complete data: statsmodels' own fixed-effect SE is the model-based one
        assert res.se == pytest.approx(np.asarray(fit.bse_fe)[7], rel=1e-5)


# -- (d) batch path = per-replicate path -----------------------------------------------------------
def _compare(analysis, b, rows):
    out = analysis.batch(b)
    trouble = np.zeros(b.size, bool)
    for mask in out.trouble.values():
        trouble |= mask
    compared = 0
    for i in rows:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            try:
                res = analysis(b.replicate(int(i)))
            except ValueError:
                assert trouble[i] and "error:ValueError" in out.trouble
                continue
        warned = any(issubclass(w.category, M.ConvergenceWarning) for w in caught)
        assert warned == bool(trouble[i]), i
        if warned:
            continue
        compared += 1
        assert out.estimate[i] == pytest.approx(res.estimate, rel=1e-6, abs=1e-9), i
        assert out.se[i] == pytest.approx(res.se, rel=1e-6), i
        assert out.pvalue[i] == pytest.approx(res.pvalue, rel=1e-5, abs=1e-9), i
        assert (out.pvalue[i] < 0.05) == (res.pvalue < 0.05), i
    return compared


@pytest.mark.parametrize("covariance", M.COVARIANCES)
@pytest.mark.parametrize("contrast,df_method", [("final", "satterthwaite"), ("average", "between_within")])
def test_batch_equals_per_replicate_on_mar_dropout(covariance, contrast, df_method):
    b = draw(51, 12, n=20, visits=4, rho=0.5, correlation="ar1", dropout_rate=0.3, dropout_mar_slope=1.0)
    an = MMRM(covariance=covariance, contrast=contrast, df_method=df_method)
    assert an.supports_batch(b)
    assert _compare(an, b, range(b.size)) >= 10


def test_batch_equals_per_replicate_with_baseline_and_intermittent_missingness():
    b = draw(52, 10, n=20, visits=4, rho=0.5, baseline=True, dropout_rate=0.2,
             missing={"type": "mcar", "rate": 0.15})
    an = MMRM(baseline=True)
    assert an.supports_batch(b)
    assert _compare(an, b, range(b.size)) >= 8


@pytest.mark.slow
def test_batch_equals_per_replicate_on_a_few_hundred_replicates():
    b = draw(53, 300, n=50, visits=4, rho=0.5, correlation="ar1", effect=0.3, dropout_rate=0.2,
             dropout_mar_slope=1.0)
    assert _compare(MMRM(), b, range(b.size)) >= 295


@pytest.mark.filterwarnings("ignore::simpower.analyses.mmrm.ConvergenceWarning")
def test_unfittable_designs_are_flagged_per_replicate_with_the_same_error():
    b = draw(61, 4, n=3, visits=3, dropout_rate=0.6)
    an = MMRM()
    out = an.batch(b)
    flagged = out.trouble.get("error:ValueError", np.zeros(b.size, bool))
    for i in range(b.size):
        try:
            an(b.replicate(i))
            assert not flagged[i]
        except ValueError as exc:
            assert flagged[i] and str(exc).startswith("mmrm:")
    assert flagged.any() and not flagged.all()
    assert np.all(np.isnan(out.pvalue[flagged]))


def test_bad_parameters_name_the_field():
    with pytest.raises(ParameterError, match="covariance"):
        MMRM(covariance="banded")
    with pytest.raises(ParameterError, match="df_method"):
        MMRM(df_method="kenward_roger")


# -- (e) type I error and bias under MAR dropout ---------------------------------------------------
@pytest.mark.slow
def test_type_one_error_and_bias_under_mar_dropout():
    common = {"n": 60, "visits": 4, "correlation": "ar1", "rho": 0.6, "dropout_rate": 0.35,
              "dropout_mar_slope": 2.0}
    null = sp.Scenario(sp.RepeatedMeasures(**common, effect=0.0), analyses={"mmrm": MMRM()})
    res = sp.run(null, reps=4000, seed=20261202, n_jobs=1)
    rate = res.summaries["mmrm"].rejection
    assert abs(rate.rate - 0.05) < 4 * rate.mcse, (rate.rate, rate.mcse)
    alt = sp.Scenario(sp.RepeatedMeasures(**common, effect=0.5),
                      analyses={"mmrm": MMRM(), "complete_case": build("analysis", {"type": "final_visit_t"})})
    res = sp.run(alt, reps=3000, seed=20261203, n_jobs=1)
    mm, cc = res.summaries["mmrm"].estimates, res.summaries["complete_case"].estimates
    assert abs(mm.bias) < 4 * mm.bias_mcse, (mm.bias, mm.bias_mcse)
    assert abs(cc.bias) > 4 * cc.bias_mcse, (cc.bias, cc.bias_mcse)


# -- the analytic core: Lu, Luo & Chen (2008) ------------------------------------------------------
def factored_inflation(cov, retention):
    """Asymptotic variance of the final-visit mean over Sigma_TT from the factored likelihood of monotone
    data: sum_j L_Tj^2 / r_j, L the Cholesky factor (Anderson 1957, JASA 52:200; Little & Rubin 2002, 7.2)."""
    L = np.linalg.cholesky(cov)
    return float((L[-1] ** 2 / np.asarray(retention)).sum() / cov[-1, -1])


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_inflation_equals_the_factored_likelihood_variance(seed):
    rng = np.random.default_rng(seed)
    T = 5
    A = rng.normal(size=(T, T))
    cov = A @ A.T + 0.5 * np.eye(T)
    retention = np.concatenate([[1.0], np.sort(rng.uniform(0.3, 1.0, T - 1))[::-1]])
    assert mmrm_inflation(cov, retention) == pytest.approx(factored_inflation(cov, retention), rel=1e-10)


def test_no_dropout_reduces_to_the_two_sample_formula():
    cov = 2.0 * (0.4 * np.ones((4, 4)) + 0.6 * np.eye(4))
    for ratio in (1.0, 2.0):
        got = mmrm_power(0.7, 40, cov=cov, retention=[1, 1, 1, 1], ratio=ratio)
        assert got == pytest.approx(z_power(0.7, 40, sd=math.sqrt(2.0), design="two-sample", ratio=ratio), rel=1e-12)
    n = mmrm_n(0.5, 0.8, cov=cov, retention=[1, 0.9, 0.8, 0.7])
    assert mmrm_power(0.5, n, cov=cov, retention=[1, 0.9, 0.8, 0.7]) == pytest.approx(0.8, rel=1e-9)
    with pytest.raises(ParameterError, match="retention"):
        mmrm_power(0.5, 40, cov=cov, retention=[1, 0.8, 0.9, 0.7])


@pytest.mark.slow
def test_formula_power_matches_simulated_mmrm_power_under_mcar_dropout():
    """Simulated power of mmrm vs the formula. The formula is asymptotic (a z-test); the allowance is 4 MCSE
    plus the gap between the z-test and a t-test with the complete cases' df at the formula's SE (a bound on
    the small-sample part at these sizes)."""
    proc = sp.RepeatedMeasures(n=100, visits=4, correlation="ar1", rho=0.6, effect=0.3, dropout_rate=0.3)
    an = MMRM()
    formula = an.analytic_power(proc, 0.05)
    f = proc.facts()[0]
    assert formula == pytest.approx(mmrm_power(0.3, 100, cov=f.cov, retention=f.retention), rel=1e-12)
    res = sp.run(sp.Scenario(proc, analyses={"mmrm": an}), reps=2000, seed=808, n_jobs=1)
    rate = res.summaries["mmrm"].rejection
    cov = np.asarray(f.cov)
    se = math.sqrt(cov[-1, -1] * mmrm_inflation(cov, f.retention) * 2 / 100)
    df = 2 * 100 * f.retention[-1] - 2
    crit = stats.t.ppf(0.975, df)
    t_power = stats.nct.sf(crit, df, 0.3 / se) + stats.nct.cdf(-crit, df, 0.3 / se)
    allowance = 4 * rate.mcse + abs(formula - t_power)
    assert abs(rate.rate - formula) < allowance, (rate.rate, formula, rate.mcse, allowance)
