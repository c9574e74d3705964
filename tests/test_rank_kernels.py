"""Order statistics of pairwise differences and Walsh averages: the selection kernel against brute force,
and the numba and numpy paths of the rank analyses against each other (same floats).

The reference for every order statistic is its definition (common practice): sort all n0 n1
differences y1_j - y0_i (``np.sort(np.subtract.outer(...))``) or all n (n + 1) / 2 Walsh averages
(d_i + d_j) / 2, i <= j (Hodges & Lehmann 1963; Hollander & Wolfe 1999, sec. 3.2), and index.
The kernel returns entries of that matrix, so the checks are exact equality, not tolerances.
"""

import importlib.util
import math
import sys
import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

import simpower as sp
from simpower.analyses import _rank_kernels as rk
from simpower.analyses import nonparametric as npm
from simpower.analyses.nonparametric import NO_NUMBA_ENV, MannWhitney, WilcoxonSignedRank, order_statistic_backend
from simpower.processes.base import Batch


def brute_differences(x, y):
    """All differences x_j - y_i of each row, sorted (the definition)."""
    return np.sort((x[:, None, :] - y[:, :, None]).reshape(x.shape[0], -1), axis=1)


def brute_walsh(d):
    i, j = np.triu_indices(d.shape[1])
    return np.sort(0.5 * (d[:, i] + d[:, j]), axis=1)


def hl_ranks(m):
    """The ranks the analyses ask for (middle pair, a CI pair) plus the extremes and a few others."""
    return sorted({0, m - 1, (m - 1) // 2, m // 2, max(0, m // 3 - 1), min(m - 1, m - m // 3), 1 % m})


def samples(kind, rng, reps, n):
    if kind == "normal":
        return rng.standard_normal((reps, n))
    if kind == "rounded":   # many ties, within and across samples
        return np.round(rng.standard_normal((reps, n)) * 2) / 2
    if kind == "cauchy":    # heavy tails: the normal model's first guess is poor
        return rng.standard_cauchy((reps, n))
    if kind == "offset":    # a large common offset: differences lose low-order bits
        return 1e8 + rng.standard_normal((reps, n))
    if kind == "constant":  # every difference the same
        return np.full((reps, n), 2.5)
    if kind == "tiny":      # a spread near the smallest normal floats: the model's slope is huge or nil
        return rng.exponential(size=(reps, n)) * 1e-300
    if kind == "zeros":     # half exact zeros, within and across samples
        return np.where(rng.random((reps, n)) < 0.5, 0.0, rng.standard_normal((reps, n)))
    raise ValueError(kind)


KINDS = ("normal", "rounded", "cauchy", "offset", "constant", "tiny", "zeros")


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("n0,n1", [(1, 1), (1, 4), (2, 3), (3, 3), (7, 19), (30, 11), (40, 40)])
def test_difference_order_stats_equal_brute_force(kind, n0, n1):
    rng = np.random.default_rng(n0 * 100 + n1)
    y = samples(kind, rng, 6, n0)
    x = samples(kind, rng, 6, n1) + (0.3 if kind != "constant" else 0.0)
    full = brute_differences(x, y)
    ks = hl_ranks(n0 * n1) if n0 * n1 > 12 else range(n0 * n1)   # tiny m: every rank
    got = rk.difference_order_stats(x, y, ks)
    for k in ks:
        np.testing.assert_array_equal(got[k], full[:, k], err_msg=f"rank {k}")


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("n", [1, 2, 3, 8, 25, 60])
def test_walsh_order_stats_equal_brute_force(kind, n):
    rng = np.random.default_rng(n)
    d = samples(kind, rng, 6, n)
    full = brute_walsh(d)
    m = n * (n + 1) // 2
    ks = hl_ranks(m) if m > 12 else range(m)
    got = rk.walsh_order_stats(d, ks)
    for k in ks:
        np.testing.assert_array_equal(got[k], full[:, k], err_msg=f"rank {k}")


@settings(max_examples=60, deadline=None, derandomize=True)
@given(st.integers(1, 12), st.integers(1, 12), st.integers(0, 2**32 - 1), st.sampled_from([0, 1, 2]))
def test_difference_order_stats_any_small_case(n0, n1, seed, decimals):
    # rounding to 0-2 decimals makes ties of every kind; every rank of m = n0 n1 is checked
    rng = np.random.default_rng(seed)
    y = np.round(rng.normal(size=(2, n0)), decimals)
    x = np.round(rng.normal(size=(2, n1)) * rng.uniform(0.1, 3), decimals)
    full = brute_differences(x, y)
    got = rk.difference_order_stats(x, y, range(n0 * n1))
    for k in range(n0 * n1):
        np.testing.assert_array_equal(got[k], full[:, k])


def test_large_sample_order_stats_equal_partition():
    # m = 40,000 differences: the bracket logic (not the small-m enumeration) decides; reference np.partition
    rng = np.random.default_rng(9)
    y, x = rng.gamma(2.0, size=(4, 200)), rng.gamma(2.0, size=(4, 200)) + 0.2
    d = (x[:, None, :] - y[:, :, None]).reshape(4, -1)
    ks = [0, 19_999, 20_000, 17_200, 22_799, 39_999]
    part = np.partition(d, ks, axis=1)
    got = rk.difference_order_stats(x, y, ks)
    for k in ks:
        np.testing.assert_array_equal(got[k], part[:, k])


def test_count_sorted_sums_equals_brute_force():
    rng = np.random.default_rng(4)
    y, x = np.round(rng.normal(size=(5, 9)), 1), np.round(rng.normal(size=(5, 14)), 1)
    u, v = rk.sorted_difference_terms(x, y)
    ts = [-0.5, 0.0, -np.nextafter(0.0, 1.0), 0.3]
    got = rk.count_sorted_sums(u, v, ts)
    d = x[:, None, :] - y[:, :, None]
    for q, t in enumerate(ts):
        np.testing.assert_array_equal(got[:, q], (d <= t).sum(axis=(1, 2)))


def test_ranks_out_of_range_are_refused():
    with pytest.raises(ValueError, match="0..5"):
        rk.difference_order_stats(np.zeros((1, 2)), np.zeros((1, 3)), [6])


def _plain_python_kernels():
    """The kernel module imported afresh as if numba were not installed (its pure-Python fallback)."""
    spec = importlib.util.spec_from_file_location("simpower_rank_kernels_plain", rk.__file__)
    mod = importlib.util.module_from_spec(spec)
    saved = sys.modules.get("numba")
    sys.modules["numba"] = None  # makes `import numba` raise ImportError
    try:
        spec.loader.exec_module(mod)
    finally:
        if saved is None:
            del sys.modules["numba"]
        else:
            sys.modules["numba"] = saved
    return mod


def test_pure_python_fallback_imports_and_gives_the_same_floats():
    plain = _plain_python_kernels()
    assert plain.HAVE_NUMBA is False
    rng = np.random.default_rng(12)
    y, x = np.round(rng.normal(size=(3, 17)), 1), np.round(rng.normal(size=(3, 23)), 1)
    ks = hl_ranks(17 * 23)
    a, b = plain.difference_order_stats(x, y, ks), rk.difference_order_stats(x, y, ks)
    full = brute_differences(x, y)
    for k in ks:
        np.testing.assert_array_equal(a[k], full[:, k])
        np.testing.assert_array_equal(b[k], a[k])
    d = rng.standard_cauchy((3, 21))
    w = plain.walsh_order_stats(d, [0, 115, 230])
    np.testing.assert_array_equal(w[115], brute_walsh(d)[:, 115])


# -- the two paths of the analyses ---------------------------------------------------------------
def test_backend_switch_is_read_at_call_time(monkeypatch):
    monkeypatch.setenv(NO_NUMBA_ENV, "1")
    assert order_statistic_backend() == "numpy"
    monkeypatch.setenv(NO_NUMBA_ENV, "0")
    assert order_statistic_backend() == ("numba" if rk.HAVE_NUMBA else "numpy")
    monkeypatch.delenv(NO_NUMBA_ENV)
    assert order_statistic_backend() == ("numba" if rk.HAVE_NUMBA else "numpy")


def two_arm_batch(seed, reps, n0, n1, decimals=None, shift=0.4):
    rng = np.random.default_rng(seed)
    y = rng.normal(size=(reps, n0 + n1))
    y[:, n0:] += shift
    if decimals is not None:
        y[::2] = np.round(y[::2], decimals)   # every other row tied, the others not
    return Batch(reps, {"y": y}, {"arm": np.repeat(np.array([0, 1], np.int8), [n0, n1])})


def both_paths(monkeypatch, fn):
    monkeypatch.setenv(NO_NUMBA_ENV, "1")
    ref = fn()
    monkeypatch.delenv(NO_NUMBA_ENV)
    return ref, fn()


@pytest.mark.parametrize("n0,n1,decimals", [(13, 17, 1), (50, 50, None), (2, 3, 0), (1, 1, None), (6, 40, 0)])
@pytest.mark.parametrize("estimand", ["shift", "probability", "none"])
@pytest.mark.parametrize("alternative", ["two-sided", "greater"])
def test_mann_whitney_batch_same_floats_on_both_paths(monkeypatch, n0, n1, decimals, estimand, alternative):
    # small n gives k < 1 (an infinite interval) for the shift; n0 = n1 = 1 also a NaN SE for the index
    b = two_arm_batch(n0 + n1, 40, n0, n1, decimals)
    an = MannWhitney(estimand=estimand, alternative=alternative, null_value=0.1)
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)   # n = 1 per arm: a variance with ddof 1
        ref, new = both_paths(monkeypatch, lambda: an.batch(b))
    assert set(ref) == set(new)
    for f in ref:
        np.testing.assert_array_equal(new[f], ref[f], err_msg=f)
    if estimand == "shift" and n0 * n1 <= 6:
        assert np.all(np.isinf(new["ci_low"]))


@pytest.mark.parametrize("n", [1, 3, 20])
def test_signed_rank_same_floats_on_both_paths(monkeypatch, n):
    rng = np.random.default_rng(n)
    y = np.round(rng.normal(size=(30, n)) + 0.3, 1)
    b = Batch(30, {"y": y})
    an = WilcoxonSignedRank(null_value=0.05)
    with np.errstate(all="ignore"):
        ref, new = both_paths(monkeypatch, lambda: an.batch(b))
    for f in ("estimate", "ci_low", "ci_high", "pvalue"):
        np.testing.assert_array_equal(new[f], ref[f], err_msg=f)


def test_per_replicate_paths_same_floats_on_both_paths(monkeypatch):
    b = two_arm_batch(3, 8, 9, 12, decimals=1)
    ref, new = both_paths(monkeypatch, lambda: [MannWhitney()(b.replicate(i)) for i in range(8)])
    assert [r.estimate for r in ref] == [r.estimate for r in new]
    assert [(r.ci_low, r.ci_high) for r in ref] == [(r.ci_low, r.ci_high) for r in new]


def test_same_seed_same_numbers_with_and_without_numba(monkeypatch):
    # reproducibility: a run's records do not depend on whether numba is installed
    two_arm = sp.Scenario(sp.NormalTwoArm(n=30, effect=0.5), MannWhitney())
    paired = sp.Scenario(sp.NormalPaired(n=25, effect=0.4, corr=0.5), WilcoxonSignedRank())
    for scen in (two_arm, paired):
        ref, new = both_paths(monkeypatch, lambda: sp.run(scen, reps=3000, seed=17, n_jobs=1, progress=False))
        for name in ref.records:
            for f in ("pvalue", "estimate", "ci_low", "ci_high"):
                a, b = getattr(ref.records[name], f), getattr(new.records[name], f)
                np.testing.assert_array_equal(np.asarray(b), np.asarray(a), err_msg=f"{name}.{f}")
        assert ref.power == new.power


# -- the probability index from the one pooled sort -----------------------------------------------
@pytest.mark.parametrize("n0,n1", [(13, 17), (40, 40), (3, 2), (25, 4)])
def test_probability_index_batch_matches_scipy_ranks(n0, n1):
    # reference: the per-replicate path's placements from scipy.stats.rankdata (DeLong et al. 1988,
    # Biometrics 44:837-845, placement variance), on rows without ties and with ties in one batch
    b = two_arm_batch(7, 60, n0, n1, decimals=1)
    an = MannWhitney(estimand="probability")
    out = an.batch(b)
    per = [an(b.replicate(i)) for i in range(b.size)]
    for f in ("pvalue", "estimate", "se", "ci_low", "ci_high"):
        np.testing.assert_allclose(out[f], [getattr(r, f) for r in per], rtol=1e-12, atol=1e-15, err_msg=f)


def test_probability_index_se_against_brute_force_placements():
    # DeLong et al. (1988, eq. 2): the placement of each arm-1 value is the share of arm 0 below it
    # (ties half), of each arm-0 value the share of arm 1 above it; brute force from all pairs
    b = two_arm_batch(8, 20, 11, 15, decimals=None)
    out = MannWhitney(estimand="probability").batch(b)
    for i in range(b.size):
        d = b.replicate(i)
        y0, y1 = d["y"][d["arm"] == 0], d["y"][d["arm"] == 1]
        psi = (np.subtract.outer(y1, y0) > 0) + 0.5 * (np.subtract.outer(y1, y0) == 0)
        se = math.sqrt(psi.mean(axis=1).var(ddof=1) / y1.size + psi.mean(axis=0).var(ddof=1) / y0.size)
        assert out["se"][i] == pytest.approx(se, rel=1e-12)
        assert out["estimate"][i] == stats.mannwhitneyu(y1, y0).statistic / (y0.size * y1.size)


def test_shift_batch_pvalues_equal_scipy_on_the_numba_path():
    # the numba path takes U and the tie term from staircase counts of the sorted arms;
    # reference: scipy.stats.mannwhitneyu(method="asymptotic")
    b = two_arm_batch(9, 30, 14, 19, decimals=0)
    out = MannWhitney(continuity=True).batch(b)
    for i in range(b.size):
        d = b.replicate(i)
        ref = stats.mannwhitneyu(d["y"][d["arm"] == 1], d["y"][d["arm"] == 0], method="asymptotic")
        assert out["pvalue"][i] == pytest.approx(ref.pvalue, rel=1e-12, abs=1e-15)


def test_numpy_path_keeps_the_block_size(monkeypatch):
    # the numpy reference path works through the replicates in memory blocks; blocks change nothing
    b = two_arm_batch(10, 25, 8, 9)
    monkeypatch.setenv(NO_NUMBA_ENV, "1")
    whole = MannWhitney().batch(b)
    monkeypatch.setattr(npm, "_BLOCK", 3 * 72)   # 3 replicates per block
    blocked = MannWhitney().batch(b)
    for f in whole:
        np.testing.assert_array_equal(blocked[f], whole[f])


def test_every_fallback_of_the_kernel_gives_the_same_floats():
    # the plain-Python kernel with its shortcuts switched off: no staircase rounds (enumerate at once)
    # and no counting passes (sort every candidate: the heap sort for more than 64), then no
    # enumeration limit; each variant must still give the definition's order statistics
    plain = _plain_python_kernels()
    rng = np.random.default_rng(21)
    y, x = np.round(rng.normal(size=(2, 15)), 1), np.round(rng.normal(size=(2, 13)), 1) + 0.3
    full = brute_differences(x, y)
    ks = hl_ranks(15 * 13)
    for changes in ({"_FLAT_STEPS": 0}, {"_MAX_ROUNDS": 0}, {"_MAX_ROUNDS": 0, "_FLAT_STEPS": 0}, {"_FLAT": 0}):
        saved = {k: getattr(plain, k) for k in changes}
        for k, v in changes.items():
            setattr(plain, k, v)
        try:
            got = plain.difference_order_stats(x, y, ks)
        finally:
            for k, v in saved.items():
                setattr(plain, k, v)
        for k in ks:
            np.testing.assert_array_equal(got[k], full[:, k], err_msg=f"{changes} rank {k}")


def test_heap_sort_sorts():
    rng = np.random.default_rng(2)
    for n in (0, 1, 2, 65, 300):
        a = np.round(rng.normal(size=n + 3), 1)
        ref = np.sort(a[:n])
        rk._heap_sort(a, n)
        np.testing.assert_array_equal(a[:n], ref)


# -- the compiled whole-test kernel on ragged rows (missing outcomes) ----------------------------------
def ragged_two_arm(rng, reps, n0, n1, rate, interleave, decimals=None):
    """Two arms with ``rate`` of the outcomes missing (NaN); arms in blocks or interleaved (no split)."""
    y = rng.normal(size=(reps, n0 + n1))
    arm = np.repeat(np.array([0, 1], np.int8), [n0, n1])
    if interleave:
        arm = rng.permutation(arm)
    y[:, arm == 1] += 0.4
    if decimals is not None:
        y = np.round(y, decimals)
    y[rng.random(y.shape) < rate] = np.nan
    y[0, arm == 0] = np.nan               # a replicate with no arm-0 value: handed to the per-replicate path
    y[1, np.flatnonzero(arm == 1)[1:]] = np.nan   # one arm-1 value left: handed over too
    return Batch(reps, {"y": y}, {"arm": arm}, info={"missing": True})


@pytest.mark.parametrize("interleave", [False, True])
@pytest.mark.parametrize("decimals", [None, 0, 1])
@pytest.mark.parametrize("estimand", ["shift", "none"])
def test_mann_whitney_missing_outcomes_same_floats_on_both_paths(monkeypatch, interleave, decimals, estimand):
    # the compiled kernel takes each replicate's observed values as they are (ragged rows); the numpy
    # path groups replicates by their observed counts and compacts them: the same floats
    rng = np.random.default_rng(40 + 3 * interleave + (decimals or 0))
    b = ragged_two_arm(rng, 60, 14, 19, 0.3, interleave, decimals)
    an = MannWhitney(estimand=estimand, alternative="less", null_value=-0.2)
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        ref, new = both_paths(monkeypatch, lambda: an.batch(b))
    assert set(ref) == set(new)
    for f in set(ref) - {"trouble", "trouble_messages"}:
        np.testing.assert_array_equal(new[f], ref[f], err_msg=f)
    assert ref.trouble.keys() == new.trouble.keys()   # replicate 0 (no arm-0 value) fails on both
    for cause in ref.trouble:
        np.testing.assert_array_equal(new.trouble[cause], ref.trouble[cause])
    # and each replicate as scipy sees its observed values (scipy's asymptotic method, to 1e-12)
    for i in (2, 3, 4):
        t = b.replicate(i)
        ok = np.isfinite(t["y"])
        y0, y1 = t["y"][ok & (t["arm"] == 0)], t["y"][ok & (t["arm"] == 1)]
        p = stats.mannwhitneyu(y1 + 0.2, y0, alternative="less", method="asymptotic").pvalue
        assert new["pvalue"][i] == pytest.approx(p, rel=1e-12)
        if estimand == "shift":
            assert new["estimate"][i] == pytest.approx(np.median(np.subtract.outer(y1, y0)), abs=1e-12)


@pytest.mark.parametrize("paired", [False, True])
@pytest.mark.parametrize("decimals", [None, 0, 1])
def test_signed_rank_missing_outcomes_same_floats_on_both_paths(monkeypatch, paired, decimals):
    rng = np.random.default_rng(50 + paired + (decimals or 0))
    reps, n = 50, 23
    y = rng.normal(size=(reps, 2 * n if paired else n)) + 0.3
    if decimals is not None:
        y = np.round(y, decimals)            # ties and exact zeros (differences too)
    y[rng.random(y.shape) < 0.25] = np.nan
    y[0, 1:] = np.nan                        # one value (pair) left: handed over
    if paired:
        b = Batch(reps, {"y": y}, {"arm": np.repeat(np.array([0, 1], np.int8), n),
                                   "pair": np.tile(np.arange(n), 2)}, info={"missing": True})
    else:
        b = Batch(reps, {"y": y}, info={"missing": True})
    an = WilcoxonSignedRank(null_value=0.1 if decimals != 0 else 0.0, continuity=True)
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        ref, new = both_paths(monkeypatch, lambda: an.batch(b))
    for f in ("estimate", "ci_low", "ci_high", "pvalue"):
        np.testing.assert_array_equal(new[f], ref[f], err_msg=f)
    for i in (1, 2):                         # against scipy's asymptotic method (zeros dropped, as Wilcoxon)
        d = y[i, n:] - y[i, :n] if paired else y[i]
        d = d[np.isfinite(d)] - an.null_value
        p = stats.wilcoxon(d, correction=True, method="asymptotic").pvalue
        assert new["pvalue"][i] == pytest.approx(p, rel=1e-12)


def test_tie_merge_and_signed_rank_terms_against_scipy_ranks():
    # U, the tie term and the signed-rank sum by the definitions (ranks by scipy.stats.rankdata;
    # tie term sum(t^3 - t), Lehmann 1975, Nonparametrics, eq. 1.45 -- from memory), with exact zeros
    rng = np.random.default_rng(8)
    for n0, n1 in ((1, 1), (5, 3), (17, 24)):
        for _ in range(20):
            a = np.sort(np.round(rng.normal(size=n0), 1))
            b = np.sort(np.round(rng.normal(size=n1), 1))
            twice, tie = rk._tie_merge(a, n0, b, n1)
            r = stats.rankdata(np.concatenate([b, a]))
            assert twice / 2.0 == r[:n1].sum() - n1 * (n1 + 1) / 2.0
            _, t = np.unique(np.concatenate([a, b]), return_counts=True)
            assert tie == float(np.sum(t**3 - t))
            x = np.sort(np.concatenate([a, -b, np.zeros(2)]))
            twice, tie, nz = rk._signed_rank_terms(x, x.size)
            nzx = x[x != 0]
            rr = stats.rankdata(np.abs(nzx))
            assert nz == np.count_nonzero(x == 0) >= 2 and twice / 2.0 == rr[nzx > 0].sum()
            _, t = np.unique(np.abs(nzx), return_counts=True)
            assert tie == float(np.sum(t**3 - t))
