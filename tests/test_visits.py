"""The `visits` design of trial and the `dropout` missingness mechanism.

External facts used (each check names its own):
- exchangeable and AR(1) correlation structures, corr(z_j, z_l) = rho and rho^|j - l|
  (Diggle, Heagerty, Liang & Zeger 2002, Analysis of Longitudinal Data, ch. 4-5);
- a Gaussian copula with lognormal margins: log y = mu + sigma z, so the log outcomes carry the
  normal scores' correlation exactly (Nelsen 2006, An Introduction to Copulas, sec. 2.4: a copula is
  invariant under increasing transformations);
- power of the two-sample t-test at the final visit = noncentral t probability (Cohen 1988, ch. 2;
  scipy.stats.nct, through tests/_helpers.nct_power);
- monotone dropout with constant hazard h: P(dropped by visit j) = 1 - (1 - h)^j (geometric
  survival, common practice);
- the mean of a lognormal outcome multiplied by c is c times its mean (common practice).
Tolerances are 4 Monte Carlo standard errors computed from the simulation (or from the binomial
variance p(1 - p)/m for proportions).
"""

import math
import pickle

import numpy as np
import pytest

import simpower as sp
from simpower.errors import ParameterError
from simpower.processes.composed import Trial
from simpower.processes.dropout import Dropout
from simpower.processes.outcomes import Lognormal, Normal
from simpower.processes.repeated import RepeatedMeasures
from simpower.processes.visits import Visits
from simpower.registry import build
from simpower.testing import check_analysis, check_component, check_process

from _helpers import nct_power


def within_4_mcse(values, target):
    values = np.asarray(values, float)
    mcse = values.std(ddof=1) / math.sqrt(values.size)
    assert abs(values.mean() - target) < 4 * mcse, (values.mean(), target, mcse)


def proportion_within_4_mcse(p_hat, p, m):
    assert abs(p_hat - p) < 4 * math.sqrt(p * (1 - p) / m), (p_hat, p, m)


def trial(outcome=None, missing=None, effect=0.0, effect_type="shift", **design):
    d = {"n": 40, "visits": 4, "rho": 0.5, **design}
    return Trial(design=Visits(**d), outcome=outcome or Normal(), effect=effect, effect_type=effect_type,
                 missing=missing)


def wide(batch, k):
    """y as (replicates * participants, visits), the arm and the observed flag of each row."""
    y = batch["y"].reshape(-1, k)
    arm = np.tile(batch.shared["arm"][::k], batch.size)
    seen = batch["observed"].reshape(-1, k).astype(bool) if "observed" in batch.per_rep else np.isfinite(y)
    return y, arm, seen


@pytest.mark.parametrize("correlation,rho,k", [("exchangeable", 0.4, 4), ("exchangeable", -0.2, 4), ("ar1", 0.7, 5),
                                               ("ar1", -0.5, 3)])
def test_normal_scores_have_the_stated_correlation(correlation, rho, k):
    # Diggle et al. (2002), ch. 4-5: corr(z_j, z_l) = rho (exchangeable) or rho^|j - l| (AR(1))
    proc = trial(outcome=Normal(mean=3.0, sd=2.0), effect=0.5, visits=k, correlation=correlation, rho=rho, n=80)
    y, arm, _ = wide(proc.draw_batch(np.random.default_rng(11), 150), k)
    z = (y - 3.0 - np.outer(arm, 0.5 * proc.design.profile)) / 2.0  # known means and SD
    for j in range(k):
        within_4_mcse(z[:, j] ** 2, 1.0)
        for m in range(j + 1, k):
            within_4_mcse(z[:, j] * z[:, m], rho if correlation == "exchangeable" else rho ** (m - j))


def test_a_lognormal_outcome_keeps_its_margin_and_the_scores_correlation_on_the_log_scale():
    # Gaussian copula with lognormal margins (Nelsen 2006, sec. 2.4): log y = mu + sigma z
    out = Lognormal(median=2.0, cv=0.8)
    mu, sigma = math.log(2.0), math.sqrt(math.log(1 + 0.8**2))
    proc = trial(outcome=out, visits=3, correlation="ar1", rho=0.6, n=60)
    y, _, _ = wide(proc.draw_batch(np.random.default_rng(12), 200), 3)
    z = (np.log(y) - mu) / sigma
    within_4_mcse(z[:, 0], 0.0)
    within_4_mcse(z[:, 2] ** 2, 1.0)
    within_4_mcse(z[:, 0] * z[:, 1], 0.6)
    within_4_mcse(z[:, 0] * z[:, 2], 0.36)
    within_4_mcse(y[:, 1], out.mean)  # the stated margin, mean exp(mu + sigma^2 / 2)


@pytest.mark.parametrize("effect_type,effect", [("ratio", 1.3), ("d", 0.4)])
def test_effect_types_reach_their_stated_size_at_the_final_visit(effect_type, effect):
    out = Lognormal(median=2.0, cv=0.5)
    proc = trial(outcome=out, effect=effect, effect_type=effect_type, n=50, visits=3)
    y, arm, _ = wide(proc.draw_batch(np.random.default_rng(13), 400), 3)
    final = y[:, -1]
    # treatment minus control mean at the final visit: (c - 1) * mean for a ratio c, d * SD for a shift in SD
    expected = out.mean * (effect - 1) if effect_type == "ratio" else effect * out.sd
    assert math.isclose(proc.true_effect(), expected)
    means = final[arm == 1].reshape(400, -1).mean(axis=1) - final[arm == 0].reshape(400, -1).mean(axis=1)
    within_4_mcse(means, expected)
    # the baseline visit is untouched by treatment (g_0 = 0)
    within_4_mcse(y[arm == 1, 0], out.mean)


@pytest.mark.slow
def test_final_visit_t_power_matches_the_noncentral_t_without_dropout():
    # Cohen (1988), ch. 2: the pooled two-sample t-test at the final visit; delta = 0.5 SD, n = 30 per arm
    n, effect, sd, alpha, reps = 30, 1.0, 2.0, 0.05, 4000
    proc = trial(outcome=Normal(mean=10.0, sd=sd), effect=effect, n=n, visits=4, correlation="ar1", rho=0.6)
    res = sp.run(sp.Scenario(proc, analyses=[build("analysis", {"type": "final_visit_t"})], alpha=alpha),
                 reps=reps, seed=2026, n_jobs=1, progress=False)
    assert res.paths["final_visit_t"] == "batch"
    row = res.summary().set_index("analysis").loc["final_visit_t"]
    ref = nct_power(effect / sd / math.sqrt(2 / n), 2 * n - 2, alpha, "two-sided")
    assert abs(row["power"] - ref) < 4 * row["mcse"], (row["power"], ref, row["mcse"])


def test_constant_hazard_dropout_follows_geometric_survival():
    # common practice: P(dropped by visit j) = 1 - (1 - h)^j, visit 0 always observed
    h, k, reps = 0.12, 5, 300
    proc = trial(missing=Dropout(hazard=h), visits=k, n=50)
    _, _, seen = wide(proc.draw_batch(np.random.default_rng(14), reps), k)
    m = seen.shape[0]
    assert seen[:, 0].all()
    assert np.all(np.diff(seen.astype(int), axis=1) <= 0)  # monotone: once missing, missing from then on
    for j in range(1, k):
        proportion_within_4_mcse(1 - seen[:, j].mean(), 1 - (1 - h) ** j, m)


def test_a_rate_gives_that_share_missing_at_the_final_visit():
    rate, k = 0.3, 4
    proc = trial(missing=Dropout(rate=rate), visits=k, n=50)
    assert math.isclose(proc._missing_step.hazard, 1 - (1 - rate) ** (1 / 3))
    _, _, seen = wide(proc.draw_batch(np.random.default_rng(15), 300), k)
    proportion_within_4_mcse(1 - seen[:, -1].mean(), rate, seen.shape[0])


@pytest.mark.parametrize("outcome", [Normal(mean=5.0, sd=2.0), Lognormal(median=2.0, cv=0.8)],
                         ids=["normal", "lognormal"])
def test_mar_dropout_is_calibrated_to_the_rate_and_removes_high_scores(outcome):
    # the calibrated intercept gives the stated share at the final visit (expected value: an integral
    # over the visits; here checked against the simulated share within binomial error)
    rate, k = 0.25, 4
    proc = trial(outcome=outcome, missing=Dropout(rate=rate, mar_slope=1.5), effect=0.3, visits=k, n=60,
                 correlation="ar1", rho=0.6)
    assert abs(proc._missing_step.expected_final_missing() - rate) < 1e-8
    y_complete = trial(outcome=outcome, effect=0.3, visits=k, n=60, correlation="ar1", rho=0.6)
    full, _, _ = wide(y_complete.draw_batch(np.random.default_rng(16), 300), k)
    _, _, seen = wide(proc.draw_batch(np.random.default_rng(16), 300), k)
    proportion_within_4_mcse(1 - seen[:, -1].mean(), rate, seen.shape[0])
    # the same normal scores (the dropout draws come after them): leavers had higher earlier scores
    assert full[~seen[:, 2], 1].mean() > full[seen[:, 2], 1].mean()


def test_intermittent_missingness_spares_the_baseline_visit():
    proc = trial(missing=Dropout(rate=0.2, intermittent={"type": "mcar", "rate": 0.3}), visits=4, n=50)
    b = proc.draw_batch(np.random.default_rng(17), 200)
    _, _, seen = wide(b, 4)
    assert seen[:, 0].all() and np.isfinite(b["baseline"]).all()
    # after visit 1 the rows are missing by dropout or by the further 30% (common practice: independent)
    retention = (1 - proc._missing_step.hazard) ** np.arange(4)
    for j in (1, 3):
        proportion_within_4_mcse(seen[:, j].mean(), retention[j] * 0.7, seen.shape[0])


def test_repeated_measures_is_the_composed_trial():
    spec = {"n": 12, "ratio": 1.5, "visits": 4, "correlation": "ar1", "rho": 0.6, "sd": 2.0, "effect": 0.7,
            "effect_shape": "slope", "dropout_rate": 0.2, "dropout_mar_slope": 1.0,
            "missing": {"type": "mcar", "rate": 0.1}}
    rm = RepeatedMeasures(**spec)
    again = build("process", rm.composed().spec())  # the trial it stands for, rebuilt from its table
    assert again.spec()["design"]["type"] == "visits" and again.spec()["missing"]["type"] == "dropout"
    a, b = rm.draw_batch(np.random.default_rng(3), 4), again.draw_batch(np.random.default_rng(3), 4)
    for key in ("y", "observed", "baseline"):
        assert np.array_equal(a[key], b[key], equal_nan=True)
    assert rm.true_effect() == again.true_effect()
    assert rm.mar_intercept == again._missing_step.intercept
    assert pickle.loads(pickle.dumps(rm)).draw_batch(np.random.default_rng(3), 4)["y"].tobytes() == a["y"].tobytes()


def test_trial_facts_are_the_repeated_measures_facts():
    common = {"n": 30, "visits": 4, "correlation": "ar1", "rho": 0.6}
    rm = RepeatedMeasures(**common, sd=2.0, effect=0.8, dropout_rate=0.3)
    t = trial(outcome=Normal(sd=2.0), effect=0.8, missing=Dropout(rate=0.3), **common)
    assert t.facts() == rm.facts()
    assert trial(missing=Dropout(rate=0.3, mar_slope=1.0)).facts() == ()


# iterative REML on both paths of mmrm (Fisher scoring vs scipy BFGS): the tolerance of tests/test_conformance.py
REML = {"rtol": 1e-6, "atol": 1e-9}


@pytest.mark.parametrize("analysis,tol", [({"type": "mmrm"}, REML), ({"type": "mmrm", "baseline": True}, REML),
                                          ({"type": "final_visit_t"}, {}), ({"type": "gee"}, {})])
def test_batch_paths_equal_the_per_replicate_paths_with_dropout(analysis, tol):
    proc = trial(outcome=Lognormal(median=2.0, cv=0.5), effect=1.2, effect_type="ratio",
                 missing=Dropout(rate=0.3, mar_slope=1.0, intermittent={"type": "mcar", "rate": 0.1}), n=10, visits=4)
    an = build("analysis", analysis)
    info = check_analysis(an, proc, **tol)
    assert an.has_batch and info["batch_compared"]


def test_the_kit_passes_the_design_the_mechanism_and_the_process():
    check_component(Visits(n=5, visits=3, rho=0.3))
    check_component(Dropout(rate=0.2, intermittent={"type": "mnar", "rate": 0.1}))
    check_process(trial(missing=Dropout(hazard=0.2, mar_slope=-0.5), n=6, visits=3, baseline=False))


@pytest.mark.parametrize("kwargs,message", [
    ({"design": {"type": "arms", "n": 10}, "missing": {"type": "dropout", "rate": 0.2}}, "`missing`: dropout needs"),
    ({"design": {"type": "visits", "n": 10, "visits": 3, "rho": 0.2}, "sd_ratio": 1.5}, "`sd_ratio` does not apply"),
    ({"design": {"type": "visits", "n": 10, "visits": 3, "rho": 0.2}, "outcome": {"type": "binary", "p0": 0.3,
                                                                                              "odds_ratio": 2.0}},
     "`outcome`: a binary layer"),
    ({"design": {"type": "visits", "n": 10, "visits": 3, "rho": -0.6}}, "`design.rho` must be > -1/(visits - 1)"),
    ({"design": {"type": "visits", "n": 10, "visits": 3, "corr": 1.5}}, "`design.corr` must be"),
    ({"design": {"type": "visits", "n": 10, "visits": 3, "rho": 0.2}, "missing": {"type": "dropout"}},
     "`missing.rate` or `hazard` is required"),
    ({"design": {"type": "visits", "n": 10, "visits": 3, "rho": 0.2},
      "missing": {"type": "dropout", "rate": 0.1, "hazard": 0.1}}, "`missing.hazard` and `rate` both given"),
    ({"design": {"type": "visits", "n": 10, "visits": 3, "rho": 0.2, "baseline": False},
      "missing": {"type": "dropout", "rate": 0.1, "intermittent": {"type": "mar", "rate": 0.1}}},
     "`missing.on` = 'baseline'"),
])
def test_bad_input_names_the_field(kwargs, message):
    with pytest.raises(ParameterError) as err:
        build("process", {"type": "trial", **kwargs})
    assert message in str(err.value) and "\n" not in str(err.value)


def test_unbound_dropout_at_random_says_where_it_works():
    with pytest.raises(ParameterError, match="`mar_slope`"):
        Dropout(rate=0.2, mar_slope=1.0).mask(np.random.default_rng(1), np.zeros((2, 6)), {"visit": np.tile([0, 1, 2], 2)})
