"""Group-sequential designs in simulation (simpower/analyses/groupseq.py) against outside references.

Tolerances are Monte Carlo errors (4 MCSE, the MCSE taken at the reference value) with fixed seeds.
References: Armitage, McPherson & Rowe (1969, J R Stat Soc A 132:235-244) for repeated testing at a
nominal level, computed here by multivariate normal integration (scipy.stats.multivariate_normal.cdf;
Corr(Z_i, Z_j) = sqrt(t_i / t_j), Jennison & Turnbull 2000, ch. 3); the design's exit probabilities by
the recursion of simpower.analytic.groupseq (itself checked against multivariate_normal in
tests/test_groupseq.py); the z-test's fixed-sample size (e.g. Chow, Shao & Wang 2008, eq. 3.2.3).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

import simpower as sp
from simpower.analyses.groupseq import GroupSequential, arm_sizes_of, look_sizes, looks_table, stop_of
from simpower.analytic import crossing_probabilities, inflation_factor
from simpower.errors import ParameterError
from simpower.execution import Execution
from simpower.registry import build
from simpower.testing import check_analysis

SERIAL = Execution(n_jobs=1, backend="serial", seed=20261202)


def _run(analysis, process, reps, alpha=0.025, seed=20261202):
    sc = sp.Scenario(process, analyses={"gs": analysis}, alpha=alpha)
    return sp.run(sc, reps=reps, execution=SERIAL.replace(seed=seed))


def _within(sim, ref, reps, k=4.0):
    mcse = math.sqrt(max(ref * (1 - ref), 1e-12) / reps)
    assert abs(sim - ref) <= k * mcse, f"simulated {sim:.5f}, reference {ref:.5f}, 4 MCSE = {k * mcse:.5f}"


# -- (a) type I error of the design ----------------------------------------------------------------
@pytest.mark.parametrize("spending", ["obf", "pocock"])
def test_type1_error_with_a_z_test_is_the_design_alpha(spending):
    """One-sided 0.025, K = 3, known variance: the rejection rate under H0 is alpha (Lan & DeMets 1983)."""
    g = GroupSequential(inner={"type": "z_test", "alternative": "greater"}, fractions=3, spending=spending)
    reps = 20_000
    res = _run(g, sp.NormalTwoArm(n=30, effect=0.0), reps)
    assert res.paths["gs"] == "batch"
    s = res.summaries["gs"]
    _within(s["power"], 0.025, reps)
    # and the rejections per look follow the spending function's increments (the design's H0 crossing)
    for k, cross in enumerate(g.design().crossing):
        _within(s["per_hypothesis"][f"look {k + 1} efficacy"]["power"], float(cross), reps)


@pytest.mark.parametrize("binding", [True, False])
def test_type1_error_with_a_futility_rule_obeyed(binding):
    """Beta-spending futility (Pampallona, Tsiatis & Kim 2001): binding keeps alpha exactly when the rule is
    obeyed; non-binding boundaries ignore the rule, so obeying it gives less than alpha (the recursion's value)."""
    g = GroupSequential(inner={"type": "z_test", "alternative": "greater"}, fractions=3,
                        futility={"kind": "obf", "beta": 0.2}, binding=binding)
    reps = 20_000
    s = _run(g, sp.NormalTwoArm(n=30, effect=0.0), reps).summaries["gs"]
    ref = crossing_probabilities(g.design(), 0.0)
    if binding:
        assert ref.rejection == pytest.approx(0.025, abs=1e-9)
    else:
        assert ref.rejection < 0.025 - 0.001
    _within(s["power"], ref.rejection, reps)
    for k in range(2):
        _within(s["per_hypothesis"][f"look {k + 1} futility"]["power"], float(ref.lower[k]), reps)


# -- (b) naive repeated testing ----------------------------------------------------------------------
AMR_MEMORY = {2: 0.083, 3: 0.107, 4: 0.126, 5: 0.142}  # Armitage, McPherson & Rowe (1969), Table 2; from memory


def _amr(k: int, alpha: float = 0.05) -> float:
    """P(|Z_j| >= z_{1-alpha/2} at some of k equally spaced looks) by multivariate normal integration."""
    t = np.arange(1, k + 1) / k
    corr = np.sqrt(np.minimum.outer(t, t) / np.maximum.outer(t, t))
    c = stats.norm.ppf(1 - alpha / 2)
    inside = stats.multivariate_normal(np.zeros(k), corr, abseps=1e-6, releps=1e-6).cdf(
        np.full(k, c), lower_limit=np.full(k, -c))
    return 1.0 - float(inside)


@pytest.mark.parametrize("k", [2, 3, 4, 5])
def test_naive_repeated_testing_inflates_alpha_as_armitage_mcpherson_rowe(k):
    ref = _amr(k)
    assert abs(ref - AMR_MEMORY[k]) < 0.0015  # the integration agrees with the published table (from memory)
    g = GroupSequential(inner={"type": "z_test"}, fractions=k, boundary="nominal", alpha=0.05)
    assert g.design().sides == 2 and np.allclose(g.design().efficacy, stats.norm.ppf(0.975))
    reps = 10_000
    res = _run(g, sp.NormalOneSample(n=60, effect=0.0), reps, alpha=0.05)
    _within(res.summaries["gs"]["power"], ref, reps)
    # the analytic core's recursion gives the same inflation
    assert abs(g.design().spent[-1] - ref) < 1e-5


# -- (c) stopping probabilities and expected sample size under H1 ---------------------------------------
@pytest.mark.parametrize("futility", [None, [0.0, 0.75]])
def test_stopping_per_look_and_expected_n_under_h1_match_the_recursion(futility):
    """Two arms, known SD 1, n = 40 per arm, effect 0.5: drift = 0.5 sqrt(40 / 2) (Jennison & Turnbull 2000, ch. 3)."""
    g = GroupSequential(inner={"type": "z_test", "alternative": "greater"}, fractions=[0.25, 0.5, 1.0],
                        spending="obf", futility=futility)
    proc = sp.NormalTwoArm(n=40, effect=0.5)
    reps = 10_000
    res = _run(g, proc, reps)
    s = res.summaries["gs"]
    cr = crossing_probabilities(g.design(), 0.5 * math.sqrt(40 / 2))
    _within(s["power"], cr.rejection, reps)
    rows, overall = looks_table(g, s, arm_sizes_of(proc))
    assert [r["n"] for r in rows] == [20, 40, 80]
    for k, row in enumerate(rows):
        _within(row["stop_efficacy"], float(cr.upper[k]), reps)
        if futility is not None and k < 2:
            _within(row["stop_futility"], float(cr.lower[k]), reps)
    expected_n = float(np.dot(cr.stopping, [20, 40, 80]))
    sd_n = math.sqrt(float(np.dot(cr.stopping, np.square([20, 40, 80]))) - expected_n**2)
    assert abs(overall["expected_n"] - expected_n) <= 4 * sd_n / math.sqrt(reps)
    assert overall["expected_n_mcse"] == pytest.approx(sd_n / math.sqrt(reps), rel=0.1)
    # the naive estimate at stopping is biased upwards when early stops are for efficacy (Whitehead 1986)
    if futility is None:
        assert s["bias"] > 4 * s["bias_mcse"]


# -- (d) t-test at small n: the p scale against the z scale ----------------------------------------------
def test_t_test_at_small_n_p_scale_keeps_alpha_where_the_z_scale_exceeds_it():
    """Two looks at 5 and 10 per arm, Student's t, one-sided 0.025, Pocock-type spending.

    The z scale compares t statistics with normal boundaries, so it rejects whenever the p scale does
    (t >= t-quantile > z-quantile at the same nominal level) and more: its type I error exceeds alpha.
    The p scale compares each look's exact t p-value with the nominal level; the looks' t statistics
    are not exactly jointly normal, so its error is near alpha but not exact (measured here: within
    4 MCSE at 40,000 replicates).
    """
    proc = sp.NormalTwoArm(n=10, effect=0.0)
    common = dict(inner={"type": "t_test", "alternative": "greater"}, fractions=[0.5, 1.0], spending="pocock")
    sc = sp.Scenario(proc, analyses={"z": GroupSequential(**common, scale="z"),
                                     "p": GroupSequential(**common, scale="p")}, alpha=0.025)
    reps = 40_000
    res = sp.run(sc, reps=reps, execution=SERIAL)
    z, p = res.summaries["z"], res.summaries["p"]
    assert np.all(res.records["p"].pvalue >= res.records["z"].pvalue)  # z rejects wherever p does
    _within(p["power"], 0.025, reps)
    assert z["power"] - 0.025 > 4 * math.sqrt(0.025 * 0.975 / reps)
    assert z["power"] > p["power"]


# -- the required maximum size ---------------------------------------------------------------------------
def test_search_finds_the_max_n_of_the_inflation_factor():
    """Max information = fixed-sample information x the inflation factor (Jennison & Turnbull 2000, ch. 2)."""
    g = GroupSequential(inner={"type": "z_test", "alternative": "greater"}, fractions=3)
    sc = sp.Scenario(sp.NormalTwoArm(n=60, effect=0.5), g, alpha=0.025)
    fixed = 2 * (stats.norm.ppf(0.975) + stats.norm.ppf(0.8)) ** 2 / 0.5**2  # per arm, known SD 1
    target = fixed * inflation_factor(g.design(), 0.8)
    res = sp.required_n(sc, 0.8, low=20, high=200, level=0.99, execution=SERIAL.replace(seed=5))
    assert res.converged
    lo, hi = res.interval
    assert lo - 1 <= target <= hi + 1, (target, res.interval)


# -- the batch path, the per-replicate path and reproducibility -----------------------------------------
@pytest.mark.parametrize("spec, process", [
    ({"inner": {"type": "t_test", "alternative": "greater"}, "fractions": [0.5, 1.0], "futility": [0.0]},
     ("normal_two_arm", {"n": 12, "effect": 0.5})),
    ({"inner": {"type": "welch_t"}, "fractions": 3, "spending": "gamma", "param": -2, "alpha": 0.05},
     ("normal_two_arm", {"n": 12, "effect": 0.5, "ratio": 2})),
    ({"inner": {"type": "t_test", "alternative": "less"}, "fractions": 2, "scale": "p",
      "futility": {"kind": "pocock", "beta": 0.2}, "binding": True},
     ("normal_one_sample", {"n": 12, "effect": -0.5})),
    ({"inner": {"type": "z_test", "alternative": "greater"}, "fractions": 3, "boundary": "classical",
      "spending": "pocock"}, ("normal_two_arm", {"n": 9, "effect": 0.5, "missing": {"type": "mcar", "rate": 0.2}})),
])
def test_batch_path_equals_per_replicate_path(spec, process):
    g = GroupSequential(**spec)
    out = check_analysis(g, build("process", {"type": process[0], **process[1]}), size=12)
    assert out["batch_compared"] >= 10  # replicates where an arm has no observed outcome at look 1 fail on both paths


def test_records_tell_look_decision_and_size():
    g = GroupSequential(inner={"type": "z_test", "alternative": "greater"}, fractions=3, futility=[-0.5, 0.5])
    res = _run(g, sp.NormalTwoArm(n=30, effect=0.4), 400)
    rec = res.records["gs"]
    look, decision = stop_of(rec.pvalues, 3)
    assert set(decision) <= {"efficacy", "futility", "none"}
    assert np.array_equal(rec.pvalue == 0, decision == "efficacy")
    assert np.all((decision != "futility") | (look < 3))
    n_used = np.array([60 * f for f in (1 / 3, 2 / 3, 1.0)])[look - 1]
    rows, overall = looks_table(g, res.summaries["gs"], [30, 30])
    assert overall["expected_n"] == pytest.approx(n_used.mean())


@pytest.mark.slow
def test_same_seed_same_numbers_for_any_executor():
    g = GroupSequential(inner={"type": "t_test", "alternative": "greater"}, fractions=3, futility=[0.0, 0.5])
    sc = sp.Scenario(sp.NormalTwoArm(n=15, effect=0.5), analyses={"gs": g}, alpha=0.025)
    a = sp.run(sc, reps=600, execution=SERIAL.replace(chunk_size=200))
    for backend in ("threading", "loky"):  # loky: worker processes get the scenario pickled
        b = sp.run(sc, reps=600, execution=SERIAL.replace(chunk_size=200, backend=backend, n_jobs=2))
        assert np.array_equal(a.records["gs"].pvalues, b.records["gs"].pvalues)
        assert a.summaries["gs"]["power"] == b.summaries["gs"]["power"]
        assert a.summaries["gs"]["mean_estimate"] == b.summaries["gs"]["mean_estimate"]


def test_look_sizes_round_the_fraction_of_each_arm():
    assert list(look_sizes(1 / 3, np.array([30, 31, 2]))) == [10, 10, 1]
    assert list(look_sizes(1.0, np.array([7]))) == [7]


# -- bad input: one line naming the field ------------------------------------------------------------------
@pytest.mark.parametrize("kw, text", [
    ({"fractions": [0.5, 0.4, 1.0]}, "`fractions` must increase"),
    ({"fractions": [0.5, 0.9]}, "`fractions` must end at 1"),
    ({"spending": "linear"}, "`spending`"),
    ({"boundary": "classical", "spending": "gamma"}, "`spending` must be 'obf' or 'pocock'"),
    ({"spending": "power"}, "`param` is required"),
    ({"futility": [0.0]}, "`futility` must list one z value per interim look"),
    ({"futility": {"kind": "obf", "beta": 2}}, "`futility.beta`"),
    ({"scale": "t"}, "`scale`"),
    ({"boundary": "classical", "binding": True}, "`binding` must be false"),
    ({"boundary": "nominal", "futility": [0.0, 0.0]}, "`futility` and `param` must be None"),
])
def test_bad_parameters_get_one_line(kw, text):
    with pytest.raises(ParameterError) as err:
        GroupSequential(inner={"type": "z_test", "alternative": "greater"}, **kw)
    assert text in str(err.value) and "\n" not in str(err.value)


def test_sides_must_match_the_inner_alternative():
    with pytest.raises(ParameterError, match="`inner.alternative` must be 'greater' or 'less'"):
        GroupSequential(inner={"type": "t_test"}, sides=1)


# -- the [looks] block and the command line ------------------------------------------------------------------
ROOT = __import__("pathlib").Path(__file__).resolve().parent.parent
BUNDLED = ROOT / "scenarios" / "staged_breathing_app.toml"

BASE = """
alpha = 0.025
[process]
type = "normal_two_arm"
n = 30
effect = 0.5
[analyses.a]
type = "z_test"
alternative = "greater"
[analyses.b]
type = "t_test"
alternative = "greater"
"""


def test_looks_block_wraps_the_named_analyses():
    from simpower.scenario_files import loads

    sf = loads(BASE + "[looks]\nanalyses = [\"a\"]\nfractions = [0.5, 1]\nspending = \"pocock\"\n")
    a, b = sf.scenario.analyses["a"], sf.scenario.analyses["b"]
    assert a.name == "group_sequential" and a.inner.name == "z_test" and b.name == "t_test"
    assert a.alpha == 0.025 and a.design().method == "spending pocock"
    sf = loads(BASE + "[looks]\nfractions = 2\n")
    assert all(x.name == "group_sequential" for x in sf.scenario.analyses.values())


@pytest.mark.parametrize("block, text", [
    ("fractions = [0.6, 0.5, 1]", "`looks.fractions` must increase"),
    ("fractions = [0.5, 0.8]", "`looks.fractions` must end at 1"),
    ("spending = \"linear\"", "`looks.spending` must be one of"),
    ("scale = \"q\"", "`looks.scale`"),
    ("analyses = [\"c\"]", "`looks.analyses` names 'c'"),
    ("futility = [0.0]", "`looks.futility` must list one z value per interim look"),
    ("fraction = 3", "`looks.fraction` is not a field of [looks]"),
])
def test_looks_block_errors_name_the_field(block, text):
    from simpower.errors import SimpowerError
    from simpower.scenario_files import loads

    with pytest.raises(SimpowerError) as err:
        loads(BASE + "[looks]\n" + block + "\n")
    assert text in str(err.value) and "\n" not in str(err.value)


def test_bad_looks_block_exits_non_zero_in_one_line(tmp_path, capsys):
    from simpower.cli.main import main

    f = tmp_path / "bad.toml"
    f.write_text(BASE + "[looks]\nfractions = [0.5, 0.8]\n")
    assert main(["run", str(f), "--reps", "50", "--jobs", "1", "-q"]) != 0
    err = capsys.readouterr().err.strip()
    assert "`looks.fractions` must end at 1" in err and "Traceback" not in err


def test_run_prints_the_per_look_table_of_the_bundled_scenario(capsys):
    from simpower.cli.main import main

    assert main(["run", str(BUNDLED), "--reps", "400", "--jobs", "1", "-q"]) == 0
    out = capsys.readouterr().out
    assert "Group-sequential design of `sequential`" in out
    lines = [ln.split() for ln in out.splitlines() if ln.strip()[:1].isdigit() and len(ln.split()) >= 9]
    assert [int(row[0]) for row in lines[:3]] == [1, 2, 3] and [int(row[2]) for row in lines[:3]] == [60, 120, 180]


def test_report_writes_the_looks_section_and_plot(tmp_path):
    from simpower.cli.main import main

    assert main(["report", str(BUNDLED), "--reps", "300", "--null-reps", "300", "--jobs", "1", "-q",
                 "--out", str(tmp_path / "r")]) == 0
    md = (tmp_path / "r" / "report.md").read_text()
    assert "## Group-sequential design of sequential" in md and "Alpha spent (cumulative)" in md
    assert (tmp_path / "r" / "looks_sequential.png").stat().st_size > 1000


def test_same_numbers_after_resuming_from_a_store(tmp_path):
    g = GroupSequential(inner={"type": "t_test", "alternative": "greater"}, fractions=3, futility=[0.0, 0.5])
    sc = sp.Scenario(sp.NormalTwoArm(n=15, effect=0.5), analyses={"gs": g}, alpha=0.025)
    ex = SERIAL.replace(chunk_size=200)
    fresh = sp.run(sc, reps=600, execution=ex)
    store = tmp_path / "s.sqlite"
    sp.run(sc, reps=200, execution=ex.replace(store=store))  # an interrupted run: its first chunk only
    resumed = sp.run(sc, reps=600, execution=ex.replace(store=store))
    assert np.array_equal(fresh.records["gs"].pvalues, resumed.records["gs"].pvalues)
    assert np.array_equal(fresh.records["gs"].estimate, resumed.records["gs"].estimate, equal_nan=True)
    assert fresh.summaries["gs"]["per_hypothesis"] == resumed.summaries["gs"]["per_hypothesis"]


def test_plan_of_a_file_with_looks_runs_the_design(tmp_path):
    f = tmp_path / "trial.toml"
    f.write_text("seed = 3\nreps = 400\n" + BASE + "[looks]\nanalyses = [\"a\"]\nfractions = 2\n"
                 "[null_check]\nenabled = false\n[execution]\nbackend = \"serial\"\n")
    plan = sp.load_plan(f)
    assert plan.looks == {"analyses": ("a",), "fractions": 2}
    out = sp.execute(plan)
    assert "per_hypothesis" in out.run.summaries["a"] and "look 2 efficacy" in out.run.summaries["a"]["per_hypothesis"]


def test_a_user_function_inner_analysis_runs_per_replicate_with_the_same_decisions():
    """scipy.stats.ttest_ind (one-sided) as a user function on the p scale: the decisions of the built-in t-test."""
    def scipy_t(data):
        y, arm = np.asarray(data["y"]), np.asarray(data["arm"])
        return stats.ttest_ind(y[arm == 1], y[arm == 0], alternative="greater").pvalue

    common = dict(fractions=[0.5, 1.0], spending="pocock", futility=[0.0], scale="p")
    sc = sp.Scenario(sp.NormalTwoArm(n=12, effect=0.6), alpha=0.025, analyses={
        "user": GroupSequential(inner=scipy_t, **common),
        "builtin": GroupSequential(inner={"type": "t_test", "alternative": "greater"}, **common)})
    res = sp.run(sc, reps=300, execution=SERIAL)
    assert res.paths["user"].startswith("per-replicate") and res.paths["builtin"] == "batch"
    assert np.array_equal(res.records["user"].pvalues, res.records["builtin"].pvalues)


def _survival_without_entry(rng, n=30):
    """Time-to-event data with no calendar time of enrolment (no `entry` column)."""
    data = staggered_survival(rng, n)
    del data["entry"]
    return data


def test_time_to_event_data_without_entry_times_are_refused_in_one_line():
    sc = sp.Scenario(_survival_without_entry, params={"n": 30},
                     analyses={"gs": GroupSequential(inner={"type": "logrank"}, fractions=2, alpha=0.05)})
    with pytest.raises(Exception, match="need an `entry` column"):
        sp.run(sc, reps=50, execution=SERIAL)
    proc = build("process", {"type": "survival_two_arm", "n": 30, "median": 1.0, "hazard_ratio": 0.6,
                             "accrual": 1.0, "follow_up": 2.0})
    assert "entry" in proc.draw_batch(np.random.default_rng(1), 2)


def test_a_pickled_copy_decides_as_the_original():
    """Worker processes get the analysis pickled (parameters only): derived settings must be recomputed."""
    import cloudpickle

    g = GroupSequential(inner={"type": "z_test", "alternative": "less"}, fractions=2, futility=[0.5])
    data = sp.NormalTwoArm(n=20, effect=-0.6).draw_batch(np.random.default_rng(4), 30)
    copy = cloudpickle.loads(cloudpickle.dumps(g))
    for i in range(30):
        a, b = g(data.replicate(i)), copy(data.replicate(i))
        assert np.array_equal(a.pvalues, b.pvalues) and a.pvalue == b.pvalue


# -- time to event: looks at event counts -----------------------------------------------------------------
def staggered_survival(rng, n=100, hazard_ratio=1.0, accrual=2.0, follow_up=1.0):
    """Two arms of n, uniform entry over [0, accrual], exponential times (control median 1), study end at
    accrual + follow_up; an `entry` column gives each participant's calendar time of enrolment."""
    arm = np.repeat([0, 1], n)
    entry = rng.uniform(0.0, accrual, 2 * n)
    rate = np.log(2.0) * np.where(arm == 1, hazard_ratio, 1.0)
    t = rng.exponential(1.0 / rate)
    cens = accrual + follow_up - entry
    return {"time": np.minimum(t, cens), "event": (t <= cens).astype(np.int64), "arm": arm, "entry": entry}


def test_event_count_looks_slice_the_data_as_they_stood():
    data = staggered_survival(np.random.default_rng(1))
    g = GroupSequential(inner={"type": "logrank", "alternative": "less"}, fractions=[0.5, 1.0])
    look = g._slice(data, 0)
    calendar = np.sort((data["entry"] + data["time"])[data["event"] == 1])
    d = int(np.floor(0.5 * calendar.size + 0.5))
    assert look["event"].sum() == d  # the look is at the d-th event in calendar time
    assert np.all(look["entry"] + look["time"] <= calendar[d - 1] + 1e-12)
    assert look["time"].size == np.count_nonzero(data["entry"] <= calendar[d - 1])
    with pytest.raises(ValueError, match="need an `entry` column"):
        g._slice({k: v for k, v in data.items() if k != "entry"}, 0)


@pytest.mark.slow
def test_type1_error_of_a_logrank_at_event_count_looks():
    """The log-rank statistic at event-count looks has independent increments with information proportional
    to the events (Tsiatis 1981, Biometrika 68:311-315): the design's alpha holds."""
    g = GroupSequential(inner={"type": "logrank", "alternative": "less"}, fractions=[0.5, 1.0], spending="pocock")
    sc = sp.Scenario(staggered_survival, params={"n": 100, "hazard_ratio": 1.0}, analyses={"gs": g}, alpha=0.025)
    reps = 10_000
    res = sp.run(sc, reps=reps, execution=SERIAL)
    _within(res.summaries["gs"]["power"], 0.025, reps)
    _within(res.summaries["gs"]["per_hypothesis"]["look 1 efficacy"]["power"], float(g.design().crossing[0]), reps)


def test_batch_path_with_padding_uses_the_looks_as_masks():
    """Variable arm sizes (padding) and missing outcomes: each look is a `present` mask over the padded rows,
    and the batch path gives what the per-replicate path gives on each replicate's own rows."""
    from simpower.batch import Batch

    rng = np.random.default_rng(11)
    r, width = 40, 30
    arm = np.repeat([0, 1], width // 2)
    y = rng.normal(0.4 * arm, 1.0, (r, width))
    y[rng.random((r, width)) < 0.1] = np.nan
    present = rng.random((r, width)) < 0.85
    batch = Batch(r, {"y": y, "present": present}, {"arm": arm}, {"missing": True})
    g = GroupSequential(inner={"type": "t_test", "alternative": "greater"}, fractions=[0.4, 0.7, 1.0],
                        futility=[-0.5, 0.0])
    assert g.supports_batch(batch)
    res = g.batch(batch)
    for i in range(r):
        one = g(batch.replicate(i))
        np.testing.assert_allclose(res.pvalues[i], one.pvalues, rtol=0, atol=0)
        np.testing.assert_allclose([res.estimate[i], res.se[i]], [one.estimate, one.se], rtol=1e-9)
