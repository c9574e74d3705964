"""Ordinal outcomes: the ordinal_two_arm process, proportional_odds, dichotomised, Whitehead's formula.

Sources named beside each check:

* proportional odds (McCullagh 1980, J R Stat Soc B 42:109-142): logit P(Y1 <= k) =
  logit P(Y0 <= k) - log OR; the treated arm's shares are computed here from the
  cumulative logits;
* statsmodels ``OrderedModel(distr="logit")`` (the per-replicate reference), its
  log-likelihood differentiated here by Richardson-extrapolated central differences;
* with two categories the proportional-odds model is logistic regression: the MLE is the
  empirical log odds ratio with Woolf's (1955) SE;
* ``scipy.stats.mannwhitneyu(method="asymptotic")`` (tie-corrected variance) for the
  Mann-Whitney test on heavily tied ordinal data;
* the two-proportion z-test (``two_proportions``, itself checked against its source in
  tests/test_binary.py) for ``dichotomised``;
* Whitehead (1993, Stat Med 12:2257-2271; formula from memory) for the sample size; its
  two-category case against the log-odds-ratio formula (common practice), and against
  simulation with an allowance of 4 MCSE (Morris, White & Crowther 2019) plus the size of
  the formula's approximation, measured by the large-sample Wald power at the true
  parameters (the multinomial Fisher information, computed here).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from scipy import special, stats

import simpower as sp
from simpower import analytic
from simpower.analyses.ordinal import batch_tables, fit_po_counts, separated
from simpower.batch import Batch
from simpower.errors import ParameterError
from simpower.registry import build

P0 = [0.1, 0.2, 0.3, 0.25, 0.15]


def ordinal(**kw):
    return build("process", {"type": "ordinal_two_arm", **kw})


def analysis(**kw):
    return build("analysis", kw)


def po_shares(p0, odds_ratio):
    """Treated shares under proportional odds, from the cumulative logits (McCullagh 1980)."""
    cum0 = np.cumsum(p0)[:-1]
    logit1 = np.log(cum0 / (1 - cum0)) - math.log(odds_ratio)
    return np.diff(np.concatenate([[0.0], 1 / (1 + np.exp(-logit1)), [1.0]]))


# -- the process --------------------------------------------------------------------------------
@pytest.mark.parametrize("kw", [dict(odds_ratio=1.8), dict(p1=[0.3, 0.1, 0.1, 0.2, 0.3]),
                                dict(odds_ratio=0.6, ratio=1.5)])
def test_category_shares_per_arm_match_p0_and_p1_within_4_mcse(kw):
    proc = ordinal(n=200, p0=P0, **kw)
    b = proc.draw_batch(np.random.default_rng(11), 400)
    y, arm = b["y"], b["arm"]
    expected = {0: np.array(P0), 1: po_shares(P0, kw["odds_ratio"]) if "odds_ratio" in kw else np.array(kw["p1"])}
    for a in (0, 1):
        vals = y[:, arm == a].ravel()
        assert set(np.unique(vals)) == set(range(5))           # categories coded 0..K-1
        share = np.array([np.mean(vals == k) for k in range(5)])
        mcse = np.sqrt(expected[a] * (1 - expected[a]) / vals.size)
        assert np.all(np.abs(share - expected[a]) < 4 * mcse), (a, share, expected[a])
    np.testing.assert_allclose(proc.p1_probs, expected[1], rtol=1e-12)


def test_odds_ratio_above_one_moves_the_treated_arm_up_and_the_estimand_is_its_log():
    proc = ordinal(n=50, p0=P0, odds_ratio=2.0)
    assert np.all(np.cumsum(proc.p1_probs)[:-1] < np.cumsum(P0)[:-1])   # P(Y1 <= k) < P(Y0 <= k)
    assert proc.true_effect() == pytest.approx(math.log(2.0))
    assert proc.null().true_effect() == 0.0 and proc.null().odds_ratio == 1.0
    np.testing.assert_allclose(analytic.po_shift(P0, 2.0), proc.p1_probs, rtol=1e-12)
    # the probability index by brute force over the category pairs
    p1 = proc.p1_probs
    brute = sum(P0[i] * p1[j] * (1.0 if j > i else 0.5 if j == i else 0.0) for i in range(5) for j in range(5))
    assert proc.probability_index == pytest.approx(brute, rel=1e-12)
    given = ordinal(n=50, p0=P0, p1=list(p1))
    assert given.true_effect() is None and given.facts() == ()
    assert given.null().p1 == tuple(P0)


@pytest.mark.parametrize("kw, message", [
    (dict(p0=[0.2, 0.3, 0.3]), r"`p0` must list K >= 2 category probabilities.*sum to 0\.8"),
    (dict(p0=[1.0]), r"`p0` must list K >= 2 .*got 1 category"),
    (dict(p0=[0.5, 0.0, 0.5]), r"`p0` must list .*got 0\.0 among"),
    (dict(p0="0.5, 0.5"), r"`p0` must list"),
    (dict(p0=[0.5, 0.5], odds_ratio=2.0, p1=[0.4, 0.6]), r"`odds_ratio`, `p1`: give .* not both"),
    (dict(p0=[0.5, 0.5], p1=[0.2, 0.3, 0.5]), r"`p1` must have one probability per category of `p0` \(2\)"),
    (dict(p0=[0.5, 0.5], odds_ratio=-1.0), r"`odds_ratio` must be > 0"),
])
def test_bad_parameters_are_one_line_errors_naming_the_field(kw, message):
    with pytest.raises(ParameterError, match=message) as info:
        ordinal(n=10, **kw)
    assert "\n" not in str(info.value)


# -- proportional_odds against statsmodels OrderedModel ---------------------------------------------
def _ordered_model_fit(table):
    from statsmodels.miscmodels.ordinal_model import OrderedModel

    y, arm = np.asarray(table["y"], float), np.asarray(table["arm"], float)
    ok = np.isfinite(y)
    model = OrderedModel(y[ok], arm[ok][:, None], distr="logit")
    return model, model.fit(method="newton", disp=0, maxiter=200)


@pytest.mark.slow
@pytest.mark.parametrize("missing", [None, {"type": "mcar", "rate": 0.2}])
def test_batch_fit_agrees_with_ordered_model_on_hundreds_of_replicates(missing):
    # statsmodels OrderedModel (Newton, numerical derivatives): its slope converges to ~1e-8; its SE comes
    # from a finite-difference Hessian (statsmodels.tools.numdiff.approx_hess), ~1e-5 relative
    kw = {"missing": missing} if missing else {}
    proc = ordinal(n=100, p0=P0, odds_ratio=1.6, **kw)
    b = proc.draw_batch(np.random.default_rng(3 if missing else 2), 250)
    res = analysis(type="proportional_odds").batch(b)
    assert not res.trouble
    est, se, p = (np.empty(b.size) for _ in range(3))
    with warnings.catch_warnings():
        warnings.simplefilter("error")   # a replicate where OrderedModel warns would be left out below
        for i in range(b.size):
            _, fit = _ordered_model_fit(b.replicate(i))
            est[i], se[i] = fit.params[0], fit.bse[0]
            p[i] = 2 * stats.norm.sf(abs(est[i] / se[i]))
    np.testing.assert_allclose(res.estimate, est, rtol=1e-6, atol=1e-8)
    np.testing.assert_allclose(res.se, se, rtol=2e-5)
    assert np.mean((res.pvalue <= 0.05) == (p <= 0.05)) >= 0.999


def _richardson_hessian(f, x, h=1e-3):
    """Hessian of ``f`` at ``x`` by central differences at h and h/2, Richardson-extrapolated (error O(h^4))."""
    def central(step):
        k = x.size
        out = np.empty((k, k))
        for i in range(k):
            for j in range(k):
                ei, ej = np.eye(k)[i] * step, np.eye(k)[j] * step
                out[i, j] = (f(x + ei + ej) - f(x + ei - ej) - f(x - ei + ej) + f(x - ei - ej)) / (4 * step**2)
        return out

    return (4 * central(h / 2) - central(h)) / 3


def test_batch_se_equals_the_inverse_hessian_of_ordered_models_likelihood():
    # OrderedModel's log-likelihood (its own parameterisation: slope, first cut, log increments),
    # differentiated here at the batch MLE: the slope's SE is invariant to the threshold parameterisation
    proc = ordinal(n=80, p0=P0, odds_ratio=1.7, missing=sp.MCAR(rate=0.1))
    b = proc.draw_batch(np.random.default_rng(8), 5)
    lay = b.layout("two_arm")
    counts, _ = batch_tables(lay)
    beta, se, ll, _, conv = fit_po_counts(counts)
    assert conv.all()
    for i in range(b.size):
        model, fit = _ordered_model_fit(b.replicate(i))   # its optimum: the slope within ~1e-8 of ours
        assert fit.llf == pytest.approx(ll[i], rel=1e-10)   # the same maximum
        hess = _richardson_hessian(model.loglike, np.asarray(fit.params, float))
        assert se[i] == pytest.approx(math.sqrt(-np.linalg.inv(hess)[0, 0]), rel=1e-6)


def test_two_categories_reduce_to_logistic_regression():
    # one binary covariate: the MLE is the empirical log odds ratio, its SE Woolf's (1955)
    proc = ordinal(n=40, p0=[0.6, 0.4], odds_ratio=2.0)
    b = proc.draw_batch(np.random.default_rng(4), 50)
    res = analysis(type="proportional_odds").batch(b)
    y, arm = b["y"], b["arm"]
    x1, x0 = (y[:, arm == 1] == 1).sum(1), (y[:, arm == 0] == 1).sum(1)
    n1, n0 = (arm == 1).sum(), (arm == 0).sum()
    fine = ~res.trouble.get("warning:PerfectSeparationWarning", np.zeros(b.size, bool))
    woolf = np.log(x1 / (n1 - x1) * (n0 - x0) / x0)
    np.testing.assert_allclose(res.estimate[fine], woolf[fine], rtol=1e-9)
    np.testing.assert_allclose(res.se[fine], np.sqrt(1 / x1 + 1 / (n1 - x1) + 1 / x0 + 1 / (n0 - x0))[fine],
                               rtol=1e-9)
    # and so does statsmodels' logistic regression (the binary analysis) on the same tables
    logit = analysis(type="logistic").batch(b)
    np.testing.assert_allclose(res.pvalue[fine], logit.pvalue[fine], rtol=1e-9)


def _table_batch(rows):
    """A batch from explicit (y0, y1) arrays per replicate, equal sizes."""
    y = np.array([np.concatenate([a, b]) for a, b in rows], float)
    n0 = len(rows[0][0])
    arm = np.repeat(np.array([0, 1], np.int8), [n0, y.shape[1] - n0])
    return Batch(len(rows), {"y": y}, {"arm": arm}, {"n0": n0, "n1": y.shape[1] - n0})


def test_empty_categories_are_dropped_as_ordered_model_drops_them_and_separation_is_flagged():
    rng = np.random.default_rng(5)
    base = [(rng.choice([0, 1, 3, 4], 30), rng.choice([0, 1, 3, 4], 30)),   # category 2 empty
            (rng.choice([0, 2, 4], 30), rng.choice([1, 2, 4], 30)),         # categories differ by arm
            (rng.choice(5, 30), rng.choice(5, 30)),                         # all five
            (rng.choice([0, 1, 2], 30), rng.choice([2, 3], 30)),            # overlap in one category: separated
            (np.zeros(30), np.zeros(30))]                                   # one category: nothing to fit
    b = _table_batch(base)
    an = analysis(type="proportional_odds")
    assert an.supports_batch(b)
    res = an.batch(b)
    assert set(res.trouble) == {"warning:PerfectSeparationWarning"}
    np.testing.assert_array_equal(res.trouble["warning:PerfectSeparationWarning"], [0, 0, 0, 1, 0])
    assert math.isnan(res.pvalue[4])
    for i in range(3):
        _, fit = _ordered_model_fit(b.replicate(i))
        assert res.estimate[i] == pytest.approx(fit.params[0], rel=1e-6)
        assert res.se[i] == pytest.approx(fit.bse[0], rel=2e-5)
    assert separated(2, 2, 2, 3) and separated(3, 4, 0, 3) and not separated(0, 2, 1, 3)


def test_likelihood_ratio_test_matches_ordered_models_llf_and_llnull():
    proc = ordinal(n=60, p0=P0, odds_ratio=1.5)
    b = proc.draw_batch(np.random.default_rng(6), 6)
    res = analysis(type="proportional_odds", test="lr", alternative="greater").batch(b)
    for i in range(b.size):
        _, fit = _ordered_model_fit(b.replicate(i))
        lr = 2 * (fit.llf - fit.llnull)
        p = stats.norm.sf(np.sign(fit.params[0]) * math.sqrt(lr))   # signed root, one-sided
        assert res.pvalue[i] == pytest.approx(p, rel=1e-6)
        assert 2 * min(p, 1 - p) == pytest.approx(stats.chi2.sf(lr, 1), rel=1e-9)


# -- type I error ---------------------------------------------------------------------------------
@pytest.mark.parametrize("an", [{"type": "proportional_odds"}, {"type": "proportional_odds", "test": "lr"},
                                {"type": "dichotomised", "cut": 3}, {"type": "mann_whitney", "estimand": "none"}])
def test_type_one_error_within_4_mcse(an):
    sc = sp.Scenario(ordinal(n=100, p0=P0, odds_ratio=1.0), build("analysis", an))
    res = sp.run(sc, reps=4000, seed=21, n_jobs=1, progress=False)
    assert res.paths[sc.primary] == "batch"
    mcse = math.sqrt(0.05 * 0.95 / res.reps)   # at the nominal level (Morris, White & Crowther 2019)
    assert abs(res.power - 0.05) < 4 * mcse, (res.power, mcse)


# -- Mann-Whitney on ordinal data: heavy ties ------------------------------------------------------
@pytest.mark.parametrize("missing", [None, {"type": "mcar", "rate": 0.2}])
def test_mann_whitney_with_heavy_ties_equals_scipy_asymptotic(missing):
    kw = {"missing": missing} if missing else {}
    proc = ordinal(n=40, p0=[0.3, 0.5, 0.2], odds_ratio=1.5, **kw)
    b = proc.draw_batch(np.random.default_rng(9), 40)
    for cont in (True, False):
        mw = analysis(type="mann_whitney", continuity=cont, estimand="probability")
        assert mw.supports_batch(b)
        res = mw.batch(b)
        for i in range(b.size):
            t = b.replicate(i)
            ok = np.isfinite(t["y"])
            y1, y0 = t["y"][ok & (t["arm"] == 1)], t["y"][ok & (t["arm"] == 0)]
            r = stats.mannwhitneyu(y1, y0, method="asymptotic", use_continuity=cont)
            assert res.pvalue[i] == pytest.approx(r.pvalue, rel=1e-9)
            assert res.estimate[i] == pytest.approx(r.statistic / (y0.size * y1.size), rel=1e-12)
    # the ties matter: the untied variance n0 n1 (N + 1) / 12 would give another p-value
    t = b.replicate(0)
    ok = np.isfinite(t["y"])
    y1, y0 = t["y"][ok & (t["arm"] == 1)], t["y"][ok & (t["arm"] == 0)]
    n0, n1 = y0.size, y1.size
    u = stats.mannwhitneyu(y1, y0).statistic
    untied = 2 * stats.norm.sf((abs(u - n0 * n1 / 2) - 0.5) / math.sqrt(n0 * n1 * (n0 + n1 + 1) / 12))
    assert abs(res.pvalue[0] - untied) > 1e-3 * untied


# -- dichotomised ----------------------------------------------------------------------------------
@pytest.mark.parametrize("missing", [None, {"type": "mcar", "rate": 0.2}])
def test_dichotomised_is_two_proportions_on_the_shares_at_or_above_the_cut(missing):
    kw = {"missing": missing} if missing else {}
    b = ordinal(n=30, p0=P0, odds_ratio=2.0, **kw).draw_batch(np.random.default_rng(12), 20)
    an = analysis(type="dichotomised", cut=3, continuity=True)
    res = an.batch(b)
    y = b["y"].copy()
    split = np.where(np.isfinite(y), (y >= 3).astype(float), np.nan)
    ref = analysis(type="two_proportions", continuity=True).batch(Batch(b.size, {**b.per_rep, "y": split},
                                                                        b.shared, b.info))
    for f in ("pvalue", "estimate", "se", "ci_low", "ci_high"):
        np.testing.assert_array_equal(res[f], ref[f])
    for i in range(b.size):
        one = an(b.replicate(i))
        t = b.replicate(i)
        ok = np.isfinite(t["y"])
        s1 = np.mean(t["y"][ok & (t["arm"] == 1)] >= 3)
        s0 = np.mean(t["y"][ok & (t["arm"] == 0)] >= 3)
        assert one.estimate == pytest.approx(s1 - s0, rel=1e-12, abs=1e-15)
        assert one.pvalue == pytest.approx(res.pvalue[i], rel=1e-12)


# -- Whitehead (1993) --------------------------------------------------------------------------------
@pytest.mark.parametrize("p, odds_ratio, ratio", [(0.3, 2.0, 1.0), (0.55, 0.5, 2.0), (0.1, 3.0, 0.5)])
def test_whitehead_with_two_categories_is_the_log_odds_ratio_formula(p, odds_ratio, ratio):
    # 1 - p^3 - q^3 = 3 p q when p + q = 1 (an algebraic identity): Whitehead's N becomes
    # (A + 1)^2 (z* + z_power)^2 / (A (log OR)^2 pbar qbar), the test of log OR with its variance at the
    # pooled risk (common practice); exact up to rounding
    p0 = [1 - p, p]
    p1 = po_shares(p0, odds_ratio)
    pbar = (p + ratio * p1[1]) / (1 + ratio)
    z = stats.norm.ppf(0.975) + stats.norm.ppf(0.9)
    total = (ratio + 1) ** 2 * z**2 / (ratio * math.log(odds_ratio) ** 2 * pbar * (1 - pbar))
    # the two-sided n counts the far tail too: compare one-sided at alpha/2
    n = analytic.whitehead_n(p0, odds_ratio, 0.9, ratio=ratio, alpha=0.025,
                             alternative="greater" if odds_ratio > 1 else "less")
    assert n * (1 + ratio) == pytest.approx(total, rel=1e-12)
    assert analytic.whitehead_power(p0, odds_ratio, n, ratio=ratio, alpha=0.025,
                                    alternative="greater" if odds_ratio > 1 else "less") == pytest.approx(0.9)
    # two-sided: the exact inverse, a hair below the one-tail formula
    n2 = analytic.whitehead_n(p0, odds_ratio, 0.9, ratio=ratio)
    assert n2 <= n and analytic.whitehead_power(p0, odds_ratio, n2, ratio=ratio) == pytest.approx(0.9, abs=1e-10)


def _information_power(p0, odds_ratio, n0, n1, alpha=0.05):
    """Large-sample power of the Wald test at the true parameters: the multinomial Fisher information.

    I = sum over arms of n_a sum_j (d pi_aj / d psi)(d pi_aj / d psi)' / pi_aj, psi = (cuts, log OR)
    (derivatives here by central differences); var(log OR hat) = [I^-1]_beta,beta.
    """
    def probs(psi, a):
        return np.diff(np.concatenate([[0.0], special.expit(psi[:-1] - psi[-1] * a), [1.0]]))

    psi = np.concatenate([special.logit(np.cumsum(p0)[:-1]), [math.log(odds_ratio)]])
    info = np.zeros((psi.size, psi.size))
    for a, n in ((0, n0), (1, n1)):
        pi = probs(psi, a)
        d = np.column_stack([(probs(psi + e, a) - probs(psi - e, a)) / 2e-6 for e in np.eye(psi.size) * 1e-6])
        info += n * (d.T / pi) @ d
    delta = math.log(odds_ratio) / math.sqrt(np.linalg.inv(info)[-1, -1])
    z = stats.norm.ppf(1 - alpha / 2)
    return stats.norm.cdf(delta - z) + stats.norm.cdf(-delta - z)


@pytest.mark.parametrize("p0, odds_ratio, ratio", [(P0, 1.8, 1.0), ([0.4, 0.3, 0.2, 0.1], 2.5, 1.5)])
def test_whitehead_power_against_simulation(p0, odds_ratio, ratio):
    n = analytic.ceil_n(analytic.whitehead_n(p0, odds_ratio, 0.8, ratio=ratio))
    proc = ordinal(n=n, p0=p0, odds_ratio=odds_ratio, ratio=ratio)
    sc = sp.Scenario(proc, analysis(type="proportional_odds"))
    res = sp.run(sc, reps=10_000, seed=13, n_jobs=1, progress=False)
    white = sc.analytic_power()["proportional_odds"]
    # at the realised allocation round(ratio n) / n, as the process states it
    assert white == pytest.approx(analytic.whitehead_power(p0, odds_ratio, n, ratio=proc.n1 / n), rel=1e-12)
    assert not sc.analyses["proportional_odds"].analytic_exact   # an approximation, flagged as such
    # the allowance: Monte Carlo error (4 MCSE) plus the size of Whitehead's approximation, measured as its
    # distance from the Wald power at the true parameters (0.010 and 0.024 here)
    approx = abs(white - _information_power(p0, odds_ratio, n, proc.n1))
    assert approx < 0.03
    mcse = math.sqrt(white * (1 - white) / res.reps)
    print(f"n = {n}: Whitehead {white:.4f}, simulated {res.power:.4f} (MCSE {res.mcse:.4f}), approximation {approx:.4f}")
    assert abs(res.power - white) < 4 * mcse + approx, (res.power, white, mcse, approx)


def test_whitehead_input_errors_name_the_field():
    with pytest.raises(ParameterError, match="`p0` must sum to 1"):
        analytic.whitehead_n([0.2, 0.2], 2.0, 0.8)
    with pytest.raises(ParameterError, match="`odds_ratio` must be > 0"):
        analytic.whitehead_power([0.5, 0.5], 0.0, 50)
    with pytest.raises(ParameterError, match=r"`log\(odds_ratio\)` must be > 0"):
        analytic.whitehead_n([0.5, 0.5], 0.8, 0.8, alternative="greater")


def test_the_docstring_examples_hold():
    import doctest

    import simpower.analytic.ordinal
    import simpower.processes.ordinal

    for mod in (simpower.analytic.ordinal, simpower.processes.ordinal):
        result = doctest.testmod(mod, optionflags=doctest.NORMALIZE_WHITESPACE)
        assert result.attempted > 0 and result.failed == 0, mod.__name__


def test_benchmark_row_o_runs_and_agrees_with_ordered_model(tmp_path):
    # scripts/benchmark.py row o: the batch answers against statsmodels OrderedModel on the loop's
    # replicates (tiny sizes: only the answers are checked, never the timings)
    import importlib.util
    import json
    from pathlib import Path

    script = Path(__file__).resolve().parents[1] / "scripts" / "benchmark.py"
    spec = importlib.util.spec_from_file_location("simpower_benchmark_script_o", script)
    bench = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(bench)
    bench.SIZES["o_reps"] = (300, 300)
    bench.SIZES["o_loop"] = (12, 12)
    out = tmp_path / "bench.json"
    assert bench.main(["--quick", "--only", "o", "--repeats", "1", "--json", str(out)]) == 0
    rows = json.loads(out.read_text())["rows"]
    assert [r["row"] for r in rows] == ["o1", "o2"]
    for r in rows:
        assert r["answers_agree"] is True, r
        assert math.isfinite(r["ratio"]) and r["ratio"] > 0
