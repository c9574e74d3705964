"""The execution settings as one validated value (simpower.execution.Execution).

Checks: validation in one place with one-line messages naming the setting; ``execution=`` accepted by every
public entry point, with the same numbers as the keyword arguments; contradictions refused; ``backend=None``
honours an outer ``joblib.parallel_config`` and the numbers do not depend on it (the reproducibility contract:
a chunk's numbers depend only on seed, point key, chunk index and chunk size -- numpy's SeedSequence spawning,
numpy documentation "Parallel random number generation").
"""

import joblib
import numpy as np
import pytest

import simpower as sp
from simpower.execution import Execution, resolve


def small(n=20):
    return sp.Scenario(sp.NormalTwoArm(n=n, effect=0.5), sp.TTest())


@pytest.mark.parametrize("changes, pattern", [
    (dict(timeout="soon"), r"^`timeout` must be a number > 0; got 'soon'\.$"),
    (dict(timeout=0), r"^`timeout` must be > 0; got 0\.$"),
    (dict(n_jobs=0), r"^`n_jobs` must be -1 \(all cores\) or an integer >= 1; got 0\.$"),
    (dict(seed=-1), r"^`seed` must be an integer >= 0; got -1\.$"),
    (dict(fit_trouble="drop"), r"^`fit_trouble` must be one of 'failure', 'nonrejection'; got 'drop'\."),
    (dict(max_failure_rate=0), r"^`max_failure_rate` must be in \(0, 1\]; got 0\.$"),
    (dict(backend="lokyy"), r"^`backend` must be one of .*Did you mean 'loky'\?$"),
    (dict(address="tcp://host"), r"^`address` must look like tcp://HOST:PORT"),
    (dict(address="tcp://h:8786", backend="loky"), r"^`address` is a dask scheduler's"),
    (dict(chunk_size=0), r"^`chunk_size` must be an integer >= 1; got 0\.$"),
    (dict(keep_records="yes"), r"^`keep_records` must be true or false; got 'yes'\.$"),
    (dict(store=3), r"^`store` must be a file path or a store with load/save; got 3\.$"),
])
def test_bad_settings_are_refused_in_one_line(changes, pattern):
    with pytest.raises(sp.ParameterError, match=pattern) as info:
        Execution(**changes)
    assert "\n" not in str(info.value)
    # replace() checks the same way, and so does a run given the keyword
    with pytest.raises(sp.ParameterError, match=pattern):
        Execution().replace(**changes)


def test_value_semantics():
    ex = Execution(seed=3, n_jobs=1)
    assert ex.replace(n_jobs=2) == Execution(seed=3, n_jobs=2) and ex.n_jobs == 1
    assert Execution(address="tcp://10.0.0.5:8786").backend == "dask"  # an address implies dask
    assert repr(ex) == "Execution(seed=3, n_jobs=1)"
    with pytest.raises(sp.ParameterError, match=r"`n_job` is not an execution setting\. Did you mean 'n_jobs'"):
        ex.replace(n_job=2)
    with pytest.raises(AttributeError):
        ex.seed = 4  # frozen


def test_keywords_and_execution_combine_or_conflict():
    ex = Execution(seed=3, n_jobs=1)
    assert resolve(ex, seed=3, n_jobs=-1) is ex  # same value, or a keyword left at its default
    with pytest.raises(sp.ParameterError, match=r"^`seed` = 4 contradicts `execution.seed` = 3; give it in one"):
        sp.run(small(), 100, seed=4, execution=ex)
    with pytest.raises(sp.ParameterError, match=r"`timeout` = 2 contradicts"):
        sp.sweep(small(), {"n": [10]}, reps=100, engine={"timeout": 2}, execution=Execution(timeout=1))


def test_every_entry_point_takes_an_execution_with_the_same_numbers():
    sc = small()
    ex = Execution(seed=11, n_jobs=1, progress=False)
    a = sp.run(sc, 400, execution=ex)
    b = sp.run(sc, 400, seed=11, n_jobs=1, progress=False)
    assert np.array_equal(a.records["t_test"].pvalue, b.records["t_test"].pvalue)
    assert [r.power for r in sp.run_many([sc, small(30)], 300, execution=ex)] == \
        [r.power for r in sp.run_many([sc, small(30)], 300, seed=11, n_jobs=1)]
    t1 = sp.sweep(sc, {"n": [10, 30]}, reps=300, execution=ex)
    t2 = sp.sweep(sc, {"n": [10, 30]}, reps=300, seed=11, n_jobs=1)
    assert t1["power"].tolist() == t2["power"].tolist()
    n1 = sp.null_check(sc, reps=400, execution=ex)
    assert n1["type1_error"].tolist() == sp.null_check(sc, reps=400, seed=11, n_jobs=1)["type1_error"].tolist()
    m1 = sp.run_to_mcse(sc, 0.02, execution=ex)
    assert m1.power == sp.run_to_mcse(sc, 0.02, seed=11, n_jobs=1).power
    # Cohen (1988, table 2.4.1): n = 64 per arm, d = 0.5, two-sided alpha 0.05 -> power 0.80; the search
    # finds n near 64 with either way of giving the settings, and the same evaluations
    r1 = sp.required_n(small(64), 0.8, low=20, high=200, max_reps=20_000, execution=ex)
    r2 = sp.required_n(small(64), 0.8, low=20, high=200, max_reps=20_000, seed=11, n_jobs=1, progress=False)
    assert r1.table["power"].tolist() == r2.table["power"].tolist()
    lo, hi = r1.interval
    assert lo - 4 <= 64 <= hi + 4
    e1 = sp.detectable_effect(small(64), 0.8, high=1.0, max_reps=20_000, execution=ex)
    e2 = sp.detectable_effect(small(64), 0.8, high=1.0, max_reps=20_000, seed=11, n_jobs=1)
    assert e1.table["power"].tolist() == e2.table["power"].tolist()


@pytest.mark.parametrize("context, used", [("threading", "threading"), ("sequential", "serial")])
def test_backend_none_honours_an_outer_joblib_context(context, used):
    sc = small()
    plain = sp.run(sc, 3000, seed=5, n_jobs=2, chunk_size=500, progress=False)
    with joblib.parallel_config(backend=context):
        inside = sp.run(sc, 3000, seed=5, n_jobs=2, chunk_size=500, progress=False)
        table = sp.sweep(sc, {"n": [10, 30]}, reps=1000, seed=5, n_jobs=2, chunk_size=250, return_results=True)
    assert inside.backend == used and all(r.backend == used for r in table[1])
    # the same seed and the same chunks: the same numbers, whatever the executor
    assert np.array_equal(inside.records["t_test"].pvalue, plain.records["t_test"].pvalue)
    assert table[0]["power"].tolist() == sp.sweep(sc, {"n": [10, 30]}, reps=1000, seed=5, n_jobs=1,
                                                  chunk_size=250)["power"].tolist()


def test_an_explicit_backend_wins_over_the_context():
    with joblib.parallel_config(backend="threading"):
        res = sp.run(small(), 600, seed=5, n_jobs=2, backend="serial", progress=False)
    assert res.backend == "serial"


def test_the_context_n_jobs_counts_when_n_jobs_is_none():
    with joblib.parallel_config(backend="threading", n_jobs=2):
        res = sp.run(small(), 600, seed=5, n_jobs=None, chunk_size=200, progress=False)
    assert res.backend == "threading" and res.n_jobs == 2
