"""Smoke test of scripts/benchmark.py: the quick t-test and mixed-model rows run and report.

No timing is asserted (speed is measured by the script itself, side by side).
The mixed-model row checks that the batch REML answers equal statsmodels
MixedLM's on the replicates it times (statsmodels as the reference).
"""

import importlib.util
import json
import math
from pathlib import Path

import pytest

SCRIPT = Path(__file__).resolve().parents[1] / "scripts" / "benchmark.py"


def _load():
    spec = importlib.util.spec_from_file_location("simpower_benchmark_script", SCRIPT)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def test_quick_benchmark_rows_a_and_b(tmp_path, capsys):
    bench = _load()
    out = tmp_path / "bench.json"
    assert bench.main(["--quick", "--only", "a,b", "--repeats", "1", "--json", str(out)]) == 0
    data = json.loads(out.read_text())
    rows = {r["row"]: r for r in data["rows"]}
    assert set(rows) == {"a1", "a2", "b"}
    for key in ("a1", "a2"):
        assert math.isfinite(rows[key]["ratio"]) and rows[key]["ratio"] > 0
    if rows["b"]["ratio"] is not None:  # None only when no cluster process is installed
        assert rows["b"]["answers_agree"] is True
    assert data["machine"]["quick"] is True
    printed = capsys.readouterr().out
    assert "t-test: engine vs scipy loop" in printed


def test_unknown_row_is_a_one_line_error(capsys):
    bench = _load()
    try:
        bench.main(["--only", "zz"])
    except SystemExit as exc:
        assert exc.code == 2
    else:  # pragma: no cover
        raise AssertionError("--only zz should exit with status 2")
    assert "unknown row 'zz'" in capsys.readouterr().err


def test_missing_rows_run_and_agree_with_the_libraries(tmp_path):
    # rows m: the batch paths with 20% MCAR outcomes against scipy / statsmodels loops on the same
    # replicates (the references); tiny sizes, so only the answers are checked, never the timings
    bench = _load()
    bench.SIZES["m_reps"] = (300, 300)
    bench.SIZES["m_loop"] = (40, 40)
    out = tmp_path / "bench.json"
    assert bench.main(["--quick", "--only", "m", "--repeats", "1", "--json", str(out)]) == 0
    rows = json.loads(out.read_text())["rows"]
    # each analysis with 20% MCAR outcomes, then on the same process with complete data
    assert [r["row"] for r in rows] == [f"m{i:02d}{c}" for i in range(1, 15) for c in ("", "c")]
    for r in rows:
        assert r["answers_agree"] is True, r
        assert math.isfinite(r["ratio"]) and r["ratio"] > 0
        # the ceiling: the bare draw rate over the loop's rate, stated in the note
        assert r["ceiling"] == pytest.approx(r["draw_per_s"] / r["reference_per_s"])
        assert f"ceiling = draw {r['draw_per_s']:,.0f}/s" in r["note"]
        assert r["bounded_by_draw"] == (r["ratio"] < r["target"] and r["ceiling"] < r["target"])
