"""Records spooled to disk (simpower.engine.spool) equal the in-memory records, and memory stays flat.

Reference: the in-memory path of the same run (simpower.engine.collect.RecordCollector), whose
arrays the spooled memory maps must equal bit for bit, failure codes included; the summaries
are those of simpower.summaries.summarize_records (Morris, White & Crowther 2019, Table 6)
on the full arrays, which the streamed tallies (Chan, Golub & LeVeque 1983 pairwise update)
reproduce to rounding error. Peak memory is measured with tracemalloc, as in
test_engine_memory.py; the RSS figures are measured by scripts/benchmark.py row e.
"""

from __future__ import annotations

import gc
import math
import os
import tracemalloc

import numpy as np
import pytest

import simpower as sp
from simpower.engine import runner
from simpower.engine.chunk import run_chunk
from simpower.engine.collect import CauseBook, RecordCollector
from simpower.engine.spool import RecordSpool

FIELDS = ("pvalue", "estimate", "se", "ci_low", "ci_high", "status")


def moody(data):
    """A user analysis that fails with two kinds of error, depending on the data."""
    y = np.asarray(data["y"])
    if y[0] > 1.8:
        raise ValueError("first value high")
    if y[1] < -1.9:
        raise ZeroDivisionError("second value low")
    d = y[data["arm"] == 1].mean() - y[data["arm"] == 0].mean()
    return {"pvalue": float(min(1.0, abs(d))), "estimate": float(d), "se": 0.3, "ci_low": d - 0.6,
            "ci_high": d + 0.6}


def _same(ra, rb):
    for f in FIELDS:
        a, b = np.asarray(getattr(ra, f)), np.asarray(getattr(rb, f))
        assert a.dtype == b.dtype and a.tobytes() == b.tobytes(), f
    assert ra.causes == rb.causes and ra.messages == rb.messages


def test_default_run_above_the_limit_spools_and_equals_the_in_memory_run():
    sc = sp.Scenario(sp.NormalTwoArm(n=8, effect=0.5), analyses={"t": sp.TTest(), "moody": moody})
    reps = runner.RECORDS_IN_MEMORY  # x 2 analyses: above the in-memory limit
    spooled = sp.run(sc, reps=reps, seed=5, n_jobs=1, progress=False)
    kept = sp.run(sc, reps=reps, seed=5, n_jobs=1, progress=False, keep_records=True)
    assert isinstance(spooled.records["t"].pvalue, np.memmap)
    assert not isinstance(kept.records["t"].pvalue, np.memmap)
    assert spooled.summaries["moody"]["n_failed"] > 0
    for name in ("t", "moody"):
        _same(spooled.records[name], kept.records[name])
        s, k = spooled.summaries[name], kept.summaries[name]
        assert set(s) == set(k)
        for key, v in k.items():
            if isinstance(v, float) and math.isfinite(v):
                assert math.isclose(s[key], v, rel_tol=1e-10, abs_tol=1e-13), key
            else:
                assert s[key] == v or (isinstance(v, float) and math.isnan(s[key])), key
    assert spooled.records_frame().equals(kept.records_frame())
    assert spooled.compare("t", "moody") == kept.compare("t", "moody")


def test_spool_renumbers_causes_like_the_collector_whatever_the_arrival_order():
    sc = sp.Scenario(sp.NormalTwoArm(n=8, effect=0.2), moody)
    size, n_chunks = 50, 8
    outs = [run_chunk(sc, 11, 7, k, size) for k in range(n_chunks)]
    assert len({c for o in outs for c in o.causes}) == 2
    first = next(o.causes[0] for o in outs if o.causes)  # canonical cause 1: first seen in chunk order
    late = next(k for k, o in enumerate(outs) if o.causes and o.causes[0] != first)
    order = [late] + [k for k in range(n_chunks)[::-1] if k != late]  # a parallel run's completion order
    spool, book = RecordSpool(sc.analyses, size * n_chunks), CauseBook()
    coll = RecordCollector(sc.analyses, size * n_chunks)
    for k in order:
        spool.add(outs[k], k * size, book.remap(outs[k]))
        coll.add(outs[k], k * size)
    causes, messages, table = book.canonical()
    assert not np.array_equal(table, np.arange(table.size))  # renumbering really happens here
    got = spool.records(causes, messages, table)
    want = coll.records()
    for name in want:
        _same(got[name], want[name])


def test_replicates_no_chunk_wrote_are_nan_as_in_the_collector():
    sc = sp.Scenario(sp.NormalTwoArm(n=8, effect=0.2), sp.TTest())
    spool, book = RecordSpool(sc.analyses, 300), CauseBook()
    coll = RecordCollector(sc.analyses, 300)
    out = run_chunk(sc, 3, 1, 1, 100)  # only the middle chunk of three
    spool.add(out, 100, book.remap(out))
    coll.add(out, 100)
    causes, messages, table = book.canonical()
    got, want = spool.records(causes, messages, table), coll.records()
    _same(got["t_test"], want["t_test"])
    assert np.isnan(got["t_test"].pvalue[:100]).all() and np.isnan(got["t_test"].pvalue[200:]).all()


def test_spool_folder_is_removed_with_the_result():
    sc = sp.Scenario(sp.NormalTwoArm(n=8, effect=0.5), sp.TTest())
    res = sp.run(sc, reps=runner.RECORDS_IN_MEMORY + 1, seed=2, n_jobs=1, progress=False)
    folder = res.records["t_test"]._spool_folder.path
    assert os.path.isdir(folder) and os.listdir(folder) == ["records"]
    del res
    gc.collect()
    assert not os.path.exists(folder)


def test_unwritable_temporary_folder_gives_one_line_error(tmp_path, monkeypatch):
    monkeypatch.setattr("tempfile.tempdir", str(tmp_path / "no" / "such" / "folder"))
    sc = sp.Scenario(sp.NormalTwoArm(n=8, effect=0.5), sp.TTest())
    with pytest.raises(sp.RunError, match="TMPDIR") as e:
        sp.run(sc, reps=runner.RECORDS_IN_MEMORY + 1, seed=2, n_jobs=1, progress=False)
    assert "\n" not in str(e.value)
    # the same run keeps its records in memory when asked
    assert sp.run(sc, reps=runner.RECORDS_IN_MEMORY + 1, seed=2, n_jobs=1, progress=False,
                  keep_records=True).records["t_test"].pvalue.size == runner.RECORDS_IN_MEMORY + 1


def _peak_bytes(reps):
    sc = sp.Scenario(sp.NormalTwoArm(n=16, effect=0.5), sp.TTest())
    tracemalloc.start()
    try:
        res = sp.run(sc, reps=reps, seed=1, n_jobs=1, progress=False)
        _ = res.power, res.summaries
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def test_default_memory_does_not_grow_with_reps_above_the_in_memory_limit():
    small, large = 40_000, 400_000
    p_small, p_large = _peak_bytes(small), _peak_bytes(large)
    # in memory the records alone would take 42 bytes per replicate: 16.8 MB at 400,000
    assert p_large < 1.2 * p_small + 500_000, (p_small, p_large)
    assert p_large < large * 42 / 4


def test_spool_file_is_closed_once_the_point_is_complete():
    sc = sp.Scenario(sp.NormalTwoArm(n=8, effect=0.2), sp.TTest())
    spool, book = RecordSpool(sc.analyses, 200), CauseBook()
    before = len(os.listdir("/proc/self/fd")) if os.path.isdir("/proc/self/fd") else None
    first = run_chunk(sc, 3, 1, 0, 100)
    spool.add(first, 0, book.remap(first))
    assert len(spool._fds) == 1  # open while the point runs
    second = run_chunk(sc, 3, 1, 1, 100)
    spool.add(second, 100, book.remap(second))
    assert not spool._fds  # a sweep of many points holds open only the running points' files
    if before is not None:
        assert len(os.listdir("/proc/self/fd")) == before
    causes, messages, table = book.canonical()
    assert spool.records(causes, messages, table)["t_test"].pvalue.size == 200


def test_spooled_several_hypothesis_pvalues_and_labels_equal_the_in_memory_ones():
    from simpower.analyses.multiplicity import Multiple
    from simpower.registry import build

    arms = build("process", {"type": "multi_arm", "effects": [0, 0.3, 0.5], "n": 6})
    sc = sp.Scenario(arms, Multiple(tests=[sp.TTest()], comparisons="each_vs_control"))
    reps = runner.RECORDS_IN_MEMORY + 500
    spooled = sp.run(sc, reps=reps, seed=8, n_jobs=1, progress=False)
    kept = sp.run(sc, reps=reps, seed=8, n_jobs=1, progress=False, keep_records=True)
    s, k = spooled.records["multiple"], kept.records["multiple"]
    assert isinstance(s.pvalue, np.memmap)
    _same(s, k)
    assert s.pvalues.tobytes() == k.pvalues.tobytes() and s.hypotheses == k.hypotheses == ["1-0", "2-0"]
    assert spooled.summaries["multiple"]["per_hypothesis"] == kept.summaries["multiple"]["per_hypothesis"]
