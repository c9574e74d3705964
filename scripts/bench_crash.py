"""What crash isolation costs: a user analysis run in this process, in the helper's workers, and with 1% crashes.

    python scripts/bench_crash.py [--reps 4000]

Prints wall-clock seconds of the same scenario (a two-arm design with n = 20 per arm and a small
user analysis) run with ``backend='serial'`` (this process, no isolation), with the default
executor at ``n_jobs=1`` (the helper's forked workers: the first run includes starting the
helper), and with an analysis that segfaults on about 1% of replicates, at 1 and 2 jobs.
"""

from __future__ import annotations

import argparse
import os
import signal
import time

import numpy as np

import simpower as sp

Z99 = 2.3263478740408408  # standard normal 0.99 quantile


def diff(data):
    y, arm = np.asarray(data["y"]), np.asarray(data["arm"])
    d = float(y[arm == 1].mean() - y[arm == 0].mean())
    return {"pvalue": min(1.0, abs(d)), "estimate": d}


def segv_1pct(data):
    if np.asarray(data["y"])[0] > Z99:
        os.kill(os.getpid(), signal.SIGSEGV)
    return diff(data)


def timed(label, **kw):
    t = time.perf_counter()
    res = sp.run(**kw)
    print(f"{label:<42} {time.perf_counter() - t:6.2f} s   failures {res.summaries[next(iter(res.summaries))]['failures']}")
    return res


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--reps", type=int, default=4000)
    reps = ap.parse_args().reps
    plain = sp.Scenario(sp.NormalTwoArm(n=20), analyses={"d": diff})
    crashy = sp.Scenario(sp.NormalTwoArm(n=20), analyses={"d": segv_1pct})
    common = dict(reps=reps, seed=1, point=0)
    timed("in this process (backend='serial')", scenario=plain, n_jobs=1, backend="serial", **common)
    timed("helper, n_jobs=1, first run (starts it)", scenario=plain, n_jobs=1, **common)
    timed("helper, n_jobs=1, second run", scenario=plain, n_jobs=1, **common)
    a = timed("helper, n_jobs=1, 1% of replicates segfault", scenario=crashy, n_jobs=1, **common)
    b = timed("helper, n_jobs=2, 1% of replicates segfault", scenario=crashy, n_jobs=2, **common)
    print("records identical for 1 and 2 jobs:",
          a.records["d"].status.tobytes() == b.records["d"].status.tobytes()
          and a.records["d"].pvalue.tobytes() == b.records["d"].pvalue.tobytes())


if __name__ == "__main__":
    main()
