"""The repeated_measures process: correlation between visits, effect profiles, dropout, bad input.

External facts used (each check names its own):
- exchangeable and AR(1) correlation structures, corr(y_j, y_l) = rho and
  rho^|j - l| (Diggle, Heagerty, Liang & Zeger 2002, Analysis of Longitudinal
  Data, ch. 4-5); exchangeable is positive definite iff -1/(k-1) < rho < 1
  (eigenvalues 1 + (k-1) rho and 1 - rho; common practice);
- monotone dropout with constant hazard h: P(dropped by visit j) = 1 - (1 - h)^j
  (geometric survival, common practice);
- the logistic MAR dropout model is recovered by statsmodels' Logit maximum likelihood.
Tolerances are 4 Monte Carlo standard errors computed from the simulation.
"""

import math

import numpy as np
import pytest
import statsmodels.api as sm

from simpower._validation import Real
from simpower.errors import ParameterError
from simpower.processes.base import Missingness
from simpower.processes.repeated import RepeatedMeasures


def within_4_mcse(values, target):
    values = np.asarray(values, float)
    mcse = values.std(ddof=1) / math.sqrt(values.size)
    assert abs(values.mean() - target) < 4 * mcse, (values.mean(), target, mcse)


def wide(batch, proc):
    """y as (replicates * subjects, visits), and the arm of each row."""
    k = proc.visits
    y = batch["y"].reshape(-1, k)
    arm = np.tile(batch.shared["arm"][::k], batch.size)
    return y, arm


@pytest.mark.parametrize("correlation,rho,k", [("exchangeable", 0.4, 4), ("exchangeable", -0.2, 4),
                                               ("ar1", 0.7, 5), ("ar1", -0.5, 3)])
def test_realised_correlation_between_visits(correlation, rho, k):
    proc = RepeatedMeasures(n=100, visits=k, correlation=correlation, rho=rho, sd=2.0, effect=0.5)
    batch = proc.draw_batch(np.random.default_rng(31), 200)
    y, arm = wide(batch, proc)
    z = (y - np.outer(arm, proc.effect * proc.profile)) / 2.0  # known means and SD
    for j in range(k):
        within_4_mcse(z[:, j] ** 2, 1.0)
        for l in range(j + 1, k):
            target = rho if correlation == "exchangeable" else rho ** (l - j)
            within_4_mcse(z[:, j] * z[:, l], target)


@pytest.mark.parametrize("shape,baseline,expected", [
    ("final", True, [0, 1 / 3, 2 / 3, 1]), ("constant", True, [0, 1, 1, 1]), ("slope", True, [0, 1, 2, 3]),
    ("final", False, [1 / 4, 2 / 4, 3 / 4, 1]), ("slope", False, [1, 2, 3, 4]),
])
def test_effect_profiles(shape, baseline, expected):
    effect = 0.4
    proc = RepeatedMeasures(n=200, visits=4, rho=0.5, effect=effect, effect_shape=shape, baseline=baseline)
    assert np.allclose(proc.profile, expected)
    assert math.isclose(proc.true_effect(), effect * expected[-1])
    batch = proc.draw_batch(np.random.default_rng(32), 100)
    y, arm = wide(batch, proc)
    for j in range(4):
        within_4_mcse(y[arm == 1, j], effect * expected[j])
        within_4_mcse(y[arm == 0, j], 0.0)


def test_long_table_layout():
    proc = RepeatedMeasures(n=5, ratio=1.4, visits=3, rho=0.3, dropout_rate=0.3)
    d = proc(np.random.default_rng(2))
    assert set(d) == {"y", "arm", "subject", "visit", "baseline", "observed"}
    assert d["y"].size == (5 + 7) * 3
    assert np.array_equal(d["visit"], np.tile(np.arange(3), 12))
    assert np.array_equal(d["subject"], np.repeat(np.arange(12), 3))
    assert np.array_equal(d["arm"], np.repeat([0, 1], [15, 21]))
    assert np.array_equal(d["baseline"], np.repeat(d["y"][::3], 3))
    assert np.array_equal(d["observed"] == 0, np.isnan(d["y"]))
    no_base = RepeatedMeasures(n=5, visits=3, rho=0.3, baseline=False)(np.random.default_rng(2))
    assert set(no_base) == {"y", "arm", "subject", "visit"}


def test_constant_hazard_dropout():
    h = 0.12
    proc = RepeatedMeasures(n=100, visits=5, rho=0.5, dropout_hazard=h)
    batch = proc.draw_batch(np.random.default_rng(33), 200)
    y, _ = wide(batch, proc)
    miss = np.isnan(y)
    # monotone: once missing, missing at every later visit
    assert not np.any(miss[:, :-1] & ~miss[:, 1:])
    for j in range(5):
        p = 1 - (1 - h) ** j
        if j == 0:
            assert not miss[:, 0].any()
        else:
            within_4_mcse(miss[:, j], p)


def test_dropout_rate_sets_the_final_share():
    rate = 0.25
    proc = RepeatedMeasures(n=100, visits=4, rho=0.5, dropout_rate=rate)
    assert math.isclose(1 - (1 - proc.hazard) ** 3, rate)
    batch = proc.draw_batch(np.random.default_rng(34), 200)
    y, _ = wide(batch, proc)
    within_4_mcse(np.isnan(y[:, -1]), rate)


@pytest.mark.parametrize("correlation,slope", [("exchangeable", 1.0), ("ar1", -0.8)])
def test_mar_dropout_calibrated_and_recovered_by_logit(correlation, slope):
    rate = 0.3
    proc = RepeatedMeasures(n=150, visits=4, correlation=correlation, rho=0.6, sd=1.5, effect=0.8,
                            dropout_rate=rate, dropout_mar_slope=slope)
    assert abs(proc.expected_final_missing() - rate) < 1e-8
    batch = proc.draw_batch(np.random.default_rng(35), 200)
    y, arm = wide(batch, proc)
    within_4_mcse(np.isnan(y[:, -1]), rate)
    # logit P(drop before visit j | seen at j-1) = a0 + slope * y_{j-1} / sd: refit with statsmodels
    prev, drop = [], []
    for j in range(1, 4):
        seen = np.isfinite(y[:, j - 1])
        prev.append(y[seen, j - 1] / 1.5)
        drop.append(np.isnan(y[seen, j]).astype(float))
    x, d = np.concatenate(prev), np.concatenate(drop)
    fit = sm.Logit(d, sm.add_constant(x)).fit(disp=0)
    assert abs(fit.params[1] - slope) < 4 * fit.bse[1]
    assert abs(fit.params[0] - proc.mar_intercept) < 4 * fit.bse[0]


def test_mar_dropout_from_a_hazard_at_the_control_mean():
    proc = RepeatedMeasures(n=10, visits=3, rho=0.2, dropout_hazard=0.1, dropout_mar_slope=0.5)
    assert math.isclose(proc.mar_intercept, math.log(0.1 / 0.9))
    assert 0 < proc.expected_final_missing() < 1


class _TestMCAR(Missingness):
    """A minimal MCAR mechanism, local to these tests."""

    params = {"rate": Real(0.0, 1.0, high_open=True)}

    def mask(self, rng, y, covariates):
        assert {"arm", "visit", "subject", "baseline"} <= set(covariates)
        assert np.all(covariates["visit"] > 0)  # only post-baseline rows are offered
        return rng.random(np.shape(y)) < self.rate


def test_missingness_after_dropout():
    proc = RepeatedMeasures(n=100, visits=3, rho=0.5, dropout_hazard=0.1, missing=_TestMCAR(rate=0.2))
    batch = proc.draw_batch(np.random.default_rng(36), 200)
    y, _ = wide(batch, proc)
    assert not np.isnan(y[:, 0]).any()
    # independent mechanisms: P(missing at visit 1) = 1 - (1 - 0.1)(1 - 0.2)
    within_4_mcse(np.isnan(y[:, 1]), 1 - 0.9 * 0.8)
    assert batch.info["missing"]


def test_same_rng_same_numbers():
    proc = RepeatedMeasures(n=8, visits=4, rho=0.3, dropout_rate=0.2, dropout_mar_slope=1.0)
    a = proc.draw_batch(np.random.default_rng(1), 10)
    b = proc.draw_batch(np.random.default_rng(1), 10)
    assert np.array_equal(a["y"], b["y"], equal_nan=True)


@pytest.mark.parametrize("kwargs,field", [
    ({"rho": -0.5}, "rho"),  # exchangeable over 4 visits needs rho > -1/3
    ({"rho": -1 / 3}, "rho"),
    ({"rho": 1.0}, "rho"), ({"correlation": "ar1", "rho": -1.0}, "rho"),
    ({"dropout_rate": 1.0}, "dropout_rate"), ({"dropout_rate": -0.1}, "dropout_rate"),
    ({"dropout_hazard": 1.0}, "dropout_hazard"),
    ({"dropout_mar_slope": 1.0}, "dropout_mar_slope"),
    ({"dropout_rate": 0.2, "dropout_hazard": 0.1}, "dropout_hazard"),
    ({"visits": 1}, "visits"), ({"n": 1}, "n"), ({"ratio": 0.1}, "ratio"),
    ({"correlation": "ar(1)"}, "correlation"), ({"effect_shape": "linear"}, "effect_shape"),
])
def test_bad_input_one_line_error_naming_the_field(kwargs, field):
    base = {"n": 10, "visits": 4, "rho": 0.3}
    with pytest.raises(ParameterError) as err:
        RepeatedMeasures(**{**base, **kwargs})
    msg = str(err.value)
    assert "\n" not in msg and msg.startswith(f"`{field}`"), msg


def test_ar1_negative_rho_is_positive_definite():
    # AR(1) is positive definite for every |rho| < 1 (its Cholesky factor exists), unlike exchangeable
    proc = RepeatedMeasures(n=5, visits=6, correlation="ar1", rho=-0.9)
    assert np.all(np.linalg.eigvalsh(proc.corr_matrix) > 0)


def test_describe_mentions_dropout():
    text = RepeatedMeasures(n=20, visits=4, rho=0.5, effect=0.3, dropout_rate=0.2,
                            dropout_mar_slope=0.7).describe()
    for word in ("20 (control)", "4 visits", "exchangeable correlation 0.5", "MAR", "20.0%"):
        assert word in text
