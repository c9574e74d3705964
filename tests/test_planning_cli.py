"""The planning commands: sweep, samplesize, report; one-line errors with exit code 2; exact reproduction."""

import json
import shlex
import sys

import pandas as pd
import pytest

from simpower.cli.main import main

TOML = """
name = "CLI planning test"
alpha = 0.05
reps = 300

[process]
type = "normal_two_arm"
n = 30
effect = 0.6

[analyses.student]
type = "t_test"

[analyses.welch]
type = "welch_t"

[sweep]
reps = 300
[sweep.vary]
n = [10, 30]
effect = { from = 0.4, to = 0.6, step = 0.2 }

[search]
power = 0.8
low = 10
high = 150
rel_tol = 0.05

[null_check]
reps = 800
"""


@pytest.fixture
def scen(tmp_path):
    p = tmp_path / "plan.toml"
    p.write_text(TOML)
    return p


def test_sweep_writes_csv_parquet_and_plots(scen, tmp_path, capsys):
    rc = main(["sweep", str(scen), "--seed", "1", "--jobs", "1", "-q", "--csv", str(tmp_path / "s.csv"),
               "--parquet", str(tmp_path / "s.parquet"), "--plot", str(tmp_path / "curve")])
    out = capsys.readouterr().out
    assert rc == 0 and "seed: 1" in out and "ICH E9" in out
    csv = pd.read_csv(tmp_path / "s.csv")
    assert len(csv) == 2 * 2 * 2 and list(pd.read_parquet(tmp_path / "s.parquet")["power"]) == list(csv["power"])
    assert (tmp_path / "curve.png").exists() and (tmp_path / "curve.svg").exists()


def test_command_line_grid_replaces_the_files(scen, tmp_path, capsys):
    rc = main(["sweep", str(scen), "--seed", "1", "--jobs", "1", "-q", "--vary", "n=8:12:2",
               "--together", "effect=0.2,0.4;sd=1,2", "--csv", str(tmp_path / "s.csv"), "--null-check",
               "--null-reps", "400"])
    assert rc == 0
    csv = pd.read_csv(tmp_path / "s.csv")
    assert sorted(set(csv["n"])) == [8, 10, 12] and len(csv) == 3 * 2 * 2
    assert "Bradley" in capsys.readouterr().out


def test_samplesize_prints_answer_and_interval(scen, tmp_path, capsys):
    rc = main(["samplesize", str(scen), "--seed", "2", "--jobs", "1", "-q", "--json", str(tmp_path / "r.json")])
    out = capsys.readouterr().out
    assert rc == 0 and "required `n` for power 0.8" in out and "Monte Carlo interval" in out
    d = json.loads((tmp_path / "r.json").read_text())
    assert d["interval"][0] <= d["value"] <= d["interval"][1] and d["seed"] == "2"


def test_samplesize_detectable_effect(scen, capsys):
    rc = main(["samplesize", str(scen), "--effect", "--range", "0:1.5", "--seed", "3", "--jobs", "1", "-q"])
    assert rc == 0 and "minimal detectable `effect`" in capsys.readouterr().out


@pytest.mark.parametrize("argv, message", [
    (["sweep", "{f}", "--vary", "nn=1,2"], "Did you mean 'n'"),
    (["sweep", "{f}", "--vary", "n="], "grid is empty"),
    (["samplesize", "{f}", "--power", "0.04"], "(alpha, 1)"),
    (["samplesize", "{f}", "--power", "1.0"], "(alpha, 1)"),
    (["samplesize", "{f}", "--range", "4:8", "--power", "0.95"], "best power seen"),
    (["samplesize", "{f}", "--range", "oops"], "LOW:HIGH"),
])
def test_bad_input_one_line_exit_2(scen, capsys, argv, message):
    argv = [a.format(f=scen) for a in argv] + ["--jobs", "1", "-q", "--seed", "1"]
    rc = main(argv)
    err = capsys.readouterr().err
    assert rc == 2
    assert message in err and err.count("\n") == 1 and "Traceback" not in err


def test_unknown_block_field_is_reported(tmp_path, capsys):
    p = tmp_path / "bad.toml"
    p.write_text(TOML.replace("rel_tol = 0.05", "rel_toll = 0.05"))
    assert main(["samplesize", str(p), "--jobs", "1", "-q"]) == 2
    assert "Did you mean 'rel_tol'" in capsys.readouterr().err


def _tables(d):
    return {name: pd.read_csv(d / f"{name}.csv").drop(columns=["seconds"], errors="ignore")
            for name in ("sweep", "search", "null_check")}


def test_report_manifest_command_reproduces_the_numbers(scen, tmp_path, monkeypatch, capsys):
    out = tmp_path / "rep"
    argv = ["report", str(scen), "--out", str(out), "--jobs", "1", "-q"]   # no seed: fresh entropy, recorded
    monkeypatch.setattr(sys, "argv", ["simpower"] + argv)
    assert main(argv) == 0
    man = json.loads((out / "manifest.json").read_text())
    first = _tables(out)
    assert (out / "report.md").exists() and (out / "report.html").exists()
    cmd = shlex.split(man["command"])
    assert cmd[0] == "simpower" and "--seed" in cmd
    monkeypatch.setattr(sys, "argv", cmd)
    assert main(cmd[1:]) == 0
    second = _tables(out)
    for name in first:
        pd.testing.assert_frame_equal(first[name], second[name])
    assert json.loads((out / "manifest.json").read_text())["seed"] == man["seed"]


def test_report_without_search_or_sweep_runs_the_design(tmp_path, monkeypatch, capsys):
    p = tmp_path / "plain.toml"
    p.write_text(TOML.split("[sweep]")[0] + "\n[sequential]\ntarget_mcse = 0.02\n\n[null_check]\nreps = 400\n")
    argv = ["report", str(p), "--out", str(tmp_path / "r"), "--jobs", "1", "-q", "--seed", "4"]
    monkeypatch.setattr(sys, "argv", ["simpower"] + argv)
    assert main(argv) == 0
    md = (tmp_path / "r" / "report.md").read_text()
    assert "Power at the planned design" in md and "Sequential stopping" in md


def test_store_folder_makes_the_search_resumable(scen, tmp_path, capsys):
    argv = ["samplesize", str(scen), "--jobs", "1", "-q", "--seed", "5", "--store", str(tmp_path / "runs") + "/"]
    assert main(argv) == 0
    first = capsys.readouterr().out
    files = list((tmp_path / "runs").glob("run-*.sqlite"))
    assert len(files) == 1
    assert main(argv) == 0
    assert capsys.readouterr().out.splitlines()[0] == first.splitlines()[0]
