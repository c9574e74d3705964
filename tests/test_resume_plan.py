"""``simpower resume``: a store is data, never a program.

The store records a data-only plan (command, scenario data, settings); ``resume`` rebuilds the run
from it, equal bit for bit to an uninterrupted run (the reference is the same scenario run in one go
with the same seed and chunk size: the engine's documented promise), writes only into the store
and the outputs named on its own command line, and refuses a plan that was edited to name another
command, an output path, a folder or code. Every test records the files of the whole temporary
tree before and after, so "writes nothing else" is checked, not assumed.
"""

from __future__ import annotations

import json
import sqlite3
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import simpower as sp
from simpower.cli.main import main
from simpower.engine.store import open_store

SCENARIO = """name = "Two-arm trial"
seed = 11
reps = 400
chunk_size = 50
[process]
type = "two_arm"
n = 12
effect = 0.6
[analysis]
type = "t_test"
"""
EVIL = """from pathlib import Path
Path(__file__).with_name("MARKER").write_text("code from a store ran")
def f(rng, **kw):
    return {}
"""


def _files(root: Path) -> set[str]:
    """Every file under ``root`` with its size, except SQLite's -wal/-shm companions of the store."""
    return {f"{p.relative_to(root)}:{p.stat().st_size}" for p in root.rglob("*")
            if p.is_file() and not p.name.endswith(("-wal", "-shm", "-journal"))}


def _cli(argv, cwd: Path, monkeypatch) -> int:
    monkeypatch.chdir(cwd)
    monkeypatch.setattr(sys, "argv", ["simpower", *argv])
    return main(list(argv))


def _drop_chunks(store: Path, keep: int) -> None:
    """Forget every chunk from index ``keep`` on: the store as an interrupted run leaves it."""
    con = sqlite3.connect(store)
    with con:
        for table in ("chunks", "arrays", "causes"):
            con.execute(f"DELETE FROM {table} WHERE chunk >= ?", (keep,))
    con.close()


def _set_meta(store: Path, key: str, value: str | None) -> None:
    con = sqlite3.connect(store)
    with con:
        if value is None:
            con.execute("DELETE FROM meta WHERE key=?", (key,))
        else:
            con.execute("INSERT OR REPLACE INTO meta VALUES (?, ?)", (key, value))
    con.close()


@pytest.fixture
def project(tmp_path, monkeypatch):
    """tmp/project/s.toml run with --store into tmp/project/run.sqlite, then cut back to 3 of 8 chunks."""
    proj = tmp_path / "project"
    proj.mkdir()
    (proj / "s.toml").write_text(SCENARIO)
    assert _cli(["run", "s.toml", "--store", "run.sqlite", "-q", "--jobs", "1", "--set", "n=14"], proj,
                monkeypatch) == 0
    store = proj / "run.sqlite"
    _drop_chunks(store, 3)
    (tmp_path / "elsewhere").mkdir()
    return tmp_path, store


def _reference():
    sc = sp.Scenario(sp.TwoArm(n=14, effect=0.6), sp.TTest(), name="Two-arm trial")
    return sp.run(sc, reps=400, seed=11, chunk_size=50, n_jobs=1)


def test_the_plan_is_data_without_command_line_folder_or_paths(project):
    _, store = project
    with open_store(store) as st:
        meta, plan = st.meta(), st.plan
    assert "command" not in meta and "cwd" not in meta
    assert plan == {"version": 1, "command": "run", "scenario_file": "s.toml", "options": {"set": ["n=14"]},
                    "scenario": {"name": "Two-arm trial", "seed": 11, "reps": 400, "chunk_size": 50,
                                 "process": {"type": "two_arm", "n": 12, "effect": 0.6},
                                 "analysis": {"type": "t_test"}}}


def test_resume_from_another_folder_is_bit_identical_and_writes_only_the_store(project, monkeypatch, capsys):
    tmp, store = project
    before = _files(tmp)
    assert _cli(["resume", str(store), "-q", "--jobs", "1"], tmp / "elsewhere", monkeypatch) == 0
    ref = _reference()
    with open_store(store) as st:
        assert len(st.done_chunks()) == 8
        records = st.records()
    for f in ("pvalue", "estimate", "se", "ci_low", "ci_high", "status"):
        assert getattr(records["t_test"], f).tobytes() == getattr(ref.records["t_test"], f).tobytes(), f
    changed = {f.split(":")[0] for f in _files(tmp) ^ before}
    assert changed <= {"project/run.sqlite"}
    out = capsys.readouterr().out
    # the reproduce line says what computes these numbers: the plan, pinned to its seed, into this store
    assert f"To reproduce these numbers exactly: simpower run s.toml --set n=14 --store {store} --seed 11" in out


def test_outputs_come_only_from_the_resume_command_line(project, monkeypatch, capsys):
    tmp, store = project
    assert _cli(["resume", str(store), "-q", "--jobs", "1", "--csv", "t.csv"], tmp / "elsewhere", monkeypatch) == 2
    err = capsys.readouterr().err.strip()
    assert err == "simpower: error: `--csv` is not an output of a resumed run; its outputs: --json."
    assert _cli(["resume", str(store), "-q", "--jobs", "1", "--json", "r.json"], tmp / "elsewhere", monkeypatch) == 0
    got = json.loads((tmp / "elsewhere" / "r.json").read_text())
    assert got["seed"] == "11"
    assert sorted(p.name for p in (tmp / "elsewhere").iterdir()) == ["r.json"]


def _plan(store: Path) -> dict:
    with open_store(store) as st:
        return st.plan


@pytest.mark.parametrize("edit, message", [
    # another command, writing onto an arbitrary path
    (lambda p, evil: {**p, "command": "export", "options": {"out": str(evil)}}, "command 'export' is not one of"),
    # an output path smuggled into the settings
    (lambda p, evil: {**p, "options": {**p["options"], "json": str(evil)}}, "option 'json' is not one a run records"),
    # a store path or a report folder inside the scenario data
    (lambda p, evil: {**p, "scenario": {**p["scenario"], "store": {"path": str(evil)}}}, "a `[store]` block"),
    (lambda p, evil: {**p, "scenario": {**p["scenario"], "report": {"out": str(evil.parent)}}}, "`report.out`"),
    (lambda p, evil: {**p, "scenario": {**p["scenario"], "execution": {"address": "tcp://10.0.0.9:8786"}}},
     "`execution.address`"),
    # a setting of the wrong kind, an unknown field, another version
    (lambda p, evil: {**p, "options": {"reps": "400; rm -rf /"}}, "option 'reps' must be int"),
    (lambda p, evil: {**p, "cwd": str(evil.parent)}, "unknown field 'cwd'"),
    (lambda p, evil: {**p, "version": 0}, "plan version 0"),
    (lambda p, evil: [p], "not a table"),
])
def test_an_edited_plan_is_refused_in_one_line_and_nothing_is_written(project, monkeypatch, capsys, edit, message):
    tmp, store = project
    evil = tmp / "elsewhere" / "evil.csv"
    _set_meta(store, "plan", json.dumps(edit(_plan(store), evil)))
    before = _files(tmp)
    assert _cli(["resume", str(store), "-q", "--jobs", "1"], tmp / "project", monkeypatch) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "recorded plan is refused" in err and message in err, err
    assert _files(tmp) == before and not evil.exists()


def test_an_old_store_recording_a_command_line_and_folder_is_refused(project, monkeypatch, capsys):
    # what older versions recorded, edited to export onto an arbitrary path from another folder
    tmp, store = project
    evil = tmp / "elsewhere" / "evil.csv"
    _set_meta(store, "plan", None)
    _set_meta(store, "command", json.dumps(["export", str(store), str(evil)]))
    _set_meta(store, "cwd", str(tmp / "elsewhere"))
    before = _files(tmp)
    assert _cli(["resume", str(store)], tmp / "project", monkeypatch) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "holds no plan" in err and "re-run the original command" in err
    assert _files(tmp) == before and not evil.exists()


def test_a_plan_naming_code_is_refused_before_importing_it(project, monkeypatch, capsys):
    tmp, store = project
    (tmp / "elsewhere" / "evil.py").write_text(EVIL)
    ref = f"{tmp / 'elsewhere' / 'evil.py'}:f"
    plan = _plan(store)
    # in the scenario data (found by the plan check) ...
    _set_meta(store, "plan", json.dumps({**plan, "scenario": {**plan["scenario"], "process": {"type": ref}}}))
    assert _cli(["resume", str(store), "-q"], tmp / "project", monkeypatch) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and f"names user code {ref!r}" in err
    # ... and in a --set value
    _set_meta(store, "plan", json.dumps({**plan, "options": {"set": [f'outcome = {{type = "{ref}"}}']}}))
    assert _cli(["resume", str(store), "-q"], tmp / "project", monkeypatch) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and f"names user code {ref!r}" in err
    assert not (tmp / "elsewhere" / "MARKER").exists()
    with open_store(store) as st:
        assert len(st.done_chunks()) == 3


def test_where_references_resolve_they_are_refused_inside_no_user_code(tmp_path):
    # the safety net below the plan check: a reference nested where only the loader sees it
    from simpower.errors import ParameterError
    from simpower.functions import no_user_code
    from simpower.registry import build

    (tmp_path / "evil.py").write_text(EVIL)
    ref = f"{tmp_path / 'evil.py'}:f"
    with no_user_code("because a test says so."):
        with pytest.raises(ParameterError, match="names user code .*because a test says so"):
            build("process", {"type": "two_arm", "n": 5, "outcome": {"type": ref}})
        with pytest.raises(ParameterError, match="names user code"):
            build("analysis", {"type": "multiple", "tests": [{"type": "t_test"}, {"type": ref}]})
    assert not (tmp_path / "MARKER").exists()
    # outside the block the same reference is imported (and so runs), as a scenario file's would
    fn = build("analysis", {"type": ref})
    assert (tmp_path / "MARKER").exists() and fn.label == ref


def test_status_shows_the_plan_or_why_it_is_refused(project, monkeypatch, capsys):
    tmp, store = project
    assert _cli(["resume", str(store), "--status"], tmp, monkeypatch) == 0
    out = capsys.readouterr().out
    assert "150 of 400 replicates (250 to go)" in out
    assert f"plan: simpower run s.toml --set n=14 --store {store}" in out
    _set_meta(store, "plan", json.dumps({**_plan(store), "command": "export"}))
    assert _cli(["resume", str(store), "--status"], tmp, monkeypatch) == 0
    assert "plan: none that resume can use" in capsys.readouterr().out


def test_a_sweep_resumes_from_its_plan_to_the_uninterrupted_table(tmp_path, monkeypatch, capsys):
    proj = tmp_path / "p"
    proj.mkdir()
    (proj / "s.toml").write_text(SCENARIO)
    argv = ["sweep", "s.toml", "--vary", "n=10,16", "--reps", "200", "-q", "--jobs", "1"]
    assert _cli([*argv, "--store", "sw.sqlite", "--csv", "full.csv"], proj, monkeypatch) == 0
    _drop_chunks(proj / "sw.sqlite", 2)
    with open_store(proj / "sw.sqlite") as st:
        assert st.plan["options"] == {"reps": 200, "vary": ["n=10,16"]}
        assert len(st.done_chunks()) == 4     # 2 points x 2 chunks of 50 kept of 4 each
    (tmp_path / "out").mkdir()
    assert _cli(["resume", str(proj / "sw.sqlite"), "-q", "--jobs", "1", "--csv", "resumed.csv"],
                tmp_path / "out", monkeypatch) == 0
    full = pd.read_csv(proj / "full.csv")
    resumed = pd.read_csv(tmp_path / "out" / "resumed.csv")
    cols = ["n", "analysis", "power", "mcse", "reps", "failures"]
    pd.testing.assert_frame_equal(full[cols], resumed[cols])
    assert np.all(resumed["reps"] == 200)


def test_a_resumed_report_writes_its_report_only_where_the_resume_command_line_says(tmp_path, monkeypatch, capsys):
    proj = tmp_path / "p"
    proj.mkdir()
    (proj / "s.toml").write_text(SCENARIO + '[null_check]\nenabled = false\n[report]\nout = "rep"\ntitle = "T"\n'
                                 '[execution]\nbackend = "serial"\n')
    assert _cli(["report", "s.toml", "--store", "r.sqlite", "--reps", "200", "-q", "--jobs", "1"], proj,
                monkeypatch) == 0
    assert (proj / "rep" / "report.md").is_file()
    with open_store(proj / "r.sqlite") as st:
        plan = st.plan["scenario"]
    assert plan["report"] == {"title": "T"} and "execution" not in plan
    _drop_chunks(proj / "r.sqlite", 1)
    (tmp_path / "out").mkdir()
    before = _files(tmp_path)
    # without --out: the store is completed, no report is written (not even to the file's [report] out)
    assert _cli(["resume", str(proj / "r.sqlite"), "-q", "--jobs", "1"], tmp_path / "out", monkeypatch) == 0
    assert "report not written" in capsys.readouterr().out
    assert {f.split(":")[0] for f in _files(tmp_path) ^ before} <= {"p/r.sqlite"}
    assert _cli(["resume", str(proj / "r.sqlite"), "-q", "--jobs", "1", "--out", "again"], tmp_path / "out",
                monkeypatch) == 0
    # the same report (results, figures' data, settings) but for the command line, scenario file and date
    def body(path):
        skip = ("simpower report", "| command", "| scenario file", "| date")
        return [ln for ln in path.read_text().splitlines() if not ln.startswith(skip)]

    assert body(tmp_path / "out" / "again" / "report.md") == body(proj / "rep" / "report.md")


def test_the_interruption_hint_offers_resume_only_without_user_code(tmp_path):
    from simpower.cli.common import resume_hint
    from simpower.scenario_files import loads

    (tmp_path / "m.py").write_text("def p(data):\n    return 0.5\n")
    plain = loads(SCENARIO, path=tmp_path / "s.toml")
    coded = loads(SCENARIO.replace('type = "t_test"', 'type = "m.py:p"'), path=tmp_path / "s.toml")
    assert resume_hint("r.sqlite", plain).endswith("run the same command again or: simpower resume r.sqlite")
    assert resume_hint("r.sqlite", coded).endswith("run the same command again")
