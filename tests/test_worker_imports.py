"""What a fresh worker process imports when it runs a chunk.

A loky worker unpickles the engine's task (``simpower.engine.chunk.run_chunk`` and the scenario) and runs
it; it should import only the modules of the components that chunk uses (DEVELOPERS.md, "The engine":
what a worker imports), never the planning, report or command-line layers nor the heavy libraries of
analyses the chunk does not run. Checked in a fresh interpreter (its own worker pool, started the way the
engine starts it: :func:`simpower.engine.guard.worker_init`, the engine's thread limits) by reading
``sys.modules`` inside the worker. A per-replicate ``ols`` chunk in the same worker then shows the check
can fail: it imports statsmodels there.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent

#: modules a worker running a batch t-test chunk must not import (prefix match: the package and its parts)
NOT_IN_A_TTEST_WORKER = ("statsmodels", "matplotlib", "pandas", "pandas.plotting", "dask", "distributed",
                         "numba", "simpower.report", "simpower.planning", "simpower.cli", "simpower.engine.runner",
                         "simpower.engine.store", "simpower.result")

SCRIPT = r"""
import json, os, sys

from joblib.externals.loky import get_reusable_executor

import simpower as sp
from simpower.engine.chunk import run_chunk
from simpower.engine.executor import _worker_env
from simpower.engine.guard import worker_init


def modules():  # defined in __main__: cloudpickle sends it by value, so the worker imports nothing for it
    import sys

    return sorted(sys.modules)


# the engine's task for chunk 0 of a two-arm normal scenario with Student's and Welch's t (batch paths),
# sent to one fresh worker started as the engine starts its pool (simpower.engine.executor._loky_results)
scenario = sp.load_scenario(sys.argv[1]).scenario
pool = get_reusable_executor(max_workers=1, timeout=60, initializer=worker_init, initargs=(os.getpid(),),
                             env=_worker_env(1))
out = pool.submit(run_chunk, scenario, 20261202, 0, 0, 2000).result()
after_ttest = pool.submit(modules).result()
# the control: the same worker runs two replicates of a per-replicate statsmodels fit (ols with a reference
# level the batch path does not take)
ols = sp.Scenario(sp.NormalTwoArm(n=10, effect=0.5),
                  analyses={"ols": sp.OLS(formula="y ~ C(arm, Treatment(reference=1))",
                                          term="C(arm, Treatment(reference=1))[T.0]")})
control = pool.submit(run_chunk, ols, 1, 0, 0, 2).result()
after_ols = pool.submit(modules).result()
print(json.dumps({"paths": out.paths, "worker": out.worker, "here": os.getpid(), "control_paths": control.paths,
                  "control_status": control.records["ols"]["status"].tolist(),
                  "after_ttest": after_ttest, "after_ols": after_ols}))
"""


def _imported(mods: list[str], name: str) -> bool:
    return any(m == name or m.startswith(name + ".") for m in mods)


def test_a_fresh_worker_running_a_batch_ttest_chunk_imports_only_what_the_chunk_needs():
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))
    proc = subprocess.run([sys.executable, "-c", SCRIPT, str(ROOT / "scenarios" / "two_arm_normal.toml")],
                          capture_output=True, text=True, env=env, cwd=ROOT, timeout=300)
    assert proc.returncode == 0, proc.stderr[-2000:]
    got = json.loads(proc.stdout.strip().splitlines()[-1])
    # the chunk ran in another process, on the batch paths
    assert int(got["worker"].rsplit(":", 1)[1]) != got["here"]
    assert got["paths"] == {"student": "batch", "welch": "batch"}
    mods = got["after_ttest"]
    # what the chunk needs is there (the check reads the worker's real module table) ...
    for needed in ("numpy", "scipy.special", "simpower.engine.chunk", "simpower.engine.guard",
                   "simpower.processes.normal", "simpower.analyses.ttests", "simpower.summaries"):
        assert _imported(mods, needed), f"the worker lacks {needed}"
    # ... and nothing it does not use
    heavy = [name for name in NOT_IN_A_TTEST_WORKER if _imported(mods, name)]
    assert heavy == [], f"a worker running a batch t-test chunk imported {heavy}"
    # other analyses' modules are not imported either (the scenario names only the t-tests)
    others = sorted(m for m in mods if m.startswith("simpower.analyses.")
                    and m not in ("simpower.analyses.base", "simpower.analyses.numeric", "simpower.analyses.ttests"))
    assert others == []
    # the control: a per-replicate statsmodels chunk in the same worker does import statsmodels
    assert got["control_paths"] == {"ols": "per-replicate"} and got["control_status"] == [0, 0]
    assert _imported(got["after_ols"], "statsmodels") and not _imported(mods, "statsmodels")
