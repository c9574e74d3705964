"""The MMRM batch path's faster pieces (simpower/analyses/mmrm.py) against their definitions.

External facts used (each check names its own):
- with complete data every visit has the same regressors, so GLS is least squares visit by visit
  (Zellner 1962, JASA 57:348) and the REML estimate of an unstructured covariance is the residual
  cross-product matrix over N - q (the unbiased estimate of the multivariate linear model; Anderson
  2003, An Introduction to Multivariate Statistical Analysis, 3rd ed., ch. 8, from memory); the
  final-visit contrast is then the pooled two-sample t-test at that visit (Student 1908; scipy
  ``ttest_ind``), with df = 2n - 2;
- the per-pattern sufficient statistics are sums over subjects of z z', z = (u, y) (their definition,
  computed here subject by subject);
- the staged evaluation (criterion, then gradient, then information, on any split of the replicates)
  is the one-shot evaluation bit for bit: each replicate's arithmetic is the same (checked exactly).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

import simpower as sp
from simpower.analyses import mmrm as M
from simpower.analyses.mmrm import MMRM


def draw(seed, size, **kw):
    params = {"n": 10, "visits": 4, "rho": 0.5, "effect": 0.5, **kw}
    return sp.RepeatedMeasures(**params).draw_batch(np.random.default_rng(seed), size)


def patterns(b, baseline=False):
    d0 = b.replicate(0)
    index, sub_arm, _ = M.design_index(d0["arm"], d0["visit"], d0["subject"])
    an = MMRM(baseline=baseline)
    y = np.stack([b.replicate(i)["y"] for i in range(b.size)])
    base = np.stack([b.replicate(i)["baseline"] for i in range(b.size)]) if baseline else None
    Y, u, scale = an._cube(index, sub_arm, y, base)
    return Y, u, scale


# -- complete data: the closed form ---------------------------------------------------------------
def test_complete_data_closed_form_is_the_pooled_t_test_replicate_by_replicate():
    """Zellner 1962 + Student 1908: estimate, SE and df of the final-visit contrast (n = 10 per arm)."""
    b = draw(1, 60)
    Y, u, _ = patterns(b)
    closed, _ = M.complete_data_reml(M.Patterns(Y, u))
    assert closed.all()                                        # every replicate takes the closed form
    out = MMRM().batch(b)
    for i in range(b.size):
        d = b.replicate(i)
        last = d["visit"] == 3
        y1, y0 = d["y"][last & (d["arm"] == 1)], d["y"][last & (d["arm"] == 0)]
        t = stats.ttest_ind(y1, y0)
        diff = y1.mean() - y0.mean()
        assert out.estimate[i] == pytest.approx(diff, rel=1e-12, abs=1e-13)
        assert out.se[i] == pytest.approx(diff / t.statistic, rel=1e-12)
        assert out.pvalue[i] == pytest.approx(t.pvalue, rel=1e-9)
    assert not out.trouble


@pytest.mark.parametrize("baseline", [False, True])
def test_closed_form_is_the_reml_optimum_fisher_scoring_reaches(baseline):
    """The closed form is a stationary point of the REML criterion and the iterative path's optimum
    (to its step tolerance), with and without the baseline covariate (ANCOVA by visit)."""
    b = draw(2, 20, n=15, baseline=baseline)
    Y, u, _ = patterns(b, baseline)
    st = M.Patterns(Y, u)
    closed, sigma = M.complete_data_reml(st)
    assert closed.all()
    theta_c = M.theta_of(sigma, "unstructured")
    ev, dec, singular = M._at_optimum(theta_c, st, "unstructured")
    assert np.all(dec < 1e-20) and not singular.any()
    theta_f, converged, _ = M.fisher_scoring(M.theta_of(M.start_sigma(st), "unstructured"), st, "unstructured")
    assert converged.all()
    sigma_f = M.sigma_of(theta_f, "unstructured", st.T, jacobian=False)[0]
    np.testing.assert_allclose(sigma_f, sigma, rtol=1e-7, atol=1e-9)


def test_a_batch_mixing_complete_and_incomplete_replicates_equals_the_per_replicate_path():
    """Complete replicates (closed form) and ones with a missing value (Fisher scoring) side by side;
    each equals the per-replicate path (scipy BFGS on the same criterion) to 1e-6."""
    b = draw(3, 8, n=12)
    y = b.per_rep["y"]
    y[::2, 5] = np.nan                                         # replicates 0, 2, 4, 6 lose one value
    Y, u, _ = patterns(b)
    closed, _ = M.complete_data_reml(M.Patterns(Y, u))
    assert closed.tolist() == [False, True] * 4
    an = MMRM()
    assert an.supports_batch(b)
    out = an.batch(b)
    for i in range(b.size):
        res = an(b.replicate(i))
        assert out.estimate[i] == pytest.approx(res.estimate, rel=1e-6)
        assert out.se[i] == pytest.approx(res.se, rel=1e-6)


# -- staged evaluation and kept evaluations: bit for bit -----------------------------------------
@pytest.mark.parametrize("kind", M.COVARIANCES)
def test_staged_evaluation_on_split_replicates_is_the_one_shot_evaluation_exactly(kind):
    b = draw(4, 9, n=15, dropout_rate=0.3, missing={"type": "mcar", "rate": 0.1})
    Y, u, _ = patterns(b)
    st = M.Patterns(Y, u)
    theta = M.theta_of(M.start_sigma(st), kind) + 0.02
    one = M.Evaluation(theta, st, kind, information=True)
    first, second = np.arange(0, 9, 2), np.arange(1, 9, 2)
    parts = [(M.Evaluation(theta[second], st.take(second), kind, gradient=False), np.arange(second.size), second),
             (M.Evaluation(theta[first], st.take(first), kind, gradient=False), np.arange(first.size), first)]
    staged = M.Evaluation.merge(parts, st).add_gradient()
    for k in ("dev", "grad", "Sigma", "B", "Ainv", "G"):
        assert np.array_equal(getattr(staged, k), getattr(one, k)), k
    sel = np.array([7, 2, 3])
    part = staged.take(sel).add_information()
    for k in ("info", "Ak", "D"):
        assert np.array_equal(getattr(part, k), getattr(one, k)[sel]), k


@pytest.mark.filterwarnings("ignore::RuntimeWarning")
@pytest.mark.parametrize("kind", ["unstructured", "toeplitz"])
def test_fisher_scoring_keeps_the_evaluation_at_the_theta_it_returns(kind):
    b = draw(5, 12, n=8, dropout_rate=0.4)                     # small: some replicates take many steps
    Y, u, _ = patterns(b)
    st = M.Patterns(Y, u)
    bad, _ = M.design_problems(st, kind)
    st = st.take(np.flatnonzero(~bad))
    theta, _, broken, ev = M.fisher_scoring(M.theta_of(M.start_sigma(st), kind), st, kind, keep=True)
    keep = np.flatnonzero(~broken)
    fresh = M.Evaluation(theta[keep], st.take(keep), kind)
    assert ev.st.R == keep.size
    for k in ("theta", "dev", "grad", "Sigma", "B"):
        assert np.array_equal(getattr(ev, k), getattr(fresh, k)), k


# -- per-pattern sums ---------------------------------------------------------------------------------
def test_pattern_sums_equal_a_subject_by_subject_loop():
    b = draw(6, 5, n=12, dropout_rate=0.3, baseline=True, missing={"type": "mcar", "rate": 0.15})
    Y, u, _ = patterns(b, baseline=True)
    st = M.Patterns(Y, u)
    R, S, T = Y.shape
    obs = np.isfinite(Y)
    seen = sorted({tuple(o) for o in obs.reshape(-1, T).tolist() if any(o)},
                  key=lambda o: sum(1 << t for t in range(T) if o[t]))   # np.unique's order of the codes
    assert st.masks.tolist() == [list(o) for o in seen]
    for r in range(R):
        for k, mask in enumerate(st.masks):
            rows = [i for i in range(S) if np.array_equal(obs[r, i], mask)]
            z = np.array([np.concatenate([u[r, i], np.where(obs[r, i], Y[r, i], 0.0)]) for i in rows])
            z = z.reshape(-1, 3 + T)
            zz = z.T @ z
            assert st.n[r, k] == len(rows)
            np.testing.assert_allclose(st.U[r, k], zz[:3, :3], rtol=1e-12, atol=1e-12)
            np.testing.assert_allclose(st.M[r, k], zz[3:, :3], rtol=1e-12, atol=1e-12)
            np.testing.assert_allclose(st.C[r, k], zz[3:, 3:], rtol=1e-12, atol=1e-12)
