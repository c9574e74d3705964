"""Comparing analyses on common random numbers; Student vs Welch under unequal variances."""

import math

import numpy as np
from scipy import stats

import simpower as sp
from simpower._validation import Int, Real
from simpower.analyses.nonparametric import MannWhitney
from simpower.processes.base import Batch, Process


class LogNormalTwoArm(Process):
    """Test process: log y ~ N(0, sigma^2) in arm 0 and N(effect, sigma^2) in arm 1 (a skewed outcome)."""

    params = {"n": Int(low=2), "effect": Real(), "sigma": Real(0.0, low_open=True)}
    defaults = {"effect": 0.0, "sigma": 1.0}

    def draw_batch(self, rng, size):
        z = rng.standard_normal((size, 2 * self.n)) * self.sigma
        z[:, self.n:] += self.effect
        return Batch(size, {"y": np.exp(z)}, {"arm": np.repeat(np.array([0, 1], np.int8), self.n)})


SKEWED = sp.Scenario(LogNormalTwoArm(n=25, effect=0.4, sigma=0.6), analyses=[sp.WelchT(), MannWhitney()])


def test_paired_comparison_of_welch_and_mann_whitney():
    reps = 4000
    res = sp.run(SKEWED, reps=reps, seed=1, n_jobs=1)
    assert res.paths == {"welch_t": "batch", "mann_whitney": "batch"}
    s = res.summaries
    c = res.compare("welch_t", "mann_whitney")
    assert c["n"] == reps
    # on the same replicates the paired difference is exactly the difference of the two powers
    assert abs(c["difference"] - (s["welch_t"]["power"] - s["mann_whitney"]["power"])) < 1e-12
    # common random numbers: the paired MCSE is far below the MCSE of two independent runs
    independent = math.hypot(s["welch_t"]["mcse"], s["mann_whitney"]["mcse"])
    assert c["mcse"] < 0.75 * independent
    # on lognormal data the rank test is the more powerful one (e.g. Blair & Higgins 1980,
    # J Educ Stat 5:309-335; from memory), by far more than 4 paired MCSE here
    assert -c["difference"] > 4 * c["mcse"]
    assert res.comparisons() == [c]


def test_discordant_pairs_mcse_matches_the_spread_over_independent_runs():
    # The reported MCSE of a paired difference, sqrt(b + c - (b - c)^2 / R) / R (the variance of a
    # difference of paired proportions, Agresti 2013, Categorical Data Analysis, sec. 11.1.1), must
    # match the SD of the difference over K independent runs: SD^2 / MCSE^2 ~ chi2(K - 1) / (K - 1),
    # so their ratio lies in the 99.9% chi-square band. The MCSE of independent runs must fail it.
    k_runs, reps = 100, 300
    diffs, paired, independent = [], [], []
    for k in range(k_runs):
        res = sp.run(SKEWED, reps=reps, seed=1000 + k, n_jobs=1)
        c = res.compare("welch_t", "mann_whitney")
        diffs.append(c["difference"])
        paired.append(c["mcse"])
        independent.append(math.hypot(res.summaries["welch_t"]["mcse"], res.summaries["mann_whitney"]["mcse"]))
    sd = np.std(diffs, ddof=1)
    lo = math.sqrt(stats.chi2.ppf(0.0005, k_runs - 1) / (k_runs - 1))
    hi = math.sqrt(stats.chi2.ppf(0.9995, k_runs - 1) / (k_runs - 1))
    assert lo < sd / math.sqrt(np.mean(np.square(paired))) < hi
    assert sd / math.sqrt(np.mean(np.square(independent))) < lo


def test_student_t_is_liberal_when_the_smaller_arm_has_the_larger_variance():
    # Control arm 40 with SD 1, treatment arm 20 with SD 2, no effect: the pooled variance
    # under-weights the noisier small arm, so Student's t rejects too often and fails Bradley's
    # (1978, Br J Math Stat Psychol 31:144-152) liberal criterion 0.5 alpha..1.5 alpha; Welch's (1947)
    # test meets it and stays within 4 MCSE of alpha.
    reps = 4000
    sc = sp.Scenario(sp.NormalTwoArm(n=40, ratio=0.5, sd_ratio=2.0, effect=0.0),
                     analyses=[sp.TTest(), sp.WelchT()])
    res = sp.run(sc, reps=reps, seed=2, n_jobs=1)
    student, welch = res.summaries["t_test"]["power"], res.summaries["welch_t"]["power"]
    assert not sp.bradley_liberal(student, 0.05) and student > 0.075
    assert sp.bradley_liberal(welch, 0.05)
    assert abs(welch - 0.05) < 4 * math.sqrt(0.05 * 0.95 / reps)
    c = res.compare("t_test", "welch_t")
    assert c["difference"] > 4 * c["mcse"]
