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
    # the closed form (0.8015, noncentral t; Cohen 1988 Table 2.4.1: 0.80) rounded to the MCSE of 400 replicates
    assert "Power" in text and "MCSE" in text and "Closed-form power 0.80 " in text
    assert "chunk size" not in text and "execution path" not in text      # implementation details: -v only
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


# -- messages say what is true (one line naming the field and the fix; no traceback) ----------------
@pytest.mark.parametrize("extra, pattern", [
    (["--json", "{tmp}/no_such_folder/r.json"], r"`--json` .*no_such_folder/r.json: the folder .*no_such_folder "
                                                 r"does not exist; create the folder first"),
    (["--json", "{tmp}"], r"`--json` .*: is a folder; give a file path"),
    (["--address", "tcp://scheduler-host"], r"`--address` must look like tcp://HOST:PORT .*got 'tcp://scheduler-host'"),
    (["--jobs", "0"], r"`--jobs` must be -1 \(all cores\) or an integer >= 1; got 0"),
    (["--jobs", "-7"], r"`--jobs` must be -1 \(all cores\) or an integer >= 1; got -7"),
])
def test_bad_outputs_and_execution_options_are_named_before_the_run(extra, pattern, tmp_path, capsys):
    import re

    argv = ["run", str(SCEN), "--reps", "50", "-q"] + [a.format(tmp=tmp_path) for a in extra]
    assert main(argv) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "Traceback" not in err and "Error:" not in err
    assert re.search(pattern, err), err


def test_report_out_onto_a_file_is_named(tmp_path, capsys):
    target = tmp_path / "taken.txt"
    target.write_text("not a folder")
    assert main(["report", str(SCEN), "--reps", "50", "--jobs", "1", "-q", "--out", str(target)]) == 2
    err = capsys.readouterr().err.strip()
    assert f"`--out` {target}: is a file, not a folder; give a folder path" in err
    assert "FileExistsError" not in err and target.read_text() == "not a folder"


def test_jobs_out_of_range_in_the_file_names_the_field(tmp_path, capsys):
    p = tmp_path / "j.toml"
    p.write_text(SCEN.read_text().replace("seed =", "jobs = -7\nseed =", 1))
    assert main(["run", str(p), "--reps", "50", "-q"]) == 2
    assert "`jobs` must be -1 (all cores) or an integer >= 1; got -7" in capsys.readouterr().err


def test_output_cut_short_by_the_reader_ends_quietly(tmp_path):
    # `simpower run ... | head -0`: the reader is gone before anything is written. Exit code 141 = 128 +
    # SIGPIPE, what POSIX shells report for a writer stopped by a closed pipe (common practice).
    proc = subprocess.Popen([sys.executable, "-m", "simpower.cli.main", "run", str(SCEN), "--reps", "50",
                             "--jobs", "1", "-q"], stdout=subprocess.PIPE, stderr=subprocess.PIPE, cwd=ROOT)
    proc.stdout.close()
    err = proc.stderr.read().decode()
    proc.stderr.close()
    assert proc.wait(timeout=120) == 141
    assert "Traceback" not in err and "BrokenPipe" not in err and err.strip() == ""


def test_an_unexpected_os_error_names_path_and_reason(tmp_path, capsys, monkeypatch):
    from simpower.cli import cmd_run

    def boom(args):
        raise PermissionError(13, "Permission denied", str(tmp_path / "locked.json"))

    monkeypatch.setattr(cmd_run, "main", boom)  # the parser is built per call and binds the patched command
    assert main(["run", str(SCEN)]) == 2
    err = capsys.readouterr().err.strip()
    assert err == f"simpower: error: {tmp_path / 'locked.json'}: Permission denied; check the path and its folder " \
                  f"(run with --debug for the traceback)"
