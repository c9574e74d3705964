"""A replicate that kills its process (segfault, os._exit) is a failure, not the end of the run.

The crashing analyses decide from the data ("the first observation exceeds
z_0.99"), so the replicates that must crash are known independently: an
analysis that reports the first observation of the same simulated data sets
(common random numbers) counts them, and their number is also checked against
Binomial(R, 0.01) within 4 SD (common practice for Monte Carlo checks). The
same analysis with a Python exception in place of the crash gives the
reference records: redoing a chunk after a crash must reproduce every other
replicate's data and results bit for bit.
"""

from __future__ import annotations

import math
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest

import simpower as sp
from simpower.engine import guard

pytestmark = pytest.mark.skipif(not guard.available(), reason="crash isolation runs on Linux")

# standard normal quantile z_0.99 (Abramowitz & Stegun 1964, Table 26.5; scipy.stats.norm.ppf agrees)
Z99 = 2.3263478740408408


def first_obs(data):
    """The first observation as the estimate (the independent count of crashing replicates)."""
    return {"pvalue": 0.5, "estimate": float(np.asarray(data["y"])[0])}


def _diff(data):
    y, arm = np.asarray(data["y"]), np.asarray(data["arm"])
    d = float(y[arm == 1].mean() - y[arm == 0].mean())
    return {"pvalue": float(min(1.0, abs(d))), "estimate": d}


def segv_high(data):
    if np.asarray(data["y"])[0] > Z99:
        os.kill(os.getpid(), signal.SIGSEGV)
    return _diff(data)


def exit_low(data):
    if np.asarray(data["y"])[0] < -Z99:
        os._exit(3)
    return _diff(data)


def raise_high(data):
    if np.asarray(data["y"])[0] > Z99:
        raise RuntimeError("would crash")
    return _diff(data)


def _scenario(**analyses):
    return sp.Scenario(sp.NormalTwoArm(n=5), analyses={"first": first_obs, **analyses})


def _same(a, b, fields=("pvalue", "estimate", "status")):
    for name in a.records:
        ra, rb = a.records[name], b.records[name]
        for f in fields:
            assert getattr(ra, f).tobytes() == getattr(rb, f).tobytes(), (name, f)
        assert ra.causes == rb.causes and ra.messages == rb.messages, name


@pytest.fixture(scope="module")
def crash_runs():
    sc = _scenario(segv=segv_high, exit=exit_low)
    return {jobs: sp.run(sc, reps=1200, seed=11, n_jobs=jobs, chunk_size=150, point=7) for jobs in (1, 2)}


def test_crashing_replicates_are_counted_and_the_run_finishes(crash_runs):
    res = crash_runs[1]
    y0 = res.records["first"].estimate
    high, low = int((y0 > Z99).sum()), int((y0 < -Z99).sum())
    assert high >= 3 and low >= 3  # the seed gives crashes of both kinds
    assert res.summaries["segv"]["failures"] == {"crash": high}
    assert res.summaries["exit"]["failures"] == {"crash": low}
    assert np.array_equal(res.records["segv"].failure == "crash", y0 > Z99)
    # Binomial(R, 0.01): within 4 SD
    for k in (high, low):
        assert abs(k - 1200 * 0.01) < 4 * math.sqrt(1200 * 0.01 * 0.99)
    i = int(np.argmax(y0 > Z99))
    msg = res.records["segv"].messages["crash"]
    assert msg.startswith(f"analysis `segv` killed its process (SIGSEGV) on replicate {i % 150} of chunk {i // 150}")
    assert res.summaries["first"]["n_failed"] == 0


def test_os_exit_in_an_analysis_is_a_crash_with_its_exit_status():
    res = sp.run(_scenario(exit=exit_low), reps=400, seed=2, n_jobs=1, chunk_size=100)
    low = res.records["first"].estimate < -Z99
    assert low.any()
    assert np.array_equal(res.records["exit"].failure == "crash", low)
    assert "analysis `exit` killed its process (exit status 3)" in res.records["exit"].messages["crash"]


def test_crash_records_are_the_same_for_any_number_of_jobs(crash_runs):
    _same(crash_runs[1], crash_runs[2])


def test_a_crash_gives_the_records_of_a_replicate_that_raised(crash_runs):
    """Redoing a chunk reproduces every other replicate: same data, same results, same positions."""
    ref = sp.run(_scenario(segv=raise_high), reps=1200, seed=11, n_jobs=1, chunk_size=150, backend="serial",
                 point=7)
    res = crash_runs[2]
    for f in ("pvalue", "estimate"):
        assert res.records["segv"].__getattribute__(f).tobytes() == ref.records["segv"].__getattribute__(f).tobytes()
    assert np.array_equal(res.records["segv"].status > 0, ref.records["segv"].status > 0)
    assert res.records["first"].estimate.tobytes() == ref.records["first"].estimate.tobytes()


def test_a_dying_loky_worker_hands_its_chunks_to_the_helper(crash_runs):
    res = sp.run(_scenario(segv=segv_high, exit=exit_low), reps=1200, seed=11, n_jobs=2, chunk_size=150, point=7,
                 backend="loky")
    _same(res, crash_runs[1])


def test_a_draw_that_crashes_is_a_process_crash():
    def shaky(rng, n=4):
        y = rng.standard_normal(2 * n)
        if y[0] > Z99:
            os.kill(os.getpid(), signal.SIGSEGV)
        return {"y": y, "arm": np.repeat([0, 1], n)}

    # the same stream drawn here: the first crashing draw of each chunk ends that chunk's replicates
    # (the later ones would follow its random numbers)
    # (a crashing draw costs the rest of its chunk: no failure threshold, which chunks finish first varies)
    res = sp.run(sp.Scenario(shaky, analyses={"d": _diff}), reps=600, seed=4, n_jobs=2, chunk_size=100,
                 max_failure_rate=1)
    expected = np.zeros(600, bool)
    for k in range(6):
        rng = np.random.default_rng(sp.engine.chunk_seed(4, res.point, k))
        for i in range(100):
            if rng.standard_normal(8)[0] > Z99:
                expected[k * 100 + i:(k + 1) * 100] = True
                break
    assert expected.any()
    assert np.array_equal(res.records["d"].failure == "process:crash", expected)
    assert "drawing replicate" in res.records["d"].messages["process:crash"]


def test_too_many_crashes_stop_the_run_with_one_line():
    def always(data):
        os.kill(os.getpid(), signal.SIGSEGV)

    with pytest.raises(sp.RunError, match=r"analysis `always` killed its process .* max_failure_rate 0.1"):
        sp.run(sp.Scenario(sp.NormalTwoArm(n=5), analyses={"always": always}), reps=40, seed=1, n_jobs=1,
               chunk_size=20, max_failure_rate=0.1)


def _descendants(pid: int) -> set[int]:
    """PIDs below ``pid``, read from /proc (psutil may be missing)."""
    parents = {}
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            try:
                stat = (entry / "stat").read_text()
            except OSError:
                continue
            parents[int(entry.name)] = int(stat.rsplit(")", 1)[1].split()[1])
    out, todo = set(), [pid]
    while todo:
        p = todo.pop()
        kids = [c for c, pp in parents.items() if pp == p]
        out.update(kids)
        todo.extend(kids)
    return out


def _alive(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return False
    return state != "Z"


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
@pytest.mark.parametrize("backend", ["None", "'loky'"])
def test_workers_exit_when_the_main_process_is_killed(tmp_path, backend):
    script = tmp_path / "victim.py"
    script.write_text(textwrap.dedent(f"""
        import os, time, numpy as np, simpower as sp
        def slow(data):
            with open("busy", "a") as f:
                f.write(f"{{os.getpid()}}\\n")
            time.sleep(0.05)
            return 0.5
        sc = sp.Scenario(sp.NormalTwoArm(n=5), analyses={{"slow": slow}})
        sp.run(sc, reps=100000, seed=1, n_jobs=2, chunk_size=10, backend={backend})
    """))
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(p for p in sys.path if p)}
    proc = subprocess.Popen([sys.executable, str(script)], cwd=tmp_path, env=env, stderr=subprocess.DEVNULL)
    try:
        busy = tmp_path / "busy"
        for _ in range(1200):  # until two workers run the analysis (at most two minutes)
            if busy.exists() and len(set(busy.read_text().split())) >= 2 or proc.poll() is not None:
                break
            time.sleep(0.1)
        kids = {k for k in _descendants(proc.pid) if _alive(k)}
        workers = {int(p) for p in busy.read_text().split()}
        assert proc.poll() is None and len(workers) >= 2 and workers <= kids, (workers, kids)
    finally:
        proc.kill()
        proc.wait()
    for _ in range(300):  # the watchdogs poll every second
        left = {k for k in kids if _alive(k)}
        if not left:
            break
        time.sleep(0.1)
    assert not left, f"processes left behind: {left}"


@pytest.mark.slow
def test_a_task_that_kills_dask_workers_is_redone_by_the_helper(crash_runs):
    distributed = pytest.importorskip("distributed")
    import dask

    # no retries on other workers: the first crash gives KilledWorker (dask's default retries 3 times)
    with dask.config.set({"distributed.scheduler.allowed-failures": 0}):
        with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                      dashboard_address=None) as cluster:
            res = sp.run(_scenario(segv=segv_high, exit=exit_low), reps=1200, seed=11, chunk_size=150, point=7,
                         backend="dask", address=cluster.scheduler_address)
    _same(res, crash_runs[1])


def test_a_scenario_that_cannot_be_sent_runs_here_with_a_warning():
    import threading

    lock = threading.Lock()  # cannot be pickled: the analysis cannot go to a worker process

    def locked(data):
        with lock:
            return first_obs(data)

    with pytest.warns(RuntimeWarning, match="cannot be sent to a worker process"):
        res = sp.run(_scenario(locked=locked), reps=200, seed=3, n_jobs=1, point=7)
    assert res.records["locked"].estimate.tobytes() == res.records["first"].estimate.tobytes()


def test_workers_follow_the_import_path_and_directory_of_the_main_process(tmp_path, monkeypatch):
    sp.run(_scenario(), reps=20, seed=1, n_jobs=1, point=7)  # the helper is running from here on
    (tmp_path / "late_module.py").write_text(textwrap.dedent("""
        import numpy as np
        def reads_here(data):
            with open("offset.txt") as f:
                return {"pvalue": 0.5, "estimate": float(np.asarray(data["y"])[0]) + float(f.read())}
    """))
    (tmp_path / "offset.txt").write_text("10")
    monkeypatch.syspath_prepend(str(tmp_path))
    monkeypatch.chdir(tmp_path)
    import late_module

    res = sp.run(_scenario(late=late_module.reads_here), reps=100, seed=1, n_jobs=1, point=7)
    assert np.array_equal(res.records["late"].estimate, res.records["first"].estimate + 10)
