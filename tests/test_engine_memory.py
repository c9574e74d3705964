"""Bounded memory: streaming summaries (keep_records=False) equal the in-memory ones and do not grow with reps.

Reference for the summaries: simpower.summaries.summarize_records on the full
per-replicate arrays of the same run (Morris, White & Crowther 2019, Table 6
formulas); the streamed figures combine chunk moments with the pairwise
update of Chan, Golub & LeVeque (1983), so floating-point sums agree to
rounding error and every count agrees exactly. Peak memory is measured with
tracemalloc (numpy reports its buffers to it); the 10-million-replicate RSS
figure is measured by scripts/bench_memory.py.
"""

from __future__ import annotations

import math
import tracemalloc

import pytest

import simpower as sp
from _helpers import cranky

Z95 = 1.6448536269514722


def _close(a, b, key):
    if isinstance(a, float) and isinstance(b, float) and math.isfinite(a):
        assert math.isclose(a, b, rel_tol=1e-10, abs_tol=1e-13), (key, a, b)
    else:
        assert a == b or (isinstance(a, float) and math.isnan(a) and math.isnan(b)), (key, a, b)


@pytest.mark.parametrize("policy", ["failure", "nonrejection"])
def test_streamed_summaries_equal_in_memory_summaries(policy):
    sc = sp.Scenario(sp.NormalTwoArm(n=10, effect=0.4), analyses={"t": sp.TTest(), "welch": sp.WelchT(),
                                                                   "cranky": cranky})
    full = sp.run(sc, reps=1300, seed=21, n_jobs=1, chunk_size=200, fit_trouble=policy)
    lean = sp.run(sc, reps=1300, seed=21, n_jobs=1, chunk_size=200, fit_trouble=policy, keep_records=False)
    assert full.summaries["cranky"]["n_fit_trouble"] > 0 and full.summaries["cranky"]["n_failed"] > 0
    for name, s in full.summaries.items():
        t = lean.summaries[name]
        assert set(s) == set(t), (name, set(s) ^ set(t))
        for key in s:
            _close(s[key], t[key], (name, key))
    for a, b in zip(full.comparisons(), lean.comparisons()):
        for key in a:
            _close(a[key], b[key], key)
    assert str(lean).count("power") == str(full).count("power")
    with pytest.raises(sp.RunError, match="not kept in memory"):
        lean.records["t"]


def test_streamed_result_points_to_the_store(tmp_path):
    sc = sp.Scenario(sp.NormalTwoArm(n=10, effect=0.4), sp.TTest())
    path = tmp_path / "lean.sqlite"
    lean = sp.run(sc, reps=5000, seed=3, n_jobs=1, keep_records=False, store=path)
    with pytest.raises(sp.RunError, match="lean.sqlite"):
        lean.records_frame()
    with sp.engine.open_store(path) as st:
        rec = st.records(lean.point)["t_test"]
    full = sp.run(sc, reps=5000, seed=3, n_jobs=1)
    assert rec.pvalue.tobytes() == full.pvalues.tobytes()
    assert lean.power == full.power


def _peak_bytes(reps, keep):
    sc = sp.Scenario(sp.NormalTwoArm(n=16, effect=0.5), sp.TTest())
    tracemalloc.start()
    try:
        sp.run(sc, reps=reps, seed=1, n_jobs=1, keep_records=keep, progress=False)
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def test_memory_is_bounded_by_the_chunk_not_the_reps():
    small, large = 40_000, 400_000
    lean_small, lean_large = _peak_bytes(small, False), _peak_bytes(large, False)
    kept_large = _peak_bytes(large, True)
    # records in memory cost at least 5 float64 + 1 int16 per replicate
    assert kept_large > large * 42
    # streaming: ten times the replicates, (nearly) the same peak -- one chunk's arrays plus small tallies
    assert lean_large < 1.5 * lean_small + 1_000_000, (lean_small, lean_large)
    assert lean_large < kept_large / 4
