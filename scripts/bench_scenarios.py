"""Wall and CPU time of `simpower run` on every bundled scenario at its default replicates, jobs 1 and 2.

Each scenario runs in a fresh process (as a user types the command), jobs = 1 and jobs = 2
interleaved, and the median of the rounds is reported with the CPU time of the child process
(user + system, the workers included), and the load average: on a shared machine the wall time
says little and the CPU time is the steadier figure.

    python scripts/bench_scenarios.py                 # every bundled scenario, 1 round
    python scripts/bench_scenarios.py --rounds 3 --only two_arm_normal,skewed_costs

Targets (issue 12): every bundled scenario under 10 s on 2 cores, and none slower with
--jobs 2 than with --jobs 1 (within the noise of the rounds).
"""

from __future__ import annotations

import argparse
import os
import resource
import statistics
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def one(path: Path, jobs: int) -> tuple[float, float, int]:
    """(wall seconds, CPU seconds of the child and its workers, exit code) of one `simpower run`."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, "-m", "simpower.cli.main", "run", str(path), "--jobs", str(jobs), "-q"],
                          cwd=ROOT, capture_output=True, text=True, env={**os.environ, "MPLBACKEND": "Agg"})
    wall = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    if proc.returncode:
        sys.stderr.write(proc.stderr[-500:])
    return wall, cpu, proc.returncode


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--rounds", type=int, default=1)
    ap.add_argument("--only", default="", help="comma-separated scenario stems")
    args = ap.parse_args(argv)
    files = sorted((ROOT / "scenarios").glob("*.toml"))
    if args.only:
        keep = {s.strip() for s in args.only.split(",")}
        files = [f for f in files if f.stem in keep]
    print(f"load average at start: {os.getloadavg()[0]:.2f}; {os.cpu_count()} cores")
    print(f"{'scenario':40s} {'wall j1':>8s} {'cpu j1':>8s} {'wall j2':>8s} {'cpu j2':>8s} {'j1/j2':>6s}")
    worst = 0.0
    for f in files:
        res = {1: [], 2: []}
        for _ in range(args.rounds):
            for jobs in (1, 2):
                res[jobs].append(one(f, jobs))
        w1 = statistics.median(r[0] for r in res[1])
        w2 = statistics.median(r[0] for r in res[2])
        c1 = statistics.median(r[1] for r in res[1])
        c2 = statistics.median(r[1] for r in res[2])
        bad = any(r[2] for r in res[1] + res[2])
        worst = max(worst, w1, w2)
        print(f"{f.stem:40s} {w1:8.1f} {c1:8.1f} {w2:8.1f} {c2:8.1f} {w1 / w2:6.2f}" + ("  FAILED" if bad else ""))
    print(f"slowest wall time: {worst:.1f} s (target < 10 s); load average at end: {os.getloadavg()[0]:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
