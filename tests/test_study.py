"""Study plans: load_plan validates the whole file at once, execute(plan) runs what it plans, and the
command line gives the same numbers (it only builds the plan, executes it and prints)."""

import json
import shutil
from pathlib import Path

import pandas as pd
import pytest

import simpower as sp
from simpower.cli.main import main
from simpower.errors import ScenarioFileError

ROOT = Path(__file__).resolve().parent.parent


def _copy(tmp_path, name, edit=None):
    text = (ROOT / "scenarios" / name).read_text()
    if edit:
        text = edit(text)
    path = tmp_path / name
    path.write_text(text)
    return path


def test_load_plan_reads_every_block(tmp_path):
    path = _copy(tmp_path, "sweep_reading_clusters.toml")
    plan = sp.load_plan(path, overrides={"reps": 100, "jobs": 1})
    assert plan.kind == "sweep" and plan.reps == 100
    assert plan.sweep["grid"].names == ["clusters", "icc"] and plan.sweep["x"] == "clusters"
    assert plan.null_check == {"reps": 4000, "at_grid": False}
    assert plan.execution == sp.Execution(seed=20261202, n_jobs=1)
    assert plan.report["title"].startswith("Reading programme")


@pytest.mark.parametrize("edit, pattern", [
    (lambda t: t + "\n[execution]\ntimeout = \"soon\"\n", r"`execution.timeout` must be a number > 0"),
    (lambda t: t.replace("[sweep]", "[sweep]\nreps = -5"), r"`sweep.reps` must be an integer >= 1; got -5"),
    (lambda t: t.replace('x = "clusters"', 'x = "schools"'), r"`\[sweep\] x` 'schools' is not a swept parameter"),
    (lambda t: t.replace("icc = [0.02, 0.05, 0.10]", "iccc = [0.02]"), r"iccc"),
])
def test_load_plan_refuses_a_bad_plan_before_anything_runs(tmp_path, edit, pattern):
    path = _copy(tmp_path, "sweep_reading_clusters.toml", edit)
    with pytest.raises(sp.SimpowerError, match=pattern) as info:
        sp.load_plan(path)
    assert "\n" not in str(info.value)


def test_execute_gives_the_report_commands_numbers(tmp_path, capsys):
    # a sweep plan with its type I check: the library call and `simpower report` agree exactly
    path = _copy(tmp_path, "sweep_reading_clusters.toml",
                 lambda t: t.replace("icc = [0.02, 0.05, 0.10]", "icc = [0.05]")
                            .replace("clusters = { from = 6, to = 20, step = 2 }", "clusters = [6, 12]"))
    plan = sp.load_plan(path, overrides={"reps": 200, "jobs": 1})
    plan = plan.replace(null_check={**plan.null_check, "reps": 400})
    out = sp.execute(plan)
    assert out.seed == 20261202 and out.run is None and out.search is None
    assert main(["report", str(path), "--reps", "200", "--null-reps", "400", "--jobs", "1", "-q",
                 "--out", str(tmp_path / "rep")]) == 0
    table = pd.read_csv(tmp_path / "rep" / "sweep.csv")
    assert table["power"].tolist() == out.sweep["power"].tolist()
    null = pd.read_csv(tmp_path / "rep" / "null_check.csv")
    assert null["type1_error"].tolist() == out.null["type1_error"].tolist()
    # Bradley (1978) liberal criterion: the cluster-means t-test holds its size, within 4 MCSE of alpha
    assert abs(out.null["type1_error"][0] - 0.05) < 4 * out.null["mcse"][0]
    manifest = json.loads((tmp_path / "rep" / "manifest.json").read_text())
    assert str(out.seed) in json.dumps(manifest)


def test_execute_a_plain_run_matches_the_run_command(tmp_path, capsys):
    path = _copy(tmp_path, "two_arm_normal.toml")
    plan = sp.load_plan(path, overrides={"reps": 500, "jobs": 1}).replace(null_check=None)
    out = sp.execute(plan)
    assert out.sweep is None and out.null is None
    assert main(["run", str(path), "--reps", "500", "--jobs", "1", "-q", "--json", str(tmp_path / "r.json")]) == 0
    cli = json.loads((tmp_path / "r.json").read_text())
    assert int(cli["seed"]) == out.run.seed == 20261201
    assert {name: a["rejections"] for name, a in cli["analyses"].items()} == \
        {name: s["rejections"] for name, s in out.run.summaries.items()}
    # Cohen (1988, table 2.4.1): n = 64 per arm, d = 0.5 -> 0.80, within 4 MCSE
    assert abs(out.run.power - 0.80) < 4 * out.run.mcse


def test_execute_a_search_plan_matches_the_samplesize_command(tmp_path, capsys):
    path = _copy(tmp_path, "samplesize_sleep_app.toml")
    plan = sp.load_plan(path, overrides={"jobs": 1})
    plan = plan.replace(search={**plan.search, "max_reps": 30_000}, null_check=None)
    out = sp.execute(plan)
    assert main(["samplesize", str(path), "--jobs", "1", "-q", "--max-reps", "30000",
                 "--csv", str(tmp_path / "ss.csv")]) in (0, 1)
    cli = pd.read_csv(tmp_path / "ss.csv")
    assert cli["power"].tolist() == out.search.table["power"].tolist()


def test_execute_takes_only_a_plan():
    with pytest.raises(sp.ParameterError, match=r"`plan` must be a StudyPlan"):
        sp.execute("trial.toml")


@pytest.mark.parametrize("name", sorted(p.name for p in (ROOT / "scenarios").glob("*.toml")))
def test_a_plan_as_data_rebuilds_the_same_computation(name):
    # every bundled scenario: to_data -> JSON -> from_data gives the same scenario fingerprint (and so the same
    # seeds: SeedSequence(seed, spawn_key=(point key from the fingerprint, chunk))), the same grid points and
    # the same data again
    plan = sp.load_plan(ROOT / "scenarios" / name)
    data = json.loads(json.dumps(plan.to_data()))
    again = sp.StudyPlan.from_data(data)
    assert again.scenario.fingerprint() == plan.scenario.fingerprint()
    assert again.to_data() == data
    assert again.execution.seed == plan.execution.seed and again.execution.chunk_size == plan.execution.chunk_size
    if plan.sweep is not None:
        assert again.sweep["grid"].settings(again.scenario) == plan.sweep["grid"].settings(plan.scenario)
    for part in ("search", "null_check", "sequential", "looks"):
        assert (getattr(again, part) or None) == (getattr(plan, part) or None), part
    assert "out" not in again.report and again.path is None and not again.stores


def test_a_plan_as_data_holds_no_place_and_no_executor(tmp_path):
    path = _copy(tmp_path, "sweep_reading_clusters.toml",
                 lambda t: t + '\n[store]\npath = "runs/"\n[execution]\nbackend = "serial"\ntimeout = 30\n')
    plan = sp.load_plan(path).replace(stores={"sweep": str(tmp_path / "runs" / "x.sqlite")})
    data = plan.to_data()
    text = json.dumps(data)
    assert str(tmp_path) not in text and "serial" not in text and "runs" not in text
    assert data["execution"] == {"seed": 20261202, "fit_trouble": "failure", "max_failure_rate": 0.5, "timeout": 30}
    with pytest.raises(sp.ParameterError, match=r"`execution.backend` is not a field"):
        sp.StudyPlan.from_data({**data, "execution": {**data["execution"], "backend": "dask"}})
    with pytest.raises(sp.ParameterError, match=r"`sweep.reps` must be an integer >= 1; got -5"):
        sp.StudyPlan.from_data({**data, "sweep": {**data["sweep"], "reps": -5}})
    with pytest.raises(sp.ParameterError, match=r"grid parameter `schools` is not a parameter"):
        sp.StudyPlan.from_data({**data, "sweep": {**data["sweep"], "grid": [{"schools": [4, 8]}]}})


def test_a_rerun_without_a_seed_continues_its_store(tmp_path, monkeypatch, capsys):
    # documented in docs/overnight.md: the first run draws a seed and stores it, the rerun (no seed either)
    # reuses it -- also for the planning commands, whose plan fixes the seed before the engine sees the store
    path = _copy(tmp_path, "two_arm_normal.toml", lambda t: "\n".join(
        ln for ln in t.splitlines() if not ln.startswith("seed")))
    monkeypatch.chdir(tmp_path)
    argv = ["sweep", str(path), "--vary", "n=20,30", "--reps", "200", "--jobs", "1", "-q", "--store", "s.sqlite"]
    assert main([*argv, "--csv", "a.csv"]) == 0
    assert main([*argv, "--csv", "b.csv"]) == 0
    a, b = pd.read_csv("a.csv"), pd.read_csv("b.csv")
    assert a["power"].tolist() == b["power"].tolist()
    with sp.open_store("s.sqlite") as st:
        assert st.plan["study"]["execution"]["seed"] == st.seed
