"""Every registered built-in analysis has a benchmark row (scripts/benchmark.py ``COVERAGE``), complete and with
missing outcomes, and every row id the map names belongs to a row of ``ROWS``; the rows added for the analyses
that had none run and agree with the libraries they are timed against (scipy / statsmodels as the references).

No timing is asserted (speed is measured by the script itself, side by side)."""

import importlib.util
import json
import math
from pathlib import Path

import pytest

from simpower import registry

SCRIPT = Path(__file__).resolve().parents[1] / "scripts" / "benchmark.py"


def _load():
    spec = importlib.util.spec_from_file_location("simpower_benchmark_coverage", SCRIPT)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def test_every_registered_analysis_has_rows_in_the_coverage_map():
    bench = _load()
    registry.load_builtins()
    builtin = set(registry.names("analysis"))
    missing = sorted(builtin - set(bench.COVERAGE))
    assert not missing, f"no benchmark row in scripts/benchmark.py COVERAGE for: {missing}"
    stale = sorted(set(bench.COVERAGE) - builtin)
    assert not stale, f"COVERAGE names analyses that are not registered: {stale}"
    for name, entry in bench.COVERAGE.items():
        for side in ("complete", "missing"):
            ids = entry[side]
            assert ids or entry.get("note"), f"{name}: no {side}-data row and no note saying why"
            for rid in ids:
                assert rid[0] in bench.ROWS, f"{name}: row id {rid!r} is not a row of ROWS ({', '.join(bench.ROWS)})"


@pytest.mark.slow
def test_the_new_rows_report_the_ids_the_map_names(tmp_path):
    # rows f, p, y (the fast ones) at tiny sizes: every id the map gives them is reported, and on the loop's
    # replicates the decisions and estimates agree with statsmodels proportions_ztest, scipy f_oneway / dunnett,
    # scipy's beta / normal posteriors and the per-look z from scipy (see the row docstrings)
    bench = _load()
    for key in ("f", "p", "y"):
        bench.SIZES[f"{key}_reps"] = (300, 300)
        bench.SIZES[f"{key}_loop"] = (60, 60)
    out = tmp_path / "bench.json"
    assert bench.main(["--quick", "--only", "f,p,y", "--repeats", "1", "--json", str(out)]) == 0
    rows = {r["row"]: r for r in json.loads(out.read_text())["rows"]}
    named = {rid for entry in bench.COVERAGE.values() for side in ("complete", "missing")
             for rid in entry[side] if rid[0] in "fpy"}
    assert named <= set(rows), sorted(named - set(rows))
    for rid, r in rows.items():
        assert r["answers_agree"] is True, r
        assert math.isfinite(r["ratio"]) and r["ratio"] > 0, r


@pytest.mark.slow
def test_rows_v_and_z_agree_with_the_libraries(tmp_path):
    # rows v (visits, clusters, crossovers; statsmodels MixedLM / PHReg) and z (complete twins of row m)
    bench = _load()
    for key in ("v", "z"):
        bench.SIZES[f"{key}_reps"] = (200, 200)
        bench.SIZES[f"{key}_loop"] = (30, 30)
    bench.SIZES["v_fits"] = (8, 8)
    out = tmp_path / "bench.json"
    assert bench.main(["--quick", "--only", "v,z", "--repeats", "1", "--json", str(out)]) == 0
    rows = {r["row"]: r for r in json.loads(out.read_text())["rows"]}
    named = {rid for entry in bench.COVERAGE.values() for side in ("complete", "missing")
             for rid in entry[side] if rid[0] in "vz"}
    assert named <= set(rows), sorted(named - set(rows))
    for r in rows.values():
        assert r["answers_agree"] is True, r
