"""``simpower resume``: a store is data, never a program.

The store records the resolved study plan as data (plan version 2: the scenario after --set,
the blocks, the seed and the other settings that shape the numbers; ``StudyPlan.to_data``);
``resume`` checks it with the validators that check a scenario file (``StudyPlan.from_data``),
rebuilds the StudyPlan and runs it with ``simpower.execute``. The result equals an uninterrupted
run bit for bit (the reference is the same plan run in one go with the same seed and chunk size:
the engine's documented promise, ``SeedSequence(seed, spawn_key=(point, chunk))``); ``resume``
writes only into the store and the outputs named on its own command line, and refuses a plan
that was edited to name another command, an output path, a folder, an executor or code. Every
test records the files of the whole temporary tree before and after, so "writes nothing else" is
checked, not assumed. Stores written before (plan version 1: the scenario file's fields and the
command's options) still resume to the same numbers.
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


def test_the_plan_is_the_resolved_study_as_data_without_command_line_folder_or_paths(project):
    tmp, store = project
    with open_store(store) as st:
        meta, plan = st.meta(), st.plan
    assert "command" not in meta and "cwd" not in meta
    assert set(plan) == {"version", "command", "scenario_file", "stores", "study"}
    assert (plan["version"], plan["command"], plan["scenario_file"], plan["stores"]) == (2, "run", "s.toml", ["run"])
    study = plan["study"]
    # the scenario as resolved: --set n=14 applied, every parameter of the process spelled out
    assert study["scenario"]["process"] == sp.TwoArm(n=14, effect=0.6).spec()
    assert study["scenario"]["name"] == "Two-arm trial" and study["reps"] == 400
    assert study["execution"] == {"seed": 11, "chunk_size": 50, "fit_trouble": "failure", "max_failure_rate": 0.5}
    text = json.dumps(plan)
    assert str(tmp) not in text and "run.sqlite" not in text and "jobs" not in text
    # the data rebuilds the plan the command ran
    rebuilt = sp.StudyPlan.from_data(study)
    assert rebuilt.scenario.fingerprint() == _reference().scenario.fingerprint()
    assert rebuilt.to_data() == study


def test_resume_from_another_folder_is_bit_identical_and_writes_only_the_store(project, monkeypatch, capsys):
    tmp, store = project
    before, plan = _files(tmp), _plan(store)
    assert _cli(["resume", str(store), "-q", "--jobs", "1"], tmp / "elsewhere", monkeypatch) == 0
    assert _plan(store) == plan     # resume adds chunks; the plan stays as recorded
    ref = _reference()
    with open_store(store) as st:
        assert len(st.done_chunks()) == 8
        records = st.records()
    for f in ("pvalue", "estimate", "se", "ci_low", "ci_high", "status"):
        assert getattr(records["t_test"], f).tobytes() == getattr(ref.records["t_test"], f).tobytes(), f
    changed = {f.split(":")[0] for f in _files(tmp) ^ before}
    assert changed <= {"project/run.sqlite"}
    out = capsys.readouterr().out
    # the reproduce line says what computes these numbers: the plan in this store
    assert f"To reproduce these numbers exactly: simpower resume {store}" in out


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


def _study(p, **changes):
    return {**p, "study": {**p["study"], **changes}}


@pytest.mark.parametrize("edit, message", [
    # another command, writing onto an arbitrary path
    (lambda p, evil: {**p, "command": "export", "options": {"out": str(evil)}}, "unknown field 'options'"),
    (lambda p, evil: {**p, "command": "export"}, "command 'export' is not one of"),
    # an output path smuggled into the plan
    (lambda p, evil: _study(p, json=str(evil)), "`plan.json` is not a field"),
    (lambda p, evil: {**p, "stores": ["run", str(evil)]}, "`stores` must list parts"),
    (lambda p, evil: {**p, "stores": []}, "`stores` must list parts"),
    # a command that does not print what the plan computes
    (lambda p, evil: {**p, "command": "sweep"}, "a sweep plan computes a sweep, this one a run"),
    # a store path, a report folder, a scheduler or a worker count inside the data
    (lambda p, evil: _study(p, scenario={**p["study"]["scenario"], "store": {"path": str(evil)}}),
     "`scenario.store` is not a field"),
    (lambda p, evil: _study(p, report={"title": "T", "out": str(evil.parent)}), "`report.out` is not a field"),
    (lambda p, evil: _study(p, execution={**p["study"]["execution"], "address": "tcp://10.0.0.9:8786"}),
     "`execution.address` is not a field"),
    (lambda p, evil: _study(p, execution={**p["study"]["execution"], "n_jobs": 64}), "`execution.n_jobs` is not"),
    # a setting of the wrong kind, out of range, missing; an unknown field, another version
    (lambda p, evil: _study(p, reps="400; rm -rf /"), "`reps` must be an integer"),
    (lambda p, evil: _study(p, search={"power": 7}), "`search.power` must be"),
    (lambda p, evil: _study(p, execution={"chunk_size": 50}), "`execution.seed` is missing"),
    (lambda p, evil: _study(p, scenario={**p["study"]["scenario"], "process": {"type": "two_arm", "n": 1}}),
     "`process.n` must be"),
    (lambda p, evil: {**p, "cwd": str(evil.parent)}, "unknown field 'cwd'"),
    # a pilot process without its values, pointed at a file to read
    (lambda p, evil: _study(p, scenario={**p["study"]["scenario"], "process": {
        "type": "pilot_resample", "n": 20, "data": "/etc/hostname"}}), "would read the data file '/etc/hostname'"),
    (lambda p, evil: {**p, "version": 0}, "plan version 0"),
    (lambda p, evil: [p], "not a table"),
    # a version-1 plan is held to its own allow-lists
    (lambda p, evil: {"version": 1, "command": "run", "scenario": {}, "scenario_file": "s.toml",
                      "options": {"json": str(evil)}}, "option 'json' is not one a run records"),
    (lambda p, evil: {"version": 1, "command": "run", "scenario_file": "s.toml", "options": {},
                      "scenario": {"report": {"out": str(evil.parent)}}}, "`report.out`"),
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
    scenario = plan["study"]["scenario"]
    places = [
        # as the process ...
        _study(plan, scenario={**scenario, "process": {"type": ref}}),
        # ... nested in the process's outcome ...
        _study(plan, scenario={**scenario, "process": {**scenario["process"], "outcome": {"type": ref}}}),
        # ... as a value of a sweep grid ...
        _study(plan, sweep={"grid": [{"outcome": [{"type": ref}]}]}),
        # ... and in a version-1 plan's --set value
        {"version": 1, "command": "run", "scenario_file": "s.toml", "scenario": {},
         "options": {"set": [f'outcome = {{type = "{ref}"}}']}},
    ]
    for edited in places:
        _set_meta(store, "plan", json.dumps(edited))
        assert _cli(["resume", str(store), "-q"], tmp / "project", monkeypatch) == 2
        err = capsys.readouterr().err.strip()
        assert len(err.splitlines()) == 1 and f"names user code {ref!r}" in err, err
        assert "re-run the original command (simpower run s.toml --store" in err
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
    assert "plan: run of Two-arm trial, seed 11" in out and "scenario file s.toml is not read" in out
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
        assert st.plan["stores"] == ["sweep"]
        assert st.plan["study"]["sweep"] == {"reps": 200, "grid": [{"n": [10, 16]}]}
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
        plan = st.plan["study"]
    assert plan["report"] == {"title": "T"} and "backend" not in json.dumps(plan)
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
        skip = ("simpower report", "simpower resume", "| command", "| scenario file", "| date")
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


# -- same seed, same numbers after a resume: every command that records a plan ---------------------
SWEEP_BLOCKS = """[null_check]
enabled = true
reps = 100
[sweep]
reps = 100
[sweep.vary]
n = [10, 16]
"""
ASSURANCE_BLOCK = """[assurance]
draws = 12
reps_per_draw = 10
[assurance.prior]
effect = {dist = "norm", loc = 0.6, scale = 0.2}
"""
# per command: its arguments (the scenario is s.toml, or r.toml for the report's file-planned study), and the
# output whose numbers are compared
COMMANDS = {
    "run": (["run", "s.toml", "--set", "n=14", "--reps", "300"], ["--json", "out.json"]),
    "sweep": (["sweep", "s.toml", "--vary", "n=8,14", "--reps", "150", "--null-check", "--null-reps", "100"],
              ["--csv", "out.csv"]),
    "samplesize": (["samplesize", "s.toml", "--range", "8:60", "--max-reps", "1500"], ["--json", "out.json"]),
    "report": (["report", "r.toml", "--null-reps", "100"], ["--out", "rep"]),
    "assurance": (["assurance", "s.toml", "--draws", "12"], ["--json", "out.json"]),
}
#: fields that hold times or how the result was asked for, not numbers
NOT_NUMBERS = ("seconds", "command", "store", "n_jobs", "backend", "simpower_source_sha256")


def _files_for(tmp: Path) -> None:
    """tmp/whole (the uninterrupted run), tmp/stored (the run into a store), each with s.toml and r.toml (the
    report's file-planned study); tmp/elsewhere (where resume runs) empty."""
    for d in ("whole", "stored", "elsewhere"):
        (tmp / d).mkdir()
    for d in ("whole", "stored"):
        (tmp / d / "s.toml").write_text(SCENARIO + ASSURANCE_BLOCK)
        (tmp / d / "r.toml").write_text(SCENARIO + SWEEP_BLOCKS)


def _numbers(folder: Path, command: str) -> str:
    """The outputs' numbers as canonical JSON text (floats by repr, so equal text is equal bits, NaN included):
    the JSON without times and the command line, the CSV tables without times."""
    def table(path):
        t = pd.read_csv(path)
        return t.drop(columns=[c for c in NOT_NUMBERS if c in t.columns]).to_dict("list")

    if command == "report":
        got = {p.name: table(p) for p in sorted((folder / "rep").glob("*.csv"))}
        assert got, "the report wrote no table"
    elif command == "sweep":
        got = table(folder / "out.csv")
    else:
        got = {k: v for k, v in json.loads((folder / "out.json").read_text()).items() if k not in NOT_NUMBERS}
    return json.dumps(got, sort_keys=True, default=str)


def _drop_every_other_chunk(store: Path) -> int:
    """Forget every second finished chunk (of every grid point): a store as an interruption leaves it."""
    con = sqlite3.connect(store)
    with con:
        done = con.execute("SELECT point, chunk FROM chunks ORDER BY point, chunk").fetchall()
        for point, chunk in done[1::2]:
            for table in ("chunks", "arrays", "causes"):
                con.execute(f"DELETE FROM {table} WHERE point = ? AND chunk = ?", (point, chunk))
    con.close()
    return len(done[1::2])


@pytest.mark.parametrize("command", list(COMMANDS))
def test_every_command_resumes_to_the_numbers_of_an_uninterrupted_run(tmp_path, monkeypatch, capsys, command):
    argv, output = COMMANDS[command]
    _files_for(tmp_path)
    rc = _cli([*argv, "-q", "--jobs", "1", *output], tmp_path / "whole", monkeypatch)
    assert _cli([*argv, "-q", "--jobs", "1", "--store", "st.sqlite"], tmp_path / "stored", monkeypatch) == rc
    store = tmp_path / "stored" / "st.sqlite"
    assert _drop_every_other_chunk(store) >= 1
    with open_store(store) as st:
        assert st.plan["version"] == 2 and st.plan["command"] == command
    before = _files(tmp_path)
    assert _cli(["resume", str(store), "-q", "--jobs", "1", *output], tmp_path / "elsewhere", monkeypatch) == rc
    changed = {f.split(":")[0] for f in _files(tmp_path) ^ before}
    assert changed and all(f == "stored/st.sqlite" or f.startswith("elsewhere/" + output[1]) for f in changed), changed
    assert _numbers(tmp_path / "elsewhere", command) == _numbers(tmp_path / "whole", command)


# -- stores written before: plan version 1 (the scenario file's fields and the command's options) ----------
@pytest.mark.parametrize("command", ["run", "sweep", "samplesize", "report"])
def test_a_version_1_plan_resumes_to_the_same_numbers_and_is_upgraded(tmp_path, monkeypatch, capsys, command):
    from simpower.cli.main import build_parser
    from simpower.cli.plan import plan_v1
    from simpower.scenario_files import load

    argv, output = COMMANDS[command]
    _files_for(tmp_path)
    rc = _cli([*argv, "-q", "--jobs", "1", *output], tmp_path / "whole", monkeypatch)
    assert _cli([*argv, "-q", "--jobs", "1", "--store", "st.sqlite"], tmp_path / "stored", monkeypatch) == rc
    store = tmp_path / "stored" / "st.sqlite"
    current = _plan(store)
    # what an older simpower recorded for the same command line
    args = build_parser().parse_args([*argv, "-q", "--store", "st.sqlite"])
    old = plan_v1(args, load(tmp_path / "stored" / argv[1]))
    assert old["version"] == 1 and old["scenario_file"] == argv[1]
    _set_meta(store, "plan", json.dumps(old))
    _drop_every_other_chunk(store)
    assert _cli(["resume", str(store), "-q", "--jobs", "1", *output], tmp_path / "elsewhere", monkeypatch) == rc
    assert _numbers(tmp_path / "elsewhere", command) == _numbers(tmp_path / "whole", command)
    # the store now holds the plan the command itself records
    assert _plan(store) == current
