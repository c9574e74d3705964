"""Required sample size and minimal detectable effect by simulation, against published formulas.

Tolerances come from the search's own Monte Carlo error: the estimate must lie
within 4 standard errors (SE = half-width of the 95% Fieller interval / 1.96)
of the reference.
"""

import math

import numpy as np
import pytest
from scipy import optimize, stats

import simpower as sp
from simpower.errors import ParameterError
from simpower.planning.search import detectable_effect, fit_probit, required_n, runnable_low
from simpower.planning.sequential import MemoryStore


def se_of(res):
    lo, hi = res.estimate_interval
    return (hi - lo) / 2 / stats.norm.ppf(0.5 + res.level / 2)


def nct_power_two_sample(d, n, alpha=0.05):
    """Two-sided two-sample t power from scipy's noncentral t (an independent reference)."""
    df = 2 * n - 2
    nc = d * math.sqrt(n / 2)
    crit = stats.t.ppf(1 - alpha / 2, df)
    lower = stats.nct.cdf(-crit, df, nc)        # far tail: scipy returns NaN where it is ~0
    return stats.nct.sf(crit, df, nc) + (0.0 if math.isnan(lower) else lower)


def nct_n(d, power, alpha=0.05, sd_scale=1.0):
    return optimize.brentq(lambda n: nct_power_two_sample(d / sd_scale, n, alpha) - power, 2.5, 200)


def test_cohen_64_per_arm():
    # Cohen (1988), Table 2.4.1: d = 0.5, power 0.80, two-sided alpha 0.05 -> 64 per arm.
    sc = sp.Scenario(sp.NormalTwoArm(n=50, effect=0.5), sp.TTest())
    res = required_n(sc, 0.8, low=10, high=300, seed=11, n_jobs=1)
    ref = nct_n(0.5, 0.8)                       # 63.77 (continuous), from scipy.stats.nct
    assert math.ceil(ref) == 64                 # the table's value
    assert res.converged and res.kind == "size" and res.parameter == "n"
    assert abs(res.estimate - ref) <= 4 * se_of(res)
    assert se_of(res) <= 0.02 * ref             # the interval met the 2% tolerance
    assert res.interval[0] <= 64 <= res.interval[1] + 1
    assert res.analytic == 64                   # closed form through the analysis's analytic_power
    assert res.reps_total == int(res.table["reps"].sum())
    assert isinstance(res.n, int)


def test_allocation_ratio_searches_the_control_arm():
    # 2:1 allocation: Var = sd^2 (1/n + 1/(2n)); the reference is the noncentral t with df = 3n - 2.
    sc = sp.Scenario(sp.NormalTwoArm(n=40, effect=0.5, ratio=2.0), sp.TTest())
    res = required_n(sc, 0.8, low=10, high=200, seed=12, n_jobs=1)

    def power(n):
        n1 = 2 * n
        df = n + n1 - 2
        nc = 0.5 / math.sqrt(1 / n + 1 / n1)
        crit = stats.t.ppf(0.975, df)
        return stats.nct.sf(crit, df, nc) + stats.nct.cdf(-crit, df, nc)

    ref = optimize.brentq(lambda n: power(n) - 0.8, 5, 500)
    assert abs(res.estimate - ref) <= 4 * se_of(res)
    assert res.at_answer().process.n1 == round(2 * res.value)


def test_detectable_effect_against_noncentral_t():
    # At n = 64 per arm the minimal detectable d for power 0.8 is 0.4991 (Cohen 1988 gives 0.50 for n = 64).
    sc = sp.Scenario(sp.NormalTwoArm(n=64, effect=0.3), sp.TTest())
    res = detectable_effect(sc, 0.8, high=1.0, seed=13, n_jobs=1, rel_tol=0.03)
    ref = optimize.brentq(lambda d: nct_power_two_sample(d, 64) - 0.8, 0.1, 1.0)
    assert abs(res.estimate - ref) <= 4 * se_of(res)
    assert res.analytic == pytest.approx(ref, abs=1e-6)


def test_negative_effect_direction():
    sc = sp.Scenario(sp.NormalTwoArm(n=64, effect=-0.3), sp.TTest(alternative="less"))
    res = detectable_effect(sc, 0.8, high=1.0, seed=14, n_jobs=1, rel_tol=0.04)
    # one-sided 0.05 at n = 64: the d with power 0.8, from the noncentral t
    df = 126
    crit = stats.t.ppf(0.95, df)
    ref = optimize.brentq(lambda d: stats.nct.sf(crit, df, d * math.sqrt(32)) - 0.8, 0.1, 2)
    assert res.value < 0 and abs(-res.estimate - ref) <= 4 * se_of(res)


def test_search_is_reproducible_and_reuses_a_store():
    sc = sp.Scenario(sp.NormalTwoArm(n=50, effect=0.6), sp.TTest())
    store = MemoryStore()
    a = required_n(sc, 0.8, low=10, high=200, seed=5, n_jobs=1, store=store, rel_tol=0.04)
    simulated = store.simulated
    b = required_n(sc, 0.8, low=10, high=200, seed=5, n_jobs=1, store=store, rel_tol=0.04)
    assert store.simulated == simulated          # the second search simulated nothing new
    assert a.estimate == b.estimate and a.interval == b.interval
    c = required_n(sc, 0.8, low=10, high=200, seed=5, n_jobs=1, rel_tol=0.04)
    assert c.estimate == a.estimate              # and without the store, the same numbers


def test_budget_stops_and_says_not_converged():
    sc = sp.Scenario(sp.NormalTwoArm(n=50, effect=0.5), sp.TTest())
    res = required_n(sc, 0.8, low=10, high=300, seed=6, n_jobs=1, max_reps=2000, rel_tol=0.005)
    assert not res.converged
    assert res.reps_total <= 2000 + 200 * 5 * 4  # budget plus the pilot's confirmation, never unbounded


def test_target_never_reached_names_best_power():
    sc = sp.Scenario(sp.NormalTwoArm(n=10, effect=0.2), sp.TTest())
    with pytest.raises(ParameterError, match=r"not reached .* best power seen is 0\.\d+"):
        required_n(sc, 0.9, low=4, high=30, seed=1, n_jobs=1)


@pytest.mark.parametrize("power", [0.03, 0.05, 1.0, 1.3])
def test_target_power_outside_alpha_one(power):
    sc = sp.Scenario(sp.NormalTwoArm(n=10, effect=0.5), sp.TTest())
    with pytest.raises(ParameterError, match=r"`power` must be in \(alpha, 1\)"):
        required_n(sc, power, seed=1, n_jobs=1)


def test_unknown_parameter_names_nearest():
    sc = sp.Scenario(sp.NormalTwoArm(n=10, effect=0.5), sp.TTest())
    with pytest.raises(ParameterError, match="Did you mean 'n'"):
        required_n(sc, 0.8, parameter="nn", seed=1, n_jobs=1)


def test_probit_fit_recovers_known_curve():
    # Data drawn from probit(p) = -2 + 0.4 sqrt(n): the ML fit must recover the coefficients within 4 SE.
    rng = np.random.default_rng(1)
    n = np.array([10, 20, 40, 60, 90, 140])
    r = np.full(n.size, 4000)
    k = rng.binomial(r, stats.norm.cdf(-2 + 0.4 * np.sqrt(n)))
    fit = fit_probit(n, k, r, "sqrt")
    se = np.sqrt(np.diag(fit.cov))
    assert abs(fit.a + 2) <= 4 * se[0] and abs(fit.b - 0.4) <= 4 * se[1]
    est, lo, hi = fit.crossing(0.8)
    true = ((stats.norm.ppf(0.8) + 2) / 0.4) ** 2
    assert lo < est < hi and abs(est - true) < 4 * (hi - lo) / 3.92


def test_required_clusters_against_design_effect():
    # Donner & Klar (2000), ch. 5-6: the variance of a cluster mean is sd^2 * DE / m with the design effect
    # DE = 1 + (m - 1) icc; the t-test on cluster means then has noncentral-t power with df = 2k - 2.
    m, icc, d = 20, 0.05, 0.3
    from simpower.processes.clusters import ClusterTrial
    from simpower.analyses.clustered import ClusterMeansT

    sc = sp.Scenario(ClusterTrial(clusters=10, cluster_size=m, icc=icc, effect=d), ClusterMeansT())
    res = required_n(sc, 0.8, low=4, high=60, seed=21, n_jobs=1, rel_tol=0.02)
    assert res.parameter == "clusters"
    deff = 1 + (m - 1) * icc
    sd_means = math.sqrt(deff / m)
    ref = nct_n(d, 0.8, sd_scale=sd_means)       # continuous clusters per arm
    assert abs(res.estimate - ref) <= 4 * se_of(res)
    # the z-based formula (no small-sample correction) is 17.01 clusters, a little below the t answer
    z_ref = (stats.norm.ppf(0.975) + stats.norm.ppf(0.8)) ** 2 * 2 * deff / (d * d) / m
    assert z_ref == pytest.approx(17.01, abs=0.01) and z_ref < ref < z_ref + 1.5


def test_required_events_against_schoenfeld():
    # Schoenfeld (1981): D = 4 (z_{1-alpha/2} + z_{1-beta})^2 / log(HR)^2 events for 1:1 allocation.
    # Without censoring every participant has an event, so events = 2n.
    from simpower.processes.survival import SurvivalTwoArm
    from simpower.analyses.survival import LogRank

    hr = 0.8
    sc = sp.Scenario(SurvivalTwoArm(n=200, median=12.0, hazard_ratio=hr), LogRank())
    res = required_n(sc, 0.8, low=50, high=800, seed=22, n_jobs=1, rel_tol=0.02)
    d_ref = 4 * (stats.norm.ppf(0.975) + stats.norm.ppf(0.8)) ** 2 / math.log(hr) ** 2   # 630.4
    events = 2 * res.estimate
    assert res.at_answer().process.expected_events() == pytest.approx(2 * res.value)
    assert abs(events - d_ref) <= 4 * 2 * se_of(res)


# -- messages name what is true -----------------------------------------------------------------
def _welch(data):
    y, arm = np.asarray(data["y"]), np.asarray(data["arm"])
    return stats.ttest_ind(y[arm == 1], y[arm == 0], equal_var=False)


def _needs_8_per_arm(data):
    """A per-replicate analysis that cannot fit fewer than 8 observations per arm (like a model with many terms)."""
    y, arm = np.asarray(data["y"]), np.asarray(data["arm"])
    if (arm == 0).sum() < 8:
        raise np.linalg.LinAlgError("singular design: fewer than 8 observations per arm")
    return _welch(data)


def _mostly_fails_below_8(data):
    """Fails on most replicates with fewer than 8 per arm: when the control mean is above -0.6 (88% at n = 4;
    the engine's fixed trial replicates include one below, so the analysis is not refused as unfit)."""
    y, arm = np.asarray(data["y"]), np.asarray(data["arm"])
    if (arm == 0).sum() < 8 and y[arm == 0].mean() > -0.6:
        raise np.linalg.LinAlgError("singular design")
    return _welch(data)


def test_a_point_that_stops_the_search_is_named_by_its_parameter_values():
    sc = sp.Scenario(sp.NormalTwoArm(n=40, effect=0.5), analyses={"fit": _mostly_fails_below_8})
    with pytest.raises(sp.RunError) as info:
        required_n(sc, 0.8, low=4, high=120, seed=1, n_jobs=1)
    msg = str(info.value)
    assert "replicates at n = 4 (" in msg and "error:LinAlgError" in msg
    assert "grid point" not in msg and not any(len(w) >= 10 and w.isdigit() for w in msg.split())
    assert "in the store" not in msg  # an in-memory search keeps nothing after it stops


def test_the_default_range_starts_where_every_analysis_runs():
    # doubling from the smallest valid n (2): 2 and 4 fail on every trial replicate, 8 runs
    sc = sp.Scenario(sp.NormalTwoArm(n=40, effect=0.5), analyses={"fit": _needs_8_per_arm, "welch": _welch})
    assert runnable_low(sc, "n", 2, 40, True) == 8
    res = required_n(sc, 0.8, seed=3, n_jobs=1, max_reps=2000, rel_tol=0.2)
    assert res.settings["low"] == 8 and "starts at n = 8" in res.note
    assert (res.table["value"] >= 8).all() and res.table["failures"].sum() == 0
    # an analysis that runs everywhere keeps the default start
    plain = sp.Scenario(sp.NormalTwoArm(n=40, effect=0.5), analyses={"welch": _welch})
    assert runnable_low(plain, "n", 2, 40, True) == 2


class _StopAfter:
    """A per-replicate Welch test that raises KeyboardInterrupt (as Ctrl-C would) after ``calls`` replicates."""

    def __init__(self, calls):
        self.left = calls

    def __call__(self, data):
        self.left -= 1
        if self.left < 0:
            raise KeyboardInterrupt
        return _welch(data)


def test_an_interrupted_search_without_a_store_says_nothing_was_saved():
    sc = sp.Scenario(sp.NormalTwoArm(n=40, effect=0.5), analyses={"w": _StopAfter(450)})
    with pytest.raises(sp.RunInterrupted) as info:
        # in this process: the analysis counts its calls (a forked worker would count its own)
        required_n(sc, 0.8, low=10, high=120, seed=1, n_jobs=1, engine={"backend": "serial"})
    msg = str(info.value)
    assert "nothing was saved" in msg and "store" in msg and "are in the store" not in msg


def test_an_interrupted_search_with_a_store_names_it(tmp_path):
    path = tmp_path / "s.sqlite"
    sc = sp.Scenario(sp.NormalTwoArm(n=40, effect=0.5), analyses={"w": _StopAfter(450)})
    with pytest.raises(sp.RunInterrupted) as info:
        required_n(sc, 0.8, low=10, high=120, seed=1, n_jobs=1, store=str(path), engine={"backend": "serial"})
    assert f"are in {path}" in str(info.value) and "nothing was saved" not in str(info.value)
