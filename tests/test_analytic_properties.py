"""Properties every power function of simpower.analytic must have.

Checked on parametrised grids and on configurations drawn from a fixed-seed
generator (hypothesis is not installed in the project environment):

* power at a zero effect is alpha (common practice: the size of the test);
* power rises monotonically to 1 as the effect moves in the tested direction;
* a smaller alpha gives less power;
* ``*_n`` and ``*_effect`` invert the power functions (to 1e-8 in power);
* the t-test never has more power than the known-SD z-test at the same n
  (the z-test is uniformly most powerful, unbiased for two-sided tests:
  Neyman-Pearson theory, common practice).
"""

from __future__ import annotations

import numpy as np
import pytest

from simpower.analytic import (
    ancova_effect,
    ancova_n,
    ancova_power,
    prop2_effect,
    prop2_n,
    prop2_power,
    schoenfeld_events,
    schoenfeld_power,
    t_effect,
    t_n,
    t_power,
    welch_effect,
    welch_n,
    welch_power,
    z_effect,
    z_n,
    z_power,
)
from simpower.errors import ParameterError

ALTERNATIVES = ["two-sided", "greater", "less"]
DESIGNS = ["one-sample", "paired", "two-sample"]
ALPHAS = np.array([0.001, 0.01, 0.05, 0.1, 0.3])
SIGN = {"two-sided": 1.0, "greater": 1.0, "less": -1.0}


def _configs(seed, k):
    """k random (effect size, power, sd, ratio, alpha) tuples from a fixed seed."""
    rng = np.random.default_rng(seed)
    return list(zip(rng.uniform(0.1, 1.5, k), rng.uniform(0.2, 0.97, k), rng.uniform(0.5, 3.0, k),
                    rng.choice([0.5, 1.0, 1.7, 3.0], k), rng.choice([0.01, 0.05, 0.1], k)))


# --------------------------------------------------------------------------- size = alpha
@pytest.mark.parametrize("alternative", ALTERNATIVES)
@pytest.mark.parametrize("design", DESIGNS)
def test_zero_effect_power_is_alpha_z_and_t(alternative, design):
    for n in (3, 10, 57.5, 400):
        for ratio in (0.5, 1.0, 2.0):
            np.testing.assert_allclose(z_power(0.0, n, alpha=ALPHAS, alternative=alternative,
                                               design=design, ratio=ratio), ALPHAS, rtol=1e-12)
            np.testing.assert_allclose(t_power(0.0, n, alpha=ALPHAS, alternative=alternative,
                                               design=design, ratio=ratio), ALPHAS, rtol=1e-10)


@pytest.mark.parametrize("alternative", ALTERNATIVES)
def test_zero_effect_power_is_alpha_other_families(alternative):
    for sd0, sd1, ratio in [(1.0, 1.0, 1.0), (1.0, 3.0, 0.5), (2.0, 0.5, 2.5)]:
        np.testing.assert_allclose(welch_power(0.0, 15, sd0=sd0, sd1=sd1, ratio=ratio, alpha=ALPHAS,
                                               alternative=alternative), ALPHAS, rtol=1e-10)
    for p, ratio in [(0.05, 1.0), (0.5, 2.0), (0.9, 0.5)]:
        np.testing.assert_allclose(prop2_power(p, p, 80, ratio=ratio, alpha=ALPHAS, alternative=alternative),
                                   ALPHAS, rtol=1e-12)
        # the continuity-corrected test is conservative (Fleiss 1981): size below alpha
        assert np.all(prop2_power(p, p, 80, ratio=ratio, alpha=ALPHAS, alternative=alternative,
                                  continuity=True) < ALPHAS)
    np.testing.assert_allclose(schoenfeld_power(1.0, 120, alpha=ALPHAS, alternative=alternative), ALPHAS,
                               rtol=1e-12)
    np.testing.assert_allclose(ancova_power(0.0, 20, rho=0.6, alpha=ALPHAS, alternative=alternative), ALPHAS,
                               rtol=1e-10)


# --------------------------------------------------------------------------- monotone to 1
def _assert_rises_to_one(powers, alpha):
    assert np.all(np.diff(powers) >= -1e-14), "power must not fall as the effect grows"
    assert powers[0] == pytest.approx(alpha, rel=1e-9)
    assert powers[-1] > 0.9999


@pytest.mark.parametrize("alternative", ALTERNATIVES)
@pytest.mark.parametrize("design", DESIGNS)
def test_power_rises_to_one_with_effect(alternative, design):
    for n in (4, 30):
        effects = SIGN[alternative] * np.linspace(0.0, 15.0 / np.sqrt(n), 61)
        _assert_rises_to_one(z_power(effects, n, alternative=alternative, design=design), 0.05)
        _assert_rises_to_one(t_power(effects, n, alternative=alternative, design=design), 0.05)
    effects = SIGN[alternative] * np.linspace(0.0, 6.0, 61)
    _assert_rises_to_one(welch_power(effects, 12, sd1=2.0, ratio=1.5, alternative=alternative), 0.05)
    _assert_rises_to_one(ancova_power(effects, 12, rho=0.4, alternative=alternative), 0.05)
    log_hr = SIGN[alternative] * np.linspace(0.0, 2.5, 51)
    _assert_rises_to_one(schoenfeld_power(np.exp(log_hr), 60, alternative=alternative), 0.05)


@pytest.mark.parametrize("alternative", ALTERNATIVES)
@pytest.mark.parametrize("p0, ratio", [(0.1, 1.0), (0.5, 2.0), (0.7, 0.5)])
def test_prop2_power_rises_with_distance(alternative, p0, ratio):
    end = 1e-6 if alternative == "less" else 1 - 1e-6
    p1 = np.linspace(p0, end, 60)
    powers = prop2_power(p0, p1, 400, ratio=ratio, alternative=alternative)
    assert np.all(np.diff(powers) >= -1e-14)
    assert powers[0] == pytest.approx(0.05, rel=1e-12)
    assert powers[-1] > 0.999


def test_two_sided_power_is_symmetric_and_one_sided_wrong_direction_is_below_alpha():
    e = np.linspace(0.05, 2.0, 20)
    np.testing.assert_allclose(t_power(e, 15, design="two-sample"), t_power(-e, 15, design="two-sample"),
                               rtol=1e-12)
    assert np.all(t_power(-e, 15, alternative="greater") < 0.05)
    assert np.all(z_power(e, 15, alternative="less") < 0.05)


# --------------------------------------------------------------------------- alpha
@pytest.mark.parametrize("alternative", ALTERNATIVES)
def test_smaller_alpha_gives_less_power(alternative):
    e = SIGN[alternative] * 0.5
    for fun in (lambda a: z_power(e, 25, alpha=a, alternative=alternative),
                lambda a: t_power(e, 25, alpha=a, alternative=alternative, design="two-sample", ratio=1.5),
                lambda a: welch_power(e, 25, sd1=1.5, alpha=a, alternative=alternative),
                lambda a: ancova_power(e, 25, rho=0.5, alpha=a, alternative=alternative),
                lambda a: prop2_power(0.4, 0.4 + 0.15 * SIGN[alternative], 100, alpha=a, alternative=alternative),
                lambda a: schoenfeld_power(np.exp(0.4 * SIGN[alternative]), 90, alpha=a, alternative=alternative)):
        assert np.all(np.diff(fun(ALPHAS)) > 0)


# --------------------------------------------------------------------------- inverses
@pytest.mark.parametrize("alternative", ALTERNATIVES)
@pytest.mark.parametrize("design", DESIGNS)
def test_z_and_t_n_and_effect_invert_power(alternative, design):
    for d, power, sd, ratio, alpha in _configs(11, 12):
        if power <= alpha:
            continue
        e = SIGN[alternative] * d * sd
        kw = dict(sd=sd, alpha=alpha, alternative=alternative, design=design, ratio=ratio)
        n = z_n(e, power, **kw)
        assert z_power(e, n, **kw) == pytest.approx(power, abs=1e-8)
        assert z_effect(n, power, **kw) == pytest.approx(e, rel=1e-8)
        n_floor = 3.0 / (1.0 + ratio) if design == "two-sample" else 2.0  # df = 1
        if t_power(e, n_floor, **kw) >= power:  # reached below df = 1: refused, by design
            with pytest.raises(ParameterError, match="already exceeded at the smallest t-test sample"):
                t_n(e, power, **kw)
            continue
        n = t_n(e, power, **kw)
        assert t_power(e, n, **kw) == pytest.approx(power, abs=1e-8)
        assert t_effect(n, power, **kw) == pytest.approx(e, rel=1e-8)


@pytest.mark.parametrize("alternative", ALTERNATIVES)
def test_welch_ancova_schoenfeld_invert_power(alternative):
    for d, power, sd, ratio, alpha in _configs(23, 10):
        e = SIGN[alternative] * d
        kw = dict(sd0=1.0, sd1=sd, ratio=ratio, alpha=alpha, alternative=alternative)
        n = welch_n(e, power, **kw)
        assert welch_power(e, n, **kw) == pytest.approx(power, abs=1e-8)
        assert welch_effect(n, power, **kw) == pytest.approx(e, rel=1e-8)
        kw = dict(rho=min(0.9, d / 1.6), sd=sd, alpha=alpha, alternative=alternative, ratio=ratio)
        n = ancova_n(e * sd, power, **kw)
        assert ancova_power(e * sd, n, **kw) == pytest.approx(power, abs=1e-8)
        assert ancova_effect(n, power, **kw) == pytest.approx(e * sd, rel=1e-8)
        hr = np.exp(e / 2)
        events = schoenfeld_events(hr, power, alpha=alpha, alternative=alternative, ratio=ratio)
        assert schoenfeld_power(hr, events, alpha=alpha, alternative=alternative, ratio=ratio) == pytest.approx(
            power, abs=1e-8)


@pytest.mark.parametrize("continuity", [False, True])
@pytest.mark.parametrize("alternative", ALTERNATIVES)
def test_prop2_n_and_effect_invert_power(alternative, continuity):
    rng = np.random.default_rng(5)
    for _ in range(12):
        p0 = rng.uniform(0.05, 0.8)
        shift = rng.uniform(0.05, 0.15)
        p1 = p0 - shift if alternative == "less" else p0 + shift
        power, ratio = rng.uniform(0.3, 0.95), rng.choice([0.5, 1.0, 2.0])
        kw = dict(ratio=ratio, alternative=alternative, continuity=continuity)
        n = prop2_n(p0, p1, power, **kw)
        assert prop2_power(p0, p1, n, **kw) == pytest.approx(power, abs=1e-8)
        assert prop2_effect(p0, n, power, **kw) == pytest.approx(p1, abs=1e-8)


# --------------------------------------------------------------------------- t versus z
@pytest.mark.parametrize("alternative", ALTERNATIVES)
def test_t_never_beats_z_and_converges_to_it(alternative):
    e = SIGN[alternative] * np.linspace(0.05, 1.5, 30)
    for n in (3, 10, 40):
        assert np.all(t_power(e, n, alternative=alternative) <= z_power(e, n, alternative=alternative) + 1e-15)
    # with 20000 df the t critical value is within 1e-4 of z's: powers agree closely
    np.testing.assert_allclose(t_power(e / 100, 20001, alternative=alternative),
                               z_power(e / 100, 20001, alternative=alternative), atol=1e-4)


# --------------------------------------------------------------------------- vectorisation
def test_vectorised_equals_elementwise():
    e = np.array([0.2, 0.5, 0.9])
    p = np.array([[0.7], [0.9]])
    grid = t_n(e, p, design="two-sample", ratio=2.0)
    assert grid.shape == (2, 3)
    for i in range(2):
        for j in range(3):
            assert grid[i, j] == t_n(float(e[j]), float(p[i, 0]), design="two-sample", ratio=2.0)
    wel = welch_n(e, 0.8, sd1=[[1.0], [2.0]])
    assert wel.shape == (2, 3) and wel[1, 2] == welch_n(0.9, 0.8, sd1=2.0)
    pr = prop2_n(0.3, [0.4, 0.5], 0.8, continuity=True)
    assert pr.shape == (2,) and pr[0] == prop2_n(0.3, 0.4, 0.8, continuity=True)
