"""Arguments of run / run_many / sweep: refused in one line naming the field, or taken as documented."""

import numpy as np
import pytest
from scipy import stats

import simpower as sp


def small():
    return sp.Scenario(sp.NormalTwoArm(n=10, effect=0.5), sp.TTest())


@pytest.mark.parametrize("n_jobs", [0, -2, -7, 2.5, True, "4"])
def test_n_jobs_must_be_minus_one_or_a_positive_count(n_jobs):
    # joblib reads -2 as "all cores but one"; simpower documents -1 or a count >= 1 and refuses the rest
    with pytest.raises(sp.ParameterError, match=r"^`n_jobs` must be -1 \(all cores\) or an integer >= 1; got "):
        sp.run(small(), reps=10, n_jobs=n_jobs)


@pytest.mark.parametrize("address", ["tcp://scheduler-host", "scheduler-host", "tcp://:8786", "tcp://h:port",
                                     "tcp://h:70000"])
def test_a_malformed_scheduler_address_is_refused_before_anything_runs(address):
    with pytest.raises(sp.ParameterError, match=r"^`address` must look like tcp://HOST:PORT"):
        sp.run(small(), reps=10, address=address)


def test_an_address_with_another_backend_is_refused():
    with pytest.raises(sp.ParameterError, match=r"^`address` is a dask scheduler's; it cannot be used with "
                                                r"backend='loky'"):
        sp.run(small(), reps=10, address="tcp://127.0.0.1:8786", backend="loky")


def test_an_address_implies_the_dask_backend():
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False, host="127.0.0.1",
                                  protocol="tcp", dashboard_address=None) as cluster:
        res = sp.run(small(), reps=200, seed=3, address=cluster.scheduler_address)
    assert res.backend == "dask"
    local = sp.run(small(), reps=200, seed=3, n_jobs=1)
    assert res.summaries["t_test"]["rejections"] == local.summaries["t_test"]["rejections"]


def _small_cluster_fails(data):
    """Fails when a cluster has fewer than 5 members (as a model with a cluster effect would)."""
    cluster = np.asarray(data["cluster"])
    if np.bincount(cluster).max() < 5:
        raise ValueError("too few members per cluster")
    y, arm = np.asarray(data["y"]), np.asarray(data["arm"])
    return stats.ttest_ind(y[arm == 1], y[arm == 0])


def test_a_sweep_point_that_stops_is_named_by_its_parameters():
    sc = sp.Scenario(sp.ClusterTrial(clusters=6, cluster_size=4, icc=0.05, effect=0.5),
                     analyses={"fit": _small_cluster_fails})
    with pytest.raises(sp.ParameterError) as info:  # refused at the trial replicates, naming the point
        sp.sweep(sc, {"cluster_size": [4, 8], "icc": [0.05]}, reps=100, seed=1, n_jobs=1)
    assert "at cluster_size = 4" in str(info.value) and "grid point" not in str(info.value)
