"""Interim futility by predictive probability or conditional power (simpower/analytic/futility.py and the
`futility = {rule = ...}` option of group_sequential) against outside references.

References: conditional power P(Z_final >= c | Z_t = z) = Phi((z sqrt(t) + theta (1 - t) - c) / sqrt(1 - t)),
under the current trend theta = z / sqrt(t) (Lan, Simon & Halperin 1982, Commun Stat C 1:207-219; Lan & Wittes
1988, Biometrics 44:579-585); the predictive probability is that conditional power averaged over the posterior
of theta (Spiegelhalter, Freedman & Blackburn 1986, Control Clin Trials 7:8-17), with a flat prior
Phi((z - c sqrt(t)) / sqrt(1 - t)) (Dmitrienko & Wang 2006, Stat Med 25:2178-2195). The Brownian-motion
covariance Corr(Z_s, Z_t) = sqrt(s / t) is Jennison & Turnbull (2000, ch. 3). Integrals are checked by
scipy.integrate.quad; simulated rates within 4 MCSE of the recursion of simpower.analytic.groupseq.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, stats

import simpower as sp
from simpower.analyses.base import TestResult
from simpower.analyses.groupseq import LOST, GroupSequential, looks_table, stop_of
from simpower.analytic import boundaries, crossing_probabilities
from simpower.analytic.futility import conditional_power, futility_z, predictive_probability
from simpower.errors import ParameterError
from simpower.execution import Execution
from simpower.testing import check_analysis

SERIAL = Execution(n_jobs=1, backend="serial", seed=20261202)
POINTS = [(1.0, 0.5, 1.96), (-0.3, 0.25, 2.2), (2.1, 0.8, 1.99), (0.4, 1 / 3, 2.04)]


def _within(sim, ref, reps, k=4.0):
    mcse = math.sqrt(max(ref * (1 - ref), 1e-12) / reps)
    assert abs(sim - ref) <= k * mcse, f"simulated {sim:.5f}, reference {ref:.5f}, 4 MCSE = {k * mcse:.5f}"


# -- the closed forms -------------------------------------------------------------------------------
def _cp_given_theta(theta, z, t, c):
    """P(Z_final >= c | Z_t = z, theta) from the bivariate normal of (Z_t, Z_final): means theta sqrt(t) and
    theta, correlation sqrt(t) (Jennison & Turnbull 2000, ch. 3), conditioned by the usual normal formula."""
    rho = math.sqrt(t)
    mean = theta + rho * (z - theta * math.sqrt(t))
    return stats.norm.sf(c, loc=mean, scale=math.sqrt(1 - rho**2))


@pytest.mark.parametrize("z, t, c", POINTS)
def test_conditional_power_is_the_conditional_normal_probability(z, t, c):
    assert conditional_power(z, t, c) == pytest.approx(_cp_given_theta(z / math.sqrt(t), z, t, c), rel=1e-12)
    assert conditional_power(z, t, c, drift=2.8) == pytest.approx(_cp_given_theta(2.8, z, t, c), rel=1e-12)
    # Lan & Wittes (1988): under the current trend, Phi((z / sqrt(t) - c) / sqrt(1 - t))
    assert conditional_power(z, t, c) == pytest.approx(stats.norm.cdf((z / math.sqrt(t) - c) / math.sqrt(1 - t)),
                                                      rel=1e-12)


def _pp_by_quadrature(z, t, c, prior=None):
    """Conditional power averaged over the posterior of theta, the posterior being prior x likelihood of the
    score B = z sqrt(t) ~ N(theta t, t), normalised by quadrature (flat prior: prior = None)."""
    b = z * math.sqrt(t)

    def post(theta):
        like = stats.norm.pdf(b, loc=theta * t, scale=math.sqrt(t))
        return like if prior is None else like * stats.norm.pdf(theta, prior[0], 1 / math.sqrt(prior[1]))

    lo, hi = b / t - 12 / math.sqrt(t), b / t + 12 / math.sqrt(t)
    num = integrate.quad(lambda th: _cp_given_theta(th, z, t, c) * post(th), lo, hi, epsabs=1e-13, limit=200)[0]
    den = integrate.quad(post, lo, hi, epsabs=1e-13, limit=200)[0]
    return num / den


@pytest.mark.parametrize("z, t, c", POINTS)
def test_predictive_probability_flat_prior_by_quadrature_and_closed_form(z, t, c):
    pp = predictive_probability(z, t, c)
    assert pp == pytest.approx(_pp_by_quadrature(z, t, c), abs=1e-9)
    # Dmitrienko & Wang (2006), flat prior: Phi((z - c sqrt(t)) / sqrt(1 - t))
    assert pp == pytest.approx(stats.norm.cdf((z - c * math.sqrt(t)) / math.sqrt(1 - t)), rel=1e-12)


@pytest.mark.parametrize("z, t, c", POINTS)
@pytest.mark.parametrize("mean, info", [(2.5, 0.2), (0.0, 1.0), (-1.0, 3.0)])
def test_predictive_probability_normal_prior_by_quadrature(z, t, c, mean, info):
    got = predictive_probability(z, t, c, prior_mean=mean, prior_information=info)
    assert got == pytest.approx(_pp_by_quadrature(z, t, c, (mean, info)), abs=1e-9)


def test_predictive_probability_limits_of_the_prior():
    """A prior worth nothing is the flat prior; a prior worth everything fixes theta at its mean, where the
    predictive probability is the conditional power at that drift (Spiegelhalter et al. 1986)."""
    z, t, c = 0.8, 0.4, 2.0
    assert predictive_probability(z, t, c, 3.0, 1e-9) == pytest.approx(predictive_probability(z, t, c), abs=1e-8)
    assert predictive_probability(z, t, c, 3.0, 1e9) == pytest.approx(conditional_power(z, t, c, drift=3.0), abs=1e-7)


@pytest.mark.parametrize("rule, extra", [("predictive", {}), ("predictive", {"prior_mean": 2.0, "prior_information": 0.5}),
                                         ("conditional", {}), ("conditional", {"drift": 2.5})])
def test_futility_z_is_where_the_probability_meets_the_threshold(rule, extra):
    t = np.array([0.25, 0.5, 0.75])
    f = futility_z(rule, 0.15, t, 1.98, **extra)
    if rule == "predictive":
        got = predictive_probability(f, t, 1.98, extra.get("prior_mean"), extra.get("prior_information"))
    else:
        got = conditional_power(f, t, 1.98, extra.get("drift"))
    np.testing.assert_allclose(got, 0.15, rtol=1e-12)
    assert np.all(np.diff(f) > 0) or rule == "conditional"  # the rule asks for more as the trial goes on


@pytest.mark.parametrize("call, field", [
    (lambda: futility_z("bayes", 0.1, 0.5, 2.0), "`rule`"),
    (lambda: futility_z("predictive", 1.0, 0.5, 2.0), "`threshold`"),
    (lambda: predictive_probability(1.0, 1.0, 2.0), "`fraction`"),
    (lambda: predictive_probability(1.0, 0.5, 2.0, prior_mean=1.0), "`prior_mean`, `prior_information`"),
    (lambda: predictive_probability(1.0, 0.5, 2.0, prior_mean=1.0, prior_information=0.0), "`prior_information`"),
])
def test_bad_input_names_the_field(call, field):
    with pytest.raises(ParameterError) as err:
        call()
    assert str(err.value).startswith(field) and "\n" not in str(err.value)


# -- the design --------------------------------------------------------------------------------------
def _gs(rule, **kw):
    return GroupSequential(inner={"type": "z_test", "alternative": "greater"}, fractions=3, futility=rule, **kw)


def test_non_binding_rule_keeps_the_efficacy_boundaries_and_sets_the_rule_z_boundaries():
    g = _gs({"rule": "predictive", "threshold": 0.1})
    plain = boundaries(3, 0.025, 1, "obf")
    b = g.design()
    np.testing.assert_array_equal(b.efficacy, plain.efficacy)  # not recomputed
    t = b.fractions[:2]
    np.testing.assert_allclose(b.futility[:2], futility_z("predictive", 0.1, t, plain.efficacy[-1]), rtol=1e-14)
    np.testing.assert_allclose(predictive_probability(b.futility[:2], t, plain.efficacy[-1]), 0.1, rtol=1e-12)
    assert "predictive probability <= 0.1 (flat prior)" in b.method
    assert g.hypothesis_names()[-1] == LOST


def test_binding_rule_is_a_fixed_point_that_keeps_alpha_when_obeyed():
    g = _gs({"rule": "conditional", "threshold": 0.2}, binding=True)
    b = g.design()
    np.testing.assert_allclose(b.futility[:2], futility_z("conditional", 0.2, b.fractions[:2], b.efficacy[-1]),
                               atol=1e-10)
    assert b.efficacy[-1] < boundaries(3, 0.025).efficacy[-1]  # binding futility gives alpha back to the end
    assert crossing_probabilities(b, 0.0).rejection == pytest.approx(0.025, abs=1e-9)


@pytest.mark.parametrize("kw, text", [
    ({"futility": {"rule": "predictive", "threshold": 0.0}}, "`futility.threshold` must be in (0, 1)"),
    ({"futility": {"rule": "predictive", "threshold": 1.2}}, "`futility.threshold` must be in (0, 1)"),
    ({"futility": {"rule": "posterior", "threshold": 0.1}}, "`futility.rule` must be one of"),
    ({"futility": {"rule": "predictive"}}, "`futility.threshold` is required"),
    ({"futility": {"rule": "conditional", "threshold": 0.1, "prior_mean": 1.0}}, "`futility.prior_mean`"),
    ({"futility": {"rule": "predictive", "threshold": 0.1, "drift": 1.0}}, "`futility.drift`"),
    ({"futility": {"rule": "predictive", "threshold": 0.1, "lost": True}}, "`futility.lost` is not a field"),
    ({"futility": {"rule": "predictive", "threshold": 0.99}}, "`futility.threshold` 0.99 puts the futility"),
])
def test_bad_rules_get_one_line(kw, text):
    with pytest.raises(ParameterError) as err:
        GroupSequential(inner={"type": "z_test", "alternative": "greater"}, fractions=3, **kw)
    assert str(err.value).startswith(text) and "\n" not in str(err.value)


BASE = """
alpha = 0.025
[process]
type = "normal_two_arm"
n = 30
effect = 0.5
[analyses.a]
type = "z_test"
alternative = "greater"
"""


@pytest.mark.parametrize("block, text", [
    ("futility = {rule = \"predictive\", threshold = 1.5}", "`looks.futility.threshold` must be in (0, 1); got 1.5."),
    ("futility = {rule = \"bayes\", threshold = 0.1}", "`looks.futility.rule` must be one of 'predictive', "
                                                      "'conditional'; got 'bayes'."),
])
def test_looks_block_validates_the_rule_in_one_line(block, text, tmp_path, capsys):
    from simpower.cli.main import main
    from simpower.errors import SimpowerError
    from simpower.scenario_files import loads

    with pytest.raises(SimpowerError) as err:
        loads(BASE + "[looks]\nfractions = 3\n" + block + "\n")
    assert str(err.value).endswith(text) and "\n" not in str(err.value)
    f = tmp_path / "bad.toml"
    f.write_text(BASE + "[looks]\nfractions = 3\n" + block + "\n")
    assert main(["run", str(f), "--reps", "50", "--jobs", "1", "-q"]) != 0
    err = capsys.readouterr().err.strip()
    assert text in err and "Traceback" not in err


def test_looks_block_with_a_rule_runs_and_prints_the_power_lost(capsys):
    from simpower.cli.main import main
    from simpower.scenario_files import loads

    sf = loads(BASE + "[looks]\nfractions = 3\nfutility = {rule = \"conditional\", threshold = 0.2}\n")
    assert "conditional power under the current trend <= 0.2" in sf.scenario.analyses["a"].design().method
    import pathlib
    import tempfile
    with tempfile.TemporaryDirectory() as d:
        f = pathlib.Path(d) / "ok.toml"
        f.write_text(BASE + "[looks]\nfractions = 3\nfutility = {rule = \"predictive\", threshold = 0.1}\n")
        assert main(["run", str(f), "--reps", "300", "--jobs", "1", "-q"]) == 0
    assert "power lost to futility" in capsys.readouterr().out


# -- batch path = per-replicate path -----------------------------------------------------------------
@pytest.mark.parametrize("spec, process", [
    ({"inner": {"type": "t_test", "alternative": "greater"}, "fractions": 3,
      "futility": {"rule": "predictive", "threshold": 0.2}}, sp.NormalTwoArm(n=14, effect=0.3)),
    ({"inner": {"type": "t_test", "alternative": "less"}, "fractions": [0.3, 0.6, 1.0], "scale": "p", "binding": True,
      "futility": {"rule": "conditional", "threshold": 0.2}},
     sp.NormalTwoArm(n=14, effect=-0.3, missing=sp.MCAR(rate=0.2))),
    ({"inner": {"type": "logrank", "alternative": "less"}, "fractions": 3,
      "futility": {"rule": "predictive", "threshold": 0.3, "prior_mean": 2.0, "prior_information": 0.5}},
     sp.SurvivalTwoArm(n=30, median=1.0, hazard_ratio=0.8, accrual=2.0, follow_up=0.5)),
])
def test_rule_batch_equals_per_replicate(spec, process):
    g = GroupSequential(**spec)
    batch = process.draw_batch(np.random.default_rng(3), 300)
    res = g.batch(batch)
    lost = 0
    for i in range(batch.size):
        one = g(batch.replicate(i))
        np.testing.assert_array_equal(res.pvalues[i], one.pvalues)
        lost += one.pvalues[-1] == 0
    assert lost > 0  # the power-lost indicator is exercised
    assert check_analysis(g, process, size=12)["batch_compared"] >= 10


def _user_z(data):
    """The z-test as a user function (no batch path): the run goes per replicate."""
    r = sp.ZTest(alternative="greater")(data)
    return TestResult(pvalue=r.pvalue, estimate=r.estimate, se=r.se)


def test_a_run_gives_the_same_stopping_table_and_power_lost_on_both_paths():
    rule = {"rule": "predictive", "threshold": 0.2}
    built, user = _gs(rule), GroupSequential(inner=_user_z, fractions=3, futility=rule)
    sc = sp.Scenario(sp.NormalTwoArm(n=30, effect=0.35), analyses={"b": built, "u": user}, alpha=0.025)
    res = sp.run(sc, reps=600, execution=SERIAL)
    assert res.paths["b"] == "batch" and res.paths["u"].startswith("per-replicate")
    np.testing.assert_array_equal(res.records["b"].pvalues, res.records["u"].pvalues)
    rows_b, over_b = looks_table(built, res.summaries["b"], [30, 30])
    rows_u, over_u = looks_table(user, res.summaries["u"], [30, 30])
    assert rows_b == rows_u and over_b["power_lost"] == over_u["power_lost"] > 0
    look, decision = stop_of(res.records["b"].pvalues, 3)
    lost = res.records["b"].pvalues[:, -1] == 0
    assert np.all(decision[lost] == "futility")  # only futility stops can lose a rejection
    assert set(decision) <= {"efficacy", "futility", "none"}


# -- simulation against the recursion ----------------------------------------------------------------
@pytest.mark.slow
@pytest.mark.parametrize("rule", [{"rule": "predictive", "threshold": 0.1}, {"rule": "conditional", "threshold": 0.2}])
def test_stopping_power_and_power_lost_match_the_recursion(rule):
    """Known-variance z-test, effect 0.4 at 40 per arm (drift 0.4 sqrt(20)): per-look efficacy and futility
    stops, the power, the power lost (power without the rule minus power with it, both by the recursion:
    non-binding, so the two designs reject on the same paths but those the rule stops) and the expected
    sample size within 4 MCSE. Under H0 the rejection rate is the recursion's, below alpha."""
    g = _gs(rule)
    reps = 20_000
    drift = 0.4 * math.sqrt(20)
    res = sp.run(sp.Scenario(sp.NormalTwoArm(n=40, effect=0.4), analyses={"gs": g}, alpha=0.025), reps=reps,
                 execution=SERIAL)
    assert res.paths["gs"] == "batch"
    s = res.summaries["gs"]
    exact = crossing_probabilities(g.design(), drift)
    without = crossing_probabilities(boundaries(3, 0.025), drift)
    _within(s["power"], exact.rejection, reps)
    for k in range(3):
        _within(s["per_hypothesis"][f"look {k + 1} efficacy"]["power"], float(exact.upper[k]), reps)
    for k in range(2):
        _within(s["per_hypothesis"][f"look {k + 1} futility"]["power"], float(exact.lower[k]), reps)
    _within(s["per_hypothesis"][LOST]["power"], without.rejection - exact.rejection, reps)
    rows, overall = looks_table(g, s, [40, 40])
    en = 80 * exact.expected_fraction
    sd_n = math.sqrt(float(exact.stopping @ (80 * exact.fractions) ** 2) - en**2)
    assert abs(overall["expected_n"] - en) <= 4 * sd_n / math.sqrt(reps)
    h0 = sp.run(sp.Scenario(sp.NormalTwoArm(n=40, effect=0.0), analyses={"gs": g}, alpha=0.025), reps=reps,
                execution=SERIAL)
    ref0 = crossing_probabilities(g.design(), 0.0).rejection
    assert ref0 < 0.025
    _within(h0.summaries["gs"]["power"], ref0, reps)
