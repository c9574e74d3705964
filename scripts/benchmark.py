"""Speed of simpower, measured side by side in one run: a table of ratios (and JSON).

Usage::

    python scripts/benchmark.py                 # the full run (a few minutes, idle machine)
    python scripts/benchmark.py --quick         # small sizes: checks that every row runs
    python scripts/benchmark.py --only a,b --json bench.json

Rows (each a ratio of two rates measured here, in this run):

a. two-arm t-test (NormalTwoArm(n=50, effect=0.5) + TTest, 50 per arm) through
   ``simpower.run`` with one job, against (a1) a per-replicate loop drawing
   fresh data and calling ``scipy.stats.ttest_ind`` and (a2) numpy's bare
   cost of drawing the same normal numbers in the engine's chunk sizes.
   Targets: >= 100 x the scipy loop, >= 0.5 x the bare draw rate.
b. cluster trial, random-intercept mixed model (REML): the batch path through
   ``simpower.run`` against statsmodels MixedLM fitted replicate by replicate
   (fit time only), after checking on the same replicates that the answers
   agree. Target >= 200 x.
c. Mann-Whitney: the batch path through ``simpower.run`` against a loop of
   ``scipy.stats.mannwhitneyu`` on freshly drawn data. Target >= 50 x. Row c0 computes
   what scipy computes (U and p); c1 and c2 add an estimate and CI that scipy does not.
d. two jobs against one on a per-replicate scenario (a user analysis calling
   scipy for each replicate). Target >= 1.7 x.
m. missing outcomes (20% MCAR, 100 per arm, one job): each analysis whose batch path now
   takes missing outcomes (m01-m14), through ``simpower.run``, against a plain per-replicate
   loop calling scipy / statsmodels (array API, no formula) on the observed values of the
   same kind of data (tables drawn before timing, so the loop is timed on its calls alone).
   Interleaved repeats (engine, loop, engine, ...); the ratio is of the median rates.
   Each row checks, on the loop's replicates, that the batch path's decisions at 0.05 agree
   with the library's on >= 99.9% of them and reports the largest relative difference of the
   estimates (rows whose library gives no estimate compare decisions only). Target >= 1 x.
x. AB/BA crossover, log scale (12 per sequence, within-subject CV 25%, 10% dropout after
   period 1), one job: x1 ``crossover_t`` through ``simpower.run`` against a loop of
   ``scipy.stats.ttest_ind`` on the period differences of the same kind of data (tables drawn
   before timing); x2 ``crossover_mixed`` (batch REML, ``df = "wald"`` like statsmodels' own
   p-values) against statsmodels ``MixedLM`` (REML, array API, default optimiser) fitted replicate
   by replicate. Each row checks on the loop's
   replicates that decisions at 0.05 agree (x1: >= 99.9% and estimates to 1e-9; x2: >= 99.5%
   and estimates to 1e-4, statsmodels' default tolerance). Targets >= 50 x and >= 200 x.
o. ordinal outcome, proportional-odds model (5 categories, 100 per arm, OR 1.6): the batch path
   through ``simpower.run`` (one job) against a plain loop of statsmodels ``OrderedModel(y, arm,
   distr="logit").fit(method="newton")`` on the same kind of data (tables drawn before timing), o1
   complete and o2 with 20% MCAR outcomes. Checks on the loop's replicates that the decisions at
   0.05 agree on >= 99.9% and the estimates to 1e-6 relative. Target >= 50 x.
s. stepped wedge (5 steps x 3 clusters, 15 per cluster-period), ``sw_mixed`` through
   ``simpower.run`` with one job against statsmodels MixedLM (``y ~ C(period) + treat``,
   Powell, the optimiser ``sw_mixed`` uses per replicate) fitted replicate by replicate
   (fit time only), checking on those replicates that the estimates agree (to 1e-4 SE) and
   the decisions on >= 99.9%. Target >= 100 x. Run with ``--only s``.
i. MMRM (n = 100 per arm, 4 visits, exchangeable correlation 0.5, 20% monotone dropout completely at
   random): the batch path (batched Fisher scoring over the observed-visit patterns) through
   ``simpower.run`` against (i1) the same analysis's per-replicate path (its REML criterion minimised
   by scipy's BFGS) in a plain loop and (i2) statsmodels MixedLM with a random intercept (compound
   symmetry; same visit-by-arm mean model, array API) as a familiar reference. Checks on the loop's
   replicates that the batch estimates are within 1e-6 relative of the per-replicate ones and the
   decisions at 0.05 identical. Target >= 50 x (i1).
g. GEE (exchangeable working correlation, robust SE), 10 + 10 clusters of 20: the batch path on
   pre-drawn batches against a plain loop of ``statsmodels.api.GEE`` (numpy arrays, no formula)
   on the same replicates, fit time only; gaussian (cluster_trial, ICC 0.05) and binomial
   (random intercept SD 0.4 on the logit scale, drawn here), complete and 20% MCAR missing.
   Each row checks estimates (relative difference) and decisions at 0.05 on the loop's
   replicates. Target >= 50 x.
k. Cox proportional hazards (Breslow ties), survival_two_arm with 100 per arm, control median 10,
   hazard ratio 0.7, follow-up 16 (about 60% events): the batch path (Newton across replicates)
   through ``simpower.run`` with one job against a plain loop of statsmodels ``PHReg(time, arm,
   status=event).fit()`` on tables drawn before timing (fit time only). Checks on the loop's
   replicates that the estimates agree to 1e-6 relative and the decisions at 0.05 on >= 99.9%.
   Target >= 50 x.
u. pilot data resampled whole units at a time (``pilot_units``; invented pilots drawn here from a
   fixed generator): u1 12 clinics of 4-12 rows resampled to 15 per arm, ``cluster_means_t``; u2 30
   participants x 4 visits (some missing) resampled to 50 per arm, ``mmrm``. Each through
   ``simpower.run`` with one job (the batch path) against the same analysis's per-replicate path
   called in a plain loop on tables drawn before timing; checks on the loop's replicates that the two
   paths agree (u1 to 1e-9, u2 to 1e-6 relative). Target >= 20 x (chosen here).
l. log-rank (survival_two_arm, 100 per arm, control median 10, hazard ratio 0.7, follow-up 16): the
   batch path (each arm's sorted time-event keys merged by a compiled walk) through ``simpower.run``
   with one job against a plain loop of statsmodels ``survdiff`` on the complete cases of tables drawn
   before timing; l1 complete, l2 with 20% of the times missing completely at random. Interleaved
   rounds, median rates; decisions at 0.05 checked on the loop's replicates. Target >= 50 x.
q. 2x2 tables and GLMs, 100 per arm, complete (q1-q4) and 20% MCAR (q1m-q4m): chi_square and
   fisher_exact against ``scipy.stats.chi2_contingency`` / ``fisher_exact`` on the observed 2x2 table,
   logistic and poisson_glm against statsmodels ``GLM`` (binomial; Poisson with the log-exposure
   offset) on the observed rows. Same timing and checks as row l. Target >= 50 x.
e. peak memory (RSS) of a whole t-test run in a fresh subprocess for growing
   reps: the RSS the run adds (peak during the run minus RSS before it), and
   the bytes added per extra replicate (shown in the ratio column), for the
   default run (e1: records spooled to disk above 25,000 replicates) and
   ``keep_records=False`` (e2). Target: flat in reps, taken as under 4 bytes
   per replicate.
e. peak memory (RSS) of a whole t-test run in a fresh subprocess for growing
   reps: the RSS the run adds (peak during the run minus RSS before it), and
   the bytes added per extra replicate (shown in the ratio column), for the
   default run (e1: records spooled to disk above 25,000 replicates) and
   ``keep_records=False`` (e2). Target: flat in reps, taken as under 4 bytes
   per replicate.
h. random-intercept GLMM (binary, logit link, adaptive Gauss-Hermite quadrature with 10 nodes),
   10 + 10 clusters of 20, complete (h1) and with 20% of outcomes missing (h2): the batch path
   (Newton across replicates) through ``simpower.run`` against the analysis's own per-replicate
   fit (``scipy.optimize.minimize``, BFGS, on the same log-likelihood) in a plain loop over
   tables drawn before timing. Each row checks, on the loop's replicates, that the estimates
   agree (largest relative difference reported, replicates without fit trouble) and the
   decisions at 0.05 are identical. Target >= 50 x. With numba the batch path evaluates the
   log-likelihood by its compiled kernel over each replicate's distinct clusters; the per-replicate
   reference keeps the numpy function (``SIMPOWER_NO_NUMBA=1`` runs the batch path on it too).
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

import simpower as sp  # noqa: E402
from simpower.constraints import Real  # noqa: E402
from simpower.engine.runner import BATCH_CHUNK  # noqa: E402

SIZES = {
    # row: (quick, full)
    "a_reps": (20_000, 400_000),
    "a_loop": (1_000, 10_000),
    "b_reps": (4_000, 40_000),
    "b_loop": (20, 200),
    "c_reps": (10_000, 100_000),
    "c_loop": (1_000, 10_000),
    "d_seconds": (1.0, 6.0),
    "e_reps": ((1_000, 10_000, 100_000), (10_000, 100_000, 1_000_000)),
    "m_reps": (4_000, 40_000),
    "m_loop": (200, 2_000),
    "x_reps": (4_000, 40_000),
    "x_loop": (200, 2_000),
    "x_mixed_loop": (20, 200),
    "o_reps": (2_000, 20_000),
    "o_loop": (40, 400),
    "h_reps": (2_000, 20_000),
    "h_loop": (30, 300),
    "s_reps": (1_000, 10_000),
    "s_loop": (20, 200),
    "g_reps": (2_000, 10_000),
    "g_loop": (40, 300),
    "i_reps": (1_000, 10_000),
    "i_loop": (20, 200),
    "i_statsmodels": (10, 100),
    "k_reps": (2_000, 20_000),
    "k_loop": (50, 500),
    "r_reps": (400, 4_000),
    "r_loop": (40, 200),
    "u_reps": (1_000, 10_000),
    "u_loop": (20, 200),
}


def best_rate(fn, count, repeats):
    """Highest rate (count / seconds) over ``repeats`` calls of ``fn``."""
    best = 0.0
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = max(best, count / (time.perf_counter() - t0))
    return best


def chunks(reps, size=BATCH_CHUNK):
    return [min(size, reps - k) for k in range(0, reps, size)]


def row(key, name, ours, theirs, target, unit="x", note="", **extra):
    ratio = ours / theirs if theirs else math.nan
    return {"row": key, "measure": name, "ours_per_s": ours, "reference_per_s": theirs, "ratio": ratio,
            "target": target, "meets": bool(ratio >= target) if target is not None else None, "unit": unit,
            "note": note, **extra}


# -- (a) t-test ------------------------------------------------------------------------
def bench_ttest(quick, repeats):
    from scipy import stats

    reps, loop = (SIZES["a_reps"][0], SIZES["a_loop"][0]) if quick else (SIZES["a_reps"][1], SIZES["a_loop"][1])
    sc = sp.Scenario(sp.NormalTwoArm(n=50, effect=0.5), sp.TTest())
    res = sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False)
    assert res.paths["t_test"] == "batch"
    engine = best_rate(lambda: sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False), reps, repeats)

    def scipy_loop():
        rng = np.random.default_rng(2)
        for _ in range(loop):
            y0 = rng.standard_normal(50)
            y1 = rng.standard_normal(50) + 0.5
            stats.ttest_ind(y1, y0)

    def bare_draw():
        rng = np.random.default_rng(3)
        for size in chunks(reps):
            rng.standard_normal((size, 100))

    loop_rate = best_rate(scipy_loop, loop, repeats)
    draw_rate = best_rate(bare_draw, reps, repeats)
    note = f"power {res.power:.4f} (MCSE {res.mcse:.4f}); {reps} reps, loop {loop}"
    return [row("a1", "t-test: engine vs scipy loop", engine, loop_rate, 100.0, note=note),
            row("a2", "t-test: engine vs numpy bare draw", engine, draw_rate, 0.5, note=note)]


# -- (b) mixed model ---------------------------------------------------------------------
def cluster_process():
    """The cluster-trial process if the library has it, else None."""
    from simpower import registry

    if "cluster_trial" not in registry.names("process"):
        return None
    return registry.build("process", {"type": "cluster_trial", "clusters": 10, "cluster_size": 20,
                                      "icc": 0.05, "effect": 0.3})


def bench_mixed(quick, repeats):
    import pandas as pd
    import statsmodels.formula.api as smf

    from simpower.analyses.mixed import MixedModel

    reps, loop = (SIZES["b_reps"][0], SIZES["b_loop"][0]) if quick else (SIZES["b_reps"][1], SIZES["b_loop"][1])
    proc = cluster_process()
    if proc is None:
        return [{"row": "b", "measure": "mixed model: batch vs statsmodels", "note": "not available "
                 "(no cluster_trial process)", "ratio": None, "target": 200.0, "meets": None}]
    an = MixedModel()
    sc = sp.Scenario(proc, an)
    res = sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False)
    assert res.paths["mixed_model"] == "batch"
    engine = best_rate(lambda: sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False), reps, repeats)

    batch = proc.draw_batch(np.random.default_rng(4), loop)
    ours = an.batch(batch)
    frames = [pd.DataFrame(batch.replicate(i)) for i in range(loop)]
    p_sm = np.empty(loop)
    est_sm = np.empty(loop)
    warned = np.zeros(loop, bool)
    t0 = time.perf_counter()
    for i, d in enumerate(frames):
        with warnings.catch_warnings(record=True) as w:
            warnings.simplefilter("always")
            fit = smf.mixedlm("y ~ C(arm)", d, groups=d["cluster"]).fit(reml=True)
        p_sm[i], est_sm[i], warned[i] = fit.pvalues.iloc[1], fit.fe_params.iloc[1], bool(w)
    sm_rate = loop / (time.perf_counter() - t0)
    clean = ~warned & ~ours["trouble"]["warning:ConvergenceWarning"]
    dp = float(np.max(np.abs(ours["pvalue"][clean] - p_sm[clean]))) if clean.any() else math.nan
    de = float(np.max(np.abs(ours["estimate"][clean] - est_sm[clean]))) if clean.any() else math.nan
    agree = float(np.mean((ours["pvalue"] <= 0.05) == (p_sm <= 0.05)))
    equal = bool(dp < 1e-4 and de < 1e-4 and agree >= 0.995)
    note = (f"20 clusters of 20, ICC 0.05; on {loop} replicates: max |dp| {dp:.1e}, max |d estimate| "
            f"{de:.1e} (clean fits: {int(clean.sum())}), same decision {agree:.1%}, statsmodels warned on "
            f"{warned.mean():.1%}; {'answers agree' if equal else 'ANSWERS DIFFER'}")
    out = row("b", "mixed model: batch vs statsmodels", engine, sm_rate, 200.0, note=note,
              max_abs_dp=dp, decision_agreement=agree, answers_agree=equal)
    out["meets"] = bool(out["meets"] and equal)
    return [out]


# -- (c) Mann-Whitney ----------------------------------------------------------------------
def bench_mann_whitney(quick, repeats):
    from scipy import stats

    from simpower import registry

    reps, loop = (SIZES["c_reps"][0], SIZES["c_loop"][0]) if quick else (SIZES["c_reps"][1], SIZES["c_loop"][1])
    if "mann_whitney" not in registry.names("analysis"):
        return [{"row": "c", "measure": "Mann-Whitney: batch vs scipy loop", "note": "not available "
                 "(no mann_whitney analysis)", "ratio": None, "target": 50.0, "meets": None}]

    def scipy_loop():
        rng = np.random.default_rng(2)
        for _ in range(loop):
            y0 = rng.standard_normal(50)
            y1 = rng.standard_normal(50) + 0.5
            stats.mannwhitneyu(y1, y0, alternative="two-sided", method="asymptotic")

    loop_rate = best_rate(scipy_loop, loop, repeats)
    from simpower.analyses import nonparametric
    backend = getattr(nonparametric, "order_statistic_backend", lambda: "numpy")()
    rows = []
    for key, estimand, what in (("c0", "none", "estimand='none': U and p only, like scipy"),
                                ("c1", "shift", "default: + Hodges-Lehmann shift and CI"),
                                ("c2", "probability", "estimand='probability': U / (n0 n1) + SE")):
        an = registry.build("analysis", {"type": "mann_whitney", "estimand": estimand})
        sc = sp.Scenario(sp.NormalTwoArm(n=50, effect=0.5), an)
        t_first = time.perf_counter()
        res = sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False)   # warm-up (numba compile or cache load)
        t_first = time.perf_counter() - t_first
        name = f"Mann-Whitney ({estimand}): batch vs scipy loop"
        if res.paths[sc.primary] != "batch":
            rows.append({"row": key, "measure": name, "ratio": None, "target": 50.0, "meets": None,
                         "note": "not available (the analysis ran per replicate)"})
            continue
        engine = best_rate(lambda: sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False), reps, repeats)
        note = f"50 per arm, {what}; scipy computes U and p only; {reps} reps, loop {loop}"
        if estimand == "shift":
            how = {"numba": "the numba kernel"}.get(backend, "numpy (all differences, partitioned)")
            note += (f"; order statistics by {how}, timed after a warm-up run of {t_first:.1f} s "
                     f"(with any compile or cache load), best of {repeats}")
        rows.append(row(key, name, engine, loop_rate, 50.0, note=note))
    return rows


# -- (d) two jobs vs one ----------------------------------------------------------------------
def bench_jobs(quick, repeats):
    from simpower import registry

    target_s = SIZES["d_seconds"][0] if quick else SIZES["d_seconds"][1]
    an = registry.build("analysis", {"type": f"{HERE / 'bench_user.py'}:scipy_pair"})
    sc = sp.Scenario(sp.NormalTwoArm(n=50, effect=0.3), an)
    chunk = 250
    pilot = 1000
    t0 = time.perf_counter()
    sp.run(sc, reps=pilot, seed=1, n_jobs=1, chunk_size=chunk, progress=False)
    per_rep = (time.perf_counter() - t0) / pilot
    reps = max(4 * chunk, int(math.ceil(target_s / per_rep / (2 * chunk))) * 2 * chunk)
    sp.run(sc, reps=4 * chunk, seed=1, n_jobs=2, chunk_size=chunk, progress=False)  # start the worker pool
    one = best_rate(lambda: sp.run(sc, reps=reps, seed=1, n_jobs=1, chunk_size=chunk, progress=False), reps, 1)
    two = best_rate(lambda: sp.run(sc, reps=reps, seed=1, n_jobs=2, chunk_size=chunk, progress=False), reps, 1)
    a = sp.run(sc, reps=2 * chunk, seed=5, n_jobs=1, chunk_size=chunk, progress=False).records
    b = sp.run(sc, reps=2 * chunk, seed=5, n_jobs=2, chunk_size=chunk, progress=False).records
    same = bool(np.array_equal(a[sc.primary].pvalue, b[sc.primary].pvalue))
    note = (f"{reps} reps ({reps / one:.1f} s with one job), chunks of {chunk}, pool started before timing; "
            f"same p-values with 1 and 2 jobs: {same}; cores: {os.cpu_count()}")
    return [row("d", "two jobs vs one (per-replicate user analysis)", two, one, 1.7, note=note,
                same_numbers=same)]


# -- (m) missing outcomes ---------------------------------------------------------------------
def _observed_arms(t):
    ok = np.isfinite(t["y"])
    y, arm = t["y"][ok], t["arm"][ok]
    return y[arm == 0], y[arm == 1]


def _missing_cases():
    """(key, label, process, analysis, library function table -> (p, estimate or None))."""
    import statsmodels.api as sm
    from scipy import stats

    mcar = sp.MCAR(rate=0.2)
    two = sp.TwoArm(n=100, effect=0.3, missing=mcar)

    def t(equal_var):
        def f(tab):
            y0, y1 = _observed_arms(tab)
            return stats.ttest_ind(y1, y0, equal_var=equal_var).pvalue, y1.mean() - y0.mean()
        return f

    def z(tab):
        y0, y1 = _observed_arms(tab)
        d = y1.mean() - y0.mean()
        return 2 * stats.norm.sf(abs(d) / math.sqrt(1 / y0.size + 1 / y1.size)), d

    def log_t(tab):
        y0, y1 = _observed_arms(tab)
        l0, l1 = np.log(y0), np.log(y1)
        return stats.ttest_ind(l1, l0, equal_var=False).pvalue, math.exp(l1.mean() - l0.mean())

    def paired(tab):
        y, arm, pair = tab["y"], tab["arm"], tab["pair"]
        o0, o1 = np.argsort(pair[arm == 0]), np.argsort(pair[arm == 1])
        d = y[arm == 1][o1] - y[arm == 0][o0]
        d = d[np.isfinite(d)]
        return stats.ttest_1samp(d, 0.0).pvalue, d.mean()

    def tost(tab):
        y0, y1 = _observed_arms(tab)
        p = max(stats.ttest_ind(y1 + 0.5, y0, equal_var=False, alternative="greater").pvalue,
                stats.ttest_ind(y1 - 0.5, y0, equal_var=False, alternative="less").pvalue)
        return p, y1.mean() - y0.mean()

    def ni(tab):
        y0, y1 = _observed_arms(tab)
        return stats.ttest_ind(y1 + 0.2, y0, equal_var=False, alternative="greater").pvalue, y1.mean() - y0.mean()

    def mw(tab):
        y0, y1 = _observed_arms(tab)
        return stats.mannwhitneyu(y1, y0, method="asymptotic").pvalue, None

    def wsr(tab):
        y = tab["y"][np.isfinite(tab["y"])]
        return stats.wilcoxon(y, method="asymptotic").pvalue, None

    def ols(cov_type, with_baseline=False, groups=False):
        def f(tab):
            ok = np.isfinite(tab["y"])
            cols = [np.ones(ok.sum()), tab["arm"][ok].astype(float)]
            if with_baseline:
                cols.append(tab["baseline"][ok])
            kw = {"cov_kwds": {"groups": tab["cluster"][ok]}} if groups else {}
            fit = sm.OLS(tab["y"][ok], np.column_stack(cols)).fit(cov_type=cov_type, use_t=True, **kw)
            return fit.pvalues[1], fit.params[1]
        return f

    def multiple(tab):
        y0, y1 = _observed_arms(tab)
        raw = [stats.ttest_ind(y1, y0).pvalue, stats.ttest_ind(y1, y0, equal_var=False).pvalue]
        # Holm (1979): the smallest adjusted p-value is min(1, k p_(1)); by hand, because
        # statsmodels' multipletests costs ~0.1 s a call here and would flatter the ratio
        return min(1.0, len(raw) * min(raw)), y1.mean() - y0.mean()

    build = sp.registry.build
    lognormal = sp.TwoArm(n=100, effect=1.2, effect_type="ratio", outcome=sp.Lognormal(median=1.0, sigma=0.5),
                          missing=mcar)
    baseline = sp.TwoArm(n=100, effect=0.3, baseline_corr=0.5, missing=mcar)
    clusters = sp.ClusterTrial(clusters=10, cluster_size=10, icc=0.05, effect=0.3, missing=mcar)
    return [
        ("m01", "t_test", two, sp.TTest(), t(True)),
        ("m02", "welch_t", two, sp.WelchT(), t(False)),
        ("m03", "z_test", two, sp.ZTest(), z),
        ("m04", "log_t", lognormal, build("analysis", {"type": "log_t"}), log_t),
        ("m05", "paired_t (complete pairs)", sp.NormalPaired(n=100, effect=0.2, missing=mcar), sp.PairedT(), paired),
        ("m06", "tost (margin 0.5)", two, sp.TOST(margin=0.5), tost),
        ("m07", "non_inferiority (margin 0.2)", two, sp.NonInferiority(margin=0.2), ni),
        ("m08", "mann_whitney (U and p, like scipy)", two, sp.MannWhitney(estimand="none"), mw),
        ("m09", "mann_whitney (+ Hodges-Lehmann shift)", two, sp.MannWhitney(), mw),
        ("m10", "wilcoxon_signed_rank (one sample)", sp.NormalOneSample(n=100, effect=0.2, missing=mcar),
         sp.WilcoxonSignedRank(), wsr),
        ("m11", "ols (classical)", two, sp.OLS(), ols("nonrobust")),
        ("m12", "ancova (HC3)", baseline, sp.Ancova(cov_type="HC3"), ols("HC3", with_baseline=True)),
        ("m13", "ols (cluster-robust), 20 clusters of 10", clusters, sp.OLS(cov_type="cluster"),
         ols("cluster", groups=True)),
        ("m14", "multiple (t_test + welch_t, Holm)", two,
         sp.Multiple(tests=[sp.TTest(), sp.WelchT()]), multiple),
    ]


def bench_missing(quick, repeats):
    import statistics

    from simpower.analyses.base import as_batch_result

    reps, loop = (SIZES["m_reps"][0], SIZES["m_loop"][0]) if quick else (SIZES["m_reps"][1], SIZES["m_loop"][1])
    rounds = max(repeats, 3)
    rows = []
    for key, label, proc, an, lib in _missing_cases():
        sc = sp.Scenario(proc, an)
        res = sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False)
        name = f"missing 20%: {label}"
        if res.paths[sc.primary] != "batch":
            rows.append({"row": key, "measure": name, "ratio": None, "target": 1.0, "meets": None,
                         "note": f"not available (the engine took the {res.paths[sc.primary]} path)"})
            continue
        batch = proc.draw_batch(np.random.default_rng(7), loop)
        tables = [batch.replicate(i) for i in range(loop)]
        ref = []

        def library_loop():
            ref.clear()
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                for tab in tables:
                    ref.append(lib(tab))

        times = {"engine": [], "loop": []}
        for _ in range(rounds):                    # interleaved: engine, loop, engine, loop, ...
            t0 = time.perf_counter()
            sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False)
            times["engine"].append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            library_loop()
            times["loop"].append(time.perf_counter() - t0)
        ours = as_batch_result(an.batch(batch))
        p_lib = np.array([r[0] for r in ref], float)
        same = float(np.mean((np.asarray(ours.pvalue) <= 0.05) == (p_lib <= 0.05)))
        if ref[0][1] is not None and ours.estimate is not None:
            est_lib = np.array([r[1] for r in ref], float)
            d_est = float(np.max(np.abs(ours.estimate - est_lib) / np.maximum(np.abs(est_lib), 1e-300)))
            est_note = f"max rel. estimate difference {d_est:.1e}"
        else:
            d_est, est_note = None, "no library estimate (decisions only)"
        ok = same >= 0.999 and (d_est is None or d_est < 1e-9)
        engine = reps / statistics.median(times["engine"])
        lib_rate = loop / statistics.median(times["loop"])
        note = (f"{reps} reps, loop {loop}, median of {rounds} interleaved rounds; on the loop's replicates: "
                f"same decision {same:.2%}, {est_note}; {'answers agree' if ok else 'ANSWERS DIFFER'}")
        out = row(key, name, engine, lib_rate, 1.0, note=note, decision_agreement=same,
                  max_rel_estimate_difference=d_est, answers_agree=ok)
        out["meets"] = bool(out["meets"] and ok)
        rows.append(out)
    return rows


# -- (o) ordinal outcome, proportional odds -----------------------------------------------------
def bench_ordinal(quick, repeats):
    from statsmodels.miscmodels.ordinal_model import OrderedModel

    from simpower import registry
    from simpower.analyses.base import as_batch_result

    reps, loop = (SIZES["o_reps"][0], SIZES["o_loop"][0]) if quick else (SIZES["o_reps"][1], SIZES["o_loop"][1])
    rows = []
    for key, missing in (("o1", None), ("o2", {"type": "mcar", "rate": 0.2})):
        spec = {"type": "ordinal_two_arm", "n": 100, "p0": [0.1, 0.2, 0.3, 0.25, 0.15], "odds_ratio": 1.6}
        if missing:
            spec["missing"] = missing
        proc = registry.build("process", spec)
        an = registry.build("analysis", {"type": "proportional_odds"})
        sc = sp.Scenario(proc, an)
        name = f"proportional odds{' (20% MCAR)' if missing else ''}: batch vs OrderedModel loop"
        res = sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False)
        if res.paths[sc.primary] != "batch":
            rows.append({"row": key, "measure": name, "ratio": None, "target": 50.0, "meets": None,
                         "note": f"not available (the engine took the {res.paths[sc.primary]} path)"})
            continue
        engine = best_rate(lambda: sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False), reps, repeats)
        batch = proc.draw_batch(np.random.default_rng(7), loop)
        tables = []
        for i in range(loop):
            t = batch.replicate(i)
            ok = np.isfinite(t["y"])
            tables.append((t["y"][ok], t["arm"][ok].astype(float)[:, None]))
        est_sm, p_sm = np.empty(loop), np.empty(loop)

        def library_loop():
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                for i, (y, arm) in enumerate(tables):
                    fit = OrderedModel(y, arm, distr="logit").fit(method="newton", disp=0)
                    est_sm[i], p_sm[i] = fit.params[0], fit.pvalues[0]

        lib_rate = best_rate(library_loop, loop, repeats)
        ours = as_batch_result(an.batch(batch))
        same = float(np.mean((ours.pvalue <= 0.05) == (p_sm <= 0.05)))
        d_est = float(np.max(np.abs(ours.estimate - est_sm) / np.maximum(np.abs(est_sm), 1e-3)))
        ok = same >= 0.999 and d_est < 1e-6
        note = (f"5 categories, 100 per arm, OR 1.6; {reps} reps, loop {loop} (fit time only); power "
                f"{res.power:.4f} (MCSE {res.mcse:.4f}); on the loop's replicates: same decision {same:.2%}, "
                f"max rel. estimate difference {d_est:.1e}; {'answers agree' if ok else 'ANSWERS DIFFER'}")
        out = row(key, name, engine, lib_rate, 50.0, note=note, decision_agreement=same,
                  max_rel_estimate_difference=d_est, answers_agree=ok)
        out["meets"] = bool(out["meets"] and ok)
        rows.append(out)
    return rows


# -- (h) GLMM ---------------------------------------------------------------------------------
class _ClusterBinary(sp.Process):
    """10 + 10 clusters of 20, logit P(y) = -1 + 0.5 arm + u, u ~ N(0, 0.5^2); ``missing`` MCAR."""

    params = {"missing": Real(0.0, 1.0, high_open=True), "effect": Real()}
    defaults = {"missing": 0.0, "effect": 0.5}
    size_param = None
    estimand_label = "conditional log odds ratio"

    def draw_batch(self, rng, size):
        from scipy import special

        cluster = np.repeat(np.arange(20), 20)
        arm = (cluster >= 10).astype(np.int64)
        u = rng.normal(0.0, 0.5, (size, 20))[:, cluster]
        y = (rng.random(u.shape) < special.expit(-1.0 + self.effect * arm + u)).astype(float)
        per_rep = {"y": y}
        if self.missing > 0:
            y[rng.random(y.shape) < self.missing] = np.nan
            per_rep["observed"] = np.isfinite(y)
        return sp.Batch(size, per_rep, {"arm": arm, "cluster": cluster}, {"missing": self.missing > 0})


def bench_glmm(quick, repeats):
    import statistics

    from simpower.analyses.glmm import GLMM

    reps, loop = (SIZES["h_reps"][0], SIZES["h_loop"][0]) if quick else (SIZES["h_reps"][1], SIZES["h_loop"][1])
    rounds = max(repeats, 3)
    rows = []
    for key, missing in (("h1", 0.0), ("h2", 0.2)):
        proc, an = _ClusterBinary(missing=missing), GLMM()
        sc = sp.Scenario(proc, an)
        res = sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False)
        assert res.paths["glmm"] == "batch"
        batch = proc.draw_batch(np.random.default_rng(7), loop)
        tables = [batch.replicate(i) for i in range(loop)]
        ref = []

        def per_replicate_loop():
            ref.clear()
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always")
                for tab in tables:
                    n_before = len(caught)
                    r = an(tab)
                    ref.append((r.pvalue, r.estimate, len(caught) > n_before))

        times = {"engine": [], "loop": []}
        for _ in range(rounds):                    # interleaved: engine, loop, engine, loop, ...
            t0 = time.perf_counter()
            sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False)
            times["engine"].append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            per_replicate_loop()
            times["loop"].append(time.perf_counter() - t0)
        ours = an.batch(batch)
        flagged = np.array([r[2] for r in ref])
        for mask in ours.trouble.values():
            flagged = flagged | mask
        clean = ~flagged
        p_ref = np.array([r[0] for r in ref])
        est_ref = np.array([r[1] for r in ref])
        same = bool(np.array_equal(ours.pvalue[clean] <= 0.05, p_ref[clean] <= 0.05))
        # relative difference; estimates within 1e-3 of 0 (an exact tie of the arms) compared in absolute terms
        scale = np.maximum(np.abs(est_ref[clean]), 1e-3)
        d_est = float(np.max(np.abs(ours.estimate[clean] - est_ref[clean]) / scale))
        ok = same and d_est < 1e-5
        engine = reps / statistics.median(times["engine"])
        loop_rate = loop / statistics.median(times["loop"])
        label = "complete" if not missing else "20% missing"
        from simpower.analyses.glmm import glmm_backend

        note = (f"{label}; batch log-likelihood by {glmm_backend()}; {reps} reps, loop {loop}, median of {rounds} "
                f"interleaved rounds; on the loop's "
                f"replicates ({int(clean.sum())} without fit trouble): same decisions {same}, max rel. estimate "
                f"difference {d_est:.1e} (absolute below 1e-3); {'answers agree' if ok else 'ANSWERS DIFFER'}")
        out = row(key, f"GLMM (AGHQ 10 nodes), {label}: batch vs scipy loop", engine, loop_rate, 50.0, note=note,
                  max_rel_estimate_difference=d_est, answers_agree=ok)
        out["meets"] = bool(out["meets"] and ok)
        rows.append(out)
    return rows


# -- (i) MMRM ---------------------------------------------------------------------------------
def bench_mmrm(quick, repeats):
    import statsmodels.api as sm

    from simpower.analyses.mmrm import MMRM

    pick = 0 if quick else 1
    reps, loop, n_sm = SIZES["i_reps"][pick], SIZES["i_loop"][pick], SIZES["i_statsmodels"][pick]
    proc = sp.RepeatedMeasures(n=100, visits=4, rho=0.5, effect=0.3, dropout_rate=0.2)
    an = MMRM()
    sc = sp.Scenario(proc, an)
    res = sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False)
    assert res.paths["mmrm"] == "batch"
    engine = best_rate(lambda: sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False), reps, repeats)

    batch = proc.draw_batch(np.random.default_rng(9), loop)
    tables = [batch.replicate(i) for i in range(loop)]
    ours = an.batch(batch)
    per = []

    def per_replicate_loop():
        per.clear()
        for tab in tables:
            per.append(an(tab))

    loop_rate = best_rate(per_replicate_loop, loop, repeats)
    est = np.array([r.estimate for r in per])
    p_loop = np.array([r.pvalue for r in per])
    d_est = float(np.max(np.abs(ours.estimate - est) / np.abs(est)))
    same = bool(np.all((ours.pvalue <= 0.05) == (p_loop <= 0.05)))

    def statsmodels_loop():
        for tab in tables[:n_sm]:
            ok = np.isfinite(tab["y"])
            v, a = tab["visit"][ok], tab["arm"][ok]
            X = np.column_stack([c for j in range(4) for c in ((v == j), (v == j) & (a == 1))]).astype(float)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                sm.MixedLM(tab["y"][ok], X, groups=tab["subject"][ok]).fit(reml=True)

    sm_rate = best_rate(statsmodels_loop, n_sm, repeats)
    agree = d_est < 1e-6 and same
    note = (f"power {res.power:.3f} (MCSE {res.mcse:.3f}); {reps} reps, loop {loop}, statsmodels {n_sm}; on the "
            f"loop's replicates: max rel. estimate difference {d_est:.1e}, decisions "
            f"{'identical' if same else 'DIFFER'}; {'answers agree' if agree else 'ANSWERS DIFFER'}")
    out = row("i1", "MMRM: batch vs per-replicate REML loop", engine, loop_rate, 50.0, note=note,
              max_rel_estimate_difference=d_est, answers_agree=agree)
    out["meets"] = bool(out["meets"] and agree)
    return [out, row("i2", "MMRM: batch vs statsmodels MixedLM (CS) loop", engine, sm_rate, 1.0,
                     note="a different covariance model (random intercept): speed reference only")]


# -- (g) GEE ---------------------------------------------------------------------------------
def _binary_cluster_batch(rng, reps, clusters=10, size=20, sd_b=0.4, log_or=0.4, missing=0.0):
    """Binary outcomes of a cluster-randomised trial: random intercept N(0, sd_b^2) on the logit scale."""
    from simpower.batch import Batch

    cluster = np.repeat(np.arange(2 * clusters), size)
    arm = (cluster >= clusters).astype(np.int8)
    eta = -0.5 + log_or * arm + rng.normal(0.0, sd_b, (reps, 2 * clusters))[:, cluster]
    y = (rng.random(eta.shape) < 1 / (1 + np.exp(-eta))).astype(float)
    per_rep, info = {"y": y}, {}
    if missing:
        hide = rng.random(y.shape) < missing
        y[hide] = np.nan
        per_rep["observed"], info["missing"] = ~hide, True
    return Batch(reps, per_rep, {"cluster": cluster, "arm": arm}, info)


def bench_gee(quick, repeats):
    import statsmodels.api as sm
    from statsmodels.genmod.cov_struct import Exchangeable

    from simpower.analyses.gee import GEE

    reps, loop = (SIZES["g_reps"][0], SIZES["g_loop"][0]) if quick else (SIZES["g_reps"][1], SIZES["g_loop"][1])
    rng = np.random.default_rng(5)
    cases = []
    for family in ("gaussian", "binomial"):
        for missing in (0.0, 0.2):
            if family == "gaussian":
                proc = sp.ClusterTrial(clusters=10, cluster_size=20, icc=0.05, effect=0.3,
                                       missing=sp.MCAR(rate=missing) if missing else None)
                batches = [proc.draw_batch(rng, n) for n in chunks(reps)]
            else:
                batches = [_binary_cluster_batch(rng, n, missing=missing) for n in chunks(reps)]
            cases.append((family, missing, batches))
    rows = []
    for k, (family, missing, batches) in enumerate(cases, start=1):
        an = GEE(family=None if family == "gaussian" else family)
        out = {}

        def batch_run():
            out["res"] = [an.batch(b) for b in batches]

        ours = best_rate(batch_run, reps, repeats)
        first = batches[0]
        tables = []
        for i in range(loop):
            t = first.replicate(i)
            keep = np.isfinite(t["y"])
            tables.append((t["y"][keep], np.column_stack([np.ones(keep.sum()), t["arm"][keep]]), t["cluster"][keep]))
        fam = sm.families.Gaussian if family == "gaussian" else sm.families.Binomial
        ref = np.empty((loop, 2))

        def library_loop():
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                for i, (y, X, g) in enumerate(tables):
                    fit = sm.GEE(y, X, groups=g, family=fam(), cov_struct=Exchangeable()).fit()
                    ref[i] = fit.params[1], fit.pvalues[1]

        theirs = best_rate(library_loop, loop, repeats)
        res = out["res"][0]
        est, p = np.asarray(res.estimate)[:loop], np.asarray(res.pvalue)[:loop]
        d_est = float(np.max(np.abs(est - ref[:, 0]) / np.maximum(np.abs(ref[:, 0]), 1e-12)))
        same = float(np.mean((p <= 0.05) == (ref[:, 1] <= 0.05)))
        handed = int(sum(sum(int(v.sum()) for v in r.trouble.values()) for r in out["res"]))
        ok = same >= 0.999 and d_est < 1e-6
        note = (f"{reps} reps (batch, chunks of {BATCH_CHUNK}), loop {loop}; on the loop's replicates: same "
                f"decision {same:.2%}, max rel. estimate difference {d_est:.1e}; replicates with fit trouble "
                f"(statsmodels' own path): {handed}; {'answers agree' if ok else 'ANSWERS DIFFER'}")
        label = f"gee {family}, exchangeable{', 20% missing' if missing else ''}: batch vs statsmodels"
        r = row(f"g{k}", label, ours, theirs, 50.0, note=note, decision_agreement=same,
                max_rel_estimate_difference=d_est, answers_agree=ok)
        r["meets"] = bool(r["meets"] and ok)
        rows.append(r)
    return rows


# -- (r) resampling: permutation test and bootstrap ------------------------------------------------
def bench_resampling(quick, repeats):
    """permutation_test / bootstrap_ci batch paths (each replicate's own draws) vs the plain scipy loop."""
    from scipy import stats

    from simpower.analyses.resampling import BootstrapCI, PermutationTest, _permuted, data_rng

    reps, loop = (SIZES["r_reps"][0], SIZES["r_loop"][0]) if quick else (SIZES["r_reps"][1], SIZES["r_loop"][1])
    proc = sp.NormalTwoArm(n=50, effect=0.3)
    cases = [("r1", "permutation test, mean diff., 1999 resamples", PermutationTest(n_resamples=1999)),
             ("r2", "bootstrap percentile, mean diff., 1999 resamples",
              BootstrapCI(n_resamples=1999, method="percentile")),
             ("r3", "bootstrap BCa, mean diff., 1999 resamples", BootstrapCI(n_resamples=1999, method="bca"))]
    first = proc.draw_batch(np.random.default_rng(7), loop)
    tables = [first.replicate(i) for i in range(loop)]
    arms = [(t["y"][t["arm"] == 0], t["y"][t["arm"] == 1]) for t in tables]
    rows = []
    for key, label, an in cases:
        sc = sp.Scenario(proc, an)
        res = sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False)
        assert res.paths[an.name] == "batch"
        ours = best_rate(lambda: sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False), reps, repeats)
        ref = np.empty((loop, 3))
        if an.name == "permutation_test":
            def library_loop():
                for i, (y0, y1) in enumerate(arms):
                    r = stats.permutation_test((y1, y0), lambda a, b, axis: a.mean(axis=axis) - b.mean(axis=axis),
                                               permutation_type="independent", vectorized=True, n_resamples=1999,
                                               rng=data_rng(0, y1, y0))
                    ref[i] = r.pvalue, r.statistic, np.nan
        else:
            def library_loop():
                for i, (y0, y1) in enumerate(arms):
                    r = stats.bootstrap((y0, y1), lambda a, b, axis=-1: b.mean(axis=axis) - a.mean(axis=axis),
                                        n_resamples=1999, vectorized=True, method=an.method, rng=data_rng(0, y0, y1))
                    ref[i] = np.nan, r.confidence_interval.low, r.confidence_interval.high

        theirs = best_rate(library_loop, loop, repeats)
        buf = np.empty((1999, 100))

        def draws_only():  # the random numbers scipy draws per replicate, nothing else: the ceiling
            for y0, y1 in arms:
                if an.name == "permutation_test":
                    x = np.concatenate([y1, y0])
                    _permuted(data_rng(0, y1, y0), x, buf)
                else:
                    rng = data_rng(0, y0, y1)
                    rng.integers(0, 50, (1999, 50))
                    rng.integers(0, 50, (1999, 50))

        ceiling = best_rate(draws_only, loop, repeats)
        out = an.batch(first)
        got = (np.column_stack([out.pvalue, out.estimate, np.full(loop, np.nan)]) if an.name == "permutation_test"
               else np.column_stack([np.full(loop, np.nan), out.ci_low, out.ci_high]))
        ok = bool(np.array_equal(got, ref, equal_nan=True))
        note = (f"{reps} reps through simpower.run (batch, chunks of {BATCH_CHUNK}), scipy loop {loop}; on the "
                f"loop's replicates the {'p-values and estimates' if an.name == 'permutation_test' else 'CIs'} "
                f"are {'identical' if ok else 'DIFFERENT'}; power {res.power:.3f}; the same random draws alone "
                f"(each replicate's own stream, as scipy draws them) run at {ceiling:,.0f}/s, a ceiling of "
                f"{ceiling / theirs:.3g} x")
        r = row(key, f"{label}: batch vs scipy loop", ours, theirs, 50.0, note=note, answers_agree=ok)
        r["meets"] = bool(r["meets"] and ok)
        rows.append(r)
    return rows


# -- (e) memory ------------------------------------------------------------------------------
CHILD = r"""
import resource, sys
sys.path.insert(0, {root!r})
import simpower as sp


def status(key):
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(key + ":"):
                return int(line.split()[1])  # KiB
    return -1


reps = int(sys.argv[1])
kw = {{}} if sys.argv[2] == "default" else {{"keep_records": False}}
sc = sp.Scenario(sp.NormalTwoArm(n=50, effect=0.5), sp.TTest())
sp.run(sc, reps=100, seed=2, n_jobs=1, progress=False).power   # warm up (imports, caches)
before = status("VmRSS")
try:                                   # reset the high-water mark (Linux >= 4.0)
    with open("/proc/self/clear_refs", "w") as fh:
        fh.write("5")
    reset = True
except OSError:
    reset = False
res = sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False, **kw)
_ = res.power, res.summaries
peak = status("VmHWM") if reset else resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
print(before, peak, int(reset))
"""


def peak_rss_kib(reps: int, mode: str) -> tuple[int, int, bool]:
    """(RSS before the run, peak RSS during it, whether the peak was reset) in KiB, in a fresh process."""
    code = CHILD.format(root=str(HERE.parent))
    out = subprocess.run([sys.executable, "-c", code, str(reps), mode], capture_output=True, text=True,
                         check=True)
    before, peak, reset = out.stdout.split()[-3:]
    return int(before), int(peak), reset == "1"


#: "flat in reps": under 4 bytes per replicate, i.e. < 4 MB more at a million replicates
FLAT_BYTES = 4.0


def bench_memory(quick, repeats):
    import inspect

    reps_list = SIZES["e_reps"][0] if quick else SIZES["e_reps"][1]
    modes = [("e1", "default", "memory: bytes per replicate (default run)")]
    if "keep_records" in inspect.signature(sp.run).parameters:
        modes.append(("e2", "summaries", "memory: bytes per replicate (keep_records=False)"))
    rows = []
    for key, mode, name in modes:
        runs = {r: peak_rss_kib(r, mode) for r in reps_list}
        extra = {r: max(0, peak - before) for r, (before, peak, _) in runs.items()}   # KiB the run added
        lo, hi = reps_list[0], reps_list[-1]
        per_rep = (extra[hi] - extra[lo]) * 1024 / (hi - lo)
        reset = all(v[2] for v in runs.values())
        note = ("RSS added by the run (peak minus RSS before it), MiB: "
                + ", ".join(f"{r:.0e} reps {extra[r] / 1024:.1f}" for r in reps_list)
                + f"; process peak {runs[lo][1] / 1024:.0f} -> {runs[hi][1] / 1024:.0f} MiB; "
                f"{per_rep:.0f} bytes per extra replicate"
                + (" (records in memory up to 25,000 replicates x analyses, then spooled to a temporary "
                   "folder and summarised from per-chunk tallies)" if mode == "default" else
                   " (per-chunk tallies only)")
                + ("" if reset else "; peak not resettable here: ru_maxrss used"))
        rows.append({"row": key, "measure": name, "ratio": per_rep, "target": FLAT_BYTES,
                     "unit": "bytes per replicate", "meets": bool(per_rep <= FLAT_BYTES), "note": note,
                     "runs_kib": {str(k): v[:2] for k, v in runs.items()}, "bytes_per_rep": per_rep,
                     "peak_growth": runs[hi][1] / runs[lo][1]})
    return rows


# -- (x) crossover ---------------------------------------------------------------------------
def bench_crossover(quick, repeats):
    import statsmodels.api as sm
    from scipy import stats

    from simpower.analyses.crossover import CrossoverMixed, CrossoverT, periods
    from simpower.processes.crossover import Crossover

    q = 0 if quick else 1
    reps, loop, mloop = SIZES["x_reps"][q], SIZES["x_loop"][q], SIZES["x_mixed_loop"][q]
    proc = Crossover(n=12, scale="log", cv_within=0.25, effect=0.95, dropout=0.1)
    batch = proc.draw_batch(np.random.default_rng(8), loop)
    tables = [periods(batch.replicate(i), "log") for i in range(loop)]
    rows = []
    for key, an, n_lib, target in (("x1", CrossoverT(scale="log"), loop, 50.0),
                                   ("x2", CrossoverMixed(scale="log", df="wald"), mloop, 200.0)):
        sc = sp.Scenario(proc, an)
        res = sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False)
        assert res.paths[an.name] == "batch"
        engine = best_rate(lambda: sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False), reps, repeats)
        ref = []

        def library_loop():
            ref.clear()
            for y1, y2, seq in tables[:n_lib]:
                d = y2 - y1
                ok = np.isfinite(d)
                if key == "x1":
                    r = stats.ttest_ind(d[ok & (seq == 0)], d[ok & (seq == 1)])
                    ref.append((r.pvalue, (d[ok & (seq == 0)].mean() - d[ok & (seq == 1)].mean()) / 2))
                    continue
                X = np.concatenate([np.stack([np.ones_like(y1), 0 * y1, seq], 1),
                                    np.stack([np.ones_like(y1), 1 + 0 * y1, 1 - seq], 1)])
                y, g = np.concatenate([y1, y2]), np.tile(np.arange(y1.size), 2)
                k = np.isfinite(y)
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    fit = sm.MixedLM(y[k], X[k], groups=g[k]).fit(reml=True)
                ref.append((fit.pvalues[2], fit.fe_params[2]))

        lib_rate = best_rate(library_loop, n_lib, repeats)
        sub = batch if n_lib == loop else sp.Batch(n_lib, {k: v[:n_lib] for k, v in batch.per_rep.items()},
                                                   batch.shared, batch.info)
        ours = an.batch(sub)
        p_lib, est_lib = np.array(ref, float).T
        same = float(np.mean((np.asarray(ours.pvalue) <= 0.05) == (p_lib <= 0.05)))
        d_est = float(np.max(np.abs(np.log(ours.estimate) - est_lib)))
        ok = same >= (0.999 if key == "x1" else 0.995) and d_est < (1e-9 if key == "x1" else 1e-4)
        note = (f"power {res.power:.4f} (MCSE {res.mcse:.4f}); on {n_lib} replicates: same decision {same:.1%}, "
                f"max |d log estimate| {d_est:.1e}; {'answers agree' if ok else 'ANSWERS DIFFER'}")
        name = ("crossover t: engine vs scipy loop" if key == "x1" else "crossover mixed: batch vs statsmodels")
        out = row(key, name, engine, lib_rate, target, note=note, answers_agree=ok)
        out["meets"] = bool(out["meets"] and ok)
        rows.append(out)
    return rows


# -- (s) stepped-wedge mixed model ------------------------------------------------------------
def bench_stepped(quick, repeats):
    """sw_mixed's batch REML against the statsmodels MixedLM loop a user would write (same model)."""
    import pandas as pd
    import statsmodels.formula.api as smf

    from simpower.registry import build

    reps, loop = (SIZES["s_reps"][0], SIZES["s_loop"][0]) if quick else (SIZES["s_reps"][1], SIZES["s_loop"][1])
    proc = build("process", {"type": "stepped_wedge", "steps": 5, "clusters_per_step": 3, "m": 15, "icc": 0.05,
                             "effect": 0.3})
    an = build("analysis", {"type": "sw_mixed"})
    sc = sp.Scenario(proc, an)
    res = sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False)
    assert res.paths["sw_mixed"] == "batch"
    engine = best_rate(lambda: sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False), reps, repeats)
    batch = proc.draw_batch(np.random.default_rng(4), loop)
    ours = an.batch(batch)
    frames = [pd.DataFrame(batch.replicate(i)) for i in range(loop)]
    p_sm, est_sm = np.empty(loop), np.empty(loop)
    t0 = time.perf_counter()
    for i, d in enumerate(frames):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            fit = smf.mixedlm("y ~ C(period) + treat", d, groups=d["cluster"]).fit(
                reml=True, method="powell", ftol=1e-12, maxiter=5000)
        p_sm[i], est_sm[i] = fit.pvalues["treat"], fit.fe_params["treat"]
    sm_rate = loop / (time.perf_counter() - t0)
    de = float(np.max(np.abs(ours["estimate"] - est_sm) / np.maximum(ours["se"], 1e-300)))
    agree = float(np.mean((ours["pvalue"] <= 0.05) == (p_sm <= 0.05)))
    equal = bool(de < 1e-4 and agree >= 0.999)
    note = (f"5 steps x 3 wards, 15 per ward-month, ICC 0.05; on {loop} replicates: max |d estimate| / SE "
            f"{de:.1e}, same decision {agree:.1%}; {'answers agree' if equal else 'ANSWERS DIFFER'}")
    out = row("s", "stepped wedge: sw_mixed batch vs statsmodels MixedLM", engine, sm_rate, 100.0, note=note,
              decision_agreement=agree, answers_agree=equal)
    out["meets"] = bool(out["meets"] and equal)
    return [out]


# -- (k) Cox proportional hazards -------------------------------------------------------------
def bench_cox(quick, repeats):
    from statsmodels.duration.hazard_regression import PHReg

    from simpower import registry
    from simpower.analyses.base import as_batch_result

    reps, loop = (SIZES["k_reps"][0], SIZES["k_loop"][0]) if quick else (SIZES["k_reps"][1], SIZES["k_loop"][1])
    proc = registry.build("process", {"type": "survival_two_arm", "n": 100, "median": 10.0, "hazard_ratio": 0.7,
                                      "follow_up": 16.0})
    an = registry.build("analysis", {"type": "cox"})
    sc = sp.Scenario(proc, an)
    name = "Cox PH (Breslow): batch vs statsmodels PHReg loop"
    res = sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False)
    if res.paths[sc.primary] != "batch":
        return [{"row": "k", "measure": name, "ratio": None, "target": 50.0, "meets": None,
                 "note": f"not available (the engine took the {res.paths[sc.primary]} path)"}]
    engine = best_rate(lambda: sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False), reps, repeats)
    batch = proc.draw_batch(np.random.default_rng(7), loop)
    tables = [batch.replicate(i) for i in range(loop)]
    tables = [(t["time"], t["arm"].astype(float)[:, None], t["event"]) for t in tables]
    est_sm, p_sm = np.empty(loop), np.empty(loop)

    def library_loop():
        for i, (t, arm, event) in enumerate(tables):
            fit = PHReg(t, arm, status=event).fit()
            est_sm[i], p_sm[i] = fit.params[0], fit.pvalues[0]

    lib_rate = best_rate(library_loop, loop, repeats)
    ours = as_batch_result(an.batch(batch))
    same = float(np.mean((ours.pvalue <= 0.05) == (p_sm <= 0.05)))
    d_est = float(np.max(np.abs(ours.estimate - est_sm) / np.maximum(np.abs(est_sm), 1e-3)))
    events = float(np.mean(batch.per_rep["event"]))
    ok = same >= 0.999 and d_est < 1e-6
    note = (f"100 per arm, HR 0.7, {events:.0%} events; {reps} reps, loop {loop} (fit time only); power "
            f"{res.power:.4f} (MCSE {res.mcse:.4f}); on the loop's replicates: same decision {same:.2%}, "
            f"max rel. estimate difference {d_est:.1e}; {'answers agree' if ok else 'ANSWERS DIFFER'}")
    out = row("k", name, engine, lib_rate, 50.0, note=note, decision_agreement=same,
              max_rel_estimate_difference=d_est, answers_agree=ok)
    out["meets"] = bool(out["meets"] and ok)
    return [out]


# -- (n) negative binomial regression ----------------------------------------------------------
def bench_negbin(quick, repeats):
    """negbin_glm's batch Newton against the plain statsmodels NegativeBinomial loop, 100 per arm."""
    import statistics

    import statsmodels.api as sm

    from simpower.registry import build

    reps, loop = (2_000, 40) if quick else (20_000, 400)
    rounds = max(repeats, 3)
    rows = []
    base = {"type": "count_two_arm", "n": 100, "rate0": 1.2, "rate_ratio": 0.7, "dispersion": 0.8}
    for key, label, extra in (("n1", "complete", {}), ("n2", "20% MCAR", {"missing": {"type": "mcar", "rate": 0.2}})):
        proc = build("process", {**base, **extra})
        an = build("analysis", {"type": "negbin_glm"})
        sc = sp.Scenario(proc, an)
        res = sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False)
        assert res.paths[sc.primary] == "batch", res.paths
        batch = proc.draw_batch(np.random.default_rng(8), loop)
        tables = [batch.replicate(i) for i in range(loop)]
        p_sm, est_sm, se_sm = np.empty(loop), np.empty(loop), np.empty(loop)

        def library_loop():
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                for i, tab in enumerate(tables):
                    ok = np.isfinite(tab["y"])
                    exog = sm.add_constant(np.asarray(tab["arm"], float)[ok])
                    fit = sm.NegativeBinomial(tab["y"][ok], exog, loglike_method="nb2",
                                              offset=np.log(tab["exposure"][ok])).fit(disp=0)
                    p_sm[i], est_sm[i], se_sm[i] = fit.pvalues[1], fit.params[1], fit.bse[1]

        times = {"engine": [], "loop": []}
        for _ in range(rounds):                    # interleaved: engine, loop, engine, loop, ...
            t0 = time.perf_counter()
            sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False)
            times["engine"].append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            library_loop()
            times["loop"].append(time.perf_counter() - t0)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ours = an.batch(batch)
        same = float(np.mean((ours["pvalue"] <= 0.05) == (p_sm <= 0.05)))
        de = float(np.max(np.abs(ours["estimate"] - est_sm) / se_sm))
        ds = float(np.max(np.abs(ours["se"] - se_sm) / se_sm))
        ok = same >= 0.999 and de < 1e-3 and ds < 2e-4
        note = (f"control rate 1.2, rate ratio 0.7, k = 0.8, {reps} reps, loop {loop}, median of {rounds} interleaved "
                f"rounds; on the loop's replicates: same decision {same:.2%}, max |d estimate| / SE {de:.1e}, max rel. "
                f"SE difference {ds:.1e} (statsmodels' bfgs stops at gtol 1e-5); "
                f"{'answers agree' if ok else 'ANSWERS DIFFER'}")
        out = row(key, f"negative binomial ({label}): negbin_glm batch vs statsmodels",
                  reps / statistics.median(times["engine"]), loop / statistics.median(times["loop"]), 50.0,
                  note=note, decision_agreement=same, answers_agree=ok)
        out["meets"] = bool(out["meets"] and ok)
        rows.append(out)
    return rows


# -- (u) pilot units -------------------------------------------------------------------------
def bench_pilot_units(quick, repeats):
    """pilot_units' clustered and longitudinal batches: the batch path vs the per-replicate path in a loop."""
    import warnings

    from simpower.registry import build

    reps, loop = (SIZES["u_reps"][0], SIZES["u_loop"][0]) if quick else (SIZES["u_reps"][1], SIZES["u_loop"][1])
    rng = np.random.default_rng(20261202)   # invented pilots
    cl = {"y": [], "unit": [], "arm": []}
    for c in range(12):
        u = rng.normal(0, 1.0)
        for _ in range(int(rng.integers(4, 13))):
            cl["y"].append(float(20 + u + rng.normal(0, 3))); cl["unit"].append(c); cl["arm"].append(c % 2)
    vi = {"y": [], "unit": [], "arm": [], "visit": []}
    for s_ in range(30):
        z = rng.normal(0, 2) + rng.normal(0, 1.5, 4)
        for v in range(4):
            if v > 1 and rng.random() < 0.1:
                continue
            vi["y"].append(float(30 + z[v] - v)); vi["unit"].append(s_); vi["arm"].append(s_ % 2); vi["visit"].append(v)
    cases = [("u1", "pilot_units clusters, cluster_means_t: batch vs loop",
              sp.PilotUnits(table=cl, unit="clinic", clusters=15, effect=1.0, spread="inflate"),
              build("analysis", {"type": "cluster_means_t"}), 1e-9),
             ("u2", "pilot_units visits, mmrm: batch vs loop",
              sp.PilotUnits(table=vi, unit="id", visit="visit", n=50, effect=-1.0, effect_from=1),
              build("analysis", {"type": "mmrm"}), 1e-6)]
    rows = []
    for key, label, proc, an, tol in cases:
        sc = sp.Scenario(proc, an)
        res = sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False)
        assert res.paths[an.name] == "batch"
        ours = best_rate(lambda: sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False), reps, repeats)
        batch = proc.draw_batch(np.random.default_rng(5), loop)
        tables = [batch.replicate(i) for i in range(loop)]
        ref = np.empty(loop)

        def per_replicate():
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                for i, t in enumerate(tables):
                    ref[i] = an(t).estimate

        theirs = best_rate(per_replicate, loop, repeats)
        got = np.asarray(an.batch(batch).estimate, float)
        diff = float(np.max(np.abs(got - ref) / np.maximum(np.abs(ref), 1e-12)))
        ok = diff <= tol
        note = (f"{reps} reps through simpower.run (batch), per-replicate loop {loop}; largest relative difference "
                f"of the estimates on the loop's replicates {diff:.2g}; power {res.power:.3f}")
        r = row(key, label, ours, theirs, 20.0, note=note, answers_agree=ok)
        r["meets"] = bool(r["meets"] and ok)
        rows.append(r)
    return rows
# -- (t) group-sequential looks at event counts -------------------------------------------------
def _logrank_less(data):
    """The log-rank test as a user function (no batch path): reports the control-over-treatment log HR so its
    z counts upwards as `logrank` with alternative 'less' does."""
    from simpower.analyses.base import TestResult

    r = sp.LogRank(alternative="less")(data)
    return TestResult(pvalue=r.pvalue, estimate=-r.estimate, se=r.se)


def bench_groupseq_events(quick, repeats):
    from simpower.analyses.groupseq import GroupSequential

    reps, loop = (200, 40) if quick else (4_000, 400)
    proc = sp.SurvivalTwoArm(n=150, median=12.0, hazard_ratio=0.75, accrual=24.0, follow_up=12.0)
    common = {"fractions": [0.4, 0.7, 1.0], "spending": "obf", "futility": {"rule": "predictive", "threshold": 0.1}}
    batch_gs = GroupSequential(inner={"type": "logrank", "alternative": "less"}, **common)
    loop_gs = GroupSequential(inner=_logrank_less, **common)
    name = "group-sequential log-rank at event-count looks: batch vs per replicate"
    a = sp.Scenario(proc, analyses={"gs": batch_gs}, alpha=0.025)
    b = sp.Scenario(proc, analyses={"gs": loop_gs}, alpha=0.025)
    ours = best_rate(lambda: sp.run(a, reps=reps, seed=1, n_jobs=1, progress=False), reps, repeats)
    theirs = best_rate(lambda: sp.run(b, reps=loop, seed=1, n_jobs=1, progress=False), loop, repeats)
    both = sp.run(sp.Scenario(proc, analyses={"batch": batch_gs, "loop": loop_gs}, alpha=0.025), reps=loop, seed=2,
                  n_jobs=1, progress=False)  # one scenario: the same data sets for both paths
    ok = both.paths["batch"] == "batch" and bool(np.array_equal(both.records["batch"].pvalues,
                                                                both.records["loop"].pvalues))
    note = (f"150 per arm, HR 0.75, looks at 40/70/100% of the events, predictive-probability futility; {reps} reps "
            f"batch, {loop} per replicate; stopping records {'identical' if ok else 'DIFFER'} on {loop} replicates")
    out = row("t", name, ours, theirs, 2.0, note=note, answers_agree=ok)
    out["meets"] = bool(out["meets"] and ok)
    return [out]
# -- (l) log-rank, (q) 2x2 tables and GLMs: engine vs the library loop, complete and 20% MCAR -----------
def _interleaved(engine, loop, rounds):
    """Median seconds of ``engine()`` and ``loop()`` over ``rounds`` interleaved calls (engine, loop, ...)."""
    import statistics

    times = {"engine": [], "loop": []}
    for _ in range(rounds):
        for key, fn in (("engine", engine), ("loop", loop)):
            t0 = time.perf_counter()
            fn()
            times[key].append(time.perf_counter() - t0)
    return statistics.median(times["engine"]), statistics.median(times["loop"])


def _survival_mcar(rate):
    """survival_two_arm (100 per arm, control median 10, HR 0.7, follow-up 16) with ``rate`` of the times
    missing completely at random (NaN): the process has no ``missing`` field, so the benchmark hides them."""
    from simpower.processes.design import apply_missing
    from simpower.processes.survival import SurvivalTwoArm

    class SurvivalMCAR(SurvivalTwoArm):  # no ``name``: not registered, the benchmark's own
        def draw_batch(self, rng, size):
            b = super().draw_batch(rng, size)
            if rate > 0:
                apply_missing(sp.MCAR(rate=rate), rng, b.per_rep["time"], {}, b.per_rep, b.info)
            return b

    return SurvivalMCAR(n=100, median=10.0, hazard_ratio=0.7, follow_up=16.0)


def _library_rows(cases, reps, rounds):
    """One row per case ``(key, label, process, analysis, loop size, library function table -> (p, estimate))``:
    the engine (``simpower.run``, one job) against the plain loop of the library call on tables drawn
    before timing; on the loop's replicates the decisions at 0.05 must agree on >= 99.9% and the
    estimates (where the library gives one) to 1e-6 relative."""
    from simpower.analyses.base import as_batch_result

    # in-process and serial, as a registered scenario runs with one job (a process defined in this
    # script would otherwise count as user code and run in a forked worker)
    run = dict(reps=reps, seed=1, n_jobs=1, progress=False, backend="serial")
    rows = []
    for key, label, proc, an, loop, lib in cases:
        sc = sp.Scenario(proc, an)
        res = sp.run(sc, **run)
        if res.paths[sc.primary] != "batch":
            rows.append({"row": key, "measure": label, "ratio": None, "target": 50.0, "meets": None,
                         "note": f"not available (the engine took the {res.paths[sc.primary]} path)"})
            continue
        batch = proc.draw_batch(np.random.default_rng(7), loop)
        tables = [batch.replicate(i) for i in range(loop)]
        ref = []

        def library_loop():
            ref.clear()
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                for tab in tables:
                    ref.append(lib(tab))

        t_engine, t_loop = _interleaved(lambda: sp.run(sc, **run),
                                        library_loop, rounds)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ours = as_batch_result(an.batch(batch))
        p_lib = np.array([r[0] for r in ref], float)
        same = float(np.mean((np.asarray(ours.pvalue) <= 0.05) == (p_lib <= 0.05)))
        d_p = float(np.nanmax(np.abs(ours.pvalue - p_lib) / np.maximum(p_lib, 1e-300)))
        if ref[0][1] is not None:
            est_lib = np.array([r[1] for r in ref], float)
            fin = np.isfinite(est_lib) & np.isfinite(ours.estimate)
            d_est = float(np.max(np.abs(ours.estimate[fin] - est_lib[fin]) / np.maximum(np.abs(est_lib[fin]), 1e-3)))
            est_note = f"max rel. estimate difference {d_est:.1e}"
        else:
            d_est, est_note = None, "no library estimate"
        ok = same >= 0.999 and (d_est is None or d_est < 1e-6)
        note = (f"{reps} reps, loop {loop}, median of {rounds} interleaved rounds; power {res.power:.3f}; on the loop's "
                f"replicates: same decision {same:.2%}, max rel. p-value difference {d_p:.1e}, {est_note}; "
                f"{'answers agree' if ok else 'ANSWERS DIFFER'}")
        out = row(key, label, reps / t_engine, loop / t_loop, 50.0, note=note, decision_agreement=same,
                  max_rel_pvalue_difference=d_p, max_rel_estimate_difference=d_est, answers_agree=ok)
        out["meets"] = bool(out["meets"] and ok)
        rows.append(out)
    return rows


def bench_logrank(quick, repeats):
    """logrank's batch path against a loop of statsmodels ``survdiff`` (complete cases), 100 per arm."""
    from statsmodels.duration.survfunc import survdiff

    from simpower.registry import build

    reps, loop = (2_000, 100) if quick else (20_000, 1_000)

    def lib(tab):
        ok = np.isfinite(tab["time"])  # the user's complete cases
        return survdiff(tab["time"][ok], tab["event"][ok], tab["arm"][ok])[1], None

    an = build("analysis", {"type": "logrank"})
    complete = build("process", {"type": "survival_two_arm", "n": 100, "median": 10.0, "hazard_ratio": 0.7,
                                 "follow_up": 16.0})
    cases = [("l1", "log-rank (complete): batch vs survdiff loop", complete, an, loop, lib),
             ("l2", "log-rank (20% MCAR): batch vs survdiff loop", _survival_mcar(0.2), an, loop, lib)]
    return _library_rows(cases, reps, max(repeats, 3))


def bench_tables_glm(quick, repeats):
    """chi_square, fisher_exact, logistic and poisson_glm (100 per arm), complete and 20% MCAR,
    against the loop a user writes: scipy ``chi2_contingency`` / ``fisher_exact`` on the 2x2 table,
    statsmodels ``GLM`` (binomial; Poisson with the log-exposure offset) on the observed rows."""
    import statsmodels.api as sm
    from scipy import stats

    from simpower.registry import build

    reps = 4_000 if quick else 40_000
    small, large = (40, 200) if quick else (300, 2_000)

    def table(tab):
        ok = np.isfinite(tab["y"])
        y, arm = tab["y"][ok], tab["arm"][ok]
        x1, n1 = y[arm == 1].sum(), np.sum(arm == 1)
        x0, n0 = y[arm == 0].sum(), np.sum(arm == 0)
        return [[x1, n1 - x1], [x0, n0 - x0]]

    def chi2(tab):
        return stats.chi2_contingency(table(tab)).pvalue, None

    def fisher(tab):
        return stats.fisher_exact(table(tab)).pvalue, None

    def glm(family, offset=False):
        def f(tab):
            ok = np.isfinite(tab["y"])
            exog = sm.add_constant(np.asarray(tab["arm"], float)[ok])
            kw = {"offset": np.log(tab["exposure"][ok])} if offset else {}
            fit = sm.GLM(tab["y"][ok], exog, family=family, **kw).fit()
            return fit.pvalues[1], fit.params[1]
        return f

    mcar = {"missing": {"type": "mcar", "rate": 0.2}}
    binary = {"type": "binary_two_arm", "n": 100, "p0": 0.3, "odds_ratio": 1.8}
    count = {"type": "count_two_arm", "n": 100, "rate0": 1.2, "rate_ratio": 0.8}
    cases = []
    for suffix, label, extra in (("", "complete", {}), ("m", "20% MCAR", mcar)):
        b, c = build("process", {**binary, **extra}), build("process", {**count, **extra})
        cases += [
            (f"q1{suffix}", f"chi-square ({label}): batch vs chi2_contingency", b,
             build("analysis", {"type": "chi_square"}), large, chi2),
            (f"q2{suffix}", f"Fisher exact ({label}): batch vs fisher_exact", b,
             build("analysis", {"type": "fisher_exact"}), large, fisher),
            (f"q3{suffix}", f"logistic ({label}): batch vs statsmodels GLM", b,
             build("analysis", {"type": "logistic"}), small, glm(sm.families.Binomial())),
            (f"q4{suffix}", f"Poisson GLM ({label}): batch vs statsmodels GLM", c,
             build("analysis", {"type": "poisson_glm"}), small, glm(sm.families.Poisson(), offset=True)),
        ]
    return _library_rows(cases, reps, max(repeats, 3))


ROWS = {"a": bench_ttest, "b": bench_mixed, "c": bench_mann_whitney, "d": bench_jobs, "e": bench_memory,
        "m": bench_missing, "x": bench_crossover, "o": bench_ordinal, "h": bench_glmm, "s": bench_stepped,
        "i": bench_mmrm, "g": bench_gee, "k": bench_cox, "n": bench_negbin, "r": bench_resampling,
        "u": bench_pilot_units, "t": bench_groupseq_events, "l": bench_logrank, "q": bench_tables_glm}


def machine():
    import scipy
    import statsmodels

    try:
        load = os.getloadavg()
    except OSError:
        load = (math.nan,) * 3
    return {"python": platform.python_version(), "numpy": np.__version__, "scipy": scipy.__version__,
            "statsmodels": statsmodels.__version__, "simpower": sp.__version__, "cpus": os.cpu_count(),
            "platform": platform.platform(), "load_average_at_start": load}


def fmt_rate(v):
    if v is None or not isinstance(v, (int, float)) or not math.isfinite(v):
        return "-"
    return f"{v:,.0f}/s" if v >= 10 else f"{v:.2f}/s"


def print_table(rows, stream=sys.stdout):
    head = f"{'row':<4} {'measure':<54} {'ours':>13} {'reference':>13} {'ratio':>9} {'target':>8}  verdict"
    print(head, file=stream)
    print("-" * len(head), file=stream)
    for r in rows:
        ratio = r.get("ratio")
        ratio_s = "-" if ratio is None or not math.isfinite(ratio) else f"{ratio:.3g}"
        tgt = r.get("target")
        if r["row"].startswith("e"):
            tgt_s, ours_s, ref_s = f"<= {tgt:g}", "", ""
        else:
            tgt_s = "-" if tgt is None else f">= {tgt:g}"
            ours_s, ref_s = fmt_rate(r.get("ours_per_s")), fmt_rate(r.get("reference_per_s"))
        meets = r.get("meets")
        verdict = "not available" if meets is None and ratio is None else ("meets" if meets else "MISSES")
        print(f"{r['row']:<4} {r['measure']:<54} {ours_s:>13} {ref_s:>13} {ratio_s:>9} {tgt_s:>8}  {verdict}",
              file=stream)
    print(file=stream)
    for r in rows:
        if r.get("note"):
            print(f"  {r['row']}: {r['note']}", file=stream)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true", help="small sizes (a smoke run, not a measurement)")
    ap.add_argument("--only", default="a,b,c,d,e,m,o,x,h,i,g,k,n,l,q", help="comma-separated rows to run, from " + ",".join(ROWS))
    ap.add_argument("--json", default=None, help="write the rows and machine facts to this JSON file")
    ap.add_argument("--repeats", type=int, default=None, help="timing repeats per rate (best is kept)")
    args = ap.parse_args(argv)
    wanted = [s.strip() for s in args.only.split(",") if s.strip()]
    bad = [w for w in wanted if w not in ROWS]
    if bad:
        ap.error(f"--only: unknown row {bad[0]!r}; valid: {', '.join(ROWS)}")
    repeats = args.repeats or (1 if args.quick else 3)
    info = machine()
    if info["load_average_at_start"][0] > 0.5:
        print(f"note: load average {info['load_average_at_start'][0]:.2f} at start: the machine is not idle, "
              "the figures are indicative only", file=sys.stderr)
    rows = []
    t0 = time.perf_counter()
    for key in wanted:
        t1 = time.perf_counter()
        rows.extend(ROWS[key](args.quick, repeats))
        print(f"[{key}] done in {time.perf_counter() - t1:.1f} s", file=sys.stderr)
    info["seconds"] = time.perf_counter() - t0
    info["quick"] = args.quick
    print_table(rows)
    if args.json:
        Path(args.json).write_text(json.dumps({"machine": info, "rows": rows}, indent=2, default=str))
    return 0


if __name__ == "__main__":
    sys.exit(main())
