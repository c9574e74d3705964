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
m. missing and complete outcomes, 100 per arm, one job: each analysis whose batch path takes
   missing outcomes, with 20% MCAR outcomes (m01-m14) and on the same process with complete data
   (m01c-m14c), through ``simpower.run``, against a plain per-replicate loop calling scipy /
   statsmodels (array API, no formula) on the observed values of the same kind of data (tables drawn
   before timing, so the loop is timed on its calls alone). Interleaved rounds (engine, loop, bare
   draw, ...); the ratio is of the median rates. Each row also times the process's bare ``draw_batch``
   at the engine's chunk sizes: its *ceiling* = draw rate / loop rate is the ratio no analysis
   speed-up can pass; a row under target whose ceiling is under target too says "bounded by drawing
   the data". Each row checks, on the loop's replicates, that the batch path's decisions at 0.05
   agree with the library's on >= 99.9% of them and reports the largest relative difference of the
   estimates (rows whose library gives no estimate compare decisions only). Target >= 50 x (issue
   12).
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
   decisions at 0.05 identical. Interleaved rounds (engine, loop, statsmodels, ...), median rates, the
   load average in the note. Target >= 50 x (i1).
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
   k3 (``--only k3``): the cluster-robust Cox model (``cox``, ``cov_type = "cluster"``: Lin-Wei sandwich
   grouped by cluster), 20 clinics of 10 per arm, ICC 0.05, hazard ratio 0.7, k3a complete and k3b with
   20% of the times missing (NaN, hidden here: the layer has no ``missing`` field). The batch path on
   pre-drawn batches against a plain loop of statsmodels ``PHReg(time, arm, status=event).fit(groups=
   cluster)`` on the same replicates (rows without a time and rows censored before the first event
   dropped first: statsmodels gives those a NaN score residual), interleaved rounds, median times. Checks
   on the loop's replicates that estimates and robust SEs agree to 1e-6 relative and the decisions at 0.05
   on >= 99.9%. Target >= 50 x.
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
   rounds, median rates; decisions at 0.05 checked on the loop's replicates. Target >= 50 x. The note
   adds the draw-only ceiling: ``draw_batch`` of the same process in the engine's chunks, timed
   interleaved with the same loop (what the row could reach if the analysis took no time).
q. 2x2 tables and GLMs, 100 per arm, complete (q1-q4) and 20% MCAR (q1m-q4m): chi_square and
   fisher_exact against ``scipy.stats.chi2_contingency`` / ``fisher_exact`` on the observed 2x2 table,
   logistic and poisson_glm against statsmodels ``GLM`` (binomial; Poisson with the log-exposure
   offset) on the observed rows. Same timing and checks as row l. Target >= 50 x.
w. rank tests, 100 per arm (one sample of 100 for the signed rank), complete and with 20% MCAR
   outcomes: w1/w2 ``mann_whitney`` (estimand 'none': U and p, like scipy), w3/w4 ``mann_whitney``
   (default: + Hodges-Lehmann shift and CI), w5/w6 ``wilcoxon_signed_rank`` (+ pseudo-median and
   CI), each through ``simpower.run`` with one job against a plain loop of
   ``scipy.stats.mannwhitneyu`` / ``wilcoxon`` (asymptotic) on the observed values of tables drawn
   before timing (scipy gives U and p only, so w3-w6 do more than the loop). Interleaved rounds,
   median rates. The ceiling column: the process's bare draw rate (``draw_batch`` in the engine's
   chunk sizes) over the loop rate, the ratio the engine would reach if the analysis cost nothing.
   Checks on the loop's replicates: decisions at 0.05 agree on >= 99.9%; the estimates equal the
   median of all pairwise differences / Walsh averages (numpy, untimed) to 1e-12. Target >= 50 x.
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
r. permutation_test and bootstrap_ci (percentile, BCa), 1999 resamples, 50 per arm: the batch path through
   ``simpower.run`` against the loop of ``scipy.stats.permutation_test`` / ``bootstrap`` seeded as the
   analysis seeds each replicate, so the answers are identical (checked). Reproducing scipy's draws bounds
   the speed: r1c-r3c time numpy drawing those resampling indices alone (no statistic) against the same
   scipy loop, the ceiling of any path that gives scipy's answers. Target >= 50 x.
f, p, v, y, z. the analyses the rows above left out, each through ``simpower.run`` (one job, serial) against
   the plain per-replicate loop a user writes, on tables drawn before timing, complete and with 20% MCAR
   outcomes (suffix ``m``); interleaved rounds, median rates. Each row checks on the loop's replicates that
   the decisions at 0.05 agree (>= 99.9%; 99.5% against statsmodels' iterative fits, as x2) and the
   estimates (1e-6 relative; 1e-4 absolute for mixed models, on the fits statsmodels did not warn about).
   Where the engine has no batch path for a case it takes the per-replicate path and the note says so.
   Each note also gives the rate of drawing the engine's data alone (its chunk sizes, no analysis): the
   ceiling of the ratio against a cheap loop.
   f: two_proportions and dichotomised (cut at 2 of an ordinal outcome) vs statsmodels
   ``proportions_ztest`` on the observed counts; posterior_probability, beta-binomial (``integrate.quad``
   of the two ``stats.beta`` posteriors) and normal (the conjugate update with ``stats.norm``).
   p: anova_f vs ``scipy.stats.f_oneway``; dunnett vs ``scipy.stats.dunnett`` (3 arms of 60), whose
   p-values come from randomised quasi-Monte Carlo (``multivariate_t.cdf``, abs. tolerance 1e-5): library
   p-values within 1e-4 of 0.05 are left out of the decision check and counted in the note.
   v: final_visit_t (4 visits, 100 per arm) and cluster_means_t (10 + 10 clusters of 20) vs
   ``ttest_ind`` on the last visit's observed values / the observed cluster means; crossover_tost (log
   scale, 0.80-1.25) vs two one-sided ``ttest_ind`` on the period differences; crossover_t and
   crossover_mixed without dropout (v4, v5; row x has 10% dropout); mixed_model, sw_mixed and cox with 20%
   MCAR outcomes (v6m-v8m) vs statsmodels ``MixedLM`` / ``PHReg``.
   y: group_sequential with z-test looks (100 per arm, 3 looks, O'Brien-Fleming-type spending) vs a loop
   computing each look's z and its p-value with ``scipy.stats.norm`` against the same nominal levels.
   z: the analyses of row m on the same processes without missingness (z01-z14), same library loops.
   ``COVERAGE`` (below ``ROWS``) maps every registered analysis to its rows; tests/test_benchmark_coverage.py
   fails when a registered analysis has none. Target >= 50 x.
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
    "k3_reps": (200, 2_000),
    "k3_loop": (10, 100),
    "r_reps": (400, 4_000),
    "r_loop": (40, 200),
    "u_reps": (1_000, 10_000),
    "u_loop": (20, 200),
    "w_reps": (4_000, 40_000),
    "w_loop": (200, 2_000),
    "f_reps": (4_000, 40_000),
    "f_loop": (200, 2_000),
    "p_reps": (4_000, 40_000),
    "p_loop": (200, 2_000),
    "v_reps": (2_000, 20_000),
    "v_loop": (200, 2_000),
    "v_fits": (20, 200),
    "y_reps": (4_000, 40_000),
    "y_loop": (200, 2_000),
    "z_reps": (4_000, 40_000),
    "z_loop": (200, 2_000),
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


def _missing_cases(missing=True):
    """(key, label, process, analysis, library function table -> (p, estimate or None)).

    ``missing``: 20% MCAR outcomes (keys m01-m14); False: the same processes with complete data
    (keys m01c-m14c)."""
    import statsmodels.api as sm
    from scipy import stats

    mcar = sp.MCAR(rate=0.2) if missing else None
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
    cases = [
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
    return cases if missing else [(c[0] + "c",) + c[1:] for c in cases]


def bench_missing(quick, repeats):
    """Rows m01-m14 (20% MCAR outcomes) and m01c-m14c (the same processes, complete data), each with
    its ceiling: the bare ``draw_batch`` rate of the process at the engine's chunk sizes over the
    loop's rate, the ratio no analysis speed-up can pass."""
    import statistics

    from simpower.analyses.base import as_batch_result
    from simpower.engine.runner import default_chunk_size

    reps, loop = (SIZES["m_reps"][0], SIZES["m_loop"][0]) if quick else (SIZES["m_reps"][1], SIZES["m_loop"][1])
    rounds = max(repeats, 3)
    target = 50.0
    rows = []
    cases = [c for pair in zip(_missing_cases(True), _missing_cases(False)) for c in pair]
    for key, label, proc, an, lib in cases:
        sc = sp.Scenario(proc, an)
        res = sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False)
        name = f"{'missing 20%' if not key.endswith('c') else 'complete'}: {label}"
        if res.paths[sc.primary] != "batch":
            rows.append({"row": key, "measure": name, "ratio": None, "target": target, "meets": None,
                         "note": f"not available (the engine took the {res.paths[sc.primary]} path)"})
            continue
        batch = proc.draw_batch(np.random.default_rng(7), loop)
        tables = [batch.replicate(i) for i in range(loop)]
        sizes = chunks(reps, default_chunk_size(sc))
        ref = []

        def library_loop():
            ref.clear()
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                for tab in tables:
                    ref.append(lib(tab))

        def bare_draw():
            rng = np.random.default_rng(3)
            for size in sizes:
                proc.draw_batch(rng, size)

        times = {"engine": [], "loop": [], "draw": []}
        for _ in range(rounds):                    # interleaved: engine, loop, draw, engine, loop, draw, ...
            for what, fn in (("engine", lambda: sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False)),
                             ("loop", library_loop), ("draw", bare_draw)):
                t0 = time.perf_counter()
                fn()
                times[what].append(time.perf_counter() - t0)
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
        draw = reps / statistics.median(times["draw"])
        ceiling = draw / lib_rate
        if engine / lib_rate >= target:
            bound = ""
        elif ceiling < target:
            bound = f"; bounded by drawing the data (ceiling {ceiling:.3g} x < {target:g} x)"
        else:
            bound = f"; bounded by the analysis (the engine runs at {engine / draw:.0%} of the draw rate)"
        note = (f"{reps} reps, loop {loop}, median of {rounds} interleaved rounds; ceiling = draw {draw:,.0f}/s "
                f"/ loop = {ceiling:.3g} x{bound}; on the loop's replicates: same decision {same:.2%}, {est_note}; "
                f"{'answers agree' if ok else 'ANSWERS DIFFER'}")
        out = row(key, name, engine, lib_rate, target, note=note, decision_agreement=same,
                  max_rel_estimate_difference=d_est, answers_agree=ok, draw_per_s=draw, ceiling=ceiling,
                  bounded_by_draw=bool(engine / lib_rate < target and ceiling < target))
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
    import os
    import statistics

    import statsmodels.api as sm

    from simpower.analyses.mmrm import MMRM

    pick = 0 if quick else 1
    reps, loop, n_sm = SIZES["i_reps"][pick], SIZES["i_loop"][pick], SIZES["i_statsmodels"][pick]
    proc = sp.RepeatedMeasures(n=100, visits=4, rho=0.5, effect=0.3, dropout_rate=0.2)
    an = MMRM()
    sc = sp.Scenario(proc, an)
    res = sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False)
    assert res.paths["mmrm"] == "batch"

    batch = proc.draw_batch(np.random.default_rng(9), loop)
    tables = [batch.replicate(i) for i in range(loop)]
    ours = an.batch(batch)
    per = []

    def per_replicate_loop():
        per.clear()
        for tab in tables:
            per.append(an(tab))

    def statsmodels_loop():
        for tab in tables[:n_sm]:
            ok = np.isfinite(tab["y"])
            v, a = tab["visit"][ok], tab["arm"][ok]
            X = np.column_stack([c for j in range(4) for c in ((v == j), (v == j) & (a == 1))]).astype(float)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                sm.MixedLM(tab["y"][ok], X, groups=tab["subject"][ok]).fit(reml=True)

    an(tables[0])                                   # first-call imports outside the timing
    rounds = max(repeats, 3)
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    times = {"engine": [], "loop": [], "statsmodels": []}
    for _ in range(rounds):                        # interleaved: engine, loop, statsmodels, engine, ...
        for key, fn in (("engine", lambda: sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False)),
                        ("loop", per_replicate_loop), ("statsmodels", statsmodels_loop)):
            t0 = time.perf_counter()
            fn()
            times[key].append(time.perf_counter() - t0)
    engine = reps / statistics.median(times["engine"])
    loop_rate = loop / statistics.median(times["loop"])
    sm_rate = n_sm / statistics.median(times["statsmodels"])
    est = np.array([r.estimate for r in per])
    p_loop = np.array([r.pvalue for r in per])
    d_est = float(np.max(np.abs(ours.estimate - est) / np.abs(est)))
    same = bool(np.all((ours.pvalue <= 0.05) == (p_loop <= 0.05)))
    agree = d_est < 1e-6 and same
    note = (f"power {res.power:.3f} (MCSE {res.mcse:.3f}); {reps} reps, loop {loop}, statsmodels {n_sm}; median of "
            f"{rounds} interleaved rounds, load average {load:.2f} before timing; on the loop's replicates: max rel. "
            f"estimate difference {d_est:.1e}, decisions {'identical' if same else 'DIFFER'}; "
            f"{'answers agree' if agree else 'ANSWERS DIFFER'}")
    out = row("i1", "MMRM: batch vs per-replicate REML loop", engine, loop_rate, 50.0, note=note,
              max_rel_estimate_difference=d_est, answers_agree=agree, load_average=load)
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

        # batch, scipy loop and the draws alone timed in interleaved rounds (median), so all three bear the same load
        t_ours, t_theirs, t_draws = _medians([lambda: sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False),
                                              library_loop, draws_only], max(repeats, 3))
        ours, theirs, ceiling = reps / t_ours, loop / t_theirs, loop / t_draws
        out = an.batch(first)
        got = (np.column_stack([out.pvalue, out.estimate, np.full(loop, np.nan)]) if an.name == "permutation_test"
               else np.column_stack([np.full(loop, np.nan), out.ci_low, out.ci_high]))
        ok = bool(np.array_equal(got, ref, equal_nan=True))
        note = (f"{reps} reps through simpower.run (batch, chunks of {BATCH_CHUNK}), scipy loop {loop}, median of "
                f"{max(repeats, 3)} interleaved rounds (batch, loop, draws alone); on the "
                f"loop's replicates the {'p-values and estimates' if an.name == 'permutation_test' else 'CIs'} "
                f"are {'identical' if ok else 'DIFFERENT'}; power {res.power:.3f}; the same random draws alone "
                f"(each replicate's own stream, as scipy draws them) run at {ceiling:,.0f}/s, a ceiling of "
                f"{ceiling / theirs:.3g} x")
        r = row(key, f"{label}: batch vs scipy loop", ours, theirs, 50.0, note=note, answers_agree=ok)
        r["meets"] = bool(r["meets"] and ok)
        rows.append(r)
        # the bound as a row of its own: no path that gives scipy's answers can beat drawing scipy's numbers
        rows.append(row(f"{key}c", f"{key}'s ceiling: numpy draws alone vs scipy loop", ceiling, theirs, None,
                        note=(f"numpy alone drawing the resampling indices scipy draws per replicate (its own "
                              f"stream, same calls and sizes), no statistic: {ceiling:,.0f}/s against the scipy "
                              f"loop's {theirs:,.0f}/s; the batch path runs at {ours / ceiling:.0%} of it")))
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


# -- (k3) cluster-robust Cox -------------------------------------------------------------------
def bench_cox_robust(quick, repeats):
    """``cox`` with ``cov_type = "cluster"`` (batch) against statsmodels ``PHReg.fit(groups=)``, complete and 20% missing."""
    from statsmodels.duration.hazard_regression import PHReg

    from simpower import registry
    from simpower.analyses.base import as_batch_result

    reps, loop = (SIZES["k3_reps"][0], SIZES["k3_loop"][0]) if quick else (SIZES["k3_reps"][1], SIZES["k3_loop"][1])
    proc = registry.build("process", {
        "type": "trial", "design": {"type": "clusters", "clusters": 20, "cluster_size": 10, "icc": 0.05},
        "outcome": {"type": "time_to_event", "median": 10.0, "hazard_ratio": 0.7, "follow_up": 16.0}})
    an = registry.build("analysis", {"type": "cox", "cov_type": "cluster"})
    out = []
    for key, rate in (("k3a", 0.0), ("k3b", 0.2)):
        batch = proc.draw_batch(np.random.default_rng(31), reps)
        if rate:
            time_ = np.array(batch.per_rep["time"], float)
            time_[np.random.default_rng(32).random(time_.shape) < rate] = np.nan
            batch = sp.Batch(batch.size, {**batch.per_rep, "time": time_}, batch.shared, {**batch.info, "missing": True})
        if not an.supports_batch(batch):
            out.append({"row": key, "measure": "robust Cox: batch path not available", "ratio": None, "target": 50.0,
                        "meets": None, "note": "the batch path does not take this batch"})
            continue
        tables = []
        for i in range(loop):
            r = batch.replicate(i)
            tables.append((np.asarray(r["time"], float), r["event"].astype(float), r["arm"].astype(float),
                           r["cluster"]))
        est_sm, se_sm, p_sm = np.empty(loop), np.empty(loop), np.empty(loop)

        def library_loop():
            for i, (t, e, a, c) in enumerate(tables):
                keep = ~np.isnan(t)
                t, e, a, c = t[keep], e[keep], a[keep], c[keep]
                keep = t >= t[e == 1].min()  # censored before the first event: NaN score residual in PHReg
                fit = PHReg(t[keep], a[keep][:, None], status=e[keep]).fit(groups=c[keep])
                est_sm[i], se_sm[i], p_sm[i] = fit.params[0], fit.bse[0], fit.pvalues[0]

        t_ours, t_lib = _interleaved(lambda: an.batch(batch), library_loop, max(repeats, 3))
        ours = as_batch_result(an.batch(batch))
        same = float(np.mean((ours.pvalue[:loop] <= 0.05) == (p_sm <= 0.05)))
        d_est = float(np.max(np.abs(ours.estimate[:loop] - est_sm) / np.maximum(np.abs(est_sm), 1e-3)))
        d_se = float(np.max(np.abs(ours.se[:loop] - se_sm) / se_sm))
        ok = same >= 0.999 and d_est < 1e-6 and d_se < 1e-6
        miss = f", {rate:.0%} of times missing" if rate else ", complete"
        short = f"{rate:.0%} missing" if rate else "complete"
        note = (f"20 clinics of 10 per arm, ICC 0.05, HR 0.7{miss}; batch of {reps} vs loop of {loop} (analysis "
                f"time only, interleaved, median of {max(repeats, 3)}); on the loop's replicates: same decision "
                f"{same:.2%}, max rel. difference estimate {d_est:.1e}, robust SE {d_se:.1e}; "
                f"{'answers agree' if ok else 'ANSWERS DIFFER'}")
        o = row(key, f"robust Cox vs PHReg fit(groups=), {short}", reps / t_ours, loop / t_lib, 50.0,
                note=note, decision_agreement=same, max_rel_estimate_difference=d_est, max_rel_se_difference=d_se,
                answers_agree=ok)
        o["meets"] = bool(o["meets"] and ok)
        out.append(o)
    return out


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
    rows = _library_rows(cases, reps, max(repeats, 3))
    # the ceiling: drawing the same process alone (the engine's chunks, a generator each) against the same loop
    for out, (_, _, proc, _, _, _) in zip(rows, cases):
        if out.get("ratio") is None:
            continue
        drawn = proc.draw_batch(np.random.default_rng(7), loop)
        tables = [drawn.replicate(i) for i in range(loop)]

        def draw_only(proc=proc):
            for k, size in enumerate(chunks(reps)):
                proc.draw_batch(np.random.default_rng(k), size)

        def library_loop(tables=tables):
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                for tab in tables:
                    lib(tab)

        t_draw, t_loop = _interleaved(draw_only, library_loop, max(repeats, 3))
        ceiling = (reps / t_draw) / (loop / t_loop)
        out["draw_ceiling"] = ceiling
        out["note"] += (f"; drawing the same data alone (no analysis) runs at {ceiling:.3g} x the loop (interleaved "
                        f"with it): the ceiling of this row")
    return rows


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


def bench_rank_tests(quick, repeats):
    """Rank tests complete and with 20% MCAR outcomes, against the scipy loop, with the draw-only ceiling."""
    from scipy import stats

    from simpower.analyses.base import as_batch_result

    reps, loop = (SIZES["w_reps"][0], SIZES["w_loop"][0]) if quick else (SIZES["w_reps"][1], SIZES["w_loop"][1])
    rounds = max(repeats, 3)
    run = dict(reps=reps, seed=1, n_jobs=1, progress=False)

    def mw(tab):
        y0, y1 = _observed_arms(tab)
        return stats.mannwhitneyu(y1, y0, method="asymptotic").pvalue

    def wsr(tab):
        return stats.wilcoxon(tab["y"][np.isfinite(tab["y"])], method="asymptotic").pvalue

    def shift(tab):
        y0, y1 = _observed_arms(tab)
        return np.median(np.subtract.outer(y1, y0))

    def pseudo_median(tab):
        y = tab["y"][np.isfinite(tab["y"])]
        i, j = np.triu_indices(y.size)
        return np.median(0.5 * (y[i] + y[j]))

    rows = []
    for rate, suffix in ((0.0, "complete"), (0.2, "20% MCAR")):
        miss = {"missing": sp.MCAR(rate=rate)} if rate else {}
        two, one = sp.TwoArm(n=100, effect=0.3, **miss), sp.NormalOneSample(n=100, effect=0.2, **miss)
        odd = 0 if rate == 0 else 1
        cases = [(f"w{1 + odd}", "mann_whitney (U and p, like scipy)", two, sp.MannWhitney(estimand="none"), mw, None),
                 (f"w{3 + odd}", "mann_whitney (+ Hodges-Lehmann shift, CI)", two, sp.MannWhitney(), mw, shift),
                 (f"w{5 + odd}", "wilcoxon_signed_rank (+ pseudo-median, CI)", one, sp.WilcoxonSignedRank(), wsr,
                  pseudo_median)]
        for key, label, proc, an, lib, est_ref in cases:
            sc = sp.Scenario(proc, an)
            name = f"{label}, {suffix}"
            res = sp.run(sc, **run)   # warm-up: numba compile or cache load
            if res.paths[sc.primary] != "batch":
                rows.append({"row": key, "measure": name, "ratio": None, "target": 50.0, "meets": None,
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

            def draw_only():
                rng = np.random.default_rng(1)
                for size in chunks(reps):
                    proc.draw_batch(rng, size)

            t_engine, t_loop = _interleaved(lambda: sp.run(sc, **run), library_loop, rounds)
            draw_rate = best_rate(draw_only, reps, rounds)
            ours = as_batch_result(an.batch(batch))
            p_lib = np.array(ref, float)
            same = float(np.mean((np.asarray(ours.pvalue) <= 0.05) == (p_lib <= 0.05)))
            d_p = float(np.nanmax(np.abs(ours.pvalue - p_lib) / np.maximum(p_lib, 1e-300)))
            d_est = None
            if est_ref is not None:
                want = np.array([est_ref(t) for t in tables])
                d_est = float(np.max(np.abs(ours.estimate - want)))
            ok = same >= 0.999 and (d_est is None or d_est <= 1e-12)
            loop_rate = loop / t_loop
            note = (f"{reps} reps, loop {loop}, median of {rounds} interleaved rounds; draw only {draw_rate:,.0f}/s "
                    f"(ceiling {draw_rate / loop_rate:.0f} x); on the loop's replicates: same decision {same:.2%}, "
                    f"max rel. p-value difference {d_p:.1e}"
                    + ("" if d_est is None else f", max abs. estimate difference {d_est:.1e}")
                    + f"; {'answers agree' if ok else 'ANSWERS DIFFER'}")
            out = row(key, name, reps / t_engine, loop_rate, 50.0, note=note, decision_agreement=same,
                      draw_only_per_s=draw_rate, ceiling=draw_rate / loop_rate, max_abs_estimate_difference=d_est,
                      answers_agree=ok)
            out["meets"] = bool(out["meets"] and ok)
            rows.append(out)
    return rows




# -- (f, p, v, y, z) the analyses the rows above leave out: engine vs the plain library loop -----------
def _answers(an, batch):
    """The analysis's answers on ``batch``: its batch path where it has one for this batch, else its
    per-replicate path replicate by replicate (p-value and estimate arrays, and which path)."""
    from simpower.analyses.base import as_batch_result, as_test_result

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        if an.supports_batch(batch):
            out = as_batch_result(an.batch(batch))
            est = out.estimate if out.estimate is not None else np.full(batch.size, np.nan)
            return np.asarray(out.pvalue, float), np.asarray(est, float), "batch"
        res = [as_test_result(an(batch.replicate(i))) for i in range(batch.size)]
    est = [np.nan if r.estimate is None else r.estimate for r in res]
    return np.array([r.pvalue for r in res], float), np.array(est, float), "per-replicate"


def _medians(fns, rounds):
    """Median seconds of each of ``fns`` over ``rounds`` interleaved rounds (each round calls every one once)."""
    import statistics

    times = [[] for _ in fns]
    for _ in range(rounds):
        for fn, t in zip(fns, times):
            t0 = time.perf_counter()
            fn()
            t.append(time.perf_counter() - t0)
    return [statistics.median(t) for t in times]


def _gap_rows(cases, reps, rounds, target=50.0):
    """One row per case: ``simpower.run`` (one job, serial) against the plain library loop on tables drawn
    before timing, interleaved rounds, median times. A case is a dict with ``key``, ``label``, ``process``,
    ``analysis``, ``loop`` (its size), ``lib`` (table -> (p-value, estimate or None[, whether the library's fit
    ran clean, i.e. without warnings: estimates are compared on clean fits only, as row b does])) and optionally
    ``band`` (library p-values within ``band`` of 0.05 may decide otherwise: a library whose p-value is
    itself an approximation, e.g. scipy's randomised quasi-Monte Carlo in ``dunnett``), ``est_tol``
    (relative, default 1e-6; absolute with ``est_abs``), ``est_map`` (maps our estimate to the library's
    scale) and ``min_agree`` (default 0.999; 0.995 where the library stops an iterative fit at its own
    default tolerance, as in row x2).

    On the loop's replicates the decisions at 0.05 must agree on >= ``min_agree`` (outside ``band``) and the
    estimates to ``est_tol``. When the engine has no batch path for the case (it then takes the
    per-replicate path), the engine runs as many replicates as the loop and the note says so."""
    run = dict(seed=1, n_jobs=1, progress=False, backend="serial")
    rows = []
    for case in cases:
        key, label, proc, an, loop, lib = (case[k] for k in ("key", "label", "process", "analysis", "loop", "lib"))
        sc = sp.Scenario(proc, an)
        first = sp.run(sc, reps=min(reps, 200), **run)
        path = first.paths[sc.primary]
        n_engine = reps if path == "batch" else loop
        batch = proc.draw_batch(np.random.default_rng(7), loop)
        tables = [batch.replicate(i) for i in range(loop)]
        ref = []

        def library_loop():
            ref.clear()
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                for tab in tables:
                    ref.append(lib(tab))

        res = {}

        def engine():
            res["r"] = sp.run(sc, reps=n_engine, **run)

        # what bounds a fast loop's ratio: drawing the engine's data alone, in its chunk sizes (no analysis)
        t_engine, t_loop, t_draw = _medians(
            [engine, library_loop, lambda: [proc.draw_batch(np.random.default_rng(1), n) for n in chunks(n_engine)]],
            rounds)
        p_ours, est_ours, checked_path = _answers(an, batch)
        p_lib = np.array([r[0] for r in ref], float)
        band = case.get("band", 0.0)
        outside = ~(np.abs(p_lib - 0.05) < band)
        agree = (p_ours <= 0.05) == (p_lib <= 0.05)
        same = float(np.mean(agree[outside]))
        near = int(np.sum(~agree & ~outside))
        fin = np.isfinite(p_lib) & np.isfinite(p_ours)
        d_p = float(np.max(np.abs(p_ours[fin] - p_lib[fin]))) if fin.any() else math.nan
        tol = case.get("est_tol", 1e-6)
        if ref[0][1] is not None:
            est_lib = np.array([r[1] for r in ref], float)
            mine = case.get("est_map", lambda v: v)(est_ours)
            clean = np.array([len(r) < 3 or bool(r[2]) for r in ref])  # a third item: the library's fit was clean
            fe = np.isfinite(est_lib) & np.isfinite(mine) & clean
            if case.get("est_abs"):
                d_est = float(np.max(np.abs(mine[fe] - est_lib[fe])))
                est_note = f"max |estimate difference| {d_est:.1e} (outcome SD 1)"
            if not clean.all():
                est_note += f" on the {int(fe.sum())} fits the library did not warn about"
            else:
                d_est = float(np.max(np.abs(mine[fe] - est_lib[fe]) / np.maximum(np.abs(est_lib[fe]), 1e-3)))
                est_note = f"max rel. estimate difference {d_est:.1e}"
        else:
            d_est, est_note = None, "no library estimate (decisions only)"
        ok = same >= case.get("min_agree", 0.999) and (d_est is None or d_est < tol)
        band_note = (f" ({int((~outside).sum())} library p-values within {band:g} of 0.05 left out of the "
                     f"decision check, {near} of them decided otherwise)" if band else "")
        path_note = ("" if path == "batch" else
                     f"; the engine has no batch path here and took the {path} path ({n_engine} reps)")
        draw_rate = n_engine / t_draw
        note = (f"{n_engine} reps, loop {loop}, median of {rounds} interleaved rounds; power "
                f"{res['r'].power:.3f}{path_note}; drawing the data alone runs at {draw_rate:,.0f}/s, a ceiling "
                f"of {draw_rate * t_loop / loop:.3g} x (the engine reaches {n_engine / t_engine / draw_rate:.0%} "
                f"of it); on the loop's replicates ({checked_path} path): same decision "
                f"{same:.2%}{band_note}, max |p-value difference| {d_p:.1e}, {est_note}; "
                f"{'answers agree' if ok else 'ANSWERS DIFFER'}")
        out = row(key, label, n_engine / t_engine, loop / t_loop, target, note=note, decision_agreement=same,
                  max_abs_pvalue_difference=d_p, max_rel_estimate_difference=d_est, answers_agree=ok, path=path,
                  draw_only_per_s=draw_rate)
        out["meets"] = bool(out["meets"] and ok)
        rows.append(out)
    return rows


def _sizes(key, quick):
    return SIZES[key][0 if quick else 1]


def _arms_observed(tab, y=None):
    y = tab["y"] if y is None else y
    ok = np.isfinite(y)
    return y[ok & (tab["arm"] == 0)], y[ok & (tab["arm"] == 1)]


def bench_binary_bayes(quick, repeats):
    """two_proportions, dichotomised and posterior_probability (beta-binomial and normal), 100 per arm, complete
    and 20% MCAR, against the loop a user writes: statsmodels ``proportions_ztest`` on the observed counts; the
    same on the outcomes cut at 2; a scipy ``integrate.quad`` of the two Beta posteriors (``stats.beta``) and the
    conjugate normal posterior with ``stats.norm``, per replicate."""
    from scipy import integrate, stats
    from statsmodels.stats.proportion import proportions_ztest

    from simpower.registry import build

    reps, loop = _sizes("f_reps", quick), _sizes("f_loop", quick)

    def ztest(y0, y1):
        z, p = proportions_ztest([y1.sum(), y0.sum()], [y1.size, y0.size])  # pooled SE under H0
        return p, y1.mean() - y0.mean()

    def two_props(tab):
        return ztest(*_arms_observed(tab))

    def dichot(tab):
        y0, y1 = _arms_observed(tab)
        return ztest((y0 >= 2).astype(float), (y1 >= 2).astype(float))

    beta_an = build("analysis", {"type": "posterior_probability", "model": "beta_binomial", "eta": 0.95})
    normal_an = build("analysis", {"type": "posterior_probability", "model": "normal", "eta": 0.975,
                                   "prior_mean": 0.0, "prior_sd": 1.0})

    def beta_post(tab):  # P(p1 - p0 > 0 | data), uniform priors: the integral a user writes
        y0, y1 = _arms_observed(tab)
        a0, b0, a1, b1 = 1 + y0.sum(), 1 + y0.size - y0.sum(), 1 + y1.sum(), 1 + y1.size - y1.sum()
        prob = integrate.quad(lambda p: stats.beta.pdf(p, a0, b0) * stats.beta.sf(p, a1, b1), 0.0, 1.0)[0]
        return (0.0 if prob > 0.95 else 1.0), a1 / (a1 + b1) - a0 / (a0 + b0)

    def normal_post(tab):  # conjugate normal update of the mean difference (pooled SD plugged in), prior N(0, 1)
        y0, y1 = _arms_observed(tab)
        d = y1.mean() - y0.mean()
        s2 = (((y0 - y0.mean()) ** 2).sum() + ((y1 - y1.mean()) ** 2).sum()) / (y0.size + y1.size - 2)
        v = 1.0 / (1.0 + 1.0 / (s2 * (1 / y0.size + 1 / y1.size)))
        mean = v * d / (s2 * (1 / y0.size + 1 / y1.size))
        prob = stats.norm.sf(0.0, loc=mean, scale=math.sqrt(v))
        return (0.0 if prob > 0.975 else 1.0), mean

    mcar = {"type": "mcar", "rate": 0.2}
    cases = []
    for sfx, what, extra in (("", "complete", {}), ("m", "20% MCAR", {"missing": mcar})):
        binary = build("process", {"type": "binary_two_arm", "n": 100, "p0": 0.3, "odds_ratio": 1.8, **extra})
        ordinal = build("process", {"type": "ordinal_two_arm", "n": 100, "p0": [0.2, 0.3, 0.3, 0.2],
                                    "odds_ratio": 1.6, **extra})
        normal = build("process", {"type": "normal_two_arm", "n": 100, "effect": 0.3, **extra})
        cases += [
            dict(key=f"f1{sfx}", label=f"two_proportions ({what}): vs proportions_ztest", process=binary,
                 analysis=build("analysis", {"type": "two_proportions"}), loop=loop, lib=two_props),
            dict(key=f"f2{sfx}", label=f"dichotomised at 2 ({what}): vs proportions_ztest", process=ordinal,
                 analysis=build("analysis", {"type": "dichotomised", "cut": 2}), loop=loop, lib=dichot),
            dict(key=f"f3{sfx}", label=f"posterior prob., beta ({what}): vs quad of beta", process=binary,
                 analysis=beta_an, loop=max(loop // 5, 20), lib=beta_post),
            dict(key=f"f4{sfx}", label=f"posterior prob., normal ({what}): vs stats.norm", process=normal,
                 analysis=normal_an, loop=loop, lib=normal_post),
        ]
    return _gap_rows(cases, reps, max(repeats, 3))


def bench_multi_arm(quick, repeats):
    """anova_f and dunnett, 3 arms of 60 (effects 0, 0.3, 0.5), complete and 20% MCAR, against
    ``scipy.stats.f_oneway`` and ``scipy.stats.dunnett`` (smallest adjusted p-value) on the observed values.

    scipy's ``dunnett`` evaluates the multivariate t by randomised quasi-Monte Carlo (``multivariate_t.cdf``,
    absolute error tolerance 1e-5 by default), so its p-values carry that error; library p-values within 1e-4
    of 0.05 are left out of the decision check (the note counts them). simpower evaluates the same probability
    by deterministic quadrature."""
    from scipy import stats

    from simpower.registry import build

    reps, loop = _sizes("p_reps", quick), _sizes("p_loop", quick)

    def groups(tab):
        ok = np.isfinite(tab["y"])
        return [tab["y"][ok & (tab["arm"] == k)] for k in range(3)]

    def anova(tab):
        return stats.f_oneway(*groups(tab)).pvalue, None

    def dunnett(tab):
        g = groups(tab)
        r = stats.dunnett(g[1], g[2], control=g[0], rng=np.random.default_rng(0))
        return float(np.min(r.pvalue)), g[1].mean() - g[0].mean()

    cases = []
    for sfx, what, extra in (("", "complete", {}), ("m", "20% MCAR", {"missing": {"type": "mcar", "rate": 0.2}})):
        proc = build("process", {"type": "multi_arm", "effects": [0.0, 0.3, 0.5], "n": 60, **extra})
        cases += [
            dict(key=f"p1{sfx}", label=f"anova_f ({what}): vs scipy f_oneway", process=proc,
                 analysis=build("analysis", {"type": "anova_f"}), loop=loop, lib=anova),
            dict(key=f"p2{sfx}", label=f"dunnett ({what}): vs scipy dunnett (QMC)", process=proc,
                 analysis=build("analysis", {"type": "dunnett"}), loop=max(loop // 10, 20), lib=dunnett,
                 band=1e-4),
        ]
    return _gap_rows(cases, reps, max(repeats, 3))


def bench_visits_clusters(quick, repeats):
    """final_visit_t, cluster_means_t, crossover_tost, crossover_t / crossover_mixed without dropout, and
    mixed_model, sw_mixed and cox with 20% MCAR outcomes, against the plain library loop (see the module notes)."""
    import statsmodels.api as sm
    from scipy import stats

    from simpower.analyses.crossover import periods
    from simpower.registry import build

    reps, loop, fits = _sizes("v_reps", quick), _sizes("v_loop", quick), _sizes("v_fits", quick)
    mcar = {"missing": {"type": "mcar", "rate": 0.2}}

    def final_visit(tab):
        last = tab["visit"] == tab["visit"].max()
        ok = last & np.isfinite(tab["y"])
        y0, y1 = tab["y"][ok & (tab["arm"] == 0)], tab["y"][ok & (tab["arm"] == 1)]
        return stats.ttest_ind(y1, y0).pvalue, y1.mean() - y0.mean()

    def cluster_means(tab):
        ok = np.isfinite(tab["y"])
        ids, inv = np.unique(tab["cluster"][ok], return_inverse=True)
        means = np.bincount(inv, tab["y"][ok]) / np.bincount(inv)
        arm = np.zeros(ids.size, int)
        arm[inv] = tab["arm"][ok]
        m0, m1 = means[arm == 0], means[arm == 1]
        return stats.ttest_ind(m1, m0).pvalue, m1.mean() - m0.mean()

    def cross_diffs(tab):
        y1, y2, seq = periods(tab, "log")
        d = y2 - y1
        ok = np.isfinite(d)
        return d[ok & (seq == 0)], d[ok & (seq == 1)]

    lo, hi = math.log(0.8), math.log(1.25)

    def cross_tost(tab):  # Schuirmann (1987): two one-sided t-tests on the period differences (B - A = half)
        d0, d1 = cross_diffs(tab)
        p = max(stats.ttest_ind(d0 - 2 * lo, d1, alternative="greater").pvalue,
                stats.ttest_ind(d0 - 2 * hi, d1, alternative="less").pvalue)
        return p, (d0.mean() - d1.mean()) / 2

    def cross_t(tab):
        d0, d1 = cross_diffs(tab)
        return stats.ttest_ind(d0, d1).pvalue, (d0.mean() - d1.mean()) / 2

    def cross_mixed(tab):
        y1, y2, seq = periods(tab, "log")
        X = np.concatenate([np.stack([np.ones_like(y1), 0 * y1, seq], 1),
                            np.stack([np.ones_like(y1), 1 + 0 * y1, 1 - seq], 1)])
        y, g = np.concatenate([y1, y2]), np.tile(np.arange(y1.size), 2)
        k = np.isfinite(y)
        with warnings.catch_warnings(record=True) as w:
            warnings.simplefilter("always")
            fit = sm.MixedLM(y[k], X[k], groups=g[k]).fit(reml=True)
        return fit.pvalues[2], fit.fe_params[2], not w

    def mixed(tab):
        ok = np.isfinite(tab["y"])
        X = sm.add_constant(tab["arm"][ok].astype(float))
        with warnings.catch_warnings(record=True) as w:
            warnings.simplefilter("always")
            fit = sm.MixedLM(tab["y"][ok], X, groups=tab["cluster"][ok]).fit(reml=True)
        return fit.pvalues[1], fit.fe_params[1], not w

    def stepped(tab):
        ok = np.isfinite(tab["y"])
        period = tab["period"][ok]
        X = np.column_stack([np.ones(ok.sum())] + [(period == t).astype(float) for t in range(1, period.max() + 1)]
                            + [tab["treat"][ok].astype(float)])
        with warnings.catch_warnings(record=True) as w:
            warnings.simplefilter("always")
            fit = sm.MixedLM(tab["y"][ok], X, groups=tab["cluster"][ok]).fit(reml=True, method="powell", ftol=1e-12,
                                                                             maxiter=5000)
        k = X.shape[1] - 1  # the treatment's coefficient (MixedLM's pvalues end with the variance's)
        return fit.pvalues[k], fit.fe_params[k], not w

    def cox(tab):
        from statsmodels.duration.hazard_regression import PHReg

        ok = np.isfinite(tab["time"])
        fit = PHReg(tab["time"][ok], tab["arm"][ok].astype(float), status=tab["event"][ok], ties="breslow").fit()
        return fit.pvalues[0], fit.params[0]

    rm = {"type": "repeated_measures", "n": 100, "visits": 4, "rho": 0.5, "effect": 0.3}
    ct = {"type": "cluster_trial", "clusters": 10, "cluster_size": 20, "icc": 0.05, "effect": 0.3}
    xo = {"type": "crossover", "n": 12, "scale": "log", "cv_within": 0.25, "effect": 0.95}
    sw = {"type": "stepped_wedge", "steps": 5, "clusters_per_step": 3, "m": 15, "icc": 0.05, "effect": 0.3}
    cases = []
    for sfx, what, extra in (("", "complete", {}), ("m", "20% MCAR", mcar)):
        cases += [
            dict(key=f"v1{sfx}", label=f"final_visit_t ({what}): vs scipy ttest_ind",
                 process=build("process", {**rm, **extra}), analysis=build("analysis", {"type": "final_visit_t"}),
                 loop=loop, lib=final_visit),
            dict(key=f"v2{sfx}", label=f"cluster_means_t ({what}): vs ttest_ind of means",
                 process=build("process", {**ct, **extra}), analysis=build("analysis", {"type": "cluster_means_t"}),
                 loop=loop, lib=cluster_means),
            dict(key=f"v3{sfx}", label=f"crossover_tost ({what}): vs two ttest_ind",
                 process=build("process", {**xo, **extra}),
                 analysis=build("analysis", {"type": "crossover_tost", "scale": "log"}), loop=loop, lib=cross_tost,
                 est_map=np.log, est_tol=1e-9),
        ]
    cases += [
        dict(key="v4", label="crossover_t (complete): vs scipy ttest_ind", process=build("process", xo),
             analysis=build("analysis", {"type": "crossover_t", "scale": "log"}), loop=loop, lib=cross_t,
             est_map=np.log, est_tol=1e-9),
        dict(key="v5", label="crossover_mixed (complete): vs statsmodels MixedLM", process=build("process", xo),
             analysis=build("analysis", {"type": "crossover_mixed", "scale": "log", "df": "wald"}), loop=fits,
             lib=cross_mixed, est_map=np.log, est_tol=1e-4, est_abs=True, min_agree=0.995),
        dict(key="v6m", label="mixed_model (20% MCAR): vs statsmodels MixedLM",
             process=build("process", {**ct, **mcar}),
             analysis=build("analysis", {"type": "mixed_model"}), loop=fits, lib=mixed, est_tol=1e-4, est_abs=True,
             min_agree=0.995),
        dict(key="v7m", label="sw_mixed (20% MCAR): vs statsmodels MixedLM", process=build("process", {**sw, **mcar}),
             analysis=build("analysis", {"type": "sw_mixed"}), loop=fits, lib=stepped, est_tol=1e-4, est_abs=True,
             min_agree=0.995),
        dict(key="v8m", label="cox (20% MCAR times): vs statsmodels PHReg", process=_survival_mcar(0.2),
             analysis=build("analysis", {"type": "cox"}), loop=fits, lib=cox),
    ]
    return _gap_rows(cases, reps, max(repeats, 3))


def bench_groupseq_z(quick, repeats):
    """group_sequential with z-test looks (normal_two_arm, 100 per arm, 3 looks, O'Brien-Fleming-type spending,
    one-sided alpha 0.025), complete and 20% MCAR, against the loop a user writes: at each look the first n_k
    participants of each arm, z from their observed values, its one-sided p-value from ``scipy.stats.norm``
    compared with the look's nominal level (the same boundaries, computed once)."""
    from scipy import stats

    from simpower.analyses.groupseq import GroupSequential, look_sizes
    from simpower.registry import build

    reps, loop = _sizes("y_reps", quick), _sizes("y_loop", quick)
    an = GroupSequential(inner={"type": "z_test", "alternative": "greater"}, fractions=3, spending="obf",
                         alpha=0.025)
    design = an.design()
    nominal = stats.norm.sf(np.asarray(design.efficacy, float))
    sizes = [int(look_sizes(float(t), np.asarray(100))) for t in design.fractions]

    def looks(tab):
        y, arm = tab["y"], tab["arm"]
        y0, y1 = y[arm == 0], y[arm == 1]
        for k, n in enumerate(sizes):
            a, b = y0[:n], y1[:n]
            a, b = a[np.isfinite(a)], b[np.isfinite(b)]
            d = b.mean() - a.mean()
            p = stats.norm.sf(d / math.sqrt(1 / a.size + 1 / b.size))
            if p <= nominal[k] or k == len(sizes) - 1:
                return (0.0 if p <= nominal[k] else 1.0), d

    cases = []
    for sfx, what, extra in (("", "complete", {}), ("m", "20% MCAR", {"missing": {"type": "mcar", "rate": 0.2}})):
        cases.append(dict(key=f"y1{sfx}", label=f"group_sequential z looks ({what}): vs scipy loop",
                          process=build("process", {"type": "normal_two_arm", "n": 100, "effect": 0.3, **extra}),
                          analysis=an, loop=loop, lib=looks))
    return _gap_rows(cases, reps, max(repeats, 3))


def bench_complete_twins(quick, repeats):
    """The analyses row m measures with 20% MCAR outcomes, on the same processes without missingness (z01-z14),
    against the same library loops (``_missing_cases``)."""
    reps, loop = _sizes("z_reps", quick), _sizes("z_loop", quick)
    cases = []
    for key, label, proc, an, lib in (case[:5] for case in _missing_cases()):
        cases.append(dict(key="z" + key[1:], label=f"complete: {label}", process=proc.replace(missing=None),
                          analysis=an, loop=loop, lib=lib, est_tol=1e-9))
    return _gap_rows(cases, reps, max(repeats, 3))


ROWS = {"a": bench_ttest, "b": bench_mixed, "c": bench_mann_whitney, "d": bench_jobs, "e": bench_memory,
        "m": bench_missing, "x": bench_crossover, "o": bench_ordinal, "h": bench_glmm, "s": bench_stepped,
        "i": bench_mmrm, "g": bench_gee, "k": bench_cox, "k3": bench_cox_robust, "n": bench_negbin,
        "r": bench_resampling, "u": bench_pilot_units, "t": bench_groupseq_events, "l": bench_logrank,
        "q": bench_tables_glm, "w": bench_rank_tests, "f": bench_binary_bayes, "p": bench_multi_arm, "v": bench_visits_clusters, "y": bench_groupseq_z,
        "z": bench_complete_twins}

#: Which rows measure each built-in analysis: ``complete`` data and ``missing`` outcomes (20% MCAR unless the row
#: says otherwise), as the row ids the rows report (their first letter is the ``ROWS`` key). ``note`` says why a
#: side has no row. tests/test_benchmark_coverage.py fails when a registered analysis is missing here.
COVERAGE = {
    "ancova": {"complete": ("z12",), "missing": ("m12",)},
    "anova_f": {"complete": ("p1",), "missing": ("p1m",)},
    "bootstrap_ci": {"complete": ("r2", "r3"), "missing": (),
                     "note": "row r only: complete data (scipy's draws reproduced exactly need the whole sample)"},
    "chi_square": {"complete": ("q1",), "missing": ("q1m",)},
    "cluster_means_t": {"complete": ("v2", "u1"), "missing": ("v2m",)},
    "cox": {"complete": ("k", "k3a"), "missing": ("v8m", "k3b")},
    "crossover_mixed": {"complete": ("v5",), "missing": ("x2",)},   # x2: 10% dropout after period 1
    "crossover_t": {"complete": ("v4",), "missing": ("x1",)},       # x1: 10% dropout after period 1
    "crossover_tost": {"complete": ("v3",), "missing": ("v3m",)},
    "dichotomised": {"complete": ("f2",), "missing": ("f2m",)},
    "dunnett": {"complete": ("p2",), "missing": ("p2m",)},
    "final_visit_t": {"complete": ("v1",), "missing": ("v1m",)},
    "fisher_exact": {"complete": ("q2",), "missing": ("q2m",)},
    "gee": {"complete": ("g1", "g3"), "missing": ("g2", "g4")},
    "glmm": {"complete": ("h1",), "missing": ("h2",)},
    "group_sequential": {"complete": ("y1", "t"), "missing": ("y1m",)},
    "log_t": {"complete": ("z04",), "missing": ("m04",)},
    "logistic": {"complete": ("q3",), "missing": ("q3m",)},
    "logrank": {"complete": ("l1",), "missing": ("l2",)},
    "mann_whitney": {"complete": ("c0", "c1", "c2", "z08", "z09", "w1", "w3"), "missing": ("m08", "m09", "w2", "w4")},
    "mixed_model": {"complete": ("b",), "missing": ("v6m",)},
    "mmrm": {"complete": (), "missing": ("i1", "i2", "u2"),   # i: 20% monotone dropout; u2: a pilot's gaps
             "note": "rows i and u2 measure MMRM with missing visits only; no library fits the unstructured "
                     "MMRM to compare a complete-data row with"},
    "multiple": {"complete": ("z14",), "missing": ("m14",)},
    "negbin_glm": {"complete": ("n1",), "missing": ("n2",)},
    "non_inferiority": {"complete": ("z07",), "missing": ("m07",)},
    "ols": {"complete": ("z11", "z13"), "missing": ("m11", "m13")},
    "paired_t": {"complete": ("z05",), "missing": ("m05",)},
    "permutation_test": {"complete": ("r1",), "missing": (),
                         "note": "row r only: complete data (scipy's draws reproduced exactly need the whole sample)"},
    "poisson_glm": {"complete": ("q4",), "missing": ("q4m",)},
    "posterior_probability": {"complete": ("f3", "f4"), "missing": ("f3m", "f4m")},
    "proportional_odds": {"complete": ("o1",), "missing": ("o2",)},
    "sw_mixed": {"complete": ("s",), "missing": ("v7m",)},
    "t_test": {"complete": ("a1", "z01"), "missing": ("m01",)},
    "tost": {"complete": ("z06",), "missing": ("m06",)},
    "two_proportions": {"complete": ("f1",), "missing": ("f1m",)},
    "welch_t": {"complete": ("z02",), "missing": ("m02",)},
    "wilcoxon_signed_rank": {"complete": ("z10", "w5"), "missing": ("m10", "w6")},
    "z_test": {"complete": ("z03",), "missing": ("m03",)},
}


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
        if tgt is None and ratio is not None:
            verdict = "(a bound)"
        print(f"{r['row']:<4} {r['measure']:<54} {ours_s:>13} {ref_s:>13} {ratio_s:>9} {tgt_s:>8}  {verdict}",
              file=stream)
    print(file=stream)
    for r in rows:
        if r.get("note"):
            print(f"  {r['row']}: {r['note']}", file=stream)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true", help="small sizes (a smoke run, not a measurement)")
    ap.add_argument("--only", default="a,b,c,d,e,m,o,x,h,i,g,k,n,l,q,w", help="comma-separated rows to run, from " + ",".join(ROWS))
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
