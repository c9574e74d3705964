"""Pilot data as the process (pilot_resample): resampling properties, the effect imposed, the cautions.

External references: the plug-in (bootstrap) distribution of m values has variance (m - 1)/m
times their unbiased variance, so sqrt(m / (m - 1)) restores it (Efron & Tibshirani 1993,
section 2.3; common practice); the shrunk smoothed bootstrap keeps the variance (Silverman
1986, section 6.4.1); Browne (1995, Stat Med 14:1933-1940): the upper 80% one-sided
confidence limit of an SD from m values, s sqrt((m - 1) / chi2_{0.2, m-1}), covers the true
SD with probability 0.8 for normal data; Teare et al. (2014, Trials 15:264): at least 35
per arm to estimate an SD.
"""

from __future__ import annotations

import math
import textwrap

import numpy as np
import pytest

import simpower as sp
from simpower.processes.pilot import PilotResample

PILOT = [12.0, 15.5, 9.0, 22.0, 30.5, 11.0, 14.0, 18.5, 40.0, 13.0]


@pytest.mark.parametrize("spread, factor", [("none", 0.9), ("inflate", 1.0), ("smooth", 1.0)])
def test_spread_correction_restores_the_pilot_variance_in_expectation(spread, factor):
    m = len(PILOT)
    s2 = float(np.var(PILOT, ddof=1))
    p = PilotResample(n=50, values=PILOT, spread=spread)
    y = p.draw_batch(np.random.default_rng(11), 4000).per_rep["y"][:, :50]
    v = y.var(axis=1, ddof=1)
    mcse = v.std(ddof=1) / math.sqrt(v.size)
    # 'none': the plug-in variance (m - 1)/m s^2; the corrections: s^2
    assert abs(v.mean() - factor * s2) < 4 * mcse
    if spread == "none":
        assert abs(v.mean() - s2) > 4 * mcse  # the shrinkage is there to correct


def test_the_pilot_difference_is_not_carried_in_unless_asked():
    arms = [0] * 5 + [1] * 5
    pooled = PilotResample(n=60, values=PILOT, arm_values=arms, effect=0.0)
    assert abs(pooled.true_effect()) < 1e-12
    res = sp.run(sp.Scenario(pooled, sp.WelchT()), reps=3000, seed=3, n_jobs=1, progress=False)
    est = res.records["welch_t"].estimate
    assert abs(est.mean()) < 4 * est.std(ddof=1) / math.sqrt(est.size)
    separate = PilotResample(n=60, values=PILOT, arm_values=arms, arms="separate", effect=0.0)
    want = np.mean(PILOT[5:]) - np.mean(PILOT[:5])
    assert math.isclose(separate.true_effect(), want)
    res = sp.run(sp.Scenario(separate, sp.WelchT()), reps=3000, seed=3, n_jobs=1, progress=False)
    est = res.records["welch_t"].estimate
    assert abs(est.mean() - want) < 4 * est.std(ddof=1) / math.sqrt(est.size)


def test_an_odds_ratio_keeps_a_binary_outcome_binary():
    pilot = [1.0] * 6 + [0.0] * 14   # p = 0.3
    p = PilotResample(n=100, values=pilot, effect=2.0, effect_type="odds_ratio")
    y = p.draw_batch(np.random.default_rng(5), 2000).per_rep["y"]
    assert set(np.unique(y)) <= {0.0, 1.0}
    p1 = 2.0 * 0.3 / (1 - 0.3 + 2.0 * 0.3)  # odds 0.3/0.7 doubled (common practice)
    treated = y[:, 100:].mean(axis=1)
    assert abs(treated.mean() - p1) < 4 * treated.std(ddof=1) / math.sqrt(treated.size)
    control = y[:, :100].mean(axis=1)
    assert abs(control.mean() - 0.3) < 4 * control.std(ddof=1) / math.sqrt(control.size)


def test_browne_upper_limit_covers_the_sd_with_probability_080():
    rng = np.random.default_rng(8)
    covered = []
    for _ in range(1500):
        vals = list(rng.normal(50, 10, 12))
        covered.append(PilotResample(n=20, values=vals).pilot_summary()["sd_upper_80"] >= 10)
    rate = np.mean(covered)
    assert abs(rate - 0.8) < 4 * math.sqrt(0.8 * 0.2 / len(covered))


def test_a_small_pilot_is_flagged_and_its_upper_sd_costs_power():
    p = PilotResample(n=40, values=PILOT, effect=6.0)
    assert p.pilot_summary()["small"] and "CAUTION" in p.describe() and "Teare" in p.describe()
    at_sd, at_upper = p.power_at_upper_sd()
    assert at_upper < at_sd


def test_a_pilot_file_relative_to_the_scenario(tmp_path):
    (tmp_path / "pilot.csv").write_text("y,arm\n" + "\n".join(f"{v},{i % 2}" for i, v in enumerate(PILOT)) + "\n,1\n")
    (tmp_path / "s.toml").write_text(textwrap.dedent("""
        [process]
        type = "pilot_resample"
        data = "pilot.csv"
        n = 30
        effect = 5.0
        [analysis]
        type = "welch_t"
    """))
    plan = sp.load_plan(tmp_path / "s.toml")
    proc = plan.scenario.process
    assert proc.values == PILOT and proc.arm_values == [i % 2 for i in range(10)]  # the empty outcome dropped
    before = plan.scenario.point_key()
    (tmp_path / "pilot.csv").write_text("y\n" + "\n".join(str(v + 1) for v in PILOT) + "\n")
    assert sp.load_plan(tmp_path / "s.toml").scenario.point_key() != before  # seeds follow the data's content


@pytest.mark.parametrize("kw, match", [
    ({}, "`data`"),
    ({"values": [1.0]}, "at least 2"),
    ({"values": [1.0, -2.0, 3.0], "effect": 1.2, "effect_type": "ratio"}, "non-negative"),
    ({"values": [0.0, 1.0, 2.0], "effect": 2.0, "effect_type": "odds_ratio"}, "0/1"),
    ({"values": PILOT, "arm_values": [0, 1]}, "each of the 10"),
    ({"data": "no/such/file.csv"}, "no pilot file"),
])
def test_bad_pilots_are_one_line_errors(kw, match):
    with pytest.raises(sp.ParameterError, match=match) as err:
        PilotResample(n=20, **kw)
    assert "\n" not in str(err.value)
