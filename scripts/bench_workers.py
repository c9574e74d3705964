"""Cold worker start-up, side by side for two source trees (this one and, e.g., an older commit's).

What a fresh loky worker costs before its first chunk is done, measured the way the engine starts its
pool (``get_reusable_executor`` with :func:`simpower.engine.guard.worker_init` and the engine's thread
limits), each measurement in a fresh interpreter so that the pool is cold:

* pool start: the executor made and a trivial task returned (the worker process started, joblib and the
  initializer's module imported);
* first chunk: the engine's task for chunk 0 (``run_chunk(scenario, ...)``, the planned chunk size) sent to
  that worker and its result back (unpickling the task imports the modules its components live in, then
  the chunk runs); "in the worker" is the chunk's own time (``ChunkOutput.seconds``), so first chunk minus
  it is what the worker spent getting ready;
* the number of modules in the worker afterwards, and which heavy ones are there.

Two scenarios: the bundled ``scenarios/two_arm_normal.toml`` (Student's and Welch's t, batch paths, 2000
replicates a chunk) and a per-replicate statsmodels fit (``ols`` with a reference level its batch path does
not take, 200 a chunk). Then the wall time of ``simpower run scenarios/two_arm_normal.toml --jobs 1`` and
``--jobs 2`` (the file's 4000 replicates, and ``--reps 200000``) for each tree, checking that the printed
numbers are the same for one and two jobs. Rounds alternate the trees; medians are reported with the
load average (the machine may be shared).

    python scripts/bench_workers.py --other /work/base            # this tree against the one at /work/base
    python scripts/bench_workers.py --other /work/base --rounds 5
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parents[1]
HEAVY = ("statsmodels", "matplotlib", "pandas", "scipy.stats", "dask", "simpower.report", "simpower.planning",
         "simpower.cli")
OLS = {"formula": "y ~ C(arm, Treatment(reference=1))", "term": "C(arm, Treatment(reference=1))[T.0]"}


def modules():  # in __main__ of the child: cloudpickle sends it by value, the worker imports nothing for it
    import sys

    return sorted(sys.modules)


def child(kind: str, scenario_file: str) -> None:
    """One cold measurement in this fresh interpreter (run with PYTHONPATH set to the tree measured)."""
    t0 = time.perf_counter()
    import simpower as sp
    from joblib.externals.loky import get_reusable_executor
    from simpower.engine.chunk import run_chunk
    from simpower.engine.executor import _worker_env
    from simpower.engine.guard import worker_init
    from simpower.engine.runner import default_chunk_size

    if kind == "ttest":
        scenario = sp.load_scenario(scenario_file).scenario
    else:
        scenario = sp.Scenario(sp.NormalTwoArm(n=30, effect=0.5), analyses={"ols": sp.OLS(**OLS)})
    size = default_chunk_size(scenario)
    t1 = time.perf_counter()
    pool = get_reusable_executor(max_workers=1, timeout=60, initializer=worker_init, initargs=(os.getpid(),),
                                 env=_worker_env(1))
    pool.submit(os.getpid).result()
    t2 = time.perf_counter()
    out = pool.submit(run_chunk, scenario, 20261202, 0, 0, size).result()
    t3 = time.perf_counter()
    mods = pool.submit(modules).result()
    print(json.dumps({"main_import": t1 - t0, "pool_start": t2 - t1, "first_chunk": t3 - t2, "in_worker": out.seconds,
                      "size": size, "paths": out.paths, "modules": len(mods),
                      "heavy": [h for h in HEAVY if any(m == h or m.startswith(h + ".") for m in mods)]}))


def _env(tree: Path) -> dict:
    return dict(os.environ, PYTHONPATH=str(tree), MPLBACKEND="Agg")


def measure(tree: Path, kind: str) -> dict:
    proc = subprocess.run([sys.executable, __file__, "--child", kind, str(tree / "scenarios" / "two_arm_normal.toml")],
                          capture_output=True, text=True, env=_env(tree), cwd=tree, check=True)
    return json.loads(proc.stdout.strip().splitlines()[-1])


def cli_run(tree: Path, jobs: int, reps: int | None) -> tuple[float, str]:
    cmd = [sys.executable, "-c", "import sys; from simpower.cli.main import main; sys.exit(main())", "run",
           "scenarios/two_arm_normal.toml", "--jobs", str(jobs), "--quiet"] + (["--reps", str(reps)] if reps else [])
    t = time.perf_counter()
    proc = subprocess.run(cmd, capture_output=True, text=True, env=_env(tree), cwd=tree, check=True)
    return time.perf_counter() - t, proc.stdout


def _numbers(text: str) -> list[str]:
    """The printed result without the line that repeats the command (it names --jobs)."""
    return [line for line in text.splitlines() if "--jobs" not in line]


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--other", type=Path, help="the other source tree (e.g. /work/base)")
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--child", nargs=2, metavar=("KIND", "SCENARIO"), help=argparse.SUPPRESS)
    a = ap.parse_args(argv)
    if a.child:
        child(*a.child)
        return 0
    if a.other is None:
        ap.error("--other TREE is required (the tree to compare with, e.g. /work/base)")
    trees = {"other": a.other.resolve(), "this": HERE}
    load0 = os.getloadavg()
    cold = {(t, k): [] for t in trees for k in ("ttest", "ols")}
    cli = {(t, j, r): [] for t in trees for j in (1, 2) for r in (None, 200_000)}
    printed = {}
    for _ in range(a.rounds):
        for kind in ("ttest", "ols"):
            for t, tree in trees.items():
                cold[t, kind].append(measure(tree, kind))
        for reps in (None, 200_000):
            for jobs in (1, 2):
                for t, tree in trees.items():
                    sec, out = cli_run(tree, jobs, reps)
                    cli[t, jobs, reps].append(sec)
                    printed.setdefault((t, reps), _numbers(out))
                    assert _numbers(out) == printed[t, reps], f"{t}: --jobs {jobs} printed other numbers"
    load1 = os.getloadavg()
    print(f"cold workers and `simpower run`: this tree {trees['this']} against {trees['other']}, "
          f"{os.cpu_count()} cores, median of {a.rounds} rounds; load average {load0[0]:.2f} before, {load1[0]:.2f} after")
    for kind, label in (("ttest", "two_arm_normal.toml (t-tests, batch)"), ("ols", "ols per replicate (statsmodels)")):
        rows = {t: cold[t, kind] for t in trees}
        size = rows["this"][0]["size"]
        print(f"\n{label}, chunk of {size}:                      other     this   this/other")
        for key, name in (("main_import", "main process: import + scenario"), ("pool_start", "pool start (worker up)"),
                          ("first_chunk", "first chunk (unpickle + run)"), ("in_worker", "  of which the chunk itself")):
            o, s = (statistics.median(r[key] for r in rows[t]) for t in ("other", "this"))
            print(f"  {name:<46} {o:7.2f} s {s:7.2f} s   {s / o:5.2f}")
        o, s = (statistics.median(r["pool_start"] + r["first_chunk"] - r["in_worker"] for r in rows[t])
                for t in ("other", "this"))
        print(f"  {'worker ready (pool start + first chunk - chunk)':<46} {o:7.2f} s {s:7.2f} s   {s / o:5.2f}")
        print(f"  {'modules in the worker':<46} {rows['other'][-1]['modules']:7d}   {rows['this'][-1]['modules']:7d}")
        for t in trees:
            print(f"  heavy modules in the worker ({t}): {', '.join(rows[t][-1]['heavy']) or 'none'}; "
                  f"paths {rows[t][-1]['paths']}")
    print("\nsimpower run scenarios/two_arm_normal.toml (wall, new process each time)      other     this")
    for reps in (None, 200_000):
        for jobs in (1, 2):
            o, s = (statistics.median(cli[t, jobs, reps]) for t in ("other", "this"))
            print(f"  {'--reps ' + format(reps, ',') if reps else 'the file reps (4000)':<22} --jobs {jobs}"
                  f"{'':<38} {o:6.2f} s {s:6.2f} s")
        for t in trees:
            one, two = (statistics.median(cli[t, j, reps]) for j in (1, 2))
            print(f"    {t}: --jobs 2 / --jobs 1 wall = {two / one:.2f} (same printed numbers)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
