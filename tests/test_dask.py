"""Executors agree: serial, loky with 2 jobs, and a dask.distributed LocalCluster give the same numbers.

The promise under test (see simpower.engine.chunk): a chunk's numbers depend
only on (seed, point key, chunk index, chunk size). The reference is the
serial run in this process.
"""

from __future__ import annotations

import numpy as np
import pytest

import simpower as sp

distributed = pytest.importorskip("distributed")


def lumpy(data):
    """A per-replicate user analysis (Mann-Whitney from scipy) that fails on some replicates."""
    from scipy import stats

    y = np.asarray(data["y"])
    if y[0] > 1.6448536269514722:
        raise ValueError("first observation above z_0.95")
    return stats.mannwhitneyu(y[data["arm"] == 1], y[data["arm"] == 0])


def scenario():
    return sp.Scenario(sp.NormalTwoArm(n=12, effect=0.6), analyses={"t": sp.TTest(), "welch": sp.WelchT(),
                                                                     "mw": lumpy})


@pytest.fixture(scope="module")
def cluster():
    # small: 2 workers, 1 thread each, in this process, TCP on the loopback interface
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False, host="127.0.0.1",
                                  protocol="tcp", dashboard_address=None) as c:
        yield c


def _same(a, b):
    for name in a.records:
        ra, rb = a.records[name], b.records[name]
        for f in ("pvalue", "estimate", "se", "ci_low", "ci_high", "status"):
            assert getattr(ra, f).tobytes() == getattr(rb, f).tobytes(), (name, f)
        assert ra.causes == rb.causes and ra.messages == rb.messages


@pytest.fixture(scope="module")
def local():
    return sp.run(scenario(), reps=1500, seed=42, n_jobs=1, chunk_size=100)


def test_dask_cluster_by_address_gives_the_local_pvalues(cluster, local):
    assert cluster.scheduler_address.startswith("tcp://127.0.0.1:")
    res = sp.run(scenario(), reps=1500, seed=42, backend="dask", address=cluster.scheduler_address,
                 chunk_size=100)
    assert np.array_equal(res.records["t"].pvalue, local.records["t"].pvalue)
    _same(res, local)
    assert res.backend == "dask"


def test_dask_client_object_and_store_resume(cluster, local, tmp_path):
    store = tmp_path / "d.sqlite"
    sp.run(scenario(), reps=700, seed=42, n_jobs=1, chunk_size=100, store=store)  # chunks 0..6 locally
    with distributed.Client(cluster) as client:
        res = sp.run(scenario(), reps=1500, seed=42, backend="dask", address=client, chunk_size=100, store=store)
        assert client.status == "running"  # a client we were given is left open
    _same(res, local)
    with sp.engine.open_store(store) as st:
        assert len(st.done_chunks()) == 15


def test_jobs_1_and_2_give_the_same_numbers(local):
    res = sp.run(scenario(), reps=1500, seed=42, n_jobs=2, chunk_size=100)
    _same(res, local)
    sweep1 = sp.run_many([scenario(), scenario().with_params(n=20)], 400, seed=9, n_jobs=1, keys=[3, 4])
    sweep2 = sp.run_many([scenario(), scenario().with_params(n=20)], 400, seed=9, n_jobs=2, keys=[3, 4])
    for a, b in zip(sweep1, sweep2):
        _same(a, b)


def test_unreachable_scheduler_is_a_clear_error():
    import dask

    from simpower.errors import RunError

    with dask.config.set({"distributed.comm.timeouts.connect": "1s"}):
        with pytest.raises(RunError, match="cannot reach the dask scheduler"):
            sp.run(scenario(), reps=10, seed=1, backend="dask", address="tcp://127.0.0.1:1")
