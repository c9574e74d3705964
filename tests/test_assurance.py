"""Assurance over a prior: simulation against the closed form, reproducibility, errors.

External references: the normal-prior assurance of a z-test, Phi((m - z se) / sqrt(se^2 + v))
(O'Hagan, Stevens & Campbell 2005, Pharm Stat 4:187-201, section 3; Spiegelhalter, Freedman &
Blackburn 1986); the assurance given a favourable effect by direct numerical integration
with scipy.integrate.quad; ordinary power from statsmodels NormalIndPower.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, optimize, stats

import simpower as sp
from simpower.analytic.assurance import assurance_ceiling, normal_prior_assurance, two_sample_z_se
from simpower.planning.assurance import assurance, required_n_for_assurance

PRIOR = {"effect": {"dist": "norm", "loc": 0.3, "scale": 0.2}}


def _scenario(n=60, alternative="two-sided"):
    return sp.Scenario(sp.NormalTwoArm(n=n, effect=0.3), sp.ZTest(alternative=alternative))


@pytest.mark.parametrize("alternative", ["two-sided", "greater"])
def test_simulated_assurance_matches_the_normal_prior_closed_form(alternative):
    res = assurance(_scenario(alternative=alternative), PRIOR, draws=1500, reps_per_draw=8, seed=20261202,
                    n_jobs=1, progress=False)
    # success is a rejection with the estimate above 0 (a two-sided test's finding of harm is no success)
    exact = normal_prior_assurance(0.3, 0.2, two_sample_z_se(60), alternative=alternative, favourable="greater")
    assert abs(res.assurance - exact) < 4 * res.mcse
    assert abs(res.ceiling - assurance_ceiling(0.3, 0.2)) < 4 * res.ceiling_mcse
    assert res.conditional_power == "closed form at each draw"
    # the closed-form conditional power at each draw is the z-test's power at that draw's effect
    row = res.draws.iloc[0]
    se = two_sample_z_se(60)
    z = stats.norm.ppf(0.975 if alternative == "two-sided" else 0.95)
    d = row["effect"]
    want = stats.norm.cdf(d / se - z) + (stats.norm.cdf(-d / se - z) if alternative == "two-sided" else 0.0)
    assert math.isclose(row["conditional_power"], want, rel_tol=1e-6)


def test_assurance_given_a_favourable_effect_matches_integration():
    res = assurance(_scenario(alternative="greater"), PRIOR, draws=1500, reps_per_draw=8, seed=7, n_jobs=1,
                    progress=False)
    se, m, v = two_sample_z_se(60), 0.3, 0.2
    z = stats.norm.ppf(0.95)
    joint, _ = integrate.quad(lambda t: stats.norm.cdf(t / se - z) * stats.norm.pdf(t, m, v), 0, np.inf)
    exact = joint / stats.norm.cdf(m / v)
    assert abs(res.given_favourable - exact) < 4 * res.given_favourable_mcse


def test_a_point_prior_gives_the_ordinary_power():
    from statsmodels.stats.power import NormalIndPower

    res = assurance(_scenario(), {"effect": [0.4]}, draws=200, reps_per_draw=20, seed=2, n_jobs=1, progress=False)
    power = NormalIndPower().power(0.4, 60, 0.05)
    assert abs(res.assurance - power) < 4 * res.mcse
    assert res.ceiling == 1.0


def test_same_numbers_for_any_number_of_jobs():
    sc = sp.Scenario(sp.NormalTwoArm(n=30, effect=0.3), sp.TTest())
    prior = {"effect": {"dist": "norm", "loc": 0.3, "scale": 0.2}, "sd": {"dist": "gamma", "a": 50, "scale": 0.02}}
    a = assurance(sc, prior, draws=40, reps_per_draw=25, seed=5, n_jobs=1, progress=False)
    b = assurance(sc, prior, draws=40, reps_per_draw=25, seed=5, n_jobs=2, progress=False)
    pd.testing.assert_frame_equal(a.draws, b.draws)
    assert a.assurance == b.assurance
    assert a.conditional_power.startswith("closed form")  # the t-test's closed form covers unequal draws of sd


def test_required_size_for_a_target_assurance():
    m, v, target = 0.4, 0.15, 0.6
    exact = optimize.brentq(lambda n: normal_prior_assurance(m, v, two_sample_z_se(n), favourable="greater") - target,
                            5, 2000)
    res = required_n_for_assurance(_scenario(), {"effect": {"dist": "norm", "loc": m, "scale": v}}, target,
                                   low=40, high=400, points=7, draws=600, reps_per_draw=10, seed=9, n_jobs=1,
                                   progress=False)
    lo, hi = res.interval
    assert lo <= exact <= hi
    assert res.value is not None and lo <= res.value <= hi + 1  # the answer is rounded up to a whole size
    # a prior with P(effect > 0) = Phi(0.5) = 0.69: assurance 0.9 is out of reach at any size
    with pytest.raises(sp.ParameterError, match="ceiling"):
        required_n_for_assurance(_scenario(), {"effect": {"dist": "norm", "loc": 0.1, "scale": 0.2}}, 0.9,
                                 low=40, high=400, draws=200, reps_per_draw=5, seed=9, n_jobs=1, progress=False)


@pytest.mark.parametrize("prior, match", [
    ({"efect": [0.3]}, "Did you mean 'effect'"),
    ({"effect": {"dist": "normal", "loc": 0.3}}, "not a scipy.stats distribution"),
    ({"effect": {"loc": 0.3}}, "needs `dist`"),
    ({"effect": {"dist": "norm", "shape": 2}}, "does not take"),
    ({"sd": {"dist": "norm", "loc": 0.1, "scale": 1.0}}, "prior draw"),
    ({"n": {"dist": "uniform", "loc": 20, "scale": 10}}, "whole numbers"),
    ({"effect": []}, "non-empty"),
])
def test_bad_priors_are_one_line_errors(prior, match):
    with pytest.raises(sp.ParameterError, match=match) as err:
        assurance(_scenario(), prior, draws=50, reps_per_draw=2, seed=1, n_jobs=1, progress=False)
    assert "\n" not in str(err.value)


def test_a_two_sided_finding_of_harm_is_no_success():
    # a prior centred near zero: many draws are harmful, and a two-sided test detects some of them
    res = assurance(_scenario(n=200), {"effect": {"dist": "norm", "loc": 0.05, "scale": 0.3}}, draws=300,
                    reps_per_draw=10, seed=4, n_jobs=1, progress=False)
    assert res.draws["rejections_wrong_way"].sum() > 0
    both = normal_prior_assurance(0.05, 0.3, two_sample_z_se(200))
    one = normal_prior_assurance(0.05, 0.3, two_sample_z_se(200), favourable="greater")
    assert abs(res.assurance - one) < 4 * res.mcse and abs(res.assurance - both) > 4 * res.mcse


BUNDLED = __import__("pathlib").Path(__file__).parent.parent / "scenarios" / "assurance_home_exercise.toml"


def test_the_assurance_block_is_checked_at_load(tmp_path):
    plan = sp.load_plan(BUNDLED)
    assert plan.kind == "assurance" and set(plan.assurance["prior"]) == {"effect", "sd"}
    text = BUNDLED.read_text()
    bad = tmp_path / "bad.toml"
    bad.write_text(text.replace('sd = { dist = "gamma"', 'sdd = { dist = "gamma"'))
    with pytest.raises(sp.ParameterError, match="prior.sdd"):
        sp.load_plan(bad)
    bad.write_text(text.replace('favourable = "less"', 'favourable = "less"\ntarget = 0.6'))
    with pytest.raises(sp.ParameterError, match="`low` is missing|`high` is missing"):
        sp.load_plan(bad)


def test_the_assurance_command(tmp_path, capsys):
    from simpower.cli.main import main

    out = tmp_path / "draws.csv"
    rc = main(["assurance", str(BUNDLED), "--draws", "40", "--reps-per-draw", "5", "--jobs", "1", "-q",
               "--csv", str(out)])
    text = capsys.readouterr().out
    assert rc == 0 and text.startswith("Assurance (t_test): ")
    table = pd.read_csv(out)
    assert len(table) == 40 and {"effect", "sd", "rate", "conditional_power"} <= set(table.columns)
    rc = main(["assurance", str(BUNDLED), "--draws", "1", "--jobs", "1", "-q"])
    err = capsys.readouterr().err
    assert rc == 2 and err.count("\n") == 1 and "draws" in err


def test_the_assurance_figure_marks_the_assurance_and_the_ceiling(tmp_path):
    res = assurance(_scenario(), PRIOR, draws=60, reps_per_draw=4, seed=6, n_jobs=1, progress=False)
    fig = res.plot(stem=tmp_path / "a")
    ax = fig.axes[0]
    xs = sorted(float(ln.get_xdata()[0]) for ln in ax.get_lines())
    assert xs == sorted([res.assurance, res.ceiling])
    assert sum(p.get_height() for p in ax.patches) == 60  # every draw in the histogram
    assert (tmp_path / "a.png").exists()


def test_the_assurance_command_keeps_its_trials_in_a_store(tmp_path, capsys):
    from simpower.cli.main import main

    store = tmp_path / "a.sqlite"
    argv = ["assurance", str(BUNDLED), "--draws", "30", "--reps-per-draw", "4", "--jobs", "1", "-q",
            "--store", str(store)]
    assert main(argv) == 0
    first = capsys.readouterr().out.splitlines()[0]
    assert store.exists()
    assert main(argv) == 0  # the second run reads the finished trials back: the same numbers
    assert capsys.readouterr().out.splitlines()[0] == first
    assert main(["assurance", str(BUNDLED), "--reps", "5", "-q"]) == 2
    assert "--reps-per-draw" in capsys.readouterr().err
