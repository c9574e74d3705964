"""Crash-safe resume: kill -9 or Ctrl-C part-way, rerun, and get the uninterrupted numbers bit for bit.

The run happens in a child process (the command line, as a planner would
start it); the reference is the same scenario run here without a store. The
scenario draws per replicate with a short pause so the child is caught
part-way; the pause does not touch the random numbers.
"""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

import simpower as sp
from simpower.engine.store import open_store
from simpower.scenario_files import load

HELPERS = '''
import time
import numpy as np

def slow_two_arm(rng, n=8, effect=0.5, pause=0.004):
    time.sleep(pause)
    y = rng.standard_normal(2 * n)
    y[n:] += effect
    return {"y": y, "arm": np.repeat([0, 1], n)}

def picky(data):
    y = np.asarray(data["y"])
    if y[0] > 1.6448536269514722:
        raise ValueError("first observation above z_0.95")
    if y[1] < -2.3263478740408408:
        raise ArithmeticError("second observation below z_0.01")
    return {"pvalue": float(min(1.0, abs(y.mean()))), "estimate": float(y.mean())}
'''

SCENARIO = '''
seed = 77
reps = 600
chunk_size = 12
[process]
type = "helpers.py:slow_two_arm"
n = 8
pause = 0.004
[analyses.student]
type = "t_test"
[analyses.picky]
type = "helpers.py:picky"
'''
CHUNKS = 50


@pytest.fixture
def project(tmp_path):
    (tmp_path / "helpers.py").write_text(HELPERS)
    (tmp_path / "s.toml").write_text(SCENARIO)
    return tmp_path


def _default_sigint():
    # A shell that starts a job in the background (as CI runners may) sets SIGINT to "ignore",
    # and children inherit that: Python then installs no KeyboardInterrupt handler. The child
    # stands for a planner's terminal session, so give it the default disposition back.
    signal.signal(signal.SIGINT, signal.SIG_DFL)


def _cli(project, store, *extra):
    cmd = [sys.executable, "-m", "simpower.cli.main", "run", "s.toml", "--store", store, "-q", *extra]
    return subprocess.Popen(cmd, cwd=project, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            preexec_fn=_default_sigint)


def _stored_chunks(path: Path) -> int:
    if not path.exists():
        return 0
    try:
        con = sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=1)
        try:
            return con.execute("SELECT count(*) FROM chunks").fetchone()[0]
        finally:
            con.close()
    except sqlite3.Error:
        return 0


def _wait_for_chunks(proc, path: Path, k: int, limit: float = 60.0) -> int:
    t0 = time.time()
    while time.time() - t0 < limit and proc.poll() is None:
        n = _stored_chunks(path)
        if n >= k:
            return n
        time.sleep(0.01)
    raise AssertionError(f"child did not store {k} chunks in time (rc={proc.poll()})")


def _reference(project):
    sf = load(project / "s.toml")
    return sp.run(sf.scenario, reps=600, seed=77, n_jobs=1, chunk_size=12)


def _assert_identical(records, ref):
    for name, r in ref.records.items():
        mine = records[name]
        for f in ("pvalue", "estimate", "se", "ci_low", "ci_high", "status"):
            assert getattr(mine, f).tobytes() == getattr(r, f).tobytes(), (name, f)
        assert mine.causes == r.causes and mine.messages == r.messages


def test_sigkill_part_way_then_resume_is_bit_identical(project):
    store = project / "run.sqlite"
    proc = _cli(project, "run.sqlite", "--jobs", "1")
    _wait_for_chunks(proc, store, 6)
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=30)
    assert proc.returncode == -signal.SIGKILL
    with open_store(store) as st:  # a valid store after kill -9
        kept = len(st.done_chunks())
    assert 6 <= kept < CHUNKS, kept
    rerun = _cli(project, "run.sqlite", "--jobs", "2")
    out, err = rerun.communicate(timeout=240)
    assert rerun.returncode == 0, err
    with open_store(store) as st:
        assert len(st.done_chunks()) == CHUNKS
        records = st.records()
        workers = st.chunks()["worker"].nunique()
    assert workers >= 2  # the killed child, then the resumed run's workers
    ref = _reference(project)
    _assert_identical(records, ref)
    assert set(ref.records["picky"].causes) == {"error:ValueError", "error:ArithmeticError"}
    # the summary printed by the resumed command is the uninterrupted one
    assert f"({ref.summaries['student']['rejections']} of 600 usable replicates rejected)" in out


def test_ctrl_c_saves_finished_chunks_and_says_how_to_resume(project, monkeypatch, capsys):
    store = project / "int.sqlite"
    proc = _cli(project, "int.sqlite", "--jobs", "1")
    _wait_for_chunks(proc, store, 4)
    proc.send_signal(signal.SIGINT)
    out, err = proc.communicate(timeout=30)
    assert proc.returncode == 130, err
    # the scenario names user code, which `simpower resume` does not run: the hint is the command itself
    assert "to resume, run the same command again." in err and "simpower resume" not in err
    assert len(err.strip().splitlines()) == 1
    with open_store(store) as st:
        kept = len(st.done_chunks())
    assert 4 <= kept < CHUNKS
    from simpower.cli.main import main

    here = os.getcwd()
    try:
        os.chdir(project)
        # the scenario names user code (helpers.py): a store is data, so `resume` refuses in one line
        # and writes nothing; the original command continues the run instead
        before = (store.stat().st_size, store.stat().st_mtime_ns)
        assert main(["resume", "int.sqlite"]) == 2
        err = capsys.readouterr().err.strip()
        assert len(err.splitlines()) == 1 and "names user code 'helpers.py:" in err
        assert "simpower run s.toml --store int.sqlite" in err
        with open_store(store) as st:
            assert len(st.done_chunks()) == kept
        assert (store.stat().st_size, store.stat().st_mtime_ns) == before
        monkeypatch.setattr(sys, "argv", ["simpower", "run", "s.toml", "--store", "int.sqlite", "-q", "--jobs", "1"])
        assert main(["run", "s.toml", "--store", "int.sqlite", "-q", "--jobs", "1"]) == 0
    finally:
        os.chdir(here)
    with open_store(store) as st:
        _assert_identical(st.records(), _reference(project))
        plan = st.plan
    printed = capsys.readouterr().out
    assert "To reproduce these numbers exactly: simpower run s.toml --store int.sqlite" in printed
    # the store keeps a data-only plan: no command line, no folder
    assert plan["command"] == "run" and plan["study"]["scenario"]["process"]["type"] == "helpers.py:slow_two_arm"
    with open_store(store) as st:
        assert not {"command", "cwd"} & set(st.meta())


def test_interrupt_in_python_keeps_chunks(project, monkeypatch):
    """KeyboardInterrupt inside the run: RunInterrupted, chunks committed, the same call resumes."""
    from simpower.engine import RunInterrupted
    from simpower.engine import runner

    sf = load(project / "s.toml")
    sc = sf.scenario.with_params(pause=0.0)
    store = project / "py.sqlite"
    real = runner.run_chunk
    calls = {"n": 0}

    def flaky(*args):
        calls["n"] += 1
        if calls["n"] == 9:
            raise KeyboardInterrupt
        return real(*args)

    monkeypatch.setattr(runner, "run_chunk", flaky)
    with pytest.raises(RunInterrupted, match="run the same call again"):  # serial: chunks run in this process
        sp.run(sc, reps=600, seed=77, n_jobs=1, chunk_size=12, store=store, backend="serial")
    with open_store(store) as st:
        assert len(st.done_chunks()) == 8
    monkeypatch.setattr(runner, "run_chunk", real)
    resumed = sp.run(sc, reps=600, seed=77, n_jobs=1, chunk_size=12, store=store)
    ref = sp.run(sc, reps=600, seed=77, n_jobs=1, chunk_size=12)
    _assert_identical(resumed.records, ref)
    assert np.array_equal(resumed.pvalues, ref.pvalues)
