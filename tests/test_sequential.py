"""Sequential stopping at a target MCSE (Morris, White & Crowther 2019, Stat Med 38:2074, section 5.3).

The MCSE of a rejection rate p after R replicates is sqrt(p(1-p)/R); a run
asked for a target MCSE must stop with an MCSE at most the target, after about
p(1-p)/target^2 replicates (rounded up to whole chunks).
"""


import numpy as np
import pytest

import simpower as sp
from simpower.errors import ParameterError
from simpower.planning.sequential import MemoryStore, point_key, reps_for_mcse, run_many_to_mcse, run_to_mcse

SC = sp.Scenario(sp.NormalTwoArm(n=64, effect=0.5), sp.TTest())


@pytest.mark.parametrize("target", [0.01, 0.005])
def test_reaches_the_mcse_asked_for(target):
    res = run_to_mcse(SC, target, seed=7, n_jobs=1)
    seq = res.extra["sequential"]
    assert seq["reached"] and res.mcse <= target
    # Morris et al. (2019): R = p(1-p)/MCSE^2; the run stops within one look's chunk of it
    need = res.power * (1 - res.power) / target**2
    assert need - seq["chunk_size"] <= res.reps <= need + 2 * seq["chunk_size"] or res.reps == seq["looks"][0]
    assert seq["looks"][-1] == res.reps and seq["looks"] == sorted(seq["looks"])


def test_same_numbers_as_one_plain_run():
    # prefix-stable chunks: the extended run equals a run of the final size with the same chunks and key
    res = run_to_mcse(SC, 0.006, seed=8, n_jobs=1)
    plain = sp.run(SC, reps=res.reps, seed=8, chunk_size=res.extra["sequential"]["chunk_size"],
                   point=point_key(SC), n_jobs=1)
    assert np.array_equal(res.pvalues, plain.pvalues) and res.power == plain.power


def test_no_replicate_simulated_twice():
    store = MemoryStore()
    res = run_to_mcse(SC, 0.005, seed=9, n_jobs=1, store=store)
    assert store.simulated == res.reps and len(res.extra["sequential"]["looks"]) >= 2


def test_max_reps_stops_and_says_so():
    res = run_to_mcse(SC, 0.001, seed=1, n_jobs=1, max_reps=3000)
    assert res.reps == 3000 and not res.extra["sequential"]["reached"] and res.mcse > 0.001


def test_power_one_does_not_stop_at_zero_mcse():
    sc = sp.Scenario(sp.NormalTwoArm(n=200, effect=2.0), sp.TTest())
    res = run_to_mcse(sc, 0.005, seed=1, n_jobs=1, min_reps=20, chunk_size=10)
    # the observed MCSE is 0 after 20 replicates, but (k+1)/(R+2) keeps the run going until
    # (R+1)/(R+2)^2 <= 0.005^2, i.e. R >= 197; a look at most quadruples the count
    assert res.power == 1.0 and res.mcse == 0.0
    assert res.reps >= reps_for_mcse(res.reps, res.reps, 0.005) and 197 <= res.reps <= 4 * 197
    looks = res.extra["sequential"]["looks"]
    assert all(b <= 4 * a for a, b in zip(looks, looks[1:]))


def test_many_points_each_to_its_target():
    scs = [SC.with_params(n=n) for n in (10, 40, 64)]
    outs = run_many_to_mcse(scs, 0.01, seed=3, n_jobs=1)
    for r in outs:
        assert r.mcse <= 0.01 and r.extra["sequential"]["reached"]
    assert outs[0].reps != outs[2].reps    # power 0.18 needs fewer replicates than 0.80


@pytest.mark.parametrize("bad", [0, -0.1, 0.5, 2])
def test_bad_target(bad):
    with pytest.raises(ParameterError, match="target_mcse"):
        run_to_mcse(SC, bad, seed=1, n_jobs=1)


def test_min_above_max():
    with pytest.raises(ParameterError, match="min_reps"):
        run_to_mcse(SC, 0.01, seed=1, n_jobs=1, min_reps=5000, max_reps=1000)
