"""The analytic cross-check table (simpower.crosscheck): every entry against its closed form.

Each entry of :data:`simpower.crosscheck.TABLE` is exercised at least once (checked below:
the cases cover the table's keys). For each case the table's value must equal the function
of :mod:`simpower.analytic` it names, called with the process's facts (to 1e-12), and an
independent computation of the published formula with scipy (tolerance stated per case):

* Student t, paired t, the cluster-means t and the pooled non-inferiority test: power of the
  t-test from the noncentral t (Cohen 1988, ch. 2), here ``scipy.stats.nct``; cluster means
  with variance sigma_b^2 + sigma_w^2 / m and df 2k - 2 (Donner & Klar 2000, ch. 6);
* Welch's t: noncentral t with the Welch-Satterthwaite df from the population SDs
  (Satterthwaite 1946; Welch 1947);
* z-test: the normal distribution of the z statistic (common practice);
* TOST: Phillips (1990): E[max(0, Phi((high - d)/tau - c S) - Phi((low - d)/tau + c S))],
  S = sqrt(V/df), V ~ chi2(df), here by ``scipy.integrate.quad`` over V (pooled SD), and with
  the Welch-Satterthwaite df for Welch's variant;
* two proportions: the normal approximation with pooled SE under H0 (Fleiss, Levin & Paik
  2003, ch. 4: Phi((|D| sqrt(n) - z A) / B) plus the far tail);
* log-rank: Schoenfeld (1981), Phi(|log HR| sqrt(D r) / (1 + r) - z) plus the far tail, at the
  expected number of events, here for exponential survival with fixed follow-up f, where an
  arm's event probability is 1 - exp(-lambda HR f) (common practice);
* Dunnett with a single treatment arm: Student's t (Dunnett 1955), here ``scipy.stats.nct``;
* one-way ANOVA F: statsmodels ``FTestAnovaPower`` with Cohen's f (Cohen 1988, ch. 8);
* proportional odds: Whitehead (1993), the normal power at delta = log OR sqrt(N A (1 - sum pbar^3) / 3) / (1 + A);
  dichotomised: the two-proportion approximation (Fleiss, Levin & Paik 2003) on the shares at or above the cut.
* stepped wedge (``sw_mixed``): the normal power at the variance of Hussey & Hughes (2007), eq. 8.

Then: processes whose facts no entry covers get None (never a number meant for another
case); subclasses inherit their base's entries; a process written against the older
``normal_case()`` still gets its closed form; and the composed ``trial`` process with a
``clusters`` design gets the cluster-means t closed form, checked against a simulation
(within 4 MCSE, Morris, White & Crowther 2019).
"""

from __future__ import annotations

import ast
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
from scipy import integrate, stats

import simpower as sp
from _helpers import nct_power
from simpower import analytic, crosscheck
from simpower.facts import (FACT_TYPES, BinaryFacts, ClusterBinaryFacts, ClusterFacts, CrossoverFacts,
                            MultiArmFacts, NormalFacts, OrdinalFacts, RepeatedFacts, SteppedFacts, SurvivalFacts)
from simpower.processes.base import Batch, Process
from simpower.processes.crossover import Crossover
from simpower.registry import build


# -- independent computations of the published formulas ------------------------------------


def satterthwaite(n0, n1, sd0, sd1):
    a0, a1 = sd0**2 / n0, sd1**2 / n1
    return math.sqrt(a0 + a1), (a0 + a1) ** 2 / (a0**2 / (n0 - 1) + a1**2 / (n1 - 1))


def z_power(delta, alpha, alternative):
    if alternative == "two-sided":
        z = stats.norm.ppf(1 - alpha / 2)
        return stats.norm.cdf(delta - z) + stats.norm.cdf(-delta - z)
    z = stats.norm.ppf(1 - alpha)
    return stats.norm.cdf(delta - z) if alternative == "greater" else stats.norm.cdf(-delta - z)


def tost_integral(effect, tau, df, low, high, alpha):
    """Phillips (1990): power of the TOST as one integral over the chi-square variable."""
    c = stats.t.ppf(1 - alpha, df)

    def integrand(v):
        s = math.sqrt(v / df)
        width = stats.norm.cdf((high - effect) / tau - c * s) - stats.norm.cdf((low - effect) / tau + c * s)
        return max(width, 0.0) * stats.chi2.pdf(v, df)

    v_max = df * ((high - low) / (2 * c * tau)) ** 2  # the integrand is 0 beyond
    return integrate.quad(integrand, 0.0, v_max, limit=200, epsabs=1e-12, epsrel=1e-10)[0]


def fleiss_power(p0, p1, n, ratio, alpha, alternative):
    pbar = (p0 + ratio * p1) / (1 + ratio)
    a = math.sqrt(pbar * (1 - pbar) * (1 + 1 / ratio))
    b = math.sqrt(p0 * (1 - p0) + p1 * (1 - p1) / ratio)
    d = (p1 - p0) * math.sqrt(n)
    z = stats.norm.ppf(1 - alpha / 2 if alternative == "two-sided" else 1 - alpha)
    upper, lower = stats.norm.cdf((d - z * a) / b), stats.norm.cdf((-d - z * a) / b)
    return {"greater": upper, "less": lower, "two-sided": upper + lower}[alternative]


# -- one case per table entry (some entries more than once) ----------------------------------
@dataclass
class Case:
    id: str
    analysis: object
    process: object
    key: tuple
    direct: object  # (facts, alpha) -> the simpower.analytic call
    reference: object  # () -> the independent value
    tol: float = 1e-9  # relative tolerance against the independent value


ALPHA = 0.05
_d = NormalFacts  # noqa: N816 - short alias for the expected facts


def _cases():
    out = []
    # Student t, two arms 2:1 with SD 2, H0 shifted by null_mean, one-sided
    p = sp.NormalTwoArm(n=12, ratio=2.0, effect=1.1, sd=2.0)
    a = sp.TTest(alternative="greater", null_mean=0.2)
    out.append(Case("t_test two-sample", a, p, ("t_test", NormalFacts),
                    lambda f, al: analytic.t_power(0.9, 12, sd=2.0, alpha=al, alternative="greater",
                                                   design="two-sample", ratio=2.0),
                    lambda: nct_power(0.9 / (2.0 * math.sqrt(1 / 12 + 1 / 24)), 34, ALPHA, "greater")))
    p = sp.NormalOneSample(n=15, effect=0.5, sd=1.5)
    out.append(Case("t_test one-sample", sp.TTest(), p, ("t_test", NormalFacts),
                    lambda f, al: analytic.t_power(0.5, 15, sd=1.5, alpha=al),
                    lambda: nct_power(0.5 / 1.5 * math.sqrt(15), 14, ALPHA, "two-sided")))
    # Welch, unequal SDs and allocation
    p = sp.NormalTwoArm(n=10, ratio=1.5, effect=1.0, sd=1.0, sd_ratio=2.0)
    se, df = satterthwaite(10, 15, 1.0, 2.0)
    out.append(Case("welch_t", sp.WelchT(), p, ("welch_t", NormalFacts),
                    lambda f, al: analytic.welch_power(1.0, 10, sd0=1.0, sd1=2.0, ratio=1.5, alpha=al),
                    lambda: nct_power(1.0 / se, df, ALPHA, "two-sided"), tol=1e-7))
    # paired: SD of differences sqrt(sd0^2 + sd1^2 - 2 rho sd0 sd1)
    p = sp.NormalPaired(n=14, effect=0.6, sd0=1.0, sd1=1.5, corr=0.4)
    sdd = math.sqrt(1 + 2.25 - 2 * 0.4 * 1.5)
    out.append(Case("paired_t", sp.PairedT(alternative="less", null_mean=0.9), p, ("paired_t", NormalFacts),
                    lambda f, al: analytic.t_power(-0.3, 14, sd=sdd, alpha=al, alternative="less", design="paired"),
                    lambda: nct_power(-0.3 / sdd * math.sqrt(14), 13, ALPHA, "less")))
    # z-test with the process's SD, two arms and one sample
    p = sp.NormalTwoArm(n=9, ratio=2.0, effect=0.8, sd=1.5)
    out.append(Case("z_test two-sample", sp.ZTest(sd=1.5), p, ("z_test", NormalFacts),
                    lambda f, al: analytic.z_power(0.8, 9, sd=1.5, alpha=al, design="two-sample", ratio=2.0),
                    lambda: z_power(0.8 / (1.5 * math.sqrt(1 / 9 + 1 / 18)), ALPHA, "two-sided")))
    p = sp.NormalOneSample(n=10, effect=0.875)
    out.append(Case("z_test one-sample", sp.ZTest(alternative="greater"), p, ("z_test", NormalFacts),
                    lambda f, al: analytic.z_power(0.875, 10, alpha=al, alternative="greater"),
                    lambda: z_power(0.875 * math.sqrt(10), ALPHA, "greater")))
    # TOST, pooled (exact) and Welch (approximate)
    p = sp.NormalTwoArm(n=20, effect=0.1, sd=1.0)
    tau = math.sqrt(2 / 20)
    out.append(Case("tost pooled", sp.TOST(margin=0.7, equal_var=True), p, ("tost", NormalFacts),
                    lambda f, al: analytic.tost_power(0.1, 20, low=-0.7, high=0.7, alpha=al, design="two-sample"),
                    lambda: tost_integral(0.1, tau, 38, -0.7, 0.7, ALPHA), tol=1e-6))
    p = sp.NormalTwoArm(n=20, effect=0.1, sd=1.0, sd_ratio=1.5)
    se_w, df_w = satterthwaite(20, 20, 1.0, 1.5)
    out.append(Case("tost welch", sp.TOST(low=-0.6, high=0.9), p, ("tost", NormalFacts),
                    lambda f, al: analytic.welch_tost_power(0.1, 20, low=-0.6, high=0.9, sd0=1.0, sd1=1.5,
                                                            alpha=al),
                    lambda: tost_integral(0.1, se_w, df_w, -0.6, 0.9, ALPHA), tol=1e-6))
    # non-inferiority: the one-sided test of H0: theta = -margin
    p = sp.NormalTwoArm(n=25, effect=0.0, sd=1.0)
    out.append(Case("non_inferiority pooled", sp.NonInferiority(margin=0.6, equal_var=True), p,
                    ("non_inferiority", NormalFacts),
                    lambda f, al: analytic.t_power(0.6, 25, alpha=al, alternative="greater", design="two-sample"),
                    lambda: nct_power(0.6 / math.sqrt(2 / 25), 48, ALPHA, "greater")))
    p = sp.NormalTwoArm(n=25, effect=0.1, sd=1.0, sd_ratio=2.0)
    se_n, df_n = satterthwaite(25, 25, 1.0, 2.0)
    out.append(Case("non_inferiority welch, lower is better", sp.NonInferiority(margin=0.6, higher_is_better=False),
                    p, ("non_inferiority", NormalFacts),
                    lambda f, al: analytic.welch_power(-0.5, 25, sd0=1.0, sd1=2.0, alpha=al, alternative="less"),
                    lambda: nct_power(-0.5 / se_n, df_n, ALPHA, "less"), tol=1e-7))
    # two proportions: risks from an odds ratio, 2:1 allocation
    p = sp.BinaryTwoArm(n=60, ratio=2.0, p0=0.2, odds_ratio=2.5)
    p1 = 2.5 * 0.2 / 0.8 / (1 + 2.5 * 0.2 / 0.8)
    out.append(Case("two_proportions", sp.TwoProportions(), p, ("two_proportions", BinaryFacts),
                    lambda f, al: analytic.prop2_power(0.2, p1, 60, ratio=2.0, alpha=al),
                    lambda: fleiss_power(0.2, p1, 60, 2.0, ALPHA, "two-sided")))
    # log-rank: exponential survival (median 1), follow-up 2, no accrual or loss
    p = sp.SurvivalTwoArm(n=80, ratio=1.5, median=1.0, hazard_ratio=0.6, follow_up=2.0)
    lam = math.log(2.0)
    events = 80 * (1 - math.exp(-lam * 2.0)) + 120 * (1 - math.exp(-lam * 0.6 * 2.0))
    delta = math.log(0.6) * math.sqrt(events * 1.5) / 2.5
    out.append(Case("logrank", sp.LogRank(alternative="less"), p, ("logrank", SurvivalFacts),
                    lambda f, al: analytic.schoenfeld_power(0.6, f.events, alpha=al, alternative="less", ratio=1.5),
                    lambda: z_power(delta, ALPHA, "less"), tol=1e-7))
    # cluster means: cluster_trial and the composed trial with a clusters design
    k, m, icc, sd, effect = 7, 12, 0.08, 2.0, 0.9
    se_c = math.sqrt((sd**2 * icc + sd**2 * (1 - icc) / m) * 2 / k)
    ref_c = nct_power(effect / se_c, 2 * k - 2, ALPHA, "two-sided")
    direct_c = lambda f, al: analytic.t_power(effect, k, sd=se_c * math.sqrt(k / 2), alpha=al,  # noqa: E731
                                              design="two-sample")
    p = sp.ClusterTrial(clusters=k, cluster_size=m, icc=icc, sd=sd, effect=effect)
    out.append(Case("cluster_means_t cluster_trial", sp.ClusterMeansT(), p, ("cluster_means_t", ClusterFacts),
                    direct_c, lambda: ref_c))
    p = build("process", {"type": "trial", "effect": effect, "outcome": {"type": "normal", "sd": sd, "mean": 5.0},
                          "design": {"type": "clusters", "clusters": k, "cluster_size": m, "icc": icc}})
    out.append(Case("cluster_means_t trial", build("analysis", {"type": "cluster_means_t", "weights": "size"}), p,
                    ("cluster_means_t", ClusterFacts), direct_c, lambda: ref_c))
    # a binary outcome in clusters: the two-proportion approximation (Fleiss, Levin & Paik 2003, ch. 4) at
    # k m / DE per arm, DE = 1 + ((1 + cv^2) m - 1) ICC (Eldridge, Ashby & Kerry 2006; cv = 0: Donner & Klar
    # 2000), ICC of the 0/1 outcomes: stated on that scale here, and a marginal risk ratio, so p1 = 1.6 p0
    kb, mb, cvb, iccb, p0b = 12, 15, 0.5, 0.04, 0.2
    for weights, size_cv in (("size", cvb), ("equal", 0.0)):
        p = build("process", {"type": "trial", "design": {"type": "clusters", "clusters": kb, "cluster_size": mb,
                                                          "cluster_size_cv": size_cv, "icc": iccb},
                              "outcome": {"type": "binary", "p0": p0b, "risk_ratio": 1.6, "effect_scale": "marginal",
                                          "icc_scale": "proportion"}})
        de = 1 + ((1 + size_cv**2) * mb - 1) * iccb
        out.append(Case(f"cluster_means_t binary, {weights} weights",
                        build("analysis", {"type": "cluster_means_t", "weights": weights}), p,
                        ("cluster_means_t", ClusterBinaryFacts),
                        lambda f, al, de=de: analytic.prop2_power(f.p0, f.p1, f.clusters * f.cluster_size / de,
                                                                  alpha=al),
                        lambda de=de: fleiss_power(p0b, 1.6 * p0b, kb * mb / de, 1.0, ALPHA, "two-sided"), tol=1e-8))
    de = 1 + ((1 + cvb**2) * mb - 1) * iccb
    p = build("process", {"type": "trial", "design": {"type": "clusters", "clusters": kb, "cluster_size": mb,
                                                      "cluster_size_cv": cvb, "icc": iccb},
                          "outcome": {"type": "binary", "p0": p0b, "risk_ratio": 1.6, "effect_scale": "marginal",
                                      "icc_scale": "proportion"}})
    out.append(Case("gee binary", build("analysis", {"type": "gee"}), p, ("gee", ClusterBinaryFacts),
                    lambda f, al, de=de: analytic.prop2_power(f.p0, f.p1, f.clusters * f.cluster_size / de,
                                                              alpha=al),
                    lambda de=de: fleiss_power(p0b, 1.6 * p0b, kb * mb / de, 1.0, ALPHA, "two-sided"), tol=1e-8))
    # Dunnett with one treatment arm is Student's t (Dunnett 1955): noncentral t, df 2n - 2
    p = sp.MultiArm(effects=[0.0, 0.8], n=15)
    out.append(Case("dunnett, one comparison", build("analysis", {"type": "dunnett"}), p, ("dunnett", MultiArmFacts),
                    lambda f, al: analytic.dunnett_power([0.8], 15, sd=1.0, alpha=al)["any"],
                    lambda: nct_power(0.8 / math.sqrt(2 / 15), 28, ALPHA, "two-sided"), tol=1e-6))
    # one-way ANOVA F: statsmodels FTestAnovaPower with Cohen's f (Cohen 1988, ch. 8)
    from statsmodels.stats.power import FTestAnovaPower

    p = sp.MultiArm(effects=[0.0, 0.4, 0.8], n=20)
    f_cohen = math.sqrt(np.mean((np.array([0.0, 0.4, 0.8]) - 0.4) ** 2))
    out.append(Case("anova_f", build("analysis", {"type": "anova_f"}), p, ("anova_f", MultiArmFacts),
                    lambda f, al: analytic.anova_power(f_cohen, 20, 3, al),
                    lambda: FTestAnovaPower().power(effect_size=f_cohen, nobs=60, alpha=ALPHA, k_groups=3),
                    tol=1e-9))
    # Bayesian posterior-probability rules: the flat-prior normal rule with eta = 1 - 0.025 is the one-sided
    # z-test at 0.025 (a known identity); the beta-binomial rule's exact power by a direct double sum with
    # scipy's binomial pmf and posterior probabilities from scipy.integrate.quad
    p = sp.NormalTwoArm(n=30, effect=0.6, sd=1.5)
    out.append(Case("posterior_probability normal", sp.PosteriorProbability(sd=1.5, eta=0.975), p,
                    ("posterior_probability", NormalFacts),
                    lambda f, al: analytic.z_power(0.6, 30, sd=1.5, alpha=0.025, alternative="greater",
                                                   design="two-sample"),
                    lambda: z_power(0.6 / (1.5 * math.sqrt(2 / 30)), 0.025, "greater"), tol=1e-9))
    p = sp.BinaryTwoArm(n=8, p0=0.3, risk_difference=0.4)
    rule = sp.PosteriorProbability(model="beta_binomial", eta=0.9)
    out.append(Case("posterior_probability beta_binomial", rule, p, ("posterior_probability", BinaryFacts),
                    lambda f, al: _beta_rule_direct(0.3, 0.7, 8, 0.9), lambda: _beta_rule_direct(0.3, 0.7, 8, 0.9),
                    tol=1e-7))
    # AB/BA crossover: Student's t on the period differences, SE sd_w sqrt((1/n_AB + 1/n_BA) / 2), df
    # n_AB + n_BA - 2, mean B - A - carryover / 2 (Senn 2002, ch. 3; Jones & Kenward 2003, ch. 2)
    p = Crossover(n=9, ratio=4 / 3, effect=0.8, sd=1.5, corr=0.6, period_effect=0.5, carryover=0.2)
    sdw = 1.5 * math.sqrt(0.4)
    se_x = sdw * math.sqrt((1 / 9 + 1 / 12) / 2)
    out.append(Case("crossover_t", build("analysis", {"type": "crossover_t"}), p, ("crossover_t", CrossoverFacts),
                    lambda f, al: analytic.crossover_power(0.7, 9, sd_within=sdw, alpha=al, ratio=12 / 9),
                    lambda: nct_power(0.7 / se_x, 19, ALPHA, "two-sided")))
    # bioequivalence on the log scale: within-subject CV 25%, ratio 0.95, range 0.80-1.25
    p = Crossover(n=12, scale="log", cv_within=0.25, effect=0.95)
    sdw_log = math.sqrt(math.log(1 + 0.25**2))
    out.append(Case("crossover_tost log", build("analysis", {"type": "crossover_tost", "scale": "log"}), p,
                    ("crossover_tost", CrossoverFacts),
                    lambda f, al: analytic.crossover_tost_power(0.95, 12, cv_within=0.25, alpha=al),
                    lambda: tost_integral(math.log(0.95), sdw_log * math.sqrt(1 / 12), 22, math.log(0.8), math.log(1.25),
                                          ALPHA), tol=1e-6))
    # ordinal, proportional odds: Whitehead (1993), N = n (1 + A), delta = log OR sqrt(N A S / 3) / (1 + A),
    # S = 1 - sum pbar^3, pbar the size-weighted mean of the arms' shares; treated shares from the cumulative logits
    o0 = [0.1, 0.2, 0.3, 0.25, 0.15]
    po = build("process", {"type": "ordinal_two_arm", "n": 60, "ratio": 1.5, "p0": o0, "odds_ratio": 1.8})
    cum0 = np.cumsum(o0)[:-1]
    cum1 = 1 / (1 + 1.8 * (1 - cum0) / cum0)
    o1 = np.diff(np.concatenate([[0.0], cum1, [1.0]]))
    pbar = (np.array(o0) + 1.5 * o1) / 2.5
    delta_o = math.log(1.8) * math.sqrt(60 * 2.5 * 1.5 * (1 - np.sum(pbar**3)) / 3) / 2.5
    out.append(Case("proportional_odds", build("analysis", {"type": "proportional_odds"}), po,
                    ("proportional_odds", OrdinalFacts),
                    lambda f, al: analytic.whitehead_power(o0, 1.8, 60, ratio=1.5, alpha=al),
                    lambda: z_power(delta_o, ALPHA, "two-sided"), tol=1e-12))
    # dichotomised at category 3: the two-proportion normal approximation on the shares >= 3
    out.append(Case("dichotomised", build("analysis", {"type": "dichotomised", "cut": 3}), po,
                    ("dichotomised", OrdinalFacts),
                    lambda f, al: analytic.prop2_power(0.4, float(o1[3:].sum()), 60, ratio=1.5, alpha=al),
                    lambda: fleiss_power(0.4, float(o1[3:].sum()), 60, 1.5, ALPHA, "two-sided"), tol=1e-9))
    # stepped wedge: Hussey & Hughes (2007) eq. 8 written out, normal power (eq. 9 plus the far tail)
    from simpower.analytic.stepped import gls_variance, stepped_power

    x = np.repeat((np.arange(5)[None, :] >= np.arange(1, 5)[:, None]).astype(float), 3, axis=0)
    s2, tau2 = (1 - 0.05) / 10, 0.05
    U, W, V = x.sum(), (x.sum(0) ** 2).sum(), (x.sum(1) ** 2).sum()
    var_hh = 12 * s2 * (s2 + 5 * tau2) / ((12 * U - W) * s2 + (U**2 + 12 * 5 * U - 5 * W - 12 * V) * tau2)
    p = build("process", {"type": "stepped_wedge", "steps": 4, "clusters_per_step": 3, "m": 10, "icc": 0.05,
                          "effect": 0.3})
    out.append(Case("sw_mixed", build("analysis", {"type": "sw_mixed"}), p, ("sw_mixed", SteppedFacts),
                    lambda f, al: stepped_power(0.3, gls_variance(x, 10, 0.05), al),
                    lambda: z_power(0.3 / math.sqrt(var_hh), ALPHA, "two-sided"), tol=1e-10))
    # MMRM, final visit, monotone MCAR dropout: the asymptotic variance of the final-visit mean from the
    # factored likelihood, sum_j L_Tj^2 / r_j with L the Cholesky factor of Sigma (Anderson 1957, JASA 52:200;
    # Little & Rubin 2002, section 7.2), against the information-matrix form of Lu, Luo & Chen (2008)
    p = sp.RepeatedMeasures(n=50, visits=4, correlation="ar1", rho=0.6, sd=2.0, effect=0.8, dropout_rate=0.3)
    cov_m = 4.0 * 0.6 ** np.abs(np.subtract.outer(np.arange(4), np.arange(4)))
    ret = (1 - p.hazard) ** np.arange(4)
    se_m = math.sqrt((np.linalg.cholesky(cov_m)[-1] ** 2 / ret).sum() * 2 / 50)
    out.append(Case("mmrm", build("analysis", {"type": "mmrm"}), p, ("mmrm", RepeatedFacts),
                    lambda f, al: analytic.mmrm_power(0.8, 50, cov=cov_m, retention=ret, alpha=al),
                    lambda: z_power(0.8 / se_m, ALPHA, "two-sided"), tol=1e-9))
    # a z-test at two looks (t = 0.5, 1) with O'Brien-Fleming-type spending: the rejection probability by
    # scipy's bivariate normal cdf, corr sqrt(t1/t2), means drift sqrt(t_k) (Jennison & Turnbull 2000, ch. 19)
    gs_an = build("analysis", {"type": "group_sequential", "inner": {"type": "z_test", "alternative": "greater"},
                               "fractions": [0.5, 1.0]})
    p = sp.NormalTwoArm(n=40, effect=0.5)
    out.append(Case("group_sequential z", gs_an, p, ("group_sequential", NormalFacts),
                    lambda f, al: analytic.crossing_probabilities(gs_an.design(), 0.5 / math.sqrt(2 / 40)).rejection,
                    lambda: _two_look_rejection(gs_an.design().efficacy, 0.5 / math.sqrt(2 / 40)), tol=1e-5))
    return out


def _two_look_rejection(bounds, drift):
    from scipy.stats import multivariate_normal

    r = math.sqrt(0.5)
    mean = [drift * math.sqrt(0.5), drift]
    stay = multivariate_normal(mean=mean, cov=[[1, r], [r, 1]], abseps=1e-10, releps=1e-10).cdf(list(bounds))
    return 1.0 - stay


def _beta_rule_direct(p0, p1, n, eta):
    total = 0.0
    for x0 in range(n + 1):
        for x1 in range(n + 1):
            post, _ = integrate.quad(lambda q: stats.beta.pdf(q, 1 + x0, 1 + n - x0) * stats.beta.sf(q, 1 + x1,
                                                                                                     1 + n - x1),
                                     0, 1, epsabs=1e-12)
            if post > eta:
                total += stats.binom.pmf(x0, n, p0) * stats.binom.pmf(x1, n, p1)
    return total


CASES = _cases()


def test_the_cases_cover_every_entry_of_the_table():
    assert {c.key for c in CASES} == set(crosscheck.TABLE)
    assert {facts for _, facts in crosscheck.TABLE} <= set(FACT_TYPES)


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_entry_gives_its_closed_form(case):
    facts = case.process.facts()
    assert len(facts) == 1 and (case.analysis.name, type(facts[0])) == case.key
    got = case.analysis.analytic_power(case.process, ALPHA)
    assert got == pytest.approx(float(case.direct(facts[0], ALPHA)), rel=1e-12)
    assert got == pytest.approx(float(case.reference()), rel=case.tol)
    # the scenario reports the same number, and the table's exactness flag
    sc = sp.Scenario(case.process, case.analysis, alpha=ALPHA)
    assert sc.analytic_power()[sc.primary] == got
    assert case.analysis.analytic_exact_for(case.process) is crosscheck.TABLE[case.key].is_exact(case.analysis)


def test_exactness_follows_the_table():
    # exact: noncentral t and z; approximations: Welch-Satterthwaite, normal approximation, Schoenfeld
    assert sp.TTest().analytic_exact and sp.PairedT().analytic_exact
    # per process: the cluster-means t is exact for normal outcomes in equal clusters, approximate for binary ones
    normal = sp.ClusterTrial(clusters=5, cluster_size=4, icc=0.1, effect=0.5)
    binary = build("process", {"type": "trial", "design": {"type": "clusters", "clusters": 5, "cluster_size": 4,
                                                           "icc": 0.1}, "outcome": {"type": "binary", "p0": 0.3,
                                                                                    "odds_ratio": 2.0}})
    assert sp.ClusterMeansT().analytic_exact_for(normal) and not sp.ClusterMeansT().analytic_exact_for(binary)
    assert not sp.ClusterMeansT().analytic_exact  # without a process: all its entries
    assert not (sp.WelchT().analytic_exact or sp.TwoProportions().analytic_exact or sp.LogRank().analytic_exact)
    assert sp.TOST(margin=1.0, equal_var=True).analytic_exact and not sp.TOST(margin=1.0).analytic_exact
    assert not sp.NonInferiority(margin=1.0).analytic_exact


# -- no entry, no number ---------------------------------------------------------------------------
@dataclass(frozen=True)
class CountFacts:
    """Facts of a kind the table has no entry for."""

    rate0: float
    rate1: float
    n: int


class _Stated(Process):
    """A process that states whatever facts it is given (draws a normal two-arm table)."""

    name = None
    params: dict = {}

    def __init__(self, facts):
        super().__init__()
        object.__setattr__(self, "_facts", tuple(facts))

    def facts(self):
        return self._facts

    def draw_batch(self, rng, size):
        arm = np.repeat([0, 1], 10)
        return Batch(size, {"y": rng.standard_normal((size, 20)) + arm}, {"arm": arm})


BUILT_IN = [sp.TTest(), sp.WelchT(), sp.PairedT(), sp.ZTest(), sp.TOST(margin=0.5), sp.NonInferiority(margin=0.5),
            sp.TwoProportions(), sp.LogRank(), sp.ClusterMeansT(), sp.ChiSquare(), sp.MannWhitney()]


@pytest.mark.parametrize("analysis", BUILT_IN, ids=lambda a: a.name)
def test_facts_no_entry_covers_give_none(analysis):
    assert analysis.analytic_power(_Stated([CountFacts(1.0, 1.5, 20)]), 0.05) is None
    assert analysis.analytic_power(_Stated([]), 0.05) is None
    sc = sp.Scenario(_Stated([CountFacts(1.0, 1.5, 20)]), analysis)
    assert sc.analytic_power()[sc.primary] is None


def test_facts_of_another_kind_give_none():
    binary = _Stated([BinaryFacts(p0=0.2, p1=0.4, n=30)])
    normal = _Stated([NormalFacts("two-sample", effect=0.5, n=20, sd0=1.0, sd1=1.0)])
    assert sp.TTest().analytic_power(binary, 0.05) is None
    assert sp.TwoProportions().analytic_power(normal, 0.05) is None
    assert sp.LogRank().analytic_power(normal, 0.05) is None
    assert sp.ClusterMeansT().analytic_power(normal, 0.05) is None
    # the facts are tried in order: the covered one wins whatever comes first
    both = _Stated([CountFacts(1.0, 1.5, 20), NormalFacts("two-sample", effect=0.5, n=20, sd0=1.0, sd1=1.0)])
    assert sp.TTest().analytic_power(both, 0.05) == pytest.approx(nct_power(0.5 / math.sqrt(0.1), 38, 0.05,
                                                                            "two-sided"), rel=1e-9)


@pytest.mark.parametrize("analysis, process", [
    # Student t and the pooled tests need one SD; the paired and unpaired tests need their own design
    (sp.TTest(), sp.NormalTwoArm(n=10, effect=0.5, sd_ratio=2.0)),
    (sp.TTest(), sp.NormalPaired(n=10, effect=0.5)),
    (sp.WelchT(), sp.NormalOneSample(n=10, effect=0.5)),
    (sp.PairedT(), sp.NormalTwoArm(n=10, effect=0.5)),
    (sp.TOST(margin=1.0), sp.NormalPaired(n=10, effect=0.5)),
    (sp.TOST(margin=1.0, equal_var=True), sp.NormalTwoArm(n=10, effect=0.5, sd_ratio=2.0)),
    (sp.NonInferiority(margin=1.0, equal_var=True), sp.NormalTwoArm(n=10, effect=0.5, sd_ratio=2.0)),
    # a z-test whose known SD is not the process's
    (sp.ZTest(sd=2.0), sp.NormalTwoArm(n=10, effect=0.5)),
    (sp.ZTest(sd=2.0), sp.NormalOneSample(n=10, effect=0.5)),
    # missing outcomes: no facts
    (sp.TTest(), sp.NormalTwoArm(n=10, effect=0.5, missing=sp.MCAR(rate=0.1))),
    (sp.TwoProportions(), sp.BinaryTwoArm(n=30, p0=0.3, odds_ratio=2.0, missing=sp.MCAR(rate=0.1))),
    (sp.ClusterMeansT(), sp.ClusterTrial(clusters=5, cluster_size=4, icc=0.1, effect=0.5,
                                         missing=sp.MCAR(rate=0.1))),
    # unequal clusters, individual randomisation, and unequal SDs between arms of clusters
    (sp.ClusterMeansT(), sp.ClusterTrial(clusters=5, cluster_size=4, cluster_size_cv=0.5, icc=0.1, effect=0.5)),
    (sp.ClusterMeansT(), sp.ClusterTrial(clusters=5, cluster_size=4, icc=0.1, effect=0.5, randomise="individual")),
    (sp.ClusterMeansT(), build("process", {"type": "trial", "effect": 0.5, "sd_ratio": 1.5, "design": {
        "type": "clusters", "clusters": 5, "cluster_size": 4, "icc": 0.1}})),
    # a skewed outcome: no normal facts for the composed trial
    (sp.ClusterMeansT(), build("process", {"type": "trial", "effect": 0.5, "outcome": {
        "type": "lognormal", "median": 1.0, "cv": 0.5}, "design": {"type": "clusters", "clusters": 5,
                                                                    "cluster_size": 4, "icc": 0.1}})),
    (sp.TTest(), build("process", {"type": "trial", "effect": 0.5, "outcome": {
        "type": "lognormal", "median": 1.0, "cv": 0.5}, "design": {"type": "arms", "n": 10}})),
])
def test_cases_outside_the_closed_forms_give_none(analysis, process):
    assert analysis.analytic_power(process, 0.05) is None


# -- inheritance and the older interface ---------------------------------------------------------
class _RenamedT(sp.TTest):
    """A user's t-test under its own name (given by the test, so nothing is registered)."""


def test_a_subclass_inherits_its_base_entries(monkeypatch):
    monkeypatch.setattr(_RenamedT, "name", "renamed_t_for_crosscheck_test")
    assert _RenamedT.__dict__["name"] != sp.TTest.name
    p = sp.NormalTwoArm(n=16, effect=0.7)
    assert _RenamedT().analytic_power(p, 0.05) == sp.TTest().analytic_power(p, 0.05)
    assert crosscheck.entries(_RenamedT()) == crosscheck.entries(sp.TTest())
    assert crosscheck.entries(build("analysis", {"type": "ols"})) == {}


class _OldStyle(Process):
    """A process written against the older normal_case() dictionary."""

    name = None
    params: dict = {}

    def normal_case(self):
        return {"design": "two-sample", "effect": 0.5, "n": 20, "ratio": 1.0, "sd0": 1.0, "sd1": 1.0, "sd": 1.0}


def test_older_normal_case_still_gives_the_closed_form():
    proc = _OldStyle()
    assert proc.facts() == (NormalFacts("two-sample", effect=0.5, n=20, sd0=1.0, sd1=1.0),)
    assert sp.TTest().analytic_power(proc, 0.05) == pytest.approx(
        nct_power(0.5 / math.sqrt(0.1), 38, 0.05, "two-sided"), rel=1e-9)


def test_normal_case_shim_returns_the_older_dictionary():
    with pytest.warns(DeprecationWarning, match="facts"):
        nc = sp.NormalTwoArm(n=20, ratio=2.0, effect=0.5, sd=2.0, sd_ratio=1.5).normal_case()
    assert nc == {"design": "two-sample", "effect": 0.5, "n": 20, "ratio": 2.0, "sd0": 2.0, "sd1": 3.0, "sd": None}
    with pytest.warns(DeprecationWarning):
        assert sp.NormalPaired(n=8, effect=0.3, sd0=1.0, sd1=1.0, corr=0.5).normal_case() == {
            "design": "paired", "effect": 0.3, "n": 8, "sd": 1.0, "ratio": 1.0}
    with pytest.warns(DeprecationWarning):
        assert sp.BinaryTwoArm(n=20, p0=0.3, odds_ratio=2.0).normal_case() is None


def _simpower_imports(filename):
    """The simpower modules a top-level module of the package imports (relative or absolute), anywhere in it."""
    out = set()
    for node in ast.walk(ast.parse((Path(sp.__file__).parent / filename).read_text())):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                out |= {f"{node.module}" if node.module else a.name for a in node.names}
            elif (node.module or "").startswith("simpower"):
                out.add(node.module)
        elif isinstance(node, ast.Import):
            out |= {a.name for a in node.names if a.name.startswith("simpower")}
    return out


def test_facts_is_a_leaf_and_the_table_sits_below_processes_and_analyses():
    # processes and analyses both import facts, and analyses import the table (DEVELOPERS.md, "Layout")
    assert _simpower_imports("facts.py") == set()
    assert _simpower_imports("crosscheck.py") == {"analytic", "facts"}


# -- the composed trial with clusters: closed form against simulation ----------------------------
def test_trial_clusters_closed_form_matches_simulation():
    k, m, icc, effect = 6, 10, 0.05, 0.45
    proc = build("process", {"type": "trial", "effect": effect,
                             "design": {"type": "clusters", "clusters": k, "cluster_size": m, "icc": icc}})
    sc = sp.Scenario(proc, sp.ClusterMeansT())
    target = nct_power(effect / math.sqrt((icc + (1 - icc) / m) * 2 / k), 2 * k - 2, 0.05, "two-sided")
    res = sp.run(sc, reps=4000, seed=31, n_jobs=1)
    s = res.summaries["cluster_means_t"]
    assert s["analytic_power"] == pytest.approx(target, rel=1e-9)
    assert abs(res.power - target) < 4 * math.sqrt(target * (1 - target) / res.reps), (res.power, target)
