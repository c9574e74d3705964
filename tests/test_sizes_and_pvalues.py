"""Impossible p-values are failures; sizes that cannot run are refused in one line before memory is used.

A p-value is a probability, in [0, 1] (e.g. Casella & Berger 2002, Definition 8.3.26): a
value outside it is a bug in the analysis, counted as failure ``invalid_pvalue``,
never as a rejection. The analyses below return such values as a deterministic
function of the data ("the first observation exceeds z_0.95"), so the expected
counts come from an independent analysis that reports the first observation of
the same simulated data sets (common random numbers).
"""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest

import simpower as sp
from simpower.analyses.base import Analysis
from simpower.engine import runner
from simpower.errors import ParameterError

# standard normal quantile z_0.95 (Abramowitz & Stegun 1964, Table 26.5; scipy.stats.norm.ppf agrees)
Z95 = 1.6448536269514722


def first_obs(data):
    return {"pvalue": 0.5, "estimate": float(np.asarray(data["y"])[0])}


def out_of_range(data):
    y0 = float(np.asarray(data["y"])[0])
    if y0 > Z95:
        return -0.2
    if y0 < -Z95:
        return 1.3
    return 1.0 + 1e-13 if y0 > 0 else 0.01  # rounding just above 1 is not an error


def bad_adjusted(data):
    y0 = float(np.asarray(data["y"])[0])
    return {"pvalue": 0.01, "pvalues": [0.01, 1.5 if y0 > Z95 else 0.2], "names": ["a", "b"]}


class ShiftedP(Analysis):
    """A batch analysis whose p-value leaves [0, 1] when the first observation is high."""

    def __call__(self, data):
        y0 = float(np.asarray(data["y"])[0])
        return {"pvalue": 1.5 if y0 > Z95 else 0.5}

    def batch(self, batch):
        y0 = batch["y"][:, 0]
        return {"pvalue": np.where(y0 > Z95, 1.5, 0.5)}


def _scenario(**analyses):
    return sp.Scenario(sp.NormalTwoArm(n=4), analyses={"first": first_obs, **analyses})


@pytest.mark.parametrize("jobs", [1, 2])
def test_pvalues_outside_0_1_are_failures_not_rejections(jobs):
    res = sp.run(_scenario(bad=out_of_range), reps=600, seed=3, n_jobs=jobs, chunk_size=150, point=1)
    y0 = res.records["first"].estimate
    hi, lo = y0 > Z95, y0 < -Z95
    assert hi.any() and lo.any()
    s = res.summaries["bad"]
    assert s["failures"] == {"invalid_pvalue": int(hi.sum() + lo.sum())}
    assert np.array_equal(res.records["bad"].failure == "invalid_pvalue", hi | lo)
    # only the clean replicates with p = 0.01 reject at alpha 0.05
    assert s["rejections"] == int(((y0 <= 0) & ~lo).sum())
    assert "outside [0, 1]" in res.records["bad"].messages["invalid_pvalue"]


def test_an_invalid_adjusted_pvalue_is_a_failure_too():
    res = sp.run(_scenario(adj=bad_adjusted), reps=300, seed=5, n_jobs=1, point=1, backend="serial")
    hi = res.records["first"].estimate > Z95
    assert hi.any()
    assert np.array_equal(res.records["adj"].failure == "invalid_pvalue", hi)


def test_batch_path_counts_invalid_pvalues_like_the_per_replicate_path():
    sc = sp.Scenario(sp.NormalTwoArm(n=4), analyses={"shifted": ShiftedP()})
    batch = sp.run(sc, reps=2000, seed=9, n_jobs=1, point=1, backend="serial", chunk_size=1000)
    assert batch.paths["shifted"] == "batch"
    per = sp.run(sp.Scenario(sp.NormalTwoArm(n=4), analyses={"shifted": lambda d: ShiftedP()(d)}), reps=2000,
                 seed=9, n_jobs=1, point=1, backend="serial", chunk_size=1000)
    assert per.paths["shifted"] == "per-replicate"
    assert batch.summaries["shifted"]["failures"]["invalid_pvalue"] > 0
    assert np.array_equal(batch.records["shifted"].status, per.records["shifted"].status)
    assert batch.summaries["shifted"]["rejections"] == 0


# ------------------------------------------------------------------ sizes


@pytest.mark.parametrize("reps", [10**30, 10**12, runner.MAX_REPS + 1])
def test_reps_beyond_the_cap_are_refused_naming_the_field(reps):
    with pytest.raises(ParameterError, match=r"`reps` must be at most 1_000_000_000"):
        sp.run(_scenario(), reps=reps, seed=1, n_jobs=1)


def test_chunks_are_planned_lazily():
    plan = runner.plan_chunks(runner.MAX_REPS, 1)
    assert len(plan) == runner.MAX_REPS and plan[-1] == (runner.MAX_REPS - 1, 1)
    assert runner.plan_chunks(4500, 2000) == [(0, 2000), (1, 2000), (2, 500)]


def test_values_per_replicate_extrapolates_exactly_for_two_arm_layouts():
    # two arms of n: y for 2n rows plus the arm labels, whatever n (the process's documented layout)
    proc = sp.NormalTwoArm(n=20_001)
    field, n, values = runner.values_per_replicate(proc)
    one = proc.draw_batch(np.random.default_rng(0), 1)
    actual = sum(np.size(v) for v in one.per_rep.values()) + sum(np.size(v) for v in one.shared.values())
    assert (field, n) == ("n", 20_001) and values == actual


def test_a_sample_size_that_cannot_fit_is_refused_before_drawing(monkeypatch):
    monkeypatch.setattr(runner, "available_memory", lambda: 16 * 2**30)
    drawn = []
    real = sp.NormalTwoArm.draw_batch

    def spy(self, rng, size):
        drawn.append(self.n)
        return real(self, rng, size)

    monkeypatch.setattr(sp.NormalTwoArm, "draw_batch", spy)
    with pytest.raises(ParameterError, match=r"`n` = 1000000000 is too large: .* GiB of memory is available; "
                                             r"lower `n`"):
        sp.run(sp.Scenario(sp.NormalTwoArm(n=10**9), sp.TTest()), reps=10, seed=1, n_jobs=1)
    assert max(drawn) <= 100  # only the small draws of the estimate
    with pytest.raises(ParameterError, match=r"`chunk_size` = 2000 is too large"):
        sp.run(sp.Scenario(sp.NormalTwoArm(n=10**6), sp.TTest()), reps=10, seed=1, n_jobs=1, chunk_size=2000)
    with pytest.raises(ParameterError, match=r"`reps` = 500000000 with `keep_records=True`"):
        sp.run(_scenario(), reps=5 * 10**8, seed=1, n_jobs=1, keep_records=True)


def _cli(tmp_path, toml, *args):
    (tmp_path / "s.toml").write_text(toml)
    return subprocess.run([sys.executable, "-m", "simpower.cli.main", "run", "s.toml", *args], cwd=tmp_path,
                          capture_output=True, text=True, timeout=300)


def test_cli_refuses_huge_sizes_in_one_line(tmp_path):
    base = '[process]\ntype = "normal_two_arm"\nn = {n}\neffect = 0.5\n\n[analyses.t]\ntype = "t_test"\n'
    out = _cli(tmp_path, base.format(n=20), "--reps", "1000000000000", "--jobs", "1")
    assert out.returncode != 0 and "Traceback" not in out.stderr
    assert out.stderr.strip().count("\n") == 0 and "`reps` must be at most" in out.stderr
    # 10**11 per arm: 1.6 TB of data for one replicate, more than any machine this runs on
    out = _cli(tmp_path, base.format(n=10**11), "--reps", "100", "--jobs", "1")
    assert out.returncode != 0 and "Traceback" not in out.stderr
    assert out.stderr.strip().count("\n") == 0 and "`n` = 100000000000 is too large" in out.stderr


def test_streaming_tallies_fold_in_chunk_order_without_keeping_every_chunk():
    from simpower.engine.chunk import run_chunk
    from simpower.summaries import PointStats

    sc = sp.Scenario(sp.NormalTwoArm(n=6, effect=0.3), sp.TTest())
    outs = [run_chunk(sc, 5, 1, k, 50) for k in range(8)]
    in_order, reversed_ = PointStats(sc), PointStats(sc)
    for out in outs:
        in_order.add(out)
        assert not in_order.waiting  # folded at once: memory does not grow with the number of chunks
    for out in reversed(outs):
        reversed_.add(out)
    a, b = in_order.folded()[0]["t_test"], reversed_.folded()[0]["t_test"]
    assert (a.est.n, a.est.mean, a.est.m2, a.rejections) == (b.est.n, b.est.mean, b.est.m2, b.rejections)
    est = np.concatenate([o.records["t_test"]["estimate"] for o in outs])
    # numpy's two-pass sample variance of all estimates (Chan, Golub & LeVeque 1983: the pairwise update agrees)
    assert abs(a.est.var() - np.var(est, ddof=1)) <= 1e-12 * np.var(est, ddof=1)
