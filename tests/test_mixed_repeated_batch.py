"""mixed_model's batch path for a design shared by the replicates (repeated measures, random subject intercept).

External references used here:
- statsmodels ``MixedLM`` (REML), fitted replicate by replicate with a tight optimiser
  tolerance: estimates, standard errors and p-values of the coefficient under test, its own
  REML log-likelihood (``MixedLM.loglike``) and observed information (``MixedLM.hessian``);
- statsmodels ``OLS``: at a zero subject variance the REML fit is the ordinary least squares
  fit with the REML (= OLS) residual variance (Searle, Casella & McCulloch 1992, ch. 6, from
  memory); simpower reports the OLS standard error there (the convention of the cluster
  batch path, documented in simpower/analyses/mixed.py);
- the between-within df (Schluchter & Elashoff 1990) and Satterthwaite df (Giesbrecht &
  Burns 1985) as the per-replicate path computes them from statsmodels' design and fit.

Data: the repeated_measures process (the bundled scenario's settings: AR(1) 0.6, effect at
the final visit, 30% MAR dropout), complete data, and a small generator of its own for the
boundary case.
"""

import math
import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from scipy import stats
from statsmodels.regression.mixed_linear_model import MixedLMParams

from simpower.analyses.mixed import MixedModel, fit_design_batch, shared_design
from simpower.processes.base import Batch
from simpower.processes.repeated import RepeatedMeasures

FORMULA = "y ~ C(arm) * C(visit, Treatment(3))"
TERM = "C(arm)[T.1]"


def scenario_process(n=30, **kw):
    spec = dict(n=n, visits=4, correlation="ar1", rho=0.6, effect=0.4, effect_shape="final",
                dropout_rate=0.3, dropout_mar_slope=2.0)
    spec.update(kw)
    spec = {k: v for k, v in spec.items() if v is not None}
    return RepeatedMeasures(**spec)


def tight_fits(batch, formula=FORMULA):
    """Per replicate: (model, result, warned) of statsmodels MixedLM at a tight tolerance."""
    out = []
    for i in range(batch.size):
        d = pd.DataFrame(batch.replicate(i)).dropna(subset=["y"])
        with warnings.catch_warnings(record=True) as w:
            warnings.simplefilter("always")
            model = smf.mixedlm(formula, d, groups=d["subject"])
            res = model.fit(reml=True, method=["bfgs"], gtol=1e-10)
        out.append((model, res, bool(w)))
    return out


def _params(fe, gamma):
    return MixedLMParams.from_components(fe_params=np.asarray(fe), cov_re=np.array([[max(gamma, 1e-12)]]))


def _fit_of(batch, formula=FORMULA):
    X, names = shared_design(formula, "subject", batch.shared)
    y = batch.per_rep["y"]
    return fit_design_batch(y, np.isfinite(y), X, batch.shared["subject"]), names


@pytest.mark.slow
@pytest.mark.parametrize("dropout", [True, False], ids=["mar_dropout", "complete"])
def test_batch_matches_statsmodels_at_a_tight_tolerance(dropout):
    proc = scenario_process() if dropout else scenario_process(dropout_rate=None, dropout_mar_slope=None,
                                                              correlation="exchangeable", rho=0.3)
    batch = proc.draw_batch(np.random.default_rng(11 if dropout else 12), 120)
    an = MixedModel(formula=FORMULA, groups="subject")
    assert an.supports_batch(batch)
    out = an.batch(batch)
    fit, names = _fit_of(batch)
    k = names.index(TERM)
    compared = 0
    agree = 0
    for i, (model, res, warned) in enumerate(tight_fits(batch)):
        assert list(model.exog_names) == names
        g = fit["gamma"][i]
        ours = model.loglike(_params(fit["beta"][i], g), profile_fe=False)
        # by statsmodels' own REML criterion the batch estimate is at least as good as its fit
        assert ours >= res.llf - 1e-8
        p_sm = res.pvalues.iloc[k]
        agree += (out["pvalue"][i] < 0.05) == (p_sm < 0.05)
        interior = res.cov_re.iloc[0, 0] / res.scale > 1e-4 and g > 0
        if warned or not interior:
            continue
        compared += 1
        assert math.isclose(out["estimate"][i], res.fe_params.iloc[k], rel_tol=1e-6)
        assert math.isclose(out["se"][i], res.bse_fe.iloc[k], rel_tol=1e-6)
        assert math.isclose(out["pvalue"][i], p_sm, rel_tol=1e-6, abs_tol=1e-12)
        # and the SE is the one of statsmodels' observed information at our estimate
        hess, _ = model.hessian(_params(fit["beta"][i], g))
        se = math.sqrt(np.linalg.inv(-hess)[k, k])
        assert math.isclose(out["se"][i], se, rel_tol=1e-7)
    assert compared >= 0.8 * batch.size
    assert agree == batch.size
    assert not out.trouble["warning:ConvergenceWarning"].any()


def test_batch_equals_the_per_replicate_path_for_every_df():
    # the per-replicate path (statsmodels' default optimiser, then between_within_df / satterthwaite on
    # statsmodels' design) against the batch path; statsmodels' default stops within ~1e-5 of the optimum
    batch = scenario_process(n=12).draw_batch(np.random.default_rng(5), 12)
    for df in ("wald", "between-within", "satterthwaite"):
        an = MixedModel(formula=FORMULA, groups="subject", df=df)
        out = an.batch(batch)
        for i in range(batch.size):
            r = an(batch.replicate(i))
            assert math.isclose(out["estimate"][i], r.estimate, rel_tol=1e-4, abs_tol=1e-5)
            assert math.isclose(out["se"][i], r.se, rel_tol=1e-4)
            assert math.isclose(out["pvalue"][i], r.pvalue, rel_tol=1e-3, abs_tol=1e-6)
        if df == "between-within":
            # the arm coefficient is constant within subjects: subjects - 2 between-subject columns
            assert np.all(np.isclose(-stats.t.ppf(0.025, 22.0) * out["se"], out["estimate"] - out["ci_low"]))


def _boundary_batch(reps=6, n=15, seed=4):
    """Four visits, outcomes negatively correlated within subject: subject variance estimated at 0."""
    rng = np.random.default_rng(seed)
    k = 4
    sub = np.repeat(np.arange(2 * n), k)
    arm = (sub >= n).astype(int)
    visit = np.tile(np.arange(k), 2 * n)
    z = rng.standard_normal((reps, 2 * n, k))
    z -= 0.9 * z.mean(axis=2, keepdims=True)            # within-subject correlation about -1/3
    y = z.reshape(reps, -1) + 0.3 * arm * (visit == 3)
    y[:, (sub % 5 == 0) & (visit == 3)] = np.nan         # some dropout
    return Batch(reps, {"y": y}, {"arm": arm, "subject": sub, "visit": visit})


def test_boundary_estimate_is_the_ols_fit():
    batch = _boundary_batch()
    an = MixedModel(formula=FORMULA, groups="subject")
    out = an.batch(batch)
    fit, names = _fit_of(batch)
    k = names.index(TERM)
    assert np.all(fit["gamma"] == 0)
    for i in range(batch.size):
        d = pd.DataFrame(batch.replicate(i)).dropna(subset=["y"])
        ols = smf.ols(FORMULA, d).fit()
        assert math.isclose(out["estimate"][i], ols.params[TERM], rel_tol=1e-9)
        assert math.isclose(out["se"][i], ols.bse[TERM], rel_tol=1e-8)
        assert math.isclose(out["pvalue"][i], 2 * stats.norm.sf(abs(ols.params[TERM] / ols.bse[TERM])), rel_tol=1e-8)
    assert not any(v.any() for v in out.trouble.values())


def test_a_level_never_observed_goes_to_the_per_replicate_path():
    batch = scenario_process(n=8).draw_batch(np.random.default_rng(2), 4)
    y = batch.per_rep["y"]
    y[1, (batch.shared["visit"] == 3) & (batch.shared["arm"] == 1)] = np.nan   # no final visit in arm 1
    an = MixedModel(formula=FORMULA, groups="subject")
    out = an.batch(batch)
    # statsmodels cannot fit that replicate (its design is singular): the batch result records the
    # per-replicate path's exception for it and for no other replicate
    with pytest.raises(np.linalg.LinAlgError):
        an(batch.replicate(1))
    assert out.trouble["error:LinAlgError"].tolist() == [False, True, False, False]
    assert np.isfinite(out["pvalue"][[0, 2, 3]]).all()
    # a level absent altogether (no final visit at all): statsmodels drops the column and fits
    y[2, batch.shared["visit"] == 3] = np.nan
    an2 = MixedModel(formula="y ~ C(arm) + C(visit)", groups="subject")
    out = an2.batch(batch)
    ref = an2(batch.replicate(2))
    assert out["estimate"][2] == ref.estimate and out["pvalue"][2] == ref.pvalue


def test_which_batches_the_general_path_takes():
    batch = scenario_process(n=8, baseline=True).draw_batch(np.random.default_rng(3), 3)
    assert MixedModel(formula=FORMULA, groups="subject").supports_batch(batch)
    assert MixedModel(formula="y ~ C(arm) + C(visit)", groups="subject").supports_batch(batch)
    # a per-replicate covariate: the design differs between replicates
    assert not MixedModel(formula="y ~ C(arm) + baseline", groups="subject").supports_batch(batch)
    # groups not in the data, or a term the formula does not have
    assert not MixedModel(formula=FORMULA, groups="cluster").supports_batch(batch)
    assert not MixedModel(formula=FORMULA, groups="subject", term="visit").supports_batch(batch)
    # a design without full column rank (visit and a copy of it)
    b2 = Batch(batch.size, batch.per_rep, {**batch.shared, "v2": batch.shared["visit"] * 2})
    assert not MixedModel(formula="y ~ C(arm) + visit + v2", groups="subject").supports_batch(b2)
