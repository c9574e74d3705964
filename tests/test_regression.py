"""OLS / ANCOVA: statsmodels agreement, batched normal equations, ANCOVA power, formula safety."""

import math

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from scipy import stats

import simpower as sp
from simpower._validation import Int, Real
from simpower.analyses.regression import OLS, Ancova, parse_formula
from simpower.errors import ParameterError
from simpower.processes.base import Batch, Process
from simpower.registry import build


class BaselineArms(Process):
    """Test process: baseline and outcome jointly normal (SD 1, correlation rho) in each arm.

    ``arms`` arms of n; arm j's outcome mean is ``effect * j``; with ``hetero`` the outcome SD of arm j
    is 1 + j (so HC SEs differ from classical ones).
    """

    params = {"n": Int(low=2), "effect": Real(), "rho": Real(-1, 1, low_open=True, high_open=True),
              "arms": Int(low=2), "hetero": Real(low=0)}
    defaults = {"effect": 0.0, "rho": 0.5, "arms": 2, "hetero": 0.0}

    def draw_batch(self, rng, size):
        arm = np.repeat(np.arange(self.arms, dtype=np.int8), self.n)
        x = rng.standard_normal((size, arm.size))
        e = rng.standard_normal((size, arm.size))
        y = self.effect * arm + (1 + self.hetero * arm) * (self.rho * x + math.sqrt(1 - self.rho**2) * e)
        return Batch(size, {"y": y, "baseline": x}, {"arm": arm})


def fit(data, formula, **kw):
    return smf.ols(formula, pd.DataFrame({k: np.asarray(v) for k, v in data.items()})).fit(**kw)


@pytest.mark.parametrize("cov_type", ["nonrobust", "HC0", "HC1", "HC2", "HC3"])
def test_ols_matches_statsmodels(cov_type):
    # reference: statsmodels OLS coefficient, SE and its Wald t-test of "term = null_value"
    b = BaselineArms(n=15, effect=0.3, arms=3, hetero=0.5).draw_batch(np.random.default_rng(0), 5)
    a = Ancova(cov_type=cov_type, term="C(arm)[T.2]", null_value=0.2)
    for i in range(b.size):
        d = b.replicate(i)
        ref = fit(d, "y ~ C(arm) + baseline", cov_type=cov_type, use_t=True)
        r = a(d)
        assert r.estimate == pytest.approx(ref.params["C(arm)[T.2]"], rel=1e-12)
        assert r.se == pytest.approx(ref.bse["C(arm)[T.2]"], rel=1e-12)
        tt = ref.t_test("C(arm)[T.2] = 0.2")
        assert r.pvalue == pytest.approx(float(tt.pvalue), rel=1e-10)
        lo, hi = ref.conf_int(0.05).loc["C(arm)[T.2]"]
        assert (r.ci_low, r.ci_high) == pytest.approx((lo, hi), rel=1e-12)


def test_cluster_robust_matches_statsmodels():
    # cluster-robust SE with t on G - 1 df, as statsmodels does with use_t=True
    d = BaselineArms(n=24, effect=0.3).draw_batch(np.random.default_rng(1), 1).replicate(0)
    d["cluster"] = np.arange(d["y"].size) // 6
    ref = fit(d, "y ~ C(arm) + baseline", cov_type="cluster", cov_kwds={"groups": d["cluster"]}, use_t=True)
    r = Ancova(cov_type="cluster")(d)
    assert r.se == pytest.approx(ref.bse["C(arm)[T.1]"], rel=1e-12)
    assert r.pvalue == pytest.approx(ref.pvalues["C(arm)[T.1]"], rel=1e-10)
    assert r.df == 7


@pytest.mark.parametrize("cov_type", ["nonrobust", "HC0", "HC1", "HC2", "HC3"])
@pytest.mark.parametrize("alternative", ["two-sided", "greater"])
def test_batch_equals_per_replicate(cov_type, alternative):
    b = BaselineArms(n=12, effect=0.2, arms=3, hetero=0.7).draw_batch(np.random.default_rng(2), 40)
    for a in (Ancova(cov_type=cov_type, alternative=alternative, term="C(arm)[T.2]"),
              OLS(cov_type=cov_type, alternative=alternative, use_t=False),
              OLS(formula="y ~ baseline + arm", cov_type=cov_type, alternative=alternative)):
        assert a.supports_batch(b)
        out = a.batch(b)
        per = [a(b.replicate(i)) for i in range(b.size)]
        for f in ("pvalue", "estimate", "se", "ci_low", "ci_high"):
            np.testing.assert_allclose(out[f], [getattr(r, f) for r in per], rtol=1e-8, atol=1e-12, err_msg=f)


def test_ols_on_arm_equals_students_t():
    # regression on a two-level factor is the pooled two-sample t-test (common practice)
    b = sp.NormalTwoArm(n=10, ratio=1.5, effect=0.5).draw_batch(np.random.default_rng(3), 20)
    out = OLS().batch(b)
    ref = sp.TTest().batch(b)
    np.testing.assert_allclose(out["pvalue"], ref["pvalue"], rtol=1e-10)
    np.testing.assert_allclose(out["se"], ref["se"], rtol=1e-10)


def test_ancova_power_matches_residual_variance_reduction():
    # Borm, Fransen & Lemmens (2007, J Clin Epidemiol 60:1234-1238): ANCOVA power is the t-test power
    # with the outcome variance multiplied by (1 - rho^2); noncentral t with df = N - 3 (scipy.stats.nct)
    n, effect, rho, reps = 40, 0.4, 0.6, 4000
    sc = sp.Scenario(BaselineArms(n=n, effect=effect, rho=rho), analyses=[Ancova(), OLS()])
    res = sp.run(sc, reps=reps, seed=13, n_jobs=1)
    assert res.paths["ancova"] == "batch"

    def power(sd, df):
        nc = effect / (sd * math.sqrt(2 / n))
        c = stats.t.ppf(0.975, df)
        return stats.nct.sf(c, df, nc) + stats.nct.cdf(-c, df, nc)

    adj = power(math.sqrt(1 - rho**2), 2 * n - 3)
    unadj = power(1.0, 2 * n - 2)
    got = res.summaries["ancova"]["power"]
    assert abs(got - adj) < 4 * math.sqrt(adj * (1 - adj) / reps)
    assert abs(res.summaries["ols"]["power"] - unadj) < 4 * math.sqrt(unadj * (1 - unadj) / reps)
    assert got - res.summaries["ols"]["power"] > 0.1


def test_ancova_with_a_user_function_process():
    # the per-replicate path through a plain function (rng, **params) -> table
    def draw(rng, n, effect, rho):
        arm = np.repeat([0, 1], n)
        x = rng.standard_normal(2 * n)
        y = effect * arm + rho * x + math.sqrt(1 - rho**2) * rng.standard_normal(2 * n)
        return {"y": y, "arm": arm, "baseline": x}

    res = sp.run(sp.Scenario(draw, Ancova(), params={"n": 20, "effect": 0.0, "rho": 0.5}), reps=200, seed=1,
                 n_jobs=1)
    assert res.paths["ancova"] == "per-replicate"
    assert res.summaries["ancova"]["n_failed"] == 0


def test_paths_that_stay_per_replicate():
    b = BaselineArms(n=10).draw_batch(np.random.default_rng(4), 3)
    assert not OLS(formula="y ~ C(arm) * baseline").supports_batch(b)
    assert not Ancova(cov_type="cluster").supports_batch(b)
    assert not OLS(formula="y ~ C(arm) + age").supports_batch(b)
    assert not OLS(formula="y ~ C(arm) - 1", term="C(arm)[1]").supports_batch(b)
    r = OLS(formula="y ~ C(arm) * baseline")(b.replicate(0))
    ref = fit(b.replicate(0), "y ~ C(arm) * baseline")
    assert r.estimate == pytest.approx(ref.params["C(arm)[T.1]"])


@pytest.mark.parametrize("formula", ["y ~ __import__('os').getcwd()", "y ~ np.log(baseline)", "y ~ I(arm * 2)",
                                     "y ~ C(arm) + baseline ** 2", "y", "y ~ a ~ b", "log(y) ~ arm", "y ~ "])
def test_formulas_outside_the_grammar_are_refused(formula):
    with pytest.raises(ParameterError, match="formula"):
        OLS(formula=formula, term="arm")


def test_formula_grammar_accepts_main_effects_interactions_and_intercept_removal():
    f = parse_formula("y ~ C(arm) * baseline - 1")
    assert not f.intercept
    assert f.terms == ((("cat", "arm"),), (("num", "baseline"),), (("cat", "arm"), ("num", "baseline")))
    assert parse_formula("y ~ 0 + arm:baseline").columns == ["y", "arm", "baseline"]


def test_errors_name_the_problem():
    with pytest.raises(ParameterError, match="term"):
        OLS(formula="y ~ baseline")
    with pytest.raises(ParameterError, match="cov_type"):
        OLS(cov_type="HC4")
    with pytest.raises(ValueError, match="baseline"):
        Ancova()({"y": np.arange(6.0), "arm": np.repeat([0, 1], 3)})
    d = BaselineArms(n=5).draw_batch(np.random.default_rng(0), 1).replicate(0)
    with pytest.raises(ValueError, match="C\\(arm\\)\\[T.1\\]"):
        OLS(term="C(arm)[T.3]")(d)


def test_spec_round_trip():
    a = Ancova(cov_type="HC3")
    assert build("analysis", a.spec()) == a
    assert a.formula == "y ~ C(arm) + baseline" and a.coefficient == "C(arm)[T.1]"


@pytest.mark.parametrize("missing", [None, 0.2])
def test_per_replicate_path_equals_the_formula_api_bit_for_bit(missing):
    # reference: statsmodels' formula API (smf.ols on the complete cases, as pandas' dropna keeps them);
    # main-effects formulas build their design by hand (no data frame): same columns, same order,
    # same memory order, so the same fit to the last bit
    miss = None if missing is None else sp.MCAR(rate=missing)
    b = sp.TwoArm(n=15, effect=0.3, baseline_corr=0.5, missing=miss).draw_batch(np.random.default_rng(8), 12)
    c = sp.ClusterTrial(clusters=4, cluster_size=6, icc=0.1, missing=miss).draw_batch(np.random.default_rng(9), 12)
    for batch, a in [(b, Ancova()), (b, Ancova(cov_type="HC3")), (b, OLS(formula="y ~ baseline + arm", cov_type="HC1")),
                     (c, OLS(cov_type="cluster")), (c, OLS(cov_type="cluster", use_t=False))]:
        cols = a.parsed.columns + (["cluster"] if a.cov_type == "cluster" else [])
        for i in range(batch.size):
            d = batch.replicate(i)
            frame = pd.DataFrame({k: np.asarray(d[k]) for k in cols}).dropna()
            kw = {"cov_kwds": {"groups": frame["cluster"].to_numpy()}} if a.cov_type == "cluster" else {}
            ref = smf.ols(a.formula, frame).fit(cov_type=a.cov_type, use_t=a.use_t, **kw)
            r = a(d)
            assert (r.estimate, r.se) == (ref.params[a.coefficient], ref.bse[a.coefficient])
            assert r.pvalue == pytest.approx(ref.pvalues[a.coefficient], rel=1e-12)


def test_batch_equals_per_replicate_with_missing_padding_and_clusters():
    # the masked path: missing outcomes, padded cluster sizes, complete and missing cluster-robust SEs
    cases = [(sp.TwoArm(n=12, effect=0.3, baseline_corr=0.5, missing=sp.MCAR(rate=0.3)),
              [Ancova(cov_type=c) for c in ("nonrobust", "HC0", "HC1", "HC2", "HC3")]),
             (sp.ClusterTrial(clusters=4, cluster_size=5, cluster_size_cv=0.5, icc=0.1),
              [OLS(cov_type="cluster"), OLS(cov_type="HC3")]),
             (sp.ClusterTrial(clusters=4, cluster_size=5, icc=0.1), [OLS(cov_type="cluster", alternative="less")]),
             (sp.ClusterTrial(clusters=4, cluster_size=5, cluster_size_cv=0.5, icc=0.1, missing=sp.MCAR(rate=0.2)),
              [OLS(cov_type="cluster"), OLS()])]
    for proc, analyses in cases:
        b = proc.draw_batch(np.random.default_rng(10), 40)
        for a in analyses:
            assert a.supports_batch(b), (proc, a)
            out = a.batch(b)
            per = [a(b.replicate(i)) for i in range(b.size)]
            for f in ("pvalue", "estimate", "se", "ci_low", "ci_high"):
                np.testing.assert_allclose(out[f], [getattr(r, f) for r in per], rtol=1e-9, atol=1e-12,
                                           err_msg=f"{proc} {a} {f}")


def test_cluster_robust_batch_with_interleaved_cluster_ids():
    # cluster ids that are not in runs (each cluster spread over the table): same SEs as row by row
    b = BaselineArms(n=12, effect=0.2).draw_batch(np.random.default_rng(11), 30)
    b.shared["cluster"] = np.random.default_rng(12).permutation(np.arange(24) % 6)
    for a in (Ancova(cov_type="cluster"), OLS(cov_type="cluster", use_t=False)):
        assert a.supports_batch(b)
        out = a.batch(b)
        per = [a(b.replicate(i)) for i in range(b.size)]
        for f in ("pvalue", "se"):
            np.testing.assert_allclose(out[f], [getattr(r, f) for r in per], rtol=1e-9, err_msg=f)
