"""The random-intercept mixed model: statsmodels per replicate, the batched REML path.

External references used here:
- statsmodels ``MixedLM`` (REML) fitted replicate by replicate: estimates,
  standard errors, p-values, its own REML log-likelihood (``MixedLM.loglike``)
  and its fit-trouble warnings;
- statsmodels ``OLS``: at a zero between-cluster variance the REML fit is the
  ordinary least squares fit with the REML (= OLS) residual variance;
- scipy ``ttest_ind`` on cluster means: in a balanced cluster-randomised
  trial with an interior REML estimate the mixed-model t statistic equals the
  cluster-means t statistic (Donner & Klar 2000, ch. 6; common practice);
- the between-within df (clusters - 2 for a between-cluster effect;
  Li & Redden 2015, BMC Medical Research Methodology) and the exact df of the
  balanced designs, which Satterthwaite's approximation reproduces (the
  variance of the estimate is then one mean square; Satterthwaite 1946,
  from memory).

Data come from a small generator written here (independent of the cluster
process) so the layouts the batch path must read -- shared columns, per
replicate columns, padding with ``present``, missing outcomes -- are all
exercised.
"""

import math
import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from scipy import stats
from statsmodels.regression.mixed_linear_model import MixedLMParams

import simpower as sp
from simpower.analyses.mixed import MixedModel, fit_batch
from simpower.processes.base import Batch


# -- a small generator of cluster trials ---------------------------------------------
def cluster_batch(rng, reps, k=10, m=20, icc=0.1, effect=0.3, cv=0.0, within=False, missing=0.0):
    """``reps`` two-arm trials with ``k`` clusters per arm (ids 0..2k-1), sizes mean ``m``.

    Equal sizes and cluster randomisation give shared ``arm``/``cluster``;
    otherwise they are per replicate, padded and marked by ``present``.
    ``within`` randomises individuals (coin flips) instead of clusters.
    """
    J = 2 * k
    if cv == 0:
        sizes = np.full((reps, J), m)
    else:
        sizes = np.maximum(2, np.round(rng.gamma(1 / cv**2, m * cv**2, (reps, J)))).astype(int)
    u = rng.standard_normal((reps, J)) * math.sqrt(icc)
    if cv == 0 and not within:
        cluster = np.repeat(np.arange(J), m)
        arm = (cluster >= k).astype(np.int8)
        y = effect * arm + u[:, cluster] + rng.standard_normal((reps, cluster.size)) * math.sqrt(1 - icc)
        per_rep, shared = {"y": y}, {"arm": arm, "cluster": cluster}
    else:
        N = int(sizes.sum(1).max())
        cluster = np.full((reps, N), J - 1)
        present = np.zeros((reps, N), bool)
        for r in range(reps):
            c = np.repeat(np.arange(J), sizes[r])
            cluster[r, : c.size] = c
            present[r, : c.size] = True
        arm = rng.integers(0, 2, (reps, N)) if within else (cluster >= k).astype(int)
        y = (effect * arm + np.take_along_axis(u, cluster, 1)
             + rng.standard_normal((reps, N)) * math.sqrt(1 - icc))
        per_rep, shared = {"y": y, "arm": arm, "cluster": cluster, "present": present}, {}
    if missing:
        y[rng.random(y.shape) < missing] = np.nan
    return Batch(reps, per_rep, shared, {"missing": bool(missing)})


def statsmodels_fits(batch, formula="y ~ C(arm)", **fit_kw):
    """Per replicate: (estimate, se, p, warned, model, result) from statsmodels MixedLM."""
    out = []
    for i in range(batch.size):
        d = pd.DataFrame(batch.replicate(i)).dropna(subset=["y"])
        with warnings.catch_warnings(record=True) as w:
            warnings.simplefilter("always")
            model = smf.mixedlm(formula, d, groups=d["cluster"])
            res = model.fit(reml=True, **fit_kw)
        out.append((res.fe_params.iloc[1], res.bse_fe.iloc[1], res.pvalues.iloc[1], bool(w), model, res))
    return out


# -- agreement with statsmodels ---------------------------------------------------------
CASES = {
    "balanced": dict(reps=120, cv=0.0),
    "unequal sizes": dict(reps=300, cv=0.6),
    "individually randomised": dict(reps=100, cv=0.4, within=True),
}


@pytest.mark.slow
@pytest.mark.parametrize("case", list(CASES))
def test_batch_agrees_with_statsmodels(case):
    kw = dict(CASES[case])
    reps = kw.pop("reps")
    batch = cluster_batch(np.random.default_rng(20240601), reps, **kw)
    an = MixedModel()
    assert an.supports_batch(batch)
    out = an.batch(batch)
    sm = statsmodels_fits(batch)
    est, se, p = (np.array([f[j] for f in sm]) for j in range(3))
    fit = fit_batch(batch)
    ours = np.array([_reml_criterion(f[4], fit["gamma"][i], [fit["b0"][i], fit["b1"][i]])
                     for i, f in enumerate(sm)])
    theirs = np.array([f[5].llf for f in sm])
    # Whether statsmodels' optimiser converges depends on its version, so nothing here counts its
    # warnings. Our REML criterion is never below the one statsmodels reached ...
    assert np.all(ours >= theirs - 1e-8)
    # ... and where statsmodels reached the same optimum (same criterion to 1e-6) and the
    # observed information is negative definite, estimates, SEs and p-values agree within 1e-4
    flagged = out["trouble"]["warning:ConvergenceWarning"]
    same = (ours - theirs < 1e-6) & ~flagged
    assert np.max(np.abs(out["estimate"][same] - est[same]), initial=0) < 1e-4
    assert np.max(np.abs(out["se"][same] - se[same]), initial=0) < 1e-4
    assert np.max(np.abs(out["pvalue"][same] - p[same]), initial=0) < 1e-4
    # every replicate the batch flags has an observed information (statsmodels' MixedLM.hessian at
    # our estimate) that is not negative definite
    for i in np.flatnonzero(flagged):
        params = MixedLMParams.from_components(fe_params=np.array([fit["b0"][i], fit["b1"][i]]),
                                               cov_re=np.array([[max(fit["gamma"][i], 1e-12)]]))
        hess, _ = sm[i][4].hessian(params)
        assert np.linalg.eigvalsh(hess).max() >= -1e-10


def _reml_criterion(model, gamma, fe=None):
    """statsmodels' own REML log-likelihood at variance ratio ``gamma`` (fixed effects given,
    or profiled out by GLS when ``fe`` is None). statsmodels cannot evaluate a singular
    random-effects covariance, so a boundary ``gamma = 0`` is evaluated at 1e-12."""
    params = MixedLMParams.from_components(fe_params=np.zeros(2) if fe is None else np.asarray(fe),
                                           cov_re=np.array([[max(gamma, 1e-12)]]))
    return model.loglike(params, profile_fe=fe is None)


def test_batch_is_the_exact_reml_optimum():
    # The property, without relying on any optimiser: by statsmodels' own REML criterion
    # (MixedLM.loglike), the batch estimate is (i) at least as good as statsmodels' fitted
    # optimum, whether or not its optimiser converged, (ii) at least as good as every point
    # of a dense grid of variance ratios, and (iii) a local maximum; the fixed effect is the
    # GLS estimate at that ratio and its SE is the one of statsmodels' observed information
    # (MixedLM.hessian) there -- or, at the boundary, the OLS fit (Searle, Casella &
    # McCulloch 1992, ch. 6, from memory).
    batch = cluster_batch(np.random.default_rng(3), 15, k=6, m=12, icc=0.2, cv=0.7)
    fit = fit_batch(batch)
    out = MixedModel().batch(batch)
    grid = np.geomspace(1e-8, 1e2, 801)
    for i, (_, _, _, _, model, res) in enumerate(statsmodels_fits(batch)):
        g = fit["gamma"][i]
        fe = [fit["b0"][i], fit["b1"][i]]
        ours = _reml_criterion(model, g, fe)
        assert ours >= res.llf - 1e-8
        assert ours >= max(_reml_criterion(model, x) for x in grid) - 1e-8
        if g == 0:
            d = pd.DataFrame(batch.replicate(i)).dropna(subset=["y"])
            ols = smf.ols("y ~ C(arm)", d).fit()
            assert math.isclose(fit["b1"][i], ols.params.iloc[1], rel_tol=0, abs_tol=1e-9)
            assert math.isclose(out["se"][i], ols.bse.iloc[1], rel_tol=1e-8)
            continue
        for step in (1 - 1e-4, 1 + 1e-4):
            assert ours >= _reml_criterion(model, g * step) - 1e-10
        gls, _ = model.get_fe_params(np.array([[g]]), np.zeros(0))
        assert math.isclose(fit["b1"][i], gls[1], rel_tol=0, abs_tol=1e-9)
        params = MixedLMParams.from_components(fe_params=np.asarray(fe), cov_re=np.array([[g]]))
        hess, _ = model.hessian(params)
        se = math.sqrt(np.linalg.inv(-hess)[1, 1])
        assert math.isclose(out["se"][i], se, rel_tol=1e-7)
        assert math.isclose(out["pvalue"][i], 2 * stats.norm.sf(abs(fe[1]) / se), rel_tol=1e-7, abs_tol=1e-12)


def test_reml_loglik_at_batch_estimate_is_at_least_statsmodels():
    # statsmodels' own REML criterion, evaluated at our estimate, is never below its fitted value.
    batch = cluster_batch(np.random.default_rng(8), 25, k=5, m=10, icc=0.05, cv=0.5)
    fit = fit_batch(batch)
    for i, (_, _, _, _, model, res) in enumerate(statsmodels_fits(batch)):
        params = MixedLMParams.from_components(fe_params=np.array([fit["b0"][i], fit["b1"][i]]),
                                               cov_re=np.array([[fit["gamma"][i]]]))
        assert model.loglike(params, profile_fe=False) >= res.llf - 1e-8


# -- the boundary -------------------------------------------------------------------------
def test_zero_cluster_variance_gives_the_boundary_and_the_ols_fit():
    reps = 400
    batch = cluster_batch(np.random.default_rng(5), reps, k=8, m=15, icc=0.0, cv=0.0)
    fit = fit_batch(batch)
    out = MixedModel().batch(batch)
    at0 = fit["gamma"] == 0
    # Balanced one-way layout: the REML estimate of the cluster variance is
    # max(0, (MSB - MSW) / m), at the boundary exactly when MSB <= MSW, which under
    # ICC = 0 has probability P(F(2k - 2, 2k(m - 1)) <= 1) (Searle, Casella & McCulloch
    # 1992, Variance Components, ch. 3 and 6; from memory). Within 4 binomial SE.
    from scipy import stats as _stats

    p_boundary = _stats.f.cdf(1.0, 2 * 8 - 2, 2 * 8 * (15 - 1))
    assert abs(at0.mean() - p_boundary) < 4 * np.sqrt(p_boundary * (1 - p_boundary) / reps)
    # the comparisons with statsmodels below (30 ms a fit) use the first 40 replicates
    batch = Batch(40, {k: v[:40] for k, v in batch.per_rep.items()}, batch.shared, batch.info)
    fit = fit_batch(batch)
    out = MixedModel().batch(batch)
    at0 = fit["gamma"] == 0
    # a boundary fit is an answer, not fit trouble (statsmodels' absolute 0.01 threshold would
    # make "trouble" depend on the outcome's units)
    assert not np.any(out["trouble"]["warning:ConvergenceWarning"][at0])
    for i in np.flatnonzero(at0)[:8]:
        d = pd.DataFrame(batch.replicate(i))
        ols = smf.ols("y ~ C(arm)", d).fit()
        assert math.isclose(fit["b1"][i], ols.params.iloc[1], rel_tol=0, abs_tol=1e-10)
        assert math.isclose(fit["se"][i], ols.bse.iloc[1], rel_tol=1e-9)
        assert math.isclose(fit["sigma_e2"][i], ols.scale, rel_tol=1e-9)
    # statsmodels may warn that its estimate is on the boundary (its sqrt parametrisation stalls
    # near 0); the per-replicate analysis does not pass that one warning on
    d = pd.DataFrame(batch.replicate(int(np.flatnonzero(at0)[0])))
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        MixedModel()(d)
    assert not [w for w in seen if "boundary" in str(w.message)]
    sm = statsmodels_fits(batch)
    # everywhere our REML criterion is at least as good as where statsmodels stopped
    for i, (_, _, _, _, model, res) in enumerate(sm):
        params = MixedLMParams.from_components(fe_params=np.array([fit["b0"][i], fit["b1"][i]]),
                                               cov_re=np.array([[fit["gamma"][i]]]))
        assert model.loglike(params, profile_fe=False) >= res.llf - 1e-8


def test_per_replicate_path_lets_statsmodels_warnings_through():
    batch = cluster_batch(np.random.default_rng(5), 40, k=8, m=15, icc=0.0)
    at0 = np.flatnonzero(fit_batch(batch)["gamma"] == 0)
    b1 = fit_batch(batch)["b1"]

    def statsmodels_warning(i):
        d = pd.DataFrame(batch.replicate(i))
        with warnings.catch_warnings(record=True) as seen:
            warnings.simplefilter("always")
            smf.mixedlm("y ~ C(arm)", d, groups=d["cluster"]).fit(reml=True)
        kept = [w for w in seen if "boundary" not in str(w.message)]
        return f"warning:{kept[0].category.__name__}" if kept else ""

    sc = sp.Scenario(lambda rng: batch.replicate(int(at0[rng.integers(at0.size)])), MixedModel())
    res = sp.run(sc, reps=6, seed=1, n_jobs=1)
    rec = res.records["mixed_model"]
    assert res.paths["mixed_model"] == "per-replicate"
    # each replicate records the (non-boundary) warning statsmodels itself gives on its data, or
    # none -- whichever statsmodels version is installed (the replicate drawn is recognised by its
    # estimate, the OLS one at the boundary)
    drawn = [int(at0[np.argmin(np.abs(b1[at0] - e))]) for e in rec.estimate]
    assert np.allclose(rec.estimate, b1[drawn], atol=1e-6)
    assert list(rec.failure) == [statsmodels_warning(i) for i in drawn]


# -- degrees of freedom ---------------------------------------------------------------
def test_between_within_df():
    bal = cluster_batch(np.random.default_rng(1), 30, k=7, m=9)
    within = cluster_batch(np.random.default_rng(1), 30, k=7, m=9, cv=0.3, within=True)
    # cluster randomised: clusters - 2 (Li & Redden 2015); within clusters: N - clusters - 1
    for batch, expected in ((bal, lambda d: 14 - 2), (within, lambda d: len(d["y"]) - 14 - 1)):
        out = MixedModel(df="between-within").batch(batch)
        checked = 0
        for i in range(batch.size):
            d = batch.replicate(i)
            with warnings.catch_warnings(record=True) as w:
                warnings.simplefilter("always")
                r = MixedModel(df="between-within")(d)
            assert r.df == expected(d)
            t = r.estimate / r.se
            assert math.isclose(r.pvalue, 2 * stats.t.sf(abs(t), expected(d)), rel_tol=1e-12)
            if not w:  # a clean statsmodels fit: the batch path agrees
                assert math.isclose(r.pvalue, out["pvalue"][i], abs_tol=1e-4)
                checked += 1
            if checked == 3:
                break
        assert checked == 3


def test_satterthwaite_reproduces_exact_df_in_balanced_designs():
    an = MixedModel(df="satterthwaite")
    for k, m in ((5, 8), (9, 4)):
        batch = cluster_batch(np.random.default_rng(k), 40, k=k, m=m, icc=0.15)
        interior = fit_batch(batch)["gamma"] > 0
        out = an.batch(batch)
        crit = (out["ci_high"] - out["ci_low"]) / (2 * out["se"])
        assert np.allclose(crit[interior], stats.t.ppf(0.975, 2 * k - 2), rtol=1e-8)
        r = an(batch.replicate(int(np.flatnonzero(interior)[0])))
        assert math.isclose(r.df, 2 * k - 2, rel_tol=1e-4)


def test_satterthwaite_batch_matches_per_replicate_unbalanced():
    batch = cluster_batch(np.random.default_rng(4), 12, k=6, m=10, icc=0.2, cv=0.7)
    an = MixedModel(df="satterthwaite")
    out = an.batch(batch)
    for i in range(batch.size):
        with warnings.catch_warnings(record=True) as w:
            warnings.simplefilter("always")
            r = an(batch.replicate(i))
        if w:
            continue
        assert math.isclose(r.pvalue, out["pvalue"][i], abs_tol=1e-4)
        assert math.isclose(r.se, out["se"][i], rel_tol=1e-4)


def test_balanced_mixed_model_equals_cluster_means_t_test():
    batch = cluster_batch(np.random.default_rng(9), 200, k=6, m=10, icc=0.1)
    out = MixedModel(df="between-within").batch(batch)
    interior = fit_batch(batch)["gamma"] > 0
    y, cl = batch.per_rep["y"], batch.shared["cluster"]
    means = np.stack([y[:, cl == j].mean(1) for j in range(12)], 1)
    ref = stats.ttest_ind(means[:, 6:], means[:, :6], axis=1)
    assert interior.mean() > 0.7
    assert np.allclose(out["pvalue"][interior], ref.pvalue[interior], rtol=1e-8, atol=1e-12)
    assert np.allclose(out["estimate"], means[:, 6:].mean(1) - means[:, :6].mean(1), atol=1e-10)


# -- layouts, paths, missing outcomes ----------------------------------------------
def test_missing_outcomes_are_dropped_in_both_paths():
    batch = cluster_batch(np.random.default_rng(2), 10, k=6, m=10, icc=0.1, missing=0.15)
    an = MixedModel()
    assert an.supports_batch(batch)
    out = an.batch(batch)
    for i, f in enumerate(statsmodels_fits(batch)):
        if not f[3]:
            assert math.isclose(f[0], out["estimate"][i], abs_tol=1e-4)
            assert math.isclose(f[2], out["pvalue"][i], abs_tol=1e-4)


def test_supports_batch_checks_the_layout():
    batch = cluster_batch(np.random.default_rng(0), 4, k=3, m=5)
    assert MixedModel().supports_batch(batch)
    assert MixedModel(formula="y ~ arm").supports_batch(batch)
    assert not MixedModel(formula="y ~ C(arm) + subject").supports_batch(batch)
    assert not MixedModel(groups="subject").supports_batch(batch)
    three_arms = Batch(4, dict(batch.per_rep), {**batch.shared, "arm": batch.shared["arm"] * 2})
    assert not MixedModel().supports_batch(three_arms)
    no_cluster = Batch(4, dict(batch.per_rep), {"arm": batch.shared["arm"]})
    assert not MixedModel().supports_batch(no_cluster)


def test_repeated_measures_per_replicate_with_subject_groups():
    rng = np.random.default_rng(6)
    n, visits = 30, 3
    subject = np.repeat(np.arange(n), visits)
    visit = np.tile(np.arange(visits), n)
    arm = (subject >= n // 2).astype(int)
    y = 0.4 * arm + 0.2 * visit + rng.normal(0, 0.7, n)[subject] + rng.normal(0, 1, n * visits)
    data = {"y": y, "arm": arm, "subject": subject, "visit": visit}
    an = MixedModel(formula="y ~ C(arm) + C(visit)", groups="subject", df="between-within")
    r = an(data)
    ref = smf.mixedlm("y ~ C(arm) + C(visit)", pd.DataFrame(data), groups=subject).fit(reml=True)
    assert math.isclose(r.estimate, ref.fe_params["C(arm)[T.1]"], rel_tol=1e-12)
    assert math.isclose(r.se, ref.bse_fe["C(arm)[T.1]"], rel_tol=1e-12)
    assert r.df == n - 2  # arm is constant within subject: subjects - 2 (intercept, arm)
    late = MixedModel(formula="y ~ C(arm) + C(visit)", groups="subject", term="C(visit)[T.2]", df="between-within")
    assert late(data).df == n * visits - n - 2  # a within-subject column: N - subjects - 2 within columns


def test_engine_takes_the_batch_path_for_the_cluster_process():
    registry = pytest.importorskip("simpower.registry")
    if "cluster_trial" not in registry.names("process"):
        pytest.skip("cluster_trial process not available")
    proc = registry.build("process", {"type": "cluster_trial", "clusters": 8, "cluster_size": 12, "icc": 0.05,
                                      "cluster_size_cv": 0.5, "effect": 0.0})
    sc = sp.Scenario(proc, analyses={"lmm": MixedModel(df="between-within")})
    res = sp.run(sc, reps=3000, seed=11, n_jobs=1)
    assert res.paths["lmm"] == "batch"
    rec = res.records["lmm"]
    # type I error of the between-within test under the null, all replicates counted as
    # decisions: near alpha (Bradley's 1978 liberal criterion 0.5 alpha .. 1.5 alpha)
    rate = np.mean(rec.pvalue <= 0.05)
    assert 0.025 <= rate <= 0.075
    assert "warning:ConvergenceWarning" in rec.causes


# -- bad input ------------------------------------------------------------------------
@pytest.mark.parametrize("kw, field", [({"df": "kenward"}, "df"), ({"formula": "y C(arm)"}, "formula"),
                                       ({"groups": ""}, "groups"), ({"alternative": "both"}, "alternative")])
def test_bad_parameters_name_the_field(kw, field):
    with pytest.raises(sp.ParameterError, match=f"`{field}`"):
        MixedModel(**kw)


def test_unknown_term_names_the_nearest_coefficient():
    batch = cluster_batch(np.random.default_rng(0), 1, k=4, m=6)
    with pytest.raises(sp.ParameterError, match="C\\(arm\\)\\[T.1\\]"):
        MixedModel(term="C(arm)[T.2]")(batch.replicate(0))


def test_a_degenerate_replicate_gives_nan_not_a_crash():
    # all treatment-arm outcomes missing in replicate 1: no arm contrast there, NaN p-value;
    # the other replicates are untouched
    batch = cluster_batch(np.random.default_rng(7), 3, k=4, m=6, icc=0.1, missing=0.01)
    y = batch.per_rep["y"]
    y[1, batch.shared["arm"] == 1] = np.nan
    for df in ("wald", "between-within", "satterthwaite"):
        out = MixedModel(df=df).batch(batch)
        assert np.isnan(out["pvalue"][1])
        assert np.all(np.isfinite(out["pvalue"][[0, 2]]))
    ref = statsmodels_fits(Batch(1, {"y": y[[0]]}, batch.shared))[0]
    out = MixedModel().batch(batch)
    assert math.isclose(out["pvalue"][0], ref[2], abs_tol=1e-4) or ref[3]


def test_fit_trouble_does_not_depend_on_the_outcome_units():
    # The same data in other units (y times 100 or divided by 100) must give the same
    # p-values and the same fit-trouble flags: power cannot depend on the unit of measure.
    base = cluster_batch(np.random.default_rng(8), 300, k=10, m=20, icc=0.05)
    flags, pvals = [], []
    for scale in (0.01, 1.0, 100.0):
        b = Batch(base.size, {**base.per_rep, "y": base.per_rep["y"] * scale}, base.shared, base.info)
        out = MixedModel().batch(b)
        flags.append(out["trouble"]["warning:ConvergenceWarning"])
        pvals.append(out["pvalue"])
    assert np.array_equal(flags[0], flags[1]) and np.array_equal(flags[1], flags[2])
    assert np.allclose(pvals[0], pvals[1], rtol=1e-8) and np.allclose(pvals[2], pvals[1], rtol=1e-8)
