"""The command line: output, exit codes, one-line errors without tracebacks."""

import json
import subprocess
import sys
from pathlib import Path

import pytest

from simpower.cli.main import main

ROOT = Path(__file__).parent.parent
SCEN = ROOT / "scenarios" / "two_arm_normal.toml"


def test_run_prints_power_analytic_and_writes_json(tmp_path, capsys):
    out = tmp_path / "r.json"
    rc = main(["run", str(SCEN), "--reps", "400", "--seed", "3", "--jobs", "1", "-q", "--json", str(out)])
    text = capsys.readouterr().out
    assert rc == 0
    assert "power" in text and "MCSE" in text and "analytic power 0.8015" in text
    assert "ICH E9" in text
    d = json.loads(out.read_text())
    assert d["reps"] == 400 and d["seed"] == "3"
    assert d["analyses"]["student"]["analytic_power"] == pytest.approx(0.8015, abs=5e-5)


def test_set_overrides_parameters(capsys):
    rc = main(["run", str(SCEN), "--reps", "200", "--jobs", "1", "-q", "--set", "n=10", "--set", "effect=0"])
    assert rc == 0
    assert "two arms of 10 (control)" in capsys.readouterr().out


@pytest.mark.parametrize("args, pattern", [
    (["run", "missing.toml"], "no such scenario file"),
    (["run", str(SCEN), "--set", "efect=3"], "`efect` is not a parameter of this scenario. Did you mean 'effect'"),
    (["run", str(SCEN), "--set", "n=-4"], "`n` must be an integer >= 2; got -4"),
    (["run", str(SCEN), "--reps", "0"], "`reps` must be an integer >= 1"),
    (["run", str(SCEN), "--set", "alpha=2"], "`alpha` must be in"),
])
def test_bad_input_exit_2_one_line(args, pattern, capsys):
    rc = main(args)
    err = capsys.readouterr().err
    assert rc == 2
    assert pattern in err
    assert err.count("\n") == 1 and "Traceback" not in err


def test_subprocess_toml_syntax_error_names_file_and_line(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text("alpha = 0.05\n[process\n")
    p = subprocess.run([sys.executable, "-m", "simpower.cli.main", "run", str(bad)], capture_output=True, text=True)
    assert p.returncode == 2
    assert "bad.toml: TOML syntax error" in p.stderr and "line 2" in p.stderr
    assert "Traceback" not in p.stderr


def test_check_quick_passes(capsys):
    rc = main(["check", "--quick", "--reps", "1000", "--jobs", "1", "-q"])
    text = capsys.readouterr().out
    assert rc == 0, text
    assert "48 checks against exact closed forms, 48 pass, 0 fail" in text
    assert "16 rows against an approximate closed form (Welch" in text


def test_run_with_target_mcse_and_null_check(tmp_path, capsys):
    # Sequential stopping reaches the MCSE asked for (Morris, White & Crowther 2019: R = p(1-p)/MCSE^2),
    # and the null check reports the type I error against Bradley's (1978) liberal band.
    out = tmp_path / "r.json"
    rc = main(["run", str(SCEN), "--seed", "5", "--jobs", "1", "-q", "--target-mcse", "0.008",
               "--null-check", "--null-reps", "2000", "--json", str(out)])
    text = capsys.readouterr().out
    assert rc == 0, text
    d = json.loads(out.read_text())
    s = d["analyses"]["student"]
    assert s["mcse"] <= 0.008
    assert "Sequential stopping: target MCSE 0.008 reached" in text
    assert "Type I error under the null" in text and "Bradley's (1978) liberal criterion [0.025, 0.075]" in text


def test_run_bad_target_mcse_is_one_line(capsys):
    rc = main(["run", str(SCEN), "--target-mcse", "0.9", "-q"])
    err = capsys.readouterr().err
    assert rc == 2 and "target_mcse" in err and err.count("\n") == 1
