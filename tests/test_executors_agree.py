"""Every batch path gives the same records with one job, two loky workers, a dask cluster and after a resume.

The engine's promise (simpower.engine.chunk): a chunk's numbers depend only on
(seed, point key, chunk index, chunk size), never on where the chunk ran. The
batch paths added for messy data (masks, dropout, GEE, Cox, NB, GLMM, MMRM,
resampling, ...) must keep it: an analysis that looked at anything outside its
chunk (a global cache filled in another order, a worker's state, the number of
chunks) would break it. Each analysis/process pairing of the conformance kit
whose analysis has a batch path runs here in three chunks four ways, and every
record field must be equal bit for bit (common practice for simulation
software: Morris, White & Crowther 2019, section on reproducibility).
"""

from __future__ import annotations

import numpy as np
import pytest

import simpower as sp
from simpower.registry import build

from test_conformance import PAIRS, _aid

distributed = pytest.importorskip("distributed")

REPS, CHUNK, SEED = 60, 20, 20261202


def _batch_pairs():
    out = []
    for p in PAIRS:
        an, proc = p[0], p[1]
        if build("analysis", an).has_batch:
            out.append(pytest.param(an, proc, id=_aid(*p)))
    return out


def _columns(res):
    """Every record field of every analysis, as bytes (numbers) or text (the rest)."""
    out = {}
    for name, rec in sorted(res.records.items()):
        frame = rec.frame()
        for col in frame.columns:
            values = frame[col].to_numpy()
            out[(name, col)] = (np.ascontiguousarray(values).tobytes() if values.dtype.kind in "biufc"
                                else repr(list(frame[col])))
    return out


@pytest.fixture(scope="module")
def cluster():
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False, host="127.0.0.1",
                                  protocol="tcp", dashboard_address=None) as c:
        yield c


@pytest.mark.slow
@pytest.mark.parametrize("an,proc", _batch_pairs())
def test_jobs_dask_and_resume_give_the_same_records(an, proc, cluster, tmp_path):
    def scenario():
        return sp.Scenario(build("process", {"type": proc[0], **proc[1]}), build("analysis", an))

    ref = sp.run(scenario(), reps=REPS, seed=SEED, n_jobs=1, chunk_size=CHUNK, progress=False)
    assert all(p == "batch" for p in ref.paths.values()), ref.paths
    want = _columns(ref)
    two = sp.run(scenario(), reps=REPS, seed=SEED, n_jobs=2, backend="loky", chunk_size=CHUNK, progress=False)
    assert _columns(two) == want, "loky, 2 jobs"
    on_dask = sp.run(scenario(), reps=REPS, seed=SEED, backend="dask", address=cluster.scheduler_address,
                     chunk_size=CHUNK, progress=False)
    assert _columns(on_dask) == want, "dask"
    store = tmp_path / "run.store"
    sp.run(scenario(), reps=2 * CHUNK, seed=SEED, n_jobs=1, chunk_size=CHUNK, store=store, progress=False)
    grown = sp.run(scenario(), reps=REPS, seed=SEED, n_jobs=1, chunk_size=CHUNK, store=store, progress=False)
    assert _columns(grown) == want, "resumed from a store holding the first two chunks"
