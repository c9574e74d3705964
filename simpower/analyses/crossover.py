"""Analyses of the AB/BA crossover: the period-difference t-test, its TOST, and the mixed model.

Data: a long table with ``y``, ``subject``, ``sequence`` (0 = AB, 1 = BA), ``period``
(1, 2) and ``treat`` (0 = A, 1 = B), as the ``crossover`` process draws it; batches
through the ``crossover`` layout (:class:`simpower.batch.CrossoverLayout`).

Sign convention: every estimate is treatment B minus A. With the period difference
``d_i = y_i2 - y_i1`` (period 2 minus period 1), ``E d = pi + tau`` in sequence AB and
``pi - tau`` in BA, so ``tau_hat = (mean d_AB - mean d_BA) / 2``; written with
``d_i = y_i1 - y_i2`` instead this is ``(mean d_BA - mean d_AB) / 2`` (Senn 2002,
*Cross-over Trials in Clinical Research*, 2nd ed., ch. 3). With ``scale = "log"`` the
analyses work on ``log y`` and report the ratio of geometric means B / A (estimate
``exp(tau_hat)``, the CI exponentiated, the SE by the delta method); an outcome <= 0
then raises ``ValueError`` (recorded as ``error:ValueError``).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
from scipy import stats

from .._validation import Choice, Real
from ..errors import ParameterError
from .base import ALTERNATIVE, CI_LEVEL, Analysis, BatchResult, NullBoundary, TestResult, hand_over
from .mixed import BOUNDARY_WARNING, between_within_df, satterthwaite
from .numeric import p_and_crit, p_from_t

SCALE = Choice(("additive", "log"))
DF_METHODS = ("satterthwaite", "between-within", "wald")


# -- the long table, per replicate ------------------------------------------------------------
def periods(data, scale: str = "additive"):
    """Per subject: outcome in period 1 and 2 (NaN when missing) and the sequence, from a long table.

    On the log scale the outcomes are logged (``ValueError`` for an observed value <= 0).
    """
    for col in ("y", "subject", "period", "sequence"):
        if col not in data:
            raise ValueError(f"crossover analyses need a {col!r} column (subject, sequence, period, y)")
    y = np.asarray(data["y"], float)
    subject, period, seq = (np.asarray(data[k]) for k in ("subject", "period", "sequence"))
    if not (np.all((period == 1) | (period == 2)) and np.all((seq == 0) | (seq == 1))):
        raise ValueError("crossover analyses need period in {1, 2} and sequence in {0 (AB), 1 (BA)}")
    if scale == "log":
        y = _logged(y)
    ids, inv = np.unique(subject, return_inverse=True)
    y1, y2 = np.full(ids.size, np.nan), np.full(ids.size, np.nan)
    y1[inv[period == 1]] = y[period == 1]
    y2[inv[period == 2]] = y[period == 2]
    s = np.zeros(ids.size, np.int8)
    s[inv] = seq
    return y1, y2, s


def _logged(y):
    ok = np.isfinite(y)
    bad = int(np.count_nonzero(y[ok] <= 0))
    if bad:
        raise ValueError(f"scale = 'log' needs positive outcomes; got {bad} value(s) <= 0")
    out = np.full(y.shape, np.nan)
    out[ok] = np.log(y[ok])
    return out


def _differences(data, scale):
    y1, y2, s = periods(data, scale)
    d = y2 - y1
    keep = np.isfinite(d)
    d_ab, d_ba = d[keep & (s == 0)], d[keep & (s == 1)]
    if d_ab.size < 1 or d_ba.size < 1 or d_ab.size + d_ba.size < 3:
        raise ValueError(f"the period-difference t-test needs complete subjects in both sequences and df >= 1; "
                         f"got {d_ab.size} (AB) and {d_ba.size} (BA)")
    return d_ab, d_ba


def _parts(d_ab, d_ba):
    """(estimate, se, df) of tau_hat = (mean d_AB - mean d_BA) / 2 with the pooled variance of d."""
    n1, n2 = d_ab.size, d_ba.size
    df = n1 + n2 - 2.0
    ss = float(((d_ab - d_ab.mean()) ** 2).sum() + ((d_ba - d_ba.mean()) ** 2).sum())
    se = math.sqrt(ss / df * (1 / n1 + 1 / n2)) / 2.0
    return float(d_ab.mean() - d_ba.mean()) / 2.0, se, df


def _on_scale(est, se, crit, scale):
    """estimate, SE and CI bounds in the reported units (ratios on the log scale; arrays allowed)."""
    lo, hi = est - crit * se, est + crit * se
    if scale == "log":
        ratio = np.exp(est)
        return ratio, ratio * se, np.exp(lo), np.exp(hi)
    return est, se, lo, hi


# -- the batch ----------------------------------------------------------------------------------
def batch_differences(layout, scale):
    """(n_ab, n_ba, estimate, se, df, bad) of the period-difference test for every replicate (R,).

    Complete pairs only (``layout.both``). ``bad`` marks replicates without a statistic (too
    few complete subjects) or, on the log scale, with an observed outcome <= 0: the
    per-replicate path decides those.
    """
    y1, y2 = layout.y1, layout.y2
    bad = np.zeros(layout.size, bool)
    if scale == "log":
        with np.errstate(all="ignore"):
            bad = np.any(layout.observed & ~(layout.y > 0), axis=1)
            y1, y2 = np.log(y1), np.log(y2)
    both = layout.both
    seq = layout.sequence
    with np.errstate(all="ignore"):
        d = np.where(both, y2 - y1, 0.0)
        stats_ = []
        for s in (0, 1):
            w = both & (seq == s)
            n = np.count_nonzero(w, axis=1)
            m = np.where(w, d, 0.0).sum(axis=1) / n
            r = np.where(w, d - m[:, None], 0.0)
            stats_.append((n, m, np.einsum("ij,ij->i", r, r)))
        (n1, m1, ss1), (n2, m2, ss2) = stats_
        df = n1 + n2 - 2.0
        se = np.sqrt((ss1 + ss2) / df * (1.0 / n1 + 1.0 / n2)) / 2.0
        est = (m1 - m2) / 2.0
    bad |= (n1 < 1) | (n2 < 1) | (df < 1)
    return n1, n2, est, se, df, bad


def _scale_label(scale):
    return "ratio of geometric means" if scale == "log" else "mean difference"


class CrossoverT(Analysis):
    """The period-difference t-test of an AB/BA crossover (Senn 2002, ch. 3).

    Each complete subject's difference ``d = y(period 2) - y(period 1)``; the
    estimate of B minus A is ``(mean d_AB - mean d_BA) / 2``, its SE from the
    variance of ``d`` pooled within the two sequences, and the test Student's t with
    ``n_AB + n_BA - 2`` df: ``scipy.stats.ttest_ind(d_AB, d_BA)`` (equal variances).
    Subjects missing a period are dropped (complete cases). The period effect cancels;
    a carryover does not (the estimate's mean is B - A minus half the differential
    carryover).

    Parameters
    ----------
    scale : {"additive", "log"}, default "additive"
        "log": test on log y; estimate the ratio of geometric means B / A.
    alternative : {"two-sided", "greater", "less"}
        "greater": H1 B above A.
    ci_level : float in (0, 1), default 0.95
    """

    name = "crossover_t"
    null_hypothesis = "treatments A and B have the same mean (the same geometric mean on the log scale)"
    params = {"scale": SCALE, "alternative": ALTERNATIVE, "ci_level": CI_LEVEL}
    defaults = {"scale": "additive", "alternative": "two-sided", "ci_level": 0.95}
    layouts = ("crossover",)

    @property
    def estimand_label(self) -> str:
        return _scale_label(self.scale)

    def __call__(self, data):
        d_ab, d_ba = _differences(data, self.scale)
        r = stats.ttest_ind(d_ab, d_ba, equal_var=True, alternative=self.alternative)
        est, se, df = _parts(d_ab, d_ba)
        crit = stats.t.ppf(0.5 + self.ci_level / 2, df)
        e, s, lo, hi = _on_scale(est, se, crit, self.scale)
        return TestResult(pvalue=float(r.pvalue), estimate=float(e), se=float(s), ci_low=float(lo),
                          ci_high=float(hi), statistic=float(r.statistic), df=df)

    def batch(self, batch):
        _, _, est, se, df, bad = batch_differences(self.batch_layout(batch), self.scale)
        with np.errstate(all="ignore"):
            p = p_from_t(est / se, df, self.alternative)
            e, s, lo, hi = _on_scale(est, se, stats.t.ppf(0.5 + self.ci_level / 2, df), self.scale)
        res = BatchResult(pvalue=p, estimate=e, se=s, ci_low=lo, ci_high=hi)
        return hand_over(self, batch, res, bad)


class CrossoverTOST(Analysis):
    """Equivalence (two one-sided tests) on the period-difference t of an AB/BA crossover.

    H0: B - A (on the log scale: the ratio of geometric means B / A) lies outside
    (``low``, ``high``); the p-value is the larger of the two one-sided p-values
    (Schuirmann 1987), as in ``tost``. Rejecting at alpha = 0.05 is the 90% CI lying
    inside the range: average bioequivalence with ``scale = "log"``, ``low = 0.80``,
    ``high = 1.25`` (the defaults on the log scale).

    Parameters
    ----------
    scale : {"additive", "log"}, default "additive"
    margin : float > 0, optional
        "additive" only: the symmetric range (-margin, margin).
    low, high : float, optional
        The range: differences ("additive"), or ratios > 0 ("log"; default 0.80 and 1.25).
    ci_level : float in (0, 1), default 0.90
    """

    name = "crossover_tost"
    null_hypothesis = "B - A (the ratio B / A on the log scale) lies outside the equivalence range (low, high)"
    params = {"scale": SCALE, "margin": Real(0.0, low_open=True, optional=True), "low": Real(optional=True),
              "high": Real(optional=True), "ci_level": CI_LEVEL}
    defaults = {"scale": "additive", "margin": None, "low": None, "high": None, "ci_level": 0.90}
    layouts = ("crossover",)

    def _check(self):
        given = self.low is not None or self.high is not None
        if given and (self.low is None or self.high is None):
            raise ParameterError("`low` and `high` go together: give both ends of the equivalence range.")
        if self.scale == "log":
            if self.margin is not None:
                raise ParameterError("`margin` is for scale = 'additive'; on the log scale give `low` and `high` "
                                     "as ratios (e.g. 0.80 and 1.25).")
            if given and not self.low > 0:
                raise ParameterError(f"`low` must be a ratio > 0 on the log scale; got {self.low:g}.")
        elif self.margin is not None and given:
            raise ParameterError("`margin` and `low`/`high` both given: give a symmetric margin or the range.")
        elif self.margin is None and not given:
            raise ParameterError("`margin` is required (or give both `low` and `high`): the equivalence range.")
        lo, hi = self.bounds
        if not lo < hi:
            raise ParameterError(f"`low` must be < `high`; got low = {lo:g}, high = {hi:g}.")

    @property
    def bounds(self) -> tuple[float, float]:
        """The range in the reported units (ratios on the log scale)."""
        if self.margin is not None:
            return -self.margin, self.margin
        if self.low is None:
            return 0.80, 1.25
        return self.low, self.high

    @property
    def _log_bounds(self) -> tuple[float, float]:
        lo, hi = self.bounds
        return (math.log(lo), math.log(hi)) if self.scale == "log" else (lo, hi)

    @property
    def estimand_label(self) -> str:
        return _scale_label(self.scale)

    def null_boundary(self) -> NullBoundary:
        return NullBoundary(float(self.bounds[1]), "upper equivalence margin")

    def __call__(self, data):
        low, high = self._log_bounds
        d_ab, d_ba = _differences(data, self.scale)
        # (mean d_AB - mean d_BA) / 2 = theta0 is the two-sample t-test of d_AB - 2 theta0 against d_BA
        p_low = stats.ttest_ind(d_ab - 2 * low, d_ba, equal_var=True, alternative="greater").pvalue
        p_high = stats.ttest_ind(d_ab - 2 * high, d_ba, equal_var=True, alternative="less").pvalue
        est, se, df = _parts(d_ab, d_ba)
        crit = stats.t.ppf(0.5 + self.ci_level / 2, df)
        e, s, lo, hi = _on_scale(est, se, crit, self.scale)
        return TestResult(pvalue=float(max(p_low, p_high)), estimate=float(e), se=float(s), ci_low=float(lo),
                          ci_high=float(hi), df=df)

    def batch(self, batch):
        low, high = self._log_bounds
        _, _, est, se, df, bad = batch_differences(self.batch_layout(batch), self.scale)
        with np.errstate(all="ignore"):
            p = np.maximum(p_from_t((est - low) / se, df, "greater"), p_from_t((est - high) / se, df, "less"))
            e, s, lo, hi = _on_scale(est, se, stats.t.ppf(0.5 + self.ci_level / 2, df), self.scale)
        return hand_over(self, batch, BatchResult(pvalue=p, estimate=e, se=s, ci_low=lo, ci_high=hi), bad)


# -- the mixed model ----------------------------------------------------------------------------
#: fixed effects: intercept, period 2, treatment B (the coefficient tested)
TREAT = 2
#: grid over rho = gamma / (1 + gamma) scanned before the golden-section refinement
GRID = 0.999 * np.linspace(0.0, 1.0, 41) ** 2
GOLDEN_STEPS = 90
#: statsmodels' gradient optimisers that take ``gtol`` (its default list without L-BFGS, whose tolerance has
#: another name), with a tolerance tighter than the default, so the per-replicate fit reaches the REML
#: optimum to about 1e-7 (the default stops within about 1e-5)
FIT_METHODS, FIT_GTOL = ["bfgs", "cg"], 1e-8
#: statsmodels' note at a zero between-subject variance (the boundary estimate: an answer, not fit trouble)
SINGULAR_WARNING = r"Random effects covariance is singular"


def _design_rows(seq):
    """Fixed-effect rows (intercept, period 2, treat B) of each subject's period 1 and 2: two (n, 3) arrays."""
    seq = np.asarray(seq, float)
    one = np.ones_like(seq)
    return np.stack([one, 0 * one, seq], -1), np.stack([one, one, 1.0 - seq], -1)


class _Sums:
    """Per-replicate sums of the crossover mixed model, grouped by the subject's observed periods m (1 or 2)."""

    def __init__(self, o1, o2, y1, y2, seq):
        x1, x2 = _design_rows(seq)
        w1, w2 = o1.astype(float), o2.astype(float)
        y1, y2 = np.where(o1, y1, 0.0), np.where(o2, y2, 0.0)
        n_obs = w1.sum(1) + w2.sum(1)
        with np.errstate(all="ignore"):
            self.shift = (y1.sum(1) + y2.sum(1)) / n_obs
        y1 = np.where(o1, y1 - self.shift[:, None], 0.0)
        y2 = np.where(o2, y2 - self.shift[:, None], 0.0)
        self.m = w1 + w2                                            # (R, n)
        self.u = w1[..., None] * x1 + w2[..., None] * x2             # X_i' 1, (R, n, 3)
        self.S = (w1[..., None, None] * (x1[:, :, None] * x1[:, None, :])
                  + w2[..., None, None] * (x2[:, :, None] * x2[:, None, :]))
        s = y1 + y2                                                 # 1' y_i
        self.Ssum = self.S.sum(1)
        self.t = (y1[..., None] * x1 + y2[..., None] * x2).sum(1)    # X' y
        self.yy = (y1 * y1 + y2 * y2).sum(1)
        self.n_obs = n_obs
        self.by_m = {}
        for k in (1, 2):
            g = (self.m == k).astype(float)
            self.by_m[k] = (np.einsum("rn,rni,rnj->rij", g, self.u, self.u), np.einsum("rn,rni->ri", g * s, self.u),
                            (g * s * s).sum(1), g.sum(1))


def _criterion(gamma, st: _Sums):
    """REML ``-2 log L`` with sigma_e^2 profiled out (up to a constant), and the GLS fit.

    ``gamma`` has shape (R,) or (R, K) (K trial values per replicate); with
    ``c_m = gamma / (1 + m gamma)`` a subject with m observed periods has
    ``V_i^-1 = (I - c_m J) / sigma_e^2``, so ``X'V^-1X``, ``X'V^-1y`` and ``y'V^-1y`` need only
    the sums over the subjects with m = 1 and m = 2 (Harville 1977 for the REML criterion).
    """
    g = gamma if gamma.ndim == 2 else gamma[:, None]
    A = np.repeat(st.Ssum[:, None], g.shape[1], axis=1)
    w = np.repeat(st.t[:, None], g.shape[1], axis=1)
    Q = st.yy[:, None] + 0.0 * g
    logv = 0.0 * g
    for k, (M, v, q, count) in st.by_m.items():
        ck = g / (1.0 + k * g)
        A = A - ck[..., None, None] * M[:, None]
        w = w - ck[..., None] * v[:, None]
        Q = Q - ck * q[:, None]
        logv = logv + count[:, None] * np.log1p(k * g)
    beta = np.linalg.solve(A, w[..., None])[..., 0]
    Q = Q - np.einsum("...i,...i->...", beta, w)
    _, logdet = np.linalg.slogdet(A)
    f = (st.n_obs - 3.0)[:, None] * np.log(Q) + logv + logdet
    if gamma.ndim == 1:
        return f[:, 0], beta[:, 0], Q[:, 0]
    return f, beta, Q


def _solve(st: _Sums):
    """REML estimate of gamma = sigma_b^2 / sigma_e^2 per replicate.

    The criterion is scanned on :data:`GRID` (in ``rho = gamma / (1 + gamma)``) and refined by
    golden-section search between the grid neighbours of the minimum; a minimum on the first
    grid point whose refinement is no better than rho = 0 is the boundary estimate 0.
    """
    R = st.yy.shape[0]
    rho = np.broadcast_to(GRID, (R, GRID.size))
    with np.errstate(all="ignore"):
        f, _, _ = _criterion(rho / (1.0 - rho), st)
    f = np.where(np.isfinite(f), f, np.inf)
    k = np.argmin(f, axis=1)
    a = GRID[np.maximum(k - 1, 0)]
    b = GRID[np.minimum(k + 1, GRID.size - 1)]
    inv = (math.sqrt(5.0) - 1.0) / 2.0
    crit = lambda r: _criterion(r / (1.0 - r), st)[0]  # noqa: E731
    with np.errstate(all="ignore"):
        for _ in range(GOLDEN_STEPS):
            c, d = b - inv * (b - a), a + inv * (b - a)
            left = crit(c) < crit(d)
            b = np.where(left, d, b)
            a = np.where(left, a, c)
        x = 0.5 * (a + b)
        at_zero = (k == 0) & (crit(np.zeros(R)) <= crit(x))
    rho_hat = np.where(at_zero, 0.0, x)
    return rho_hat / (1.0 - rho_hat)


def fit_crossover_batch(layout, scale):
    """Batched REML fit of ``y ~ 1 + period + treat``, random subject intercept, on the observed outcomes.

    Returns a dict of arrays (R,): ``estimate``, ``var`` (model-based), ``df_satterthwaite``,
    ``gamma``, ``sigma_b2``, ``sigma_e2``, and ``bad`` (replicates the per-replicate path decides).
    """
    y1, y2 = layout.y1, layout.y2
    R = layout.size
    bad = np.zeros(R, bool)
    if scale == "log":
        with np.errstate(all="ignore"):
            bad = np.any(layout.observed & ~(layout.y > 0), axis=1)
            y1, y2 = np.log(y1), np.log(y2)
    o1, o2 = layout.seen1, layout.seen2
    seq = layout.sequence
    both = o1 & o2
    complete = [np.count_nonzero(both & (seq == s), axis=1) for s in (0, 1)]
    bad |= (complete[0] < 1) | (complete[1] < 1) | (complete[0] + complete[1] < 3)
    out = {"estimate": np.full(R, np.nan), "var": np.full(R, np.nan), "df_satterthwaite": np.full(R, np.nan),
           "gamma": np.full(R, np.nan), "sigma_b2": np.full(R, np.nan), "sigma_e2": np.full(R, np.nan)}
    good = ~bad
    if good.any():
        st = _Sums(o1[good], o2[good], y1[good], y2[good], seq)
        g = _solve(st)
        with np.errstate(all="ignore"):
            _, beta, Q = _criterion(g, st)
            se2 = Q / (st.n_obs - 3.0)
            sb2 = g * se2
            var, df = satterthwaite(st.m, st.u, st.S, sb2, se2, TREAT)
        for key, val in (("estimate", beta[:, TREAT]), ("var", var), ("df_satterthwaite", df), ("gamma", g),
                         ("sigma_b2", sb2), ("sigma_e2", se2)):
            out[key][good] = val
    out["bad"] = bad
    out["complete"] = complete[0] + complete[1]
    return out


class CrossoverMixed(Analysis):
    """Mixed model of an AB/BA crossover: random subject intercept, period and treatment fixed, REML.

    ``y_ik = mu + pi [period 2] + tau [treatment B] + b_i + e_ik`` (Jones & Kenward 2003,
    ch. 2), fitted to every observed outcome, so subjects seen in period 1 only add
    between-subject information. Per replicate: ``statsmodels`` ``MixedLM`` (REML); the
    reported SE is the model-based ``sqrt([(X' V^-1 X)^-1]_tau)`` at the REML variance
    estimates, which on complete data with a positive between-subject variance equals
    the period-difference t-test's SE. Its warnings (``ConvergenceWarning``) reach the
    engine, except statsmodels' notes that the estimate is on the boundary (between-subject
    variance 0, a singular random-effects covariance), an answer rather than fit trouble
    (as ``mixed_model``).

    The batch path maximises the same REML criterion for all replicates at once: with
    ``gamma = sigma_b^2 / sigma_e^2`` a subject's covariance inverse is
    ``(I - c_m J) / sigma_e^2``, ``c_m = gamma / (1 + m gamma)`` for its m observed periods, so
    the criterion with sigma_e^2 profiled out needs only sums over the subjects with one and
    with two periods; it is scanned on a grid in ``gamma / (1 + gamma)`` and refined by
    golden-section search (boundary estimate 0 kept). It agrees with statsmodels run to a
    tight gradient tolerance to about 1e-7 (``tests/test_crossover.py``). Replicates without
    a complete subject in each sequence (or, on the log scale, with an outcome <= 0) go to
    the per-replicate path, which raises ``ValueError`` there.

    Parameters
    ----------
    scale : {"additive", "log"}, default "additive"
    df : {"satterthwaite", "between-within", "wald"}, default "satterthwaite"
        Reference distribution: t with Satterthwaite's df (Giesbrecht & Burns 1985, as
        ``mixed_model``), t with the between-within df (observations minus subjects minus
        2: the complete subjects minus 2), or the normal.
    alternative : {"two-sided", "greater", "less"}
    ci_level : float in (0, 1), default 0.95
    """

    name = "crossover_mixed"
    null_hypothesis = "treatments A and B have the same mean (the same geometric mean on the log scale)"
    params = {"scale": SCALE, "df": Choice(DF_METHODS), "alternative": ALTERNATIVE, "ci_level": CI_LEVEL}
    defaults = {"scale": "additive", "df": "satterthwaite", "alternative": "two-sided", "ci_level": 0.95}
    layouts = ("crossover",)

    @property
    def estimand_label(self) -> str:
        return _scale_label(self.scale)

    def _finish(self, est, var, df):
        se = np.sqrt(var)
        with np.errstate(all="ignore"):
            stat = est / se
            p, crit = p_and_crit(stat, df, self.alternative, self.ci_level)
            e, s, lo, hi = _on_scale(est, se, crit, self.scale)
        return p, e, s, lo, hi

    def __call__(self, data):
        from statsmodels.regression.mixed_linear_model import MixedLM  # not statsmodels.api: it loads every model

        y1, y2, seq = periods(data, self.scale)
        _differences(data, self.scale)  # the same minimum of complete subjects as the batch path
        x1, x2 = _design_rows(seq)
        y = np.concatenate([y1, y2])
        X = np.concatenate([x1, x2])
        groups = np.tile(np.arange(seq.size), 2)
        keep = np.isfinite(y)
        y, X, groups = y[keep], X[keep], groups[keep]
        model = MixedLM(y, X, groups=groups)
        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", message=BOUNDARY_WARNING)
            warnings.filterwarnings("ignore", message=SINGULAR_WARNING)
            fit = model.fit(reml=True, method=FIT_METHODS, gtol=FIT_GTOL)
        labels, g = np.unique(groups, return_inverse=True)
        m = np.bincount(g).astype(float)
        u = np.zeros((labels.size, 3))
        np.add.at(u, g, X)
        S = np.zeros((labels.size, 3, 3))
        np.add.at(S, g, X[:, :, None] * X[:, None, :])
        var, df_s = satterthwaite(m, u, S, float(np.asarray(fit.cov_re)[0, 0]), float(fit.scale), TREAT)
        df = {"satterthwaite": float(df_s), "wald": None,
              "between-within": between_within_df(X, groups, TREAT)}[self.df]
        est = float(np.asarray(fit.fe_params)[TREAT])
        p, e, s, lo, hi = self._finish(np.asarray(est), np.asarray(var), df)
        return TestResult(pvalue=float(p), estimate=float(e), se=float(s), ci_low=float(lo), ci_high=float(hi),
                          statistic=est / math.sqrt(var), df=math.inf if df is None else float(df))

    def batch(self, batch):
        fit = fit_crossover_batch(self.batch_layout(batch), self.scale)
        df = {"satterthwaite": fit["df_satterthwaite"], "wald": None,
              "between-within": fit["complete"] - 2.0}[self.df]
        p, e, s, lo, hi = self._finish(fit["estimate"], fit["var"], df)
        res = BatchResult(pvalue=p, estimate=e, se=s, ci_low=lo, ci_high=hi)
        return hand_over(self, batch, res, fit["bad"])
