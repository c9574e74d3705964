"""gee: families, small-sample corrections, and the batch path against statsmodels.

External sources, named beside each check:
- statsmodels GEE (``statsmodels.api.GEE``; Liang & Zeger 1986, Biometrika 73:13-22): estimates,
  robust SEs and the Mancl & DeRouen (2001, Biometrics 57:126-134) bias-reduced SEs
  (statsmodels' ``cov_type="bias_reduced"``), fitted here directly on numpy arrays;
- Kauermann & Carroll (2001, JASA 96:1387-1396): the sandwich with each group's residuals
  multiplied by ``(I - H_i)^-1/2``, ``H_i = D_i B^-1 D_i' V_i^-1``; computed in this file
  from that formula with scipy.linalg.sqrtm (the principal square root), independently of
  simpower's implementation;
- with one observation per group and independence working correlation a GEE is a linear
  regression and the three sandwiches are White's HC0, HC2 and HC3 (MacKinnon & White 1985,
  J Econometrics 29:305-325): statsmodels OLS ``cov_type`` "HC0", "HC2", "HC3";
- Bradley (1978, Br J Math Stat Psychol 31:144-152): a test is robust at level alpha when its
  type I error lies in [alpha / 2, 3 alpha / 2]; Li & Redden (2015, Stat Med 34:281-296) report
  that the uncorrected sandwich with a normal reference is anti-conservative with few clusters
  and that Mancl-DeRouen with t(clusters - 2) keeps the type I error in that interval.
Binary and count cluster data are drawn in this file (random intercepts on the logit / log
scale); statistical tolerances are 4 Monte Carlo standard errors (MCSE).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
import scipy.linalg
import statsmodels.api as sm
from scipy import stats
from statsmodels.genmod import cov_struct as sm_cov

import simpower as sp
from simpower.analyses.base import rowwise
from simpower.analyses.clustered import Gee
from simpower.analyses.gee import GEE, kauermann_carroll_cov
from simpower.batch import Batch


# -- data: clustered outcomes of three families, drawn here --------------------------------------
def cluster_batch(family, reps, clusters=6, size=8, cv=0.0, missing=0.0, seed=1, sd_b=0.5, effect=0.4):
    """A two-arm cluster-randomised batch: ``clusters`` per arm, random intercept N(0, sd_b^2) on the link scale.

    Equal sizes: shared ``cluster`` and ``arm``; ``cv`` > 0: sizes 1 + Poisson(size - 1) scaled
    to that CV by a gamma mixture, padded, with per-replicate ``cluster``, ``arm``, ``present``.
    ``missing``: each outcome missing completely at random with that probability.
    """
    rng = np.random.default_rng(seed)
    G = 2 * clusters
    if cv == 0:
        sizes = np.full((reps, G), size)
    else:
        lam = rng.gamma(1 / cv**2, cv**2 * (size - 1), (reps, G))
        sizes = 1 + rng.poisson(lam)
    width = int(sizes.sum(axis=1).max())
    cluster = np.full((reps, width), G - 1)
    present = np.zeros((reps, width), bool)
    for r in range(reps):
        ids = np.repeat(np.arange(G), sizes[r])
        cluster[r, :ids.size] = ids
        present[r, :ids.size] = True
    arm = (cluster >= clusters).astype(np.int8)
    u = rng.normal(0.0, sd_b, (reps, G))
    eta = -0.3 + effect * arm + np.take_along_axis(u, cluster, axis=1)
    if family == "binomial":
        y = (rng.random(eta.shape) < 1 / (1 + np.exp(-eta))).astype(float)
    elif family == "poisson":
        y = rng.poisson(np.exp(eta + 0.5)).astype(float)
    else:
        y = eta + rng.normal(0.0, 1.0, eta.shape)
    per_rep, shared, info = {"y": y}, {}, {}
    if cv == 0:
        shared = {"cluster": cluster[0], "arm": arm[0]}
    else:
        per_rep.update(cluster=cluster, arm=arm, present=present)
    if missing:
        hide = rng.random(y.shape) < missing
        y[hide] = np.nan
        per_rep["observed"] = ~hide & present
        info["missing"] = True
    return Batch(reps, per_rep, shared, info)


# -- the reference: statsmodels GEE on numpy arrays --------------------------------------------
FAMILY = {"gaussian": sm.families.Gaussian, "binomial": sm.families.Binomial, "poisson": sm.families.Poisson}


def statsmodels_fit(table, family, structure):
    y = np.asarray(table["y"], float)
    keep = np.isfinite(y)
    X = np.column_stack([np.ones(keep.sum()), np.asarray(table["arm"], float)[keep]])
    cs = sm_cov.Exchangeable() if structure == "exchangeable" else sm_cov.Independence()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        res = sm.GEE(y[keep], X, groups=np.asarray(table["cluster"])[keep], family=FAMILY[family](),
                     cov_struct=cs).fit(cov_type="bias_reduced")
    return res, bool(res.converged) and not caught


def reference(batch, family, structure):
    """Per replicate: estimate, robust SE, Mancl-DeRouen SE, Kauermann-Carroll SE and whether statsmodels converged."""
    out = {k: np.full(batch.size, np.nan) for k in ("est", "robust", "md", "kc")}
    clean = np.zeros(batch.size, bool)
    for i in range(batch.size):
        res, ok = statsmodels_fit(batch.replicate(i), family, structure)
        out["est"][i] = res.params[1]
        out["robust"][i] = res.standard_errors("robust")[1]
        out["md"][i] = res.standard_errors("bias_reduced")[1]
        if ok:
            out["kc"][i] = math.sqrt(direct_kc(res)[1, 1])
        clean[i] = ok
    return out, clean


# -- Kauermann-Carroll from the paper's formula, with full matrices ---------------------------------
def direct_kc(res):
    """``B^-1 [sum_i D_i' V_i^-1 A_i r_i r_i' A_i' V_i^-1 D_i] B^-1`` with ``A_i = (I - H_i)^-1/2`` (principal
    root by scipy.linalg.sqrtm), ``H_i = D_i B^-1 D_i' V_i^-1`` (Kauermann & Carroll 2001), at statsmodels'
    final estimate and working correlation."""
    m = res.model
    beta = np.asarray(res.params)
    parts = []
    for i in range(m.num_group):
        X, y = m.exog_li[i], m.endog_li[i]
        eta = X @ beta
        mu = m.family.link.inverse(eta)
        D = X * m.family.link.inverse_deriv(eta)[:, None]
        sd = np.sqrt(m.family.variance(mu))
        a = m.cov_struct.dep_params if isinstance(m.cov_struct, sm_cov.Exchangeable) else 0.0
        R = np.full((len(y), len(y)), a)
        np.fill_diagonal(R, 1.0)
        parts.append((D, R * np.outer(sd, sd), y - mu))
    B = sum(D.T @ np.linalg.inv(V) @ D for D, V, _ in parts)
    if np.linalg.eigvalsh(B)[0] <= 0:  # an exchangeable estimate that is no correlation matrix: undefined
        return np.full(B.shape, np.nan)
    Binv = np.linalg.inv(B)
    meat = 0
    for D, V, r in parts:
        H = D @ Binv @ D.T @ np.linalg.inv(V)
        if np.linalg.eigvals(np.eye(len(r)) - H).real.min() <= 0:  # no principal square root: undefined
            return np.full(B.shape, np.nan)
        A = np.linalg.inv(scipy.linalg.sqrtm(np.eye(len(r)) - H).real)
        s = D.T @ np.linalg.inv(V) @ A @ r
        meat = meat + np.outer(s, s)
    return Binv @ meat @ Binv


# -- batch path == statsmodels, every family x working correlation x SE x data shape -------------
CONFIGS = [(f, s, cv, miss) for f in ("gaussian", "binomial", "poisson") for s in ("exchangeable", "independence")
           for cv in (0.0, 0.6) for miss in (0.0, 0.2)]


def _compare(family, structure, cv, missing, reps, seed):
    batch = cluster_batch(family, reps, cv=cv, missing=missing, seed=seed)
    ref, clean = reference(batch, family, structure)
    assert clean.mean() > 0.9
    tables = [batch.replicate(i) for i in range(reps)]
    groups = np.array([np.unique(np.asarray(t["cluster"])[np.isfinite(t["y"])]).size for t in tables])
    for cov_type, key in (("robust", "robust"), ("mancl_derouen", "md"), ("kauermann_carroll", "kc")):
        for dist in ("normal", "t"):
            an = GEE(family=family, cov_struct=structure, cov_type=cov_type, distribution=dist)
            assert an.supports_batch(batch)
            got = an.batch(batch)
            est, se = np.asarray(got.estimate), np.asarray(got.se)
            both = clean & np.isfinite(ref[key])
            assert np.all(np.isnan(se[clean & ~both]))  # KC undefined there: the per-replicate path raises
            # (estimates are 0 when the arms tie: an absolute tolerance too)
            np.testing.assert_allclose(est[both], ref["est"][both], rtol=1e-6, atol=1e-10, err_msg=cov_type)
            np.testing.assert_allclose(se[both], ref[key][both], rtol=1e-6, err_msg=cov_type)
            # decisions of the Wald test, normal or t(groups - 2), from statsmodels' numbers
            z = ref["est"] / ref[key]
            p_ref = 2 * (stats.norm.sf(np.abs(z)) if dist == "normal" else stats.t.sf(np.abs(z), groups - 2))
            same = (np.asarray(got.pvalue)[both] <= 0.05) == (p_ref[both] <= 0.05)
            assert same.mean() >= 0.999, (cov_type, dist, same.mean())


@pytest.mark.parametrize("family, structure, cv, missing", CONFIGS)
def test_batch_matches_statsmodels(family, structure, cv, missing):
    _compare(family, structure, cv, missing, reps=40, seed=11)


@pytest.mark.slow
@pytest.mark.parametrize("family, structure, cv, missing", CONFIGS)
def test_batch_matches_statsmodels_on_hundreds_of_replicates(family, structure, cv, missing):
    _compare(family, structure, cv, missing, reps=200, seed=12)


@pytest.mark.parametrize("family", ["gaussian", "binomial"])
def test_batch_path_equals_per_replicate_path_with_its_trouble(family):
    # per replicate through simpower's own path (statsmodels + its warnings, recorded per replicate
    # as the engine does): values to 1e-9 and the same causes
    batch = cluster_batch(family, 30, clusters=4, size=5, cv=0.6, missing=0.2, seed=5)
    for cov_type in ("robust", "bias_reduced", "kauermann_carroll"):
        an = GEE(family=family, cov_type=cov_type, distribution="t")
        got = an.batch(batch)
        vals, trouble, _ = rowwise(an, batch, np.arange(batch.size))
        for f in ("pvalue", "estimate", "se", "ci_low", "ci_high"):
            np.testing.assert_allclose(got[f], vals[f], rtol=1e-9, equal_nan=True, err_msg=f)
        assert {k: list(np.flatnonzero(v)) for k, v in got.trouble.items()} == \
            {k: list(np.flatnonzero(v)) for k, v in trouble.items()}


def test_failing_replicate_is_flagged_alone():
    # binomial: one replicate whose control arm has no events (separation) -- statsmodels' own
    # path decides that replicate (its warnings become that replicate's trouble); the others
    # stay on the batch path and agree with statsmodels
    batch = cluster_batch("binomial", 12, clusters=4, size=6, seed=8)
    y = batch.per_rep["y"]
    y[3, batch.shared["arm"] == 0] = 0.0
    an = GEE(family="binomial")
    got = an.batch(batch)
    vals, trouble, _ = rowwise(an, batch, np.arange(batch.size))
    assert trouble and set(got.trouble) == set(trouble)      # statsmodels warns on replicate 3
    for cause, mask in trouble.items():
        assert np.array_equal(got.trouble[cause], mask)
        assert mask[3] and not mask[np.arange(12) != 3].any()
    np.testing.assert_allclose(got.estimate, vals["estimate"], rtol=1e-9, atol=1e-12)


def test_repeated_measures_batch_matches_the_formula_model():
    # the default repeated-measures model is visit x arm with the final visit as reference
    # (statsmodels' formula interface builds it here independently of simpower's design)
    import pandas as pd

    proc = sp.RepeatedMeasures(n=12, visits=3, rho=0.5, effect=0.5, dropout_rate=0.2)
    batch = proc.draw_batch(np.random.default_rng(4), 25)
    an = GEE(cov_type="kauermann_carroll")
    got = an.batch(batch)
    for i in (0, 9, 17):
        df = pd.DataFrame(batch.replicate(i)).dropna(subset=["y"])
        res = sm.GEE.from_formula("y ~ C(visit, Treatment(reference=2)) * arm", groups="subject", data=df,
                                  cov_struct=sm_cov.Exchangeable()).fit()
        assert got.estimate[i] == pytest.approx(res.params["arm"], rel=1e-8)
        j = list(res.model.exog_names).index("arm")
        assert got.se[i] == pytest.approx(math.sqrt(direct_kc(res)[j, j]), rel=1e-8)


# -- Kauermann-Carroll ------------------------------------------------------------------------------
def test_kauermann_carroll_on_a_small_data_set():
    # 4 clusters (2 per arm) of sizes 2, 3, 2, 3; gaussian, independence working correlation:
    # the GEE estimate is OLS, B = X'X, H_i = X_i (X'X)^-1 X_i' (Kauermann & Carroll 2001)
    y = np.array([1.0, 2.0, 0.5, 1.5, 2.5, 3.0, 2.0, 4.0, 3.5, 2.5])
    arm = np.array([0, 0, 0, 0, 0, 1, 1, 1, 1, 1])
    cl = np.array([0, 0, 1, 1, 1, 2, 2, 3, 3, 3])
    X = np.column_stack([np.ones(10), arm])
    beta = np.linalg.solve(X.T @ X, X.T @ y)
    assert beta[1] == pytest.approx(3.0 - 1.5)          # difference in arm means: 15/5 - 7.5/5
    r = y - X @ beta
    Binv = np.linalg.inv(X.T @ X)
    meat = np.zeros((2, 2))
    for g in range(4):
        Xg, rg = X[cl == g], r[cl == g]
        A = np.linalg.inv(scipy.linalg.sqrtm(np.eye(len(rg)) - Xg @ Binv @ Xg.T).real)
        s = Xg.T @ A @ rg
        meat += np.outer(s, s)
    se = math.sqrt((Binv @ meat @ Binv)[1, 1])
    data = {"y": y, "arm": arm, "cluster": cl}
    res = GEE(cov_struct="independence", cov_type="kauermann_carroll")(data)
    assert res.estimate == pytest.approx(1.5, rel=1e-12)
    assert res.se == pytest.approx(se, rel=1e-10)
    # the batch path on the same table (as a batch of one replicate)
    b = Batch(1, {"y": y[None]}, {"arm": arm, "cluster": cl})
    assert GEE(cov_struct="independence", cov_type="kauermann_carroll").batch(b).se[0] == pytest.approx(se, rel=1e-10)
    # and the helper the per-replicate path uses, with the same pieces
    D = [X[cl == g] for g in range(4)]
    V = [np.eye(len(d)) for d in D]
    assert math.sqrt(kauermann_carroll_cov(D, V, [r[cl == g] for g in range(4)])[1, 1]) == pytest.approx(se, rel=1e-10)


@pytest.mark.parametrize("family", ["gaussian", "binomial", "poisson"])
def test_kauermann_carroll_matches_the_paper_formula_with_exchangeable_correlation(family):
    batch = cluster_batch(family, 6, clusters=5, size=4, cv=0.5, seed=21)
    got = GEE(family=family, cov_type="kauermann_carroll").batch(batch)
    for i in range(6):
        res, ok = statsmodels_fit(batch.replicate(i), family, "exchangeable")
        assert ok
        assert got.se[i] == pytest.approx(math.sqrt(direct_kc(res)[1, 1]), rel=1e-8)


@pytest.mark.parametrize("cov_type, hc", [("robust", "HC0"), ("kauermann_carroll", "HC2"), ("mancl_derouen", "HC3")])
def test_one_observation_per_group_gives_the_heteroskedasticity_consistent_ses(cov_type, hc):
    # independence, gaussian, one member per group: B = X'X, H_i = h_ii, so the corrections are
    # 1, (1 - h_ii)^-1/2 and (1 - h_ii)^-1 on each residual: HC0, HC2, HC3 (MacKinnon & White 1985)
    rng = np.random.default_rng(3)
    n = 15
    arm = (np.arange(n) >= 7).astype(int)
    y = rng.normal(size=n) * (1 + arm) + arm
    ols = sm.OLS(y, sm.add_constant(arm.astype(float))).fit(cov_type=hc)
    for structure in ("independence", "exchangeable"):   # singletons: statsmodels never updates the correlation
        res = GEE(cov_struct=structure, cov_type=cov_type)({"y": y, "arm": arm, "cluster": np.arange(n)})
        assert res.se == pytest.approx(ols.bse[1], rel=1e-10)


def test_kauermann_carroll_lies_between_robust_and_mancl_derouen_with_equal_clusters():
    # with equal clusters and a cluster-level covariate, H_i = D_i B^-1 D_i' V_i^-1 has the same
    # eigenvalues lam in [0, 1) in every cluster of an arm, and the corrections scale each cluster's
    # contribution by 1, (1 - lam)^-1 and (1 - lam)^-2 (robust, KC, MD) in the arm direction
    batch = cluster_batch("gaussian", 50, clusters=5, size=6, seed=31)
    se = {c: GEE(cov_type=c).batch(batch).se for c in ("robust", "kauermann_carroll", "mancl_derouen")}
    assert np.all(se["robust"] < se["kauermann_carroll"]) and np.all(se["kauermann_carroll"] < se["mancl_derouen"])


# -- parameters ----------------------------------------------------------------------------------
def test_parameters_and_names():
    assert Gee is GEE and sp.GEE is GEE
    # the default family is stored as unset: the spec (and seeds) of earlier gee scenarios are unchanged
    assert "family" not in GEE().spec() and GEE(family="gaussian").fingerprint() == GEE().fingerprint()
    assert GEE(family="binomial").estimand_label == "log odds ratio"
    assert GEE(family="poisson").estimand_label == "log rate ratio" and GEE().estimand_label is None
    for bad, field in (({"family": "logit"}, "family"), ({"cov_type": "kc"}, "cov_type"),
                       ({"distribution": "z"}, "distribution")):
        with pytest.raises(sp.ParameterError, match=f"^`{field}`"):
            GEE(**bad)
    # Mancl-DeRouen under both names gives the same numbers
    batch = cluster_batch("poisson", 5, seed=2)
    a, b = GEE(cov_type="bias_reduced").batch(batch), GEE(cov_type="mancl_derouen").batch(batch)
    assert np.array_equal(a.se, b.se)
    # a user formula keeps the per-replicate path
    assert not GEE(formula="y ~ arm").supports_batch(batch)
    assert not GEE(term="Intercept").supports_batch(batch)


def test_engine_takes_the_batch_path_for_cluster_and_repeated_data():
    for proc in (sp.ClusterTrial(clusters=4, cluster_size=5, icc=0.1, effect=0.5, missing=sp.MCAR(rate=0.2)),
                 sp.RepeatedMeasures(n=8, visits=3, rho=0.5, effect=0.5, dropout_rate=0.2)):
        res = sp.run(sp.Scenario(proc, GEE(cov_type="mancl_derouen", distribution="t")), reps=40, seed=3, n_jobs=1)
        assert res.paths["gee"] == "batch"
        assert 0.0 < res.power < 1.0


# -- type I error with few clusters (Bradley 1978; Li & Redden 2015) ---------------------------------
@pytest.mark.slow
def test_type_one_error_with_ten_clusters_per_arm():
    # binary outcomes, 10 clusters of 20 per arm, ICC about 0.05 on the logit scale, no effect;
    # one data set per replicate analysed every way (common random numbers)
    reps = 4000
    batch = cluster_batch("binomial", reps, clusters=10, size=20, cv=0.0, seed=2026, sd_b=0.4, effect=0.0)
    p = {}
    for label, cov_type, dist in (("robust z", "robust", "normal"), ("robust t", "robust", "t"),
                                  ("KC t", "kauermann_carroll", "t"), ("MD t", "mancl_derouen", "t")):
        res = GEE(family="binomial", cov_type=cov_type, distribution=dist).batch(batch)
        assert not res.trouble
        p[label] = np.asarray(res.pvalue)
    reject = {k: v <= 0.05 for k, v in p.items()}
    rate = {k: v.mean() for k, v in reject.items()}
    mcse = {k: math.sqrt(r * (1 - r) / reps) for k, r in rate.items()}
    print({k: f"{rate[k]:.4f} ({mcse[k]:.4f})" for k in rate})
    # the uncorrected sandwich with a normal reference rejects too often with 20 clusters
    assert rate["robust z"] - 0.05 > 4 * mcse["robust z"]
    # Mancl-DeRouen and Kauermann-Carroll with t(18): in Bradley's liberal interval [0.025, 0.075]
    # (the property is refuted only if the rate is more than 4 MCSE outside it)
    for label in ("MD t", "KC t"):
        assert rate[label] + 4 * mcse[label] > 0.025 and rate[label] - 4 * mcse[label] < 0.075, label
    # equal clusters, cluster-level covariates: each cluster's H_i has one non-zero eigenvalue lam with
    # the cluster's residual sum on its eigenvector, so the corrections scale cluster i's score by
    # 1 < (1 - lam_i)^-1/2 < (1 - lam_i)^-1: SE robust < KC < MD in every replicate, and with the same
    # estimate the rejections nest (t(18) rejects less than the normal reference at the same SE)
    order = ("robust z", "robust t", "KC t", "MD t")
    for hi, lo in zip(order, order[1:]):
        assert np.all(reject[hi] >= reject[lo]), (hi, lo)
