"""Stepped-wedge designs: closed forms, the process, the sw_mixed analysis, simulations.

External references named beside each check:

* Hussey & Hughes (2007), Contemp Clin Trials 28:182, eq. 8: the variance of the treatment
  effect for a complete cross-sectional design with a random cluster intercept; written out
  here with numpy, and compared with the GLS variance to 1e-10 (they are the same estimator);
* Donner & Klar (2000), ch. 5: a parallel cluster trial measured once has variance
  ``2 sd^2 (1 + (m - 1) icc) / (k m)`` (k clusters per arm);
* Woertman et al. (2013), J Clin Epidemiol 66:752, eq. 1: the design effect; its exact relation to
  Hussey & Hughes, ``DE = I m Var_HH / (4 sd^2)`` (N_sw = I m = DE N_u with N_u = 4 sd^2 / Var_HH);
* statsmodels ``GLS`` on the individual-level data: ``(X' V^-1 X)^-1`` with the full covariance
  of every individual (the nested and exponential structures of Hooper et al. 2016 and Kasza et
  al. 2019, and cohorts), against the cell-mean computation of ``gls_variance``;
* statsmodels ``MixedLM`` (REML, Powell's method): the batch REML fit of ``sw_mixed``, its
  criterion compared through statsmodels' own ``loglike``;
* simulation (Morris, White & Crowther 2019: within 4 MCSE): power against Hussey & Hughes, the
  type I error against alpha, a binary outcome's control event rate against the mean of
  expit(logit p0 + u) over the random effect (by ``scipy.integrate.quad``), a count's mean
  against the lognormal mean ``rate0 exp(s^2 / 2)`` (common practice), and the covariance of
  the cell means against the structures above.

No published numeric example is recalled reliably enough to assert its digits. From memory:
Hemming & Taljaard (2016, J Clin Epidemiol 69:137) find the stepped wedge more efficient than a
parallel design of the same clusters when ``icc * m`` is large; that ordering is checked.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from scipy import integrate, stats

import simpower as sp
from simpower.analytic.stepped import (cell_mean_covariance, gls_variance, hussey_hughes_variance,
                                       standard_design, stepped_power, woertman_design_effect)
from simpower.errors import ParameterError
from simpower.registry import build


def sw(**kw):
    return build("process", {"type": "stepped_wedge", **kw})


def hh_by_hand(x, m, icc, sd=1.0):
    """Hussey & Hughes (2007) eq. 8, written out independently."""
    I, T = x.shape
    s2 = (1 - icc) * sd**2 / m
    tau2 = icc * sd**2
    U = x.sum()
    W = (x.sum(0) ** 2).sum()
    V = (x.sum(1) ** 2).sum()
    return I * s2 * (s2 + T * tau2) / ((I * U - W) * s2 + (U**2 + I * T * U - T * W - I * V) * tau2)


# -- closed forms ---------------------------------------------------------------------------
@pytest.mark.parametrize("steps, per, b, t, m, icc", [(4, 1, 1, 1, 10, 0.05), (5, 3, 2, 1, 20, 0.1),
                                                      (3, 2, 1, 2, 7, 0.2), (6, 1, 0, 1, 30, 0.01),
                                                      (2, 4, 1, 3, 1, 0.5)])
def test_hussey_hughes_equals_gls_for_the_standard_design(steps, per, b, t, m, icc):
    x = standard_design(steps, per, b, t)
    hh = hussey_hughes_variance(x, m, icc, sd=1.7)
    assert hh == pytest.approx(hh_by_hand(x, m, icc, 1.7), rel=1e-12)
    assert gls_variance(x, m, icc, sd=1.7) == pytest.approx(hh, rel=1e-10)
    # the nested structure with cac = 1 and a cohort without individual autocorrelation are the same model
    assert gls_variance(x, m, icc, 1.0, "nested", sd=1.7) == pytest.approx(hh, rel=1e-10)
    assert gls_variance(x, m, icc, sampling="cohort", sd=1.7) == pytest.approx(hh, rel=1e-10)


@pytest.mark.parametrize("k, m, icc", [(5, 10, 0.05), (12, 3, 0.3), (2, 50, 0.0)])
def test_gls_of_a_parallel_trial_measured_once_is_the_classical_variance(k, m, icc):
    # Donner & Klar (2000): Var = 2 sd^2 (1 + (m - 1) icc) / (k m), with k clusters per arm
    x = np.array([[0.0]] * k + [[1.0]] * k)
    sd = 2.0
    assert gls_variance(x, m, icc, sd=sd) == pytest.approx(2 * sd**2 * (1 + (m - 1) * icc) / (k * m), rel=1e-12)


@pytest.mark.parametrize("k, b, t, m, icc, per", [(4, 1, 1, 10, 0.05, 1), (5, 2, 1, 20, 0.1, 3),
                                                  (3, 1, 2, 7, 0.2, 2), (6, 1, 1, 30, 0.01, 1)])
def test_woertman_design_effect_is_hussey_hughes_rearranged(k, b, t, m, icc, per):
    # Woertman et al. (2013) eq. 1; exact relation DE = I m Var_HH / (4 sd^2), I = clusters
    sd = 1.3
    x = standard_design(k, per, b, t)
    var = hussey_hughes_variance(x, m, icc, sd=sd)
    assert woertman_design_effect(k, b, t, m, icc) == pytest.approx(x.shape[0] * m * var / (4 * sd**2), rel=1e-12)


def _individual_gls(x, m, icc, cac, structure, sampling, iac, sd=1.0):
    """(X'V^-1X)^-1 of theta from statsmodels GLS on one row per individual and period."""
    import statsmodels.api as smapi

    K, T = x.shape
    rows = [(k, t, i) for k in range(K) for t in range(T) if np.isfinite(x[k, t]) for i in range(m)]
    N = len(rows)
    X = np.zeros((N, T + 1))
    V = np.zeros((N, N))
    lag = lambda s, t: abs(s - t)  # noqa: E731
    for a, (k, t, i) in enumerate(rows):
        X[a, t] = 1.0
        X[a, T] = x[k, t]
        for c, (k2, t2, i2) in enumerate(rows):
            if k2 != k:
                continue
            corr = 1.0 if structure == "exchangeable" else (cac if structure == "nested" else cac ** lag(t, t2))
            v = icc * sd**2 * (1.0 if t == t2 else corr)
            if sampling == "cohort" and i == i2:
                v += (1 - icc) * sd**2 * (1.0 if t == t2 else iac)
            elif sampling == "cross_sectional" and a == c:
                v += (1 - icc) * sd**2
            V[a, c] = v
    fit = smapi.GLS(np.random.default_rng(0).standard_normal(N), X, sigma=V).fit()
    return fit.normalized_cov_params[T, T]


@pytest.mark.parametrize("structure, cac, sampling, iac", [
    ("exchangeable", 1.0, "cross_sectional", 0.0), ("nested", 0.6, "cross_sectional", 0.0),
    ("exponential", 0.7, "cross_sectional", 0.0), ("nested", 0.8, "cohort", 0.5),
    ("exponential", 0.5, "cohort", 0.3)])
def test_gls_on_cell_means_equals_gls_on_individuals(structure, cac, sampling, iac):
    # an incomplete design: a not-measured implementation period on the diagonal
    x = np.array([[0, np.nan, 1, 1, 1], [0, 0, np.nan, 1, 1], [0, 0, 0, np.nan, 1], [0, 1, 1, 1, 1]], float)
    got = gls_variance(x, 3, 0.1, cac, structure, sampling, iac)
    assert got == pytest.approx(_individual_gls(x, 3, 0.1, cac, structure, sampling, iac), rel=1e-9)


def test_power_and_orderings():
    x = standard_design(4, 3)
    v = hussey_hughes_variance(x, 10, 0.05)
    z = stats.norm.ppf(0.975)
    # Hussey & Hughes (2007) eq. 9 plus the far tail
    assert stepped_power(0.3, v, 0.05) == pytest.approx(stats.norm.cdf(0.3 / math.sqrt(v) - z)
                                                        + stats.norm.cdf(-0.3 / math.sqrt(v) - z), rel=1e-12)
    # t reference: noncentral t (scipy), df = clusters - 2
    c = stats.t.ppf(0.975, 10)
    d = 0.3 / math.sqrt(v)
    assert stepped_power(0.3, v, 0.05, df=10) == pytest.approx(stats.nct.sf(c, 10, d) + stats.nct.cdf(-c, 10, d))
    # decay of the between-period correlation loses information against the exchangeable model
    # (Kasza et al. 2019); implementation periods lose it too
    assert gls_variance(x, 10, 0.05, 0.5, "exponential") > v
    xi = x.copy()
    xi[np.arange(4).repeat(3), np.arange(1, 5).repeat(3)] = np.nan
    assert gls_variance(xi, 10, 0.05) > v
    # a stepped wedge beats a parallel trial of the same clusters and periods when icc * m is large
    par = np.array([[0.0] * 5] * 6 + [[1.0] * 5] * 6)
    assert hussey_hughes_variance(x, 50, 0.2) < gls_variance(par, 50, 0.2)


def test_bad_inputs_give_one_line_errors():
    with pytest.raises(ParameterError, match="`sequences` cells must be 0, 1"):
        gls_variance([[0, 2]], 5, 0.1)
    with pytest.raises(ParameterError, match="not estimable"):
        gls_variance([[0, 1], [0, 1]], 5, 0.1)  # every cluster switches at once: treatment = period 1
    for kw, field in (({"steps": 3, "sequences": [[0, 1]]}, "`sequences`, `steps`"),
                      ({"steps": 3, "cac": 0.5}, "`cac` must be 1"),
                      ({"steps": 3, "individual_autocorr": 0.3}, "`individual_autocorr` must be 0"),
                      ({"steps": 3, "period_effects": [0.0, 1.0]}, "`period_effects` must have one number per period"),
                      ({"steps": 3, "outcome": "binary"}, "`p0` is needed"),
                      ({"sequences": [[1, 1]]}, "both control"),
                      ({"sequences": [[0, 1, 1], [0, "-", 1]]}, "not estimable"),
                      ({"steps": 3, "m": 1, "cluster_size_cv": 0.5}, "`cluster_size_cv` must be 0"),
                      ({"sequences": [[0, 3]]}, "`sequences` cells")):
        with pytest.raises(ParameterError, match=field) as info:
            sw(**{"m": 5, "icc": 0.1, **kw})
        assert "\n" not in str(info.value)


# -- the process ------------------------------------------------------------------------------
def test_long_table_and_design():
    p = sw(sequences=[[0, 1, 1], [0, "-", 1], [0, 0, 1]], clusters_per_step=2, m=3, icc=0.1, sampling="cohort",
           individual_autocorr=0.2, effect=0.5)
    assert p.clusters_per_sequence == 2 and p.spec()["sequences"] == [[0, 1, 1], [0, "-", 1], [0, 0, 1]]
    d = p(np.random.default_rng(1))
    assert len(d["y"]) == 3 * (3 + 3 + 2 + 2 + 3 + 3)
    cells = {(int(c), int(t)): int(x) for c, t, x in zip(d["cluster"], d["period"], d["treat"]) if c < 4}
    assert cells == {(0, 0): 0, (0, 1): 1, (0, 2): 1, (1, 0): 0, (1, 1): 1, (1, 2): 1,
                     (2, 0): 0, (2, 2): 1, (3, 0): 0, (3, 2): 1}
    # a cohort: the same individuals in every period of their cluster
    for c in range(4):
        ids = [set(d["subject"][(d["cluster"] == c) & (d["period"] == t)].tolist()) for t in (0, 2)]
        assert ids[0] == ids[1] and len(ids[0]) == 3
    b = p.draw_batch(np.random.default_rng(1), 4)
    assert set(b.layouts()) == {"table", "one_sample", "stepped"}   # no `arm`: not a two-arm table


def test_variable_cluster_sizes():
    # each cluster measures its drawn size in every measured period, treated as its sequence says; the
    # sizes have mean m (within 4 MCSE; their law, with its CV, is cluster_trial's: tests/test_clusters.py)
    p = sw(steps=3, clusters_per_step=4, m=8, cluster_size_cv=0.5, icc=0.1, effect=0.3)
    b = p.draw_batch(np.random.default_rng(5), 300)
    assert "present" in b.per_rep and p.facts() == ()
    sizes = []
    for i in range(b.size):
        t = b.replicate(i)
        cnt = np.zeros((p.n_clusters, p.periods), int)
        np.add.at(cnt, (t["cluster"], t["period"]), 1)
        assert np.all(cnt == cnt[:, :1])              # the same size in every period
        sizes.extend(cnt[:, 0].tolist())
        assert np.array_equal(t["treat"], p.design_matrix[t["cluster"], t["period"]])
    sizes = np.array(sizes, float)
    per_rep = sizes.reshape(b.size, -1)
    assert abs(sizes.mean() - 8) < 4 * per_rep.mean(1).std(ddof=1) / math.sqrt(b.size)


def _cell_means(p, reps, seed):
    b = p.draw_batch(np.random.default_rng(seed), reps)
    K, T, m = p.n_clusters, p.periods, p.m
    return b.per_rep["y"].reshape(reps, K, T, m).mean(-1)


@pytest.mark.parametrize("kw", [dict(structure="nested", cac=0.6), dict(structure="exponential", cac=0.7),
                                dict(structure="exponential", cac=0.5, sampling="cohort", individual_autocorr=0.6)])
def test_cell_means_have_the_stated_covariance(kw):
    # the generator against the covariance of Hooper et al. (2016) / Kasza et al. (2019):
    # each element of the sample covariance within 4 of its standard errors
    # (Var of a sample covariance of normal pairs: (s_ii s_jj + s_ij^2) / R; Anderson 2003, sec. 3.3)
    p = sw(steps=3, clusters_per_step=4, m=4, icc=0.3, sd=2.0, **kw)
    R = 1500
    ybar = _cell_means(p, R, 7)                               # (R, K, T)
    dev = ybar - ybar.mean(axis=(0, 1))                       # period means removed (they carry the effect)
    emp = np.einsum("rks,rkt->st", dev, dev) / (R * p.n_clusters)
    true = cell_mean_covariance(p.periods, 4, 0.3, kw["cac"], kw["structure"], kw.get("sampling", "cross_sectional"),
                                kw.get("individual_autocorr", 0.0), 2.0)
    se = np.sqrt((np.outer(np.diag(true), np.diag(true)) + true**2) / (R * p.n_clusters))
    assert np.all(np.abs(emp - true) < 4 * se + 1e-12), (emp, true)


def test_binary_control_event_rate_is_p0_averaged_over_the_random_effect():
    p = sw(steps=3, clusters_per_step=5, m=10, icc=0.2, outcome="binary", p0=0.15, effect=0.7)
    R = 400
    b = p.draw_batch(np.random.default_rng(11), R)
    control = b.shared["treat"] == 0
    per_rep = b.per_rep["y"][:, control].mean(axis=1)        # replicates are independent
    mcse = per_rep.std(ddof=1) / math.sqrt(R)
    s2 = 0.2 * (math.pi**2 / 3) / (1 - 0.2)                  # latent-scale cluster variance
    target, _ = integrate.quad(lambda u: stats.norm.pdf(u) / (1 + math.exp(-(math.log(0.15 / 0.85) + math.sqrt(s2) * u))),
                               -12, 12)
    assert abs(per_rep.mean() - target) < 4 * mcse
    assert abs(target - 0.15) > 8 * mcse                      # the averaging matters at this ICC


def test_count_mean_is_the_lognormal_mean():
    p = sw(steps=3, clusters_per_step=5, m=10, icc=0.3, outcome="count", rate0=2.0, effect=0.0)
    R = 400
    y = p.draw_batch(np.random.default_rng(12), R).per_rep["y"]
    per_rep = y.mean(axis=1)
    s2 = 0.3 * math.log1p(1 / 2.0) / (1 - 0.3)
    assert abs(per_rep.mean() - 2.0 * math.exp(s2 / 2)) < 4 * per_rep.std(ddof=1) / math.sqrt(R)


def test_facts_and_the_cross_check_entry():
    p = sw(steps=4, clusters_per_step=3, m=10, icc=0.05, effect=0.3)
    a = build("analysis", {"type": "sw_mixed"})
    v = hh_by_hand(p.design_matrix, 10, 0.05)
    assert a.analytic_power(p, 0.05) == pytest.approx(stepped_power(0.3, v, 0.05), rel=1e-10)
    at = build("analysis", {"type": "sw_mixed", "df": "clusters"})
    assert at.analytic_power(p, 0.05) == pytest.approx(stepped_power(0.3, v, 0.05, df=10), rel=1e-10)
    assert not a.analytic_exact                       # variance components are estimated
    # no closed form where the model is not the process's, or outcomes are not normal / complete
    assert a.analytic_power(sw(steps=4, m=10, icc=0.05, structure="nested", cac=0.5), 0.05) is None
    assert a.analytic_power(sw(steps=4, m=10, icc=0.05, outcome="binary", p0=0.2), 0.05) is None
    assert a.analytic_power(sw(steps=4, m=10, icc=0.05, missing={"type": "mcar", "rate": 0.1}), 0.05) is None
    nested = build("analysis", {"type": "sw_mixed", "structure": "nested"})
    q = sw(steps=4, m=10, icc=0.05, structure="nested", cac=0.5)
    assert nested.analytic_power(q, 0.05) == pytest.approx(
        stepped_power(0.0, gls_variance(q.design_matrix, 10, 0.05, 0.5, "nested"), 0.05))


# -- the analysis: batch REML against statsmodels --------------------------------------------
def _statsmodels_check(p, analysis, reps, seed):
    import pandas as pd
    import statsmodels.formula.api as smf
    from statsmodels.regression.mixed_linear_model import MixedLMParams

    from simpower.analyses.stepped import cell_statistics, fit_cells

    nested = analysis.structure == "nested"
    b = p.draw_batch(np.random.default_rng(seed), reps)
    res = analysis.batch(b)
    lay = b.layout("stepped")
    fit = fit_cells(cell_statistics(lay.y, lay.observed, lay.cluster, lay.period, lay.treat), nested)
    compared = same = 0
    for i in range(reps):
        frame = pd.DataFrame(b.replicate(i))
        frame = frame[np.isfinite(frame["y"])]
        kw = {"re_formula": "1", "vc_formula": {"period": "0 + C(period)"}} if nested else {}
        model = smf.mixedlm("y ~ C(period) + treat", frame, groups=frame["cluster"], **kw)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            per = analysis(b.replicate(i))
            sm = model.fit(reml=True, method="powell", ftol=1e-12, maxiter=5000)
            # (statsmodels' loglike is NaN at a variance of exactly 0: a ratio of 1e-10 stands for it)
            comps = dict(fe_params=np.zeros(model.k_fe), cov_re=np.array([[max(fit["gamma_b"][i], 1e-10)]]),
                         vcomp=np.array([max(fit["gamma_c"][i], 1e-10)]) if nested else np.zeros(0))
            ll_ours = model.loglike(MixedLMParams.from_components(**comps), profile_fe=True)
        # our REML optimum is never worse than statsmodels', by statsmodels' own criterion
        assert ll_ours >= sm.llf - 1e-7 * abs(sm.llf), i
        same += (per.pvalue < 0.05) == (res.pvalue[i] < 0.05)
        gam_sm = [sm.cov_re.iloc[0, 0] / sm.scale] + ([sm.vcomp[0] / sm.scale] if nested else [])
        interior = min(gam_sm) > 1e-3 and min(fit["gamma_b"][i], fit["gamma_c"][i] if nested else 1) > 1e-3
        if interior and abs(ll_ours - sm.llf) < 1e-9 * abs(sm.llf):  # statsmodels at the same interior optimum
            compared += 1
            # relative to the estimate's scale (its SE), as an estimate near 0 has no relative digits
            assert res.estimate[i] == pytest.approx(sm.fe_params["treat"], rel=1e-6, abs=1e-6 * res.se[i])
            assert res.se[i] == pytest.approx(sm.bse_fe["treat"], rel=1e-6)
    return compared, same


def test_batch_fit_agrees_with_statsmodels_quick():
    p = sw(steps=3, clusters_per_step=2, m=5, icc=0.1, effect=0.4, period_effects=0.2,
           missing={"type": "mcar", "rate": 0.1})
    compared, same = _statsmodels_check(p, build("analysis", {"type": "sw_mixed"}), 25, 3)
    assert compared >= 10 and same == 25


@pytest.mark.slow
@pytest.mark.parametrize("structure, reps", [("exchangeable", 300), ("nested", 100)])
def test_batch_fit_agrees_with_statsmodels(structure, reps):
    p = sw(steps=4, clusters_per_step=2, m=5, icc=0.1, structure="nested", cac=0.7, effect=0.4, period_effects=0.1)
    compared, same = _statsmodels_check(p, build("analysis", {"type": "sw_mixed", "structure": structure}), reps, 5)
    assert compared >= reps // 3
    assert same >= math.ceil(0.999 * reps)


def test_batch_path_is_taken_and_flags_per_replicate():
    p = sw(steps=3, clusters_per_step=2, m=4, icc=0.05, effect=0.2)
    a = build("analysis", {"type": "sw_mixed"})
    b = p.draw_batch(np.random.default_rng(0), 6)
    assert a.supports_batch(b) and a.layouts == ("stepped",)
    assert not a.supports_batch(sp.ClusterTrial(clusters=3, cluster_size=4, icc=0.1).draw_batch(
        np.random.default_rng(0), 2))
    res = a.batch(b)
    assert set(res.trouble) == {"warning:ConvergenceWarning"} and res.trouble["warning:ConvergenceWarning"].shape == (6,)
    t = build("analysis", {"type": "sw_mixed", "df": "clusters"})
    rt = t.batch(b)
    np.testing.assert_allclose(rt.pvalue, 2 * stats.t.sf(np.abs(res.estimate / res.se), 6 - 2), rtol=1e-12)


# -- simulations ------------------------------------------------------------------------------
def test_simulated_power_matches_hussey_hughes():
    # 30 clusters: the Wald test with estimated variances is close to its known-variance power
    p = sw(steps=5, clusters_per_step=6, m=6, icc=0.05, effect=0.25)
    res = sp.run(sp.Scenario(p, build("analysis", {"type": "sw_mixed"})), reps=1500, seed=41, n_jobs=1)
    s = res.summaries["sw_mixed"]
    assert res.paths["sw_mixed"] == "batch"
    hh = stepped_power(0.25, hussey_hughes_variance(p.design_matrix, 6, 0.05), 0.05)
    assert 0.4 < hh < 0.9
    assert abs(s["power"] - hh) < 4 * s["mcse"]


@pytest.mark.parametrize("structure", ["exchangeable", pytest.param("nested", marks=pytest.mark.slow)])
def test_type_one_error_with_enough_clusters(structure):
    cac = 1.0 if structure == "exchangeable" else 0.7
    p = sw(steps=4, clusters_per_step=8, m=5, icc=0.1, structure=structure, cac=cac, effect=0.0,
           period_effects=[0.0, 0.3, 0.1, 0.4, 0.2])
    res = sp.run(sp.Scenario(p, build("analysis", {"type": "sw_mixed", "structure": structure})), reps=2000,
                 seed=43, n_jobs=1)
    s = res.summaries["sw_mixed"]
    mcse = math.sqrt(0.05 * 0.95 / s["n_ok"])
    assert abs(s["power"] - 0.05) < 4 * mcse
