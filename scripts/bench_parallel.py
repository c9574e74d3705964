"""jobs = 2 against jobs = 1 for a per-replicate (non-vectorised) scenario.

The scenario draws each replicate with a user function (no batch path, so
chunks of 50 replicates, LOOP_CHUNK) and analyses it with two scipy tests per replicate.
Workers are warmed up first (loky starts its processes once and reuses them);
each configuration is timed over several interleaved rounds and the median
reported, with the numbers checked identical across jobs.

    python scripts/bench_parallel.py --quick   # while others use the machine
    python scripts/bench_parallel.py           # on an idle machine, for final figures

Target (issue 5): on a 2-core machine, jobs = 2 at least 1.7 times as fast as jobs = 1.
"""

from __future__ import annotations

import argparse
import os
import statistics
import time

import numpy as np

import simpower as sp


def two_arm(rng, n=40, effect=0.4):
    y = rng.standard_normal(2 * n)
    y[n:] += effect
    return {"y": y, "arm": np.repeat([0, 1], n)}


def rank_and_t(data):
    from scipy import stats

    y, arm = data["y"], data["arm"]
    a, b = y[arm == 1], y[arm == 0]
    u = stats.mannwhitneyu(a, b)
    t = stats.ttest_ind(a, b)
    return {"pvalue": float(max(u.pvalue, t.pvalue)), "estimate": float(a.mean() - b.mean())}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--reps", type=int, default=20_000)
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--quick", action="store_true", help="4,000 replicates, 2 rounds")
    a = ap.parse_args()
    reps, rounds = (4_000, 2) if a.quick else (a.reps, a.rounds)
    sc = sp.Scenario(two_arm, analyses={"rank_and_t": rank_and_t})
    sp.run(sc, reps=800, seed=0, n_jobs=2, progress=False)  # start and warm the loky workers
    times = {1: [], 2: []}
    ref = None
    for _ in range(rounds):
        for jobs in (1, 2):
            t = time.perf_counter()
            res = sp.run(sc, reps=reps, seed=1, n_jobs=jobs, progress=False)
            times[jobs].append(time.perf_counter() - t)
            ref = res.pvalues if ref is None else ref
            assert res.pvalues.tobytes() == ref.tobytes(), "jobs changed the numbers"
    t1, t2 = statistics.median(times[1]), statistics.median(times[2])
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"per-replicate scenario (user process + Mann-Whitney and t per replicate), {reps:,} replicates, "
          f"chunk {res.chunk_size}, {os.cpu_count()} cores, load average {load:.2f}, median of {rounds} rounds")
    print(f"  jobs = 1: {t1:7.2f} s   ({1e6 * t1 / reps:.0f} us per replicate)")
    print(f"  jobs = 2: {t2:7.2f} s   speed-up {t1 / t2:.2f}x (target >= 1.7x on an idle 2-core machine)")


if __name__ == "__main__":
    main()
