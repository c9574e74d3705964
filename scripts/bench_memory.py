"""Peak memory (RSS) of a large t-test run: streaming summaries vs per-replicate records in memory.

Each configuration runs in a fresh child process and reports its peak
resident set size (``resource.getrusage(...).ru_maxrss``). The issue's target:
10 million replicates of a t-test scenario stay under 1 GiB peak.

    python scripts/bench_memory.py            # 10,000,000 replicates (about 30 s per configuration)
    python scripts/bench_memory.py --quick    # 1,000,000 replicates
    python scripts/bench_memory.py --with-store --with-records

Run it on an idle machine for final figures.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile

CHILD = r"""
import json, os, resource, sys, time
import simpower as sp
reps, keep, store = int(sys.argv[1]), json.loads(sys.argv[2]), sys.argv[3] or None
sc = sp.Scenario(sp.NormalTwoArm(n=64, effect=0.5), sp.TTest())
base = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
t = time.perf_counter()
res = sp.run(sc, reps=reps, seed=1, n_jobs=1, keep_records=keep, store=store, progress=False)
print(json.dumps({"seconds": time.perf_counter() - t, "power": res.power, "mcse": res.mcse,
                  "import_mib": base / 1024, "peak_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
                  "store_mb": os.path.getsize(store) / 1e6 if store else 0.0}))
"""


def measure(reps: int, keep, store: str | None) -> dict:
    out = subprocess.run([sys.executable, "-c", CHILD, str(reps), json.dumps(keep), store or ""],
                         capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--reps", type=int, default=10_000_000)
    ap.add_argument("--quick", action="store_true", help="1,000,000 replicates")
    ap.add_argument("--with-store", action="store_true", help="also run with a run store (writes ~42 bytes/rep)")
    ap.add_argument("--with-records", action="store_true", help="also keep per-replicate records in memory")
    a = ap.parse_args()
    reps = 1_000_000 if a.quick else a.reps
    configs = [("default (streaming above 1e6 reps)", None, False)]
    if a.quick:
        configs = [("summaries only (keep_records=False)", False, False)]
    if a.with_records:
        configs.append(("records in memory (keep_records=True)", True, False))
    if a.with_store:
        configs.append(("summaries only + run store", False, True))
    print(f"t-test scenario (two arms of 64, Student t), {reps:,} replicates, n_jobs=1")
    for label, keep, with_store in configs:
        with tempfile.TemporaryDirectory() as d:
            r = measure(reps, keep, f"{d}/run.sqlite" if with_store else None)
        print(f"  {label:40s} peak RSS {r['peak_mib']:7.0f} MiB (after imports {r['import_mib']:.0f} MiB)  "
              f"time {r['seconds']:6.1f} s  power {r['power']:.5f} (MCSE {r['mcse']:.5f})"
              + (f"  store {r['store_mb']:.0f} MB" if with_store else ""))


if __name__ == "__main__":
    main()
