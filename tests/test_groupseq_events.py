"""Group-sequential looks at event counts on time-to-event data: the batch path and outside references.

References: the log-rank statistic at event-count looks has independent increments with information
proportional to the number of events (Tsiatis 1981, Biometrika 68:311-315), about D/4 at 1:1 allocation
(Schoenfeld 1983, Biometrics 39:499-503), so its exit probabilities are those of the recursion of
simpower.analytic.groupseq (Jennison & Turnbull 2000, ch. 3 and 7) at drift |log HR| sqrt(D / 4).
Tolerances are 4 Monte Carlo SEs (the MCSE taken at the reference value) with fixed seeds.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest

import simpower as sp
from simpower.analyses.base import TestResult
from simpower.analyses.groupseq import GroupSequential, looks_table, stop_of
from simpower.analytic import crossing_probabilities
from simpower.batch import Batch
from simpower.execution import Execution
from simpower.registry import build
from simpower.testing import check_analysis

SERIAL = Execution(n_jobs=1, backend="serial", seed=20261202)


def _within(sim, ref, reps, k=4.0):
    mcse = math.sqrt(max(ref * (1 - ref), 1e-12) / reps)
    assert abs(sim - ref) <= k * mcse, f"simulated {sim:.5f}, reference {ref:.5f}, 4 MCSE = {k * mcse:.5f}"


def _trial(**kw):
    spec = {"n": 40, "median": 1.0, "hazard_ratio": 0.6, "accrual": 2.0, "follow_up": 0.5, **kw}
    return sp.SurvivalTwoArm(**spec)


# -- the entry column -------------------------------------------------------------------------------
def test_entry_is_the_accrual_times_the_uniform_entry_draw_and_the_draws_are_unchanged():
    """Documented draw order (event exponentials, entry uniforms, loss exponentials); administrative
    censoring at the study end accrual + follow_up in calendar time (the process's model)."""
    p = _trial(n=25, dropout_rate=0.1)
    b = p.draw_batch(np.random.default_rng(5), 30)
    rng = np.random.default_rng(5)
    e_event = rng.standard_exponential((30, 50))
    u_entry = rng.random((30, 50))
    assert np.array_equal(b["entry"], 2.0 * u_entry)
    e_event[:, 25:] /= 0.6
    t = e_event / p.rate0
    assert np.array_equal(b["time"][b["event"] == 1], t[b["event"] == 1])  # event times as before
    end = b["entry"] + b["time"]
    assert np.all(end <= 2.5 + 1e-12)  # nobody is followed past the study end
    cens = b["event"] == 0
    assert np.any(np.isclose(end[cens], 2.5, rtol=0, atol=1e-12))  # the administratively censored end there
    assert np.all(b.replicate(0)["entry"] == b["entry"][0])


# -- batch path = per-replicate path ----------------------------------------------------------------
@pytest.mark.parametrize("spec", [
    {"inner": {"type": "logrank", "alternative": "less"}, "fractions": [0.3, 0.6, 1.0], "futility": [-0.5, 0.0]},
    {"inner": {"type": "logrank"}, "fractions": 2, "alpha": 0.05, "scale": "p"},
    {"inner": {"type": "cox", "alternative": "less", "ties": "efron"}, "fractions": 3, "spending": "pocock"},
    {"inner": {"type": "cox", "alternative": "less"}, "fractions": [0.5, 1.0],
     "futility": {"kind": "obf", "beta": 0.2}, "binding": True},
])
def test_event_looks_batch_equals_per_replicate(spec):
    g = GroupSequential(**spec)
    p = _trial(time_resolution=0.05)  # ties in time and in calendar time
    batch = p.draw_batch(np.random.default_rng(8), 150)
    assert g.supports_batch(batch)
    res = g.batch(batch)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for i in range(batch.size):
            one = g(batch.replicate(i))
            np.testing.assert_array_equal(res.pvalues[i], one.pvalues)
            assert res.pvalue[i] == one.pvalue
            np.testing.assert_allclose([res.estimate[i], res.se[i], res.ci_low[i], res.ci_high[i]],
                                       [one.estimate, one.se, one.ci_low, one.ci_high], rtol=1e-8)
    assert check_analysis(g, p, size=12)["batch_compared"] >= 10


def test_event_looks_with_padding_and_replicates_without_events():
    """Padding rows of the full data set stay out of every look; a replicate without any event fails
    on both paths with the same cause (ValueError) and no fields."""
    p = _trial(n=12)
    b = p.draw_batch(np.random.default_rng(2), 40)
    rng = np.random.default_rng(3)
    present = rng.random(b["time"].shape) < 0.8
    event = b["event"].copy()
    event[5] = 0  # replicate 5: no event at all
    batch = Batch(40, {**b.per_rep, "event": event, "present": present}, b.shared, b.info)
    g = GroupSequential(inner={"type": "logrank", "alternative": "less"}, fractions=[0.5, 1.0], futility=[0.0])
    assert g.supports_batch(batch)
    res = g.batch(batch)
    assert set(res.trouble) == {"error:ValueError"}
    assert np.flatnonzero(res.trouble["error:ValueError"]).tolist() == [5]
    assert np.isnan(res.pvalue[5]) and np.isnan(res.estimate[5])
    with pytest.raises(ValueError, match="no events"):
        g(batch.replicate(5))
    for i in set(range(40)) - {5}:
        one = g(batch.replicate(i))
        np.testing.assert_array_equal(res.pvalues[i], one.pvalues)
        np.testing.assert_allclose([res.estimate[i], res.se[i]], [one.estimate, one.se], rtol=1e-9)


@pytest.mark.parametrize("inner", [{"type": "logrank"}, {"type": "logrank", "alternative": "greater"},
                                   {"type": "cox", "ties": "efron"}])
def test_logrank_and_cox_batch_paths_leave_padding_rows_out(inner):
    """Padding rows (present = False) are left out as the per-replicate path's replicate(i) drops them;
    a replicate with an arm of no rows is refused on both paths (ValueError)."""
    b = _trial(n=15).draw_batch(np.random.default_rng(1), 60)
    present = np.random.default_rng(2).random(b["time"].shape) < 0.7
    present[3, :15] = False
    batch = Batch(60, {**b.per_rep, "present": present}, b.shared, b.info)
    a = build("analysis", inner)
    assert a.supports_batch(batch)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = a.batch(batch)
        assert res.trouble["error:ValueError"][3]
        for i in set(range(60)) - {3}:
            one = a(batch.replicate(i))
            np.testing.assert_allclose([res.pvalue[i], res.estimate[i], res.se[i]], [one.pvalue, one.estimate, one.se],
                                       rtol=1e-8)


def _user_logrank(data):
    """The built-in log-rank test as a user function: no batch path, so the run goes per replicate. A function
    has no `alternative` (its estimate / se counts upwards): it reports the control-over-treatment log hazard
    ratio, so its z is that of `logrank` with alternative 'less'."""
    r = sp.LogRank(alternative="less")(data)
    return TestResult(pvalue=r.pvalue, estimate=-r.estimate, se=r.se, ci_low=-r.ci_high, ci_high=-r.ci_low)


def test_a_run_gives_the_same_records_and_looks_table_on_both_paths():
    common = {"fractions": [0.4, 0.7, 1.0], "futility": [-0.5, 0.0]}
    batch_gs = GroupSequential(inner={"type": "logrank", "alternative": "less"}, **common)
    user_gs = GroupSequential(inner=_user_logrank, **common)
    sc = sp.Scenario(_trial(), analyses={"batch": batch_gs, "user": user_gs}, alpha=0.025)
    res = sp.run(sc, reps=400, execution=SERIAL)
    assert res.paths["batch"] == "batch" and res.paths["user"].startswith("per-replicate")
    np.testing.assert_array_equal(res.records["batch"].pvalues, res.records["user"].pvalues)
    look, decision = stop_of(res.records["batch"].pvalues, 3)
    assert {"efficacy", "futility"} <= set(decision)  # the table below is not trivial
    rows_b, overall_b = looks_table(batch_gs, res.summaries["batch"])
    rows_u, overall_u = looks_table(user_gs, res.summaries["user"])
    assert rows_b == rows_u
    assert overall_b["expected_n"] == overall_u["expected_n"] and overall_b["rejection"] == overall_u["rejection"]
    assert overall_b["expected_n_unit"] == "fraction of the maximum"  # event fractions


# -- outside references ------------------------------------------------------------------------------
EVENT_LOOKS = {"inner": {"type": "logrank", "alternative": "less"}, "fractions": [0.4, 0.7, 1.0], "spending": "obf"}


@pytest.mark.slow
def test_type1_error_of_logrank_at_event_fractions_with_obf_spending():
    """H0 (hazard ratio 1): overall rejection alpha = 0.025 and per look the spending function's increments
    (Lan & DeMets 1983) within 4 MCSE: the log-rank score at event-count looks has independent increments
    with information proportional to the events (Tsiatis 1981)."""
    g = GroupSequential(**EVENT_LOOKS)
    reps = 10_000
    res = sp.run(sp.Scenario(sp.SurvivalTwoArm(n=150, median=12, hazard_ratio=1.0, accrual=24, follow_up=12),
                             analyses={"gs": g}, alpha=0.025), reps=reps, execution=SERIAL)
    assert res.paths["gs"] == "batch"
    s = res.summaries["gs"]
    _within(s["power"], 0.025, reps)
    for k, cross in enumerate(g.design().crossing):
        _within(s["per_hypothesis"][f"look {k + 1} efficacy"]["power"], float(cross), reps)


@pytest.mark.slow
def test_power_of_logrank_at_event_fractions_matches_schoenfeld_information():
    """Hazard ratio 0.75: the rejection rate and the efficacy stops per look within 4 MCSE of the recursion's
    exit probabilities at drift |log HR| sqrt(D / 4), D the expected number of events (Schoenfeld 1983;
    Jennison & Turnbull 2000, ch. 3 and 7)."""
    g = GroupSequential(**EVENT_LOOKS)
    p = sp.SurvivalTwoArm(n=200, median=12, hazard_ratio=0.75, accrual=24, follow_up=12)
    reps = 10_000
    res = sp.run(sp.Scenario(p, analyses={"gs": g}, alpha=0.025), reps=reps, execution=SERIAL.replace(seed=31))
    exact = crossing_probabilities(g.design(), abs(math.log(0.75)) * math.sqrt(p.expected_events() / 4))
    s = res.summaries["gs"]
    _within(s["power"], exact.rejection, reps)
    for k in range(3):
        _within(s["per_hypothesis"][f"look {k + 1} efficacy"]["power"], float(exact.upper[k]), reps)
