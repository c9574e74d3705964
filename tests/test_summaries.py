"""One summary path: in memory, spooled, streamed, from a store and for any number of jobs, the same bits.

References: the Wilson (1927) interval against statsmodels ``proportion_confint(method="wilson")``;
the performance measures of Morris, White & Crowther (2019, Statistics in Medicine 38:2074,
Table 6) recomputed here with numpy on the per-replicate records; the paired-proportion SE of a
difference in power (Agresti 2013, Categorical Data Analysis, section 11.1.1).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from statsmodels.stats.proportion import proportion_confint

import simpower as sp
from _helpers import cranky
from simpower.engine import runner
from simpower.summaries import AnalysisSummary, EstimatePerformance, RejectionRate


SCENARIO = sp.Scenario(sp.NormalTwoArm(n=10, effect=0.4),
                       analyses={"t": sp.TTest(), "welch": sp.WelchT(), "cranky": cranky})


def _same(a, b):
    """Equal to the last bit (NaN equal to NaN)."""
    if isinstance(a, float) and isinstance(b, float) and math.isnan(a):
        return math.isnan(b)
    return a == b


@pytest.mark.parametrize("policy", ["failure", "nonrejection"])
def test_every_way_of_keeping_records_gives_the_same_summaries(policy, tmp_path, monkeypatch):
    kw = dict(reps=1300, seed=21, chunk_size=200, fit_trouble=policy)
    full = sp.run(SCENARIO, n_jobs=1, **kw)
    lean = sp.run(SCENARIO, n_jobs=1, keep_records=False, store=tmp_path / "s.sqlite", **kw)
    two = sp.run(SCENARIO, n_jobs=2, **kw)  # chunks finish in any order
    monkeypatch.setattr(runner, "RECORDS_IN_MEMORY", 10)
    spooled = sp.run(SCENARIO, n_jobs=1, **kw)
    assert full.summaries["cranky"]["n_fit_trouble"] > 0 and full.summaries["cranky"]["n_failed"] > 0
    for other in (lean, two, spooled):
        for name, s in full.summaries.items():
            t = other.summaries[name]
            assert set(s) == set(t)
            for key in s:
                assert _same(s[key], t[key]), (name, key, s[key], t[key])
        assert full.comparisons() == other.comparisons()
    with sp.engine.open_store(tmp_path / "s.sqlite") as st:
        points = st.points(fit_trouble=policy)
    for _, row in points.iterrows():
        s = full.summaries[row["analysis"]]
        for key in ("power", "mcse", "ci_low", "ci_high", "n_ok", "n_failed", "mean_estimate", "empirical_se"):
            assert _same(float(s[key]), float(row[key])), (row["analysis"], key)


def test_summaries_are_the_published_measures_of_the_records():
    res = sp.run(SCENARIO, reps=1300, seed=5, n_jobs=1, chunk_size=200)
    for name, s in res.summaries.items():
        r = res.records[name]
        clean = r.status == 0
        k, n = int((r.pvalue[clean] <= 0.05).sum()), int(clean.sum())
        assert isinstance(s, AnalysisSummary) and s.rejection == RejectionRate(k, n)
        assert s["power"] == k / n and math.isclose(s["mcse"], math.sqrt(k / n * (1 - k / n) / n))
        lo, hi = proportion_confint(k, n, alpha=0.05, method="wilson")
        assert math.isclose(s["ci_low"], lo, rel_tol=1e-9) and math.isclose(s["ci_high"], hi, rel_tol=1e-9)
        est = r.estimate[clean]
        e = s.estimates
        assert isinstance(e, EstimatePerformance)
        assert math.isclose(e.mean, est.mean(), rel_tol=1e-12)
        assert math.isclose(e.empirical_se, est.std(ddof=1), rel_tol=1e-10)
        assert math.isclose(e.model_se, math.sqrt(np.mean(r.se[clean] ** 2)), rel_tol=1e-12)
        assert math.isclose(e.bias, est.mean() - 0.4, rel_tol=1e-9, abs_tol=1e-15)
        cover = np.mean((r.ci_low[clean] <= 0.4) & (0.4 <= r.ci_high[clean]))
        assert math.isclose(e.coverage, cover, rel_tol=1e-12)
        assert s.failure_counts == {c: int((r.failure == c).sum()) for c in r.causes if (r.failure == c).any()}
    # the paired difference in power on replicates clean in both (Agresti 2013, 11.1.1)
    a, b = res.records["t"], res.records["cranky"]
    both = (a.status == 0) & (b.status == 0)
    ra, rb = a.pvalue[both] <= 0.05, b.pvalue[both] <= 0.05
    c = res.compare("t", "cranky")
    m = both.sum()
    nb, nc = int((ra & ~rb).sum()), int((~ra & rb).sum())
    assert c["difference"] == (nb - nc) / m
    assert math.isclose(c["mcse"], math.sqrt(nb + nc - (nb - nc) ** 2 / m) / m, rel_tol=1e-12)


def test_summary_rows_are_flat_table_rows():
    res = sp.run(SCENARIO, reps=400, seed=2, n_jobs=1)
    table = res.summary()
    assert list(table["analysis"]) == ["t", "welch", "cranky"]
    assert "error:ValueError x" in table.loc[2, "failures"] and "warning:RuntimeWarning x" in table.loc[2, "failures"]
    assert res.summaries["t"].rejection.interval(0.9)[0] > res.summaries["t"]["ci_low"]
