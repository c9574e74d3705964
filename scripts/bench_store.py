"""What writing the run store costs, relative to the run time of a t-test scenario.

The t-test scenario is the worst case for the store: a vectorised chunk of
2000 replicates takes a few milliseconds, while its records (5 float64 and
one int16 per replicate) still have to reach the disk. Configurations, run
interleaved over several rounds (medians reported):

* no store;
* the run store as shipped: one blob per chunk and analysis (the arrays' raw
  bytes with their layout and a CRC), one transaction per chunk, committed on
  a writer thread, the WAL checkpointed by that thread every ~1.6 MB;
* the same, committed in the run's own thread (``background=False``);
* an alternative layout, one SQLite row per replicate (a ChunkStore written
  here for the comparison).

    python scripts/bench_store.py --quick      # while others use the machine
    python scripts/bench_store.py              # on an idle machine, for final figures

Target (issue 5): the shipped store costs under 5% of the run time.
"""

from __future__ import annotations

import argparse
import gc
import os
import sqlite3
import statistics
import tempfile
import time

import simpower as sp
from simpower.engine.store import RunStore


class RowPerReplicate:
    """A ChunkStore keeping one row per replicate and analysis (for comparison only)."""

    def __init__(self, path):
        self.conn = sqlite3.connect(path, isolation_level=None)
        self.conn.execute("PRAGMA journal_mode=WAL")
        self.conn.execute("PRAGMA synchronous=NORMAL")
        self.conn.execute("CREATE TABLE IF NOT EXISTS reps (point INT, chunk INT, analysis TEXT, i INT, pvalue REAL, "
                          "estimate REAL, se REAL, ci_low REAL, ci_high REAL, status INT)")
        self.conn.execute("CREATE TABLE IF NOT EXISTS chunks (point INT, chunk INT, size INT, PRIMARY KEY (point, chunk))")

    def load(self, point, chunk, size):
        return None

    def save(self, out):
        c = self.conn
        c.execute("BEGIN")
        for name, r in out.records.items():
            cols = [r[f].tolist() for f in ("pvalue", "estimate", "se", "ci_low", "ci_high", "status")]
            c.executemany("INSERT INTO reps VALUES (?,?,?,?,?,?,?,?,?,?)",
                          zip([out.point] * out.size, [out.chunk] * out.size, [name] * out.size, range(out.size), *cols))
        c.execute("INSERT INTO chunks VALUES (?,?,?)", (out.point, out.chunk, out.size))
        c.execute("COMMIT")

    def close(self):
        self.conn.close()


def timed(sc, reps, jobs, make_store):
    with tempfile.TemporaryDirectory() as d:
        store = make_store(os.path.join(d, "run.sqlite")) if make_store else None
        gc.collect()  # the previous result's spooled records are removed now, not during this run
        os.sync()     # and the disk writes of earlier runs do not land in this one's time
        t = time.perf_counter()
        res = sp.run(sc, reps=reps, seed=1, n_jobs=jobs, store=store, progress=False)
        if store is not None:
            store.close()  # includes the final commit and WAL checkpoint
        return time.perf_counter() - t, res


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--reps", type=int, default=400_000)
    ap.add_argument("--rounds", type=int, default=5)
    ap.add_argument("--jobs", type=int, default=1)
    ap.add_argument("--quick", action="store_true", help="100,000 replicates, 3 rounds")
    ap.add_argument("--no-rows", action="store_true", help="leave out the one-row-per-replicate layout")
    a = ap.parse_args()
    reps, rounds = (100_000, 3) if a.quick else (a.reps, a.rounds)
    sc = sp.Scenario(sp.NormalTwoArm(n=64, effect=0.5), sp.TTest())
    configs = {
        "no store": None,
        "run store (writer thread)": lambda p: RunStore(p),
        "run store (same thread)": lambda p: RunStore(p, background=False),
    }
    if not a.no_rows:
        configs["one row per replicate"] = RowPerReplicate
    timed(sc, 20_000, a.jobs, None)  # warm up imports and workers
    times = {k: [] for k in configs}
    ref = None
    for _ in range(rounds):
        for label, make in configs.items():
            sec, res = timed(sc, reps, a.jobs, make)
            times[label].append(sec)
            got = res.summaries  # the same numbers with and without a store (records may be streamed)
            ref = got if ref is None else ref
            assert got == ref
    base = statistics.median(times["no store"])
    paired = {k: statistics.median((t - b) / b for t, b in zip(ts, times["no store"])) for k, ts in times.items()}
    print(f"t-test scenario (two arms of 64), {reps:,} replicates, chunk 2000, n_jobs={a.jobs}, "
          f"median of {rounds} rounds")
    for label, ts in times.items():
        med = statistics.median(ts)
        extra = "" if label == "no store" else (f"  cost {100 * (med - base) / base:+6.1f}% of the run time "
                                                 f"(median of the rounds' own ratios {100 * paired[label]:+.1f}%)")
        print(f"  {label:28s} {med:7.3f} s{extra}")


if __name__ == "__main__":
    main()
