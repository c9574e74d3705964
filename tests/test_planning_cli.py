"""The planning commands: sweep, samplesize, report; one-line errors with exit code 2; exact reproduction."""

import json
import shlex
import sys

import pandas as pd
import pytest

from simpower.cli.main import main

try:
    import matplotlib  # noqa: F401
    HAVE_MPL = True
except ImportError:
    HAVE_MPL = False
#: the tests that draw figures (matplotlib is a dependency of simpower; an environment may lack it)
needs_mpl = pytest.mark.skipif(not HAVE_MPL, reason="figures need matplotlib")

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


@needs_mpl
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
    assert rc == 0 and "Required sample size for 80% power" in out and "Monte Carlo interval" in out
    d = json.loads((tmp_path / "r.json").read_text())
    assert d["interval"][0] <= d["value"] <= d["interval"][1] and d["seed"] == "2"


def test_samplesize_detectable_effect(scen, capsys):
    rc = main(["samplesize", str(scen), "--effect", "--range", "0:1.5", "--seed", "3", "--jobs", "1", "-q"])
    assert rc == 0 and "Minimal detectable effect for" in capsys.readouterr().out


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


@needs_mpl
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


@needs_mpl
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


# -- audit fixes: --effect over a size block, the plot axis, empty ranges, missing values -----------
SCENARIOS = __import__("pathlib").Path(__file__).resolve().parents[1] / "scenarios"


def welch_power(delta, n1, n2, sd1, sd2, alpha=0.05):
    """Two-sided Welch t power from scipy.stats.nct with the Welch-Satterthwaite df (Welch 1947,
    Biometrika 34:28-35; Satterthwaite 1946); computed here, independent of simpower.analytic."""
    import math

    from scipy import stats

    v1, v2 = sd1**2 / n1, sd2**2 / n2
    df = (v1 + v2) ** 2 / (v1**2 / (n1 - 1) + v2**2 / (n2 - 1))
    crit, nc = stats.t.ppf(1 - alpha / 2, df), delta / math.sqrt(v1 + v2)
    return stats.nct.sf(crit, df, nc) + stats.nct.cdf(-crit, df, nc)


def _numbers(pattern, text):
    import re

    m = re.search(pattern, text)
    assert m, f"{pattern!r} not in output:\n{text}"
    return [float(g) for g in m.groups()]


def test_sleep_app_detectable_effect_command_from_its_header(capsys):
    # The command in scenarios/samplesize_sleep_app.toml's header, without --range: the file's
    # [search] low/high (20..400, a size range) must not become the effect's range.
    rc = main(["samplesize", str(SCENARIOS / "samplesize_sleep_app.toml"), "--effect", "--set", "n=80",
               "--jobs", "1", "-q"])
    out = capsys.readouterr().out
    assert rc == 0, out
    (value,) = _numbers(r"Minimal detectable effect for 90% power \(welch_t\): effect = ([\d.]+)", out)
    lo, hi = _numbers(r"95% Monte Carlo interval: +([\d.]+) to ([\d.]+)", out)
    (closed,) = _numbers(r"Closed form: +([\d.]+)", out)
    # reference: 80 vs round(2 * 80) = 160 per arm, SDs 30 and 1.3 * 30, power 0.9 (the file's [search] power)
    from scipy.optimize import brentq

    ref = brentq(lambda d: welch_power(d, 80, 160, 30.0, 39.0) - 0.9, 1.0, 30.0)
    assert closed == pytest.approx(ref, abs=0.01)
    # within 4 Monte Carlo standard errors: the interval is +-1.96 SE
    assert abs(value - ref) <= 4 / 1.96 * (hi - lo) / 2


def test_effect_flag_drops_the_size_blocks_range_but_keeps_a_command_line_one(scen, tmp_path, capsys):
    base = ["samplesize", str(scen), "--effect", "--seed", "3", "--jobs", "1", "-q"]
    assert main(base + ["--json", str(tmp_path / "a.json")]) == 0
    s = json.loads((tmp_path / "a.json").read_text())["settings"]
    # detectable_effect's defaults: 0 to 3 x the current effect (0.6), the process's effect parameter
    assert (s["low"], s["high"], s["parameter"]) == (0.0, pytest.approx(1.8), "effect")
    assert s["power"] == 0.8 and s["rel_tol"] == 0.05      # the block's other settings still apply
    assert main(base + ["--range", "0.1:1.2", "--json", str(tmp_path / "b.json")]) == 0
    s = json.loads((tmp_path / "b.json").read_text())["settings"]
    assert (s["low"], s["high"]) == (0.1, 1.2)


def test_a_block_written_for_the_effect_keeps_its_range(tmp_path, capsys):
    p = tmp_path / "eff.toml"
    p.write_text(TOML.replace("low = 10\nhigh = 150", 'find = "effect"\nlow = 0.1\nhigh = 1.4'))
    assert main(["samplesize", str(p), "--effect", "--seed", "3", "--jobs", "1", "-q",
                 "--json", str(tmp_path / "e.json")]) == 0
    s = json.loads((tmp_path / "e.json").read_text())["settings"]
    assert (s["low"], s["high"]) == (0.1, 1.4)


def _with_x(tmp_path, x):
    p = tmp_path / "x.toml"
    p.write_text(TOML.replace("[sweep]\n", f"[sweep]\nx = {x}\n"))
    return p


@pytest.mark.parametrize("extra", [["--plot", "{d}/curve"], ["--report", "{d}/rep"]])
def test_unswept_file_x_fails_before_running_and_names_the_block(tmp_path, capsys, extra):
    p = _with_x(tmp_path, '"alpha"')
    argv = ["sweep", str(p), "--seed", "1", "--jobs", "1", "-q", "--csv", str(tmp_path / "s.csv")]
    rc = main(argv + [a.format(d=tmp_path) for a in extra])
    cap = capsys.readouterr()
    assert rc == 2
    assert "`[sweep] x` 'alpha' is not a swept parameter; swept: n, effect." in cap.err and "--x" not in cap.err
    assert "seed:" not in cap.out and not (tmp_path / "s.csv").exists()     # nothing ran, nothing written


def test_unswept_x_does_not_matter_without_a_plot(tmp_path, capsys):
    p = _with_x(tmp_path, '"alpha"')
    assert main(["sweep", str(p), "--seed", "1", "--jobs", "1", "-q", "--csv", str(tmp_path / "s.csv")]) == 0
    assert len(pd.read_csv(tmp_path / "s.csv")) == 2 * 2 * 2


def test_bad_command_line_x_names_the_option(scen, tmp_path, capsys):
    rc = main(["sweep", str(scen), "--seed", "1", "--jobs", "1", "-q", "--x", "efect", "--plot",
               str(tmp_path / "c")])
    cap = capsys.readouterr()
    assert rc == 2 and "`--x` 'efect' is not a swept parameter; swept: n, effect." in cap.err
    assert "seed:" not in cap.out


def test_non_numeric_plot_axis_is_refused_before_running(scen, tmp_path, capsys):
    rc = main(["sweep", str(scen), "--seed", "1", "--jobs", "1", "-q", "--vary", "student.alternative=two-sided,greater",
               "--vary", "n=10,20", "--plot", str(tmp_path / "c")])
    cap = capsys.readouterr()
    assert rc == 2 and "'student.alternative' takes non-numeric values" in cap.err and "`--x` one of n" in cap.err
    assert "seed:" not in cap.out and not (tmp_path / "c.png").exists()


@needs_mpl
def test_command_line_grid_sets_aside_a_stale_file_x(tmp_path, capsys):
    p = _with_x(tmp_path, '"effect"')          # swept by the file's grid, not by --vary
    rc = main(["sweep", str(p), "--seed", "1", "--jobs", "1", "-q", "--vary", "n=10,20", "--plot",
               str(tmp_path / "c")])
    assert rc == 0 and (tmp_path / "c.png").exists()


def test_descending_range_says_empty_and_shows_the_valid_form(scen, capsys):
    rc = main(["sweep", str(scen), "--vary", "n=10:4:2", "--jobs", "1", "-q", "--seed", "1"])
    err = capsys.readouterr().err
    assert rc == 2 and err.count("\n") == 1
    assert "range is empty" in err and "n=4:10:2" in err and "a range is from:to:step" not in err


def test_missing_closed_form_prints_a_dash(tmp_path, capsys):
    # the Mann-Whitney test has no closed form here (analytic_power None at every point)
    p = tmp_path / "mw.toml"
    p.write_text(TOML.replace('[analyses.student]\ntype = "t_test"\n\n[analyses.welch]\ntype = "welch_t"',
                              '[analysis]\ntype = "mann_whitney"'))
    assert main(["sweep", str(p), "--seed", "1", "--jobs", "1", "-q", "--vary", "n=10,20"]) == 0
    lines = capsys.readouterr().out.splitlines()
    head = lines[0].split()
    col = head.index("analytic_power")
    rows = [ln.split() for ln in lines[1:3]]
    assert [r[col] for r in rows] == ["-", "-"] and "None" not in "\n".join(lines)


def test_report_without_matplotlib_is_one_line_naming_the_fix(tmp_path):
    import os
    import subprocess

    fake = tmp_path / "blocked" / "matplotlib"
    fake.mkdir(parents=True)
    (fake / "__init__.py").write_text("raise ModuleNotFoundError(\"No module named 'matplotlib'\", name='matplotlib')\n")
    scen = tmp_path / "s.toml"
    scen.write_text('[process]\ntype = "normal_two_arm"\nn = 20\neffect = 0.5\n\n[analysis]\ntype = "t_test"\n')
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(tmp_path / "blocked"), *sys.path]))
    out = subprocess.run([sys.executable, "-m", "simpower.cli.main", "report", str(scen), "--out",
                          str(tmp_path / "r"), "--reps", "200", "--jobs", "1"], capture_output=True, text=True,
                         env=env, cwd=tmp_path)
    assert out.returncode != 0
    err = out.stderr.strip().splitlines()
    assert len(err) == 1 and "pip install matplotlib" in err[0] and "Traceback" not in out.stderr


# -- every bundled scenario's sample-size search runs with its defaults ----------------------------
BUNDLED = sorted((__import__("pathlib").Path(__file__).resolve().parents[1] / "scenarios").glob("*.toml"))
#: per-replicate model fits (a mixed model, a negative binomial GLM): seconds even with few replicates;
#: the value is the replicates per chunk (and per pilot point) the test uses
SLOW_BUNDLED = {"overdispersed_counts.toml": 10}


@pytest.mark.parametrize("path", [pytest.param(p, id=p.stem, marks=[pytest.mark.slow] if p.name in SLOW_BUNDLED
                                               else []) for p in BUNDLED])
def test_every_bundled_scenario_searches_its_sample_size_with_the_defaults(path, tmp_path, capsys):
    # the file's own range ([search] or the default one), few replicates per chunk and a small budget: the
    # search must not stop with an error (exit 2); it may end unconverged (exit 1) at this budget
    copy = tmp_path / path.name
    if (path.parent / "data").is_dir():  # data files a scenario names relative to itself (pilot data)
        import shutil

        shutil.copytree(path.parent / "data", tmp_path / "data")
    chunk = SLOW_BUNDLED.get(path.name, 10)
    copy.write_text(f"chunk_size = {chunk}\n" + path.read_text(encoding="utf-8"), encoding="utf-8")
    out = tmp_path / "r.json"
    rc = main(["samplesize", str(copy), "--jobs", "1", "-q", "--seed", "11", "--max-reps", str(6 * chunk),
               "--json", str(out)])
    err = capsys.readouterr().err
    assert rc in (0, 1), err
    res = json.loads(out.read_text())
    s = res["settings"]
    assert s["low"] <= res["value"] <= s["high"] + (s.get("step") or 0)


def test_an_interrupted_samplesize_without_store_says_nothing_was_saved(tmp_path, capsys):
    # Ctrl-C during the search, simulated by a user analysis that raises KeyboardInterrupt after 300 replicates
    (tmp_path / "stopper.py").write_text(
        "from scipy import stats\n"
        "CALLS = [0]\n"
        "def welch(data):\n"
        "    CALLS[0] += 1\n"
        "    if CALLS[0] > 300:\n"
        "        raise KeyboardInterrupt\n"
        "    y, a = data['y'], data['arm']\n"
        "    return stats.ttest_ind(y[a == 1], y[a == 0], equal_var=False)\n")
    p = tmp_path / "s.toml"
    # in this process (serial): the analysis counts its calls (a forked worker would count its own)
    p.write_text("[process]\ntype = 'normal_two_arm'\nn = 30\neffect = 0.6\n[analysis]\ntype = 'stopper.py:welch'\n"
                 "[execution]\nbackend = 'serial'\n")
    rc = main(["samplesize", str(p), "--jobs", "1", "-q", "--seed", "1", "--range", "10:150"])
    err = capsys.readouterr().err.strip()
    assert rc == 130
    assert err.startswith("simpower: error: interrupted; nothing was saved") and "--store" in err
    assert "are in the store" not in err and len(err.splitlines()) == 1
