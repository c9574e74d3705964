"""Two-arm time to event: the log-rank test and Cox proportional hazards regression.

Layout understood: a long table with ``time`` (> 0), ``event`` (1 event,
0 right-censored) and ``arm`` in {0, 1}. Censored participants count as at
risk at their censoring time, also when an event happens at that same time.

Log-rank notation, summing over the distinct event times j with ``d_j``
events out of ``r_j`` at risk (``d1_j``, ``r1_j`` in arm 1):

    U = O1 - E1 = sum_j (d1_j - r1_j d_j / r_j)
    V = sum_j d_j (r_j - d_j) r1_j (r_j - r1_j) / (r_j^2 (r_j - 1))   (r_j > 1)

``Z = U / sqrt(V)``; ties are handled by this hypergeometric variance, as in
:func:`statsmodels.duration.survfunc.survdiff`.
"""

from __future__ import annotations

import math
import os
import warnings

import numpy as np
from scipy import special

from .._validation import Bool, Choice
from ..errors import ParameterError
from .base import ALTERNATIVE, CI_LEVEL, Analysis, BatchResult, TestResult, hand_over
from .numeric import p_from_z, wald


#: replicate-by-row cells handled at once by the batch log-rank path
_BLOCK_CELLS = 1_000_000
#: replicate-by-row cells per block of the compiled log-rank merge (its keys stay in cache)
_MERGE_BLOCK_CELLS = 1 << 15
#: Newton steps of the batch Cox fit before a replicate goes to the per-replicate path, and the
#: relative step size taken as settled
_COX_MAX_ITER = 100
_COX_TOL = 1e-10


def survival_columns(data):
    """``time``, ``event`` (0/1 float) and ``arm`` (0/1 float) of one replicate's participants with a time.

    Rows whose ``time`` is missing (NaN) are left out; other bad values raise ``ValueError``.
    """
    time = np.asarray(data["time"], float)
    event = np.asarray(data["event"], float)
    arm = np.asarray(data["arm"])
    seen = ~np.isnan(time)  # a missing follow-up time (NaN): that participant is left out (complete cases)
    if not seen.all():
        time, event, arm = time[seen], event[seen], arm[seen]
    levels = set(np.unique(arm).tolist())
    if levels != {0, 1}:
        raise ValueError(f"two-arm analyses need arm labels 0 and 1; got {sorted(levels)}")
    if not np.all(np.isfinite(time)) or np.any(time < 0):
        raise ValueError("survival analyses need finite times >= 0")
    if np.any((event != 0) & (event != 1)):
        raise ValueError("survival analyses need event in {0, 1}")
    return time, event, arm.astype(float)


def logrank_terms(time, event, arm) -> tuple[float, float]:
    """``(U, V)`` of one replicate (see the module docstring), via the distinct times."""
    utimes, inv = np.unique(time, return_inverse=True)
    m = utimes.size
    at = np.bincount(inv, minlength=m)
    at1 = np.bincount(inv, weights=arm, minlength=m)
    d = np.bincount(inv, weights=event, minlength=m)
    d1 = np.bincount(inv, weights=event * arm, minlength=m)
    r = np.cumsum(at[::-1])[::-1].astype(float)
    r1 = np.cumsum(at1[::-1])[::-1]
    u = float(np.sum(d1 - r1 * d / r))
    keep = r > 1
    v = float(np.sum((d * (r - d) * r1 * (r - r1))[keep] / (r[keep] ** 2 * (r[keep] - 1))))
    return u, v


def batch_logrank_terms(time, event, arm, observed=None):
    """``(U, V)`` arrays over replicates (rows of ``time``, ``event``), vectorised with numpy.

    ``arm`` is shared (N,) or per replicate (R, N); ``observed`` (R, N) marks the rows that
    take part (None: all). Unobserved rows are moved to the end of each row (time +inf) and
    count neither at risk nor as events. Each row is sorted by time; a run of equal times is
    one risk-set time, whose numbers at risk are the observed rows from the run's first
    position on. Event counts per run come from ``bincount`` over (row, run) labels.
    """
    size, m = time.shape
    if observed is None:
        t_in, w = time, None
    else:
        t_in, w = np.where(observed, time, np.inf), np.asarray(observed, float)
    order = np.argsort(t_in, axis=1, kind="stable")
    t = np.take_along_axis(t_in, order, axis=1)
    d = np.take_along_axis(np.asarray(event, float), order, axis=1)
    a = np.broadcast_to(np.asarray(arm, float), time.shape)
    a = np.take_along_axis(a, order, axis=1)
    start = np.ones((size, m), bool)
    start[:, 1:] = t[:, 1:] != t[:, :-1]
    run = np.cumsum(start, axis=1) - 1
    label = (run + m * np.arange(size)[:, None]).ravel()
    nbin = size * m
    if w is None:
        at_risk = m - np.broadcast_to(np.arange(m), (size, m))
    else:
        ws = np.take_along_axis(w, order, axis=1)
        d, a = d * ws, a * ws
        at_risk = ws.sum(axis=1, keepdims=True) - (np.cumsum(ws, axis=1) - ws)
    dj = np.bincount(label, weights=d.ravel(), minlength=nbin).reshape(size, m)
    d1j = np.bincount(label, weights=(d * a).ravel(), minlength=nbin).reshape(size, m)
    before1 = np.cumsum(a, axis=1) - a
    total1 = a.sum(axis=1, keepdims=True)
    rj = np.bincount(label, weights=np.where(start, at_risk, 0).ravel(), minlength=nbin).reshape(size, m)
    r1j = np.bincount(label, weights=np.where(start, total1 - before1, 0).ravel(), minlength=nbin).reshape(size, m)
    with np.errstate(all="ignore"):
        u = np.sum(np.where(rj > 0, d1j - r1j * dj / rj, 0.0), axis=1)
        v = np.sum(np.where(rj > 1, dj * (rj - dj) * r1j * (rj - r1j) / (rj**2 * (rj - 1)), 0.0), axis=1)
    return u, v


def absent_first(time, event, present, arm):
    """Padding rows moved before every time, without an event; and the replicates an arm has no row in.

    A row at ``-inf`` without an event sorts first, opens no event time and has left every risk
    set before the first real time, so the risk-set sums of :func:`batch_logrank_terms` and
    :func:`_cox_event_terms` are those of the present rows alone. Returns ``(time, event, empty)``;
    without padding the arrays themselves and ``empty = None`` (complete data: unchanged arithmetic).
    ``empty`` (R,) marks the replicates with no present row in an arm: the per-replicate path
    refuses them (:func:`survival_columns`), so the batch path hands them over.
    """
    if present is None:
        return time, event, None
    present = np.asarray(present, bool)
    arm = np.broadcast_to(np.asarray(arm), present.shape)
    empty = ~np.any(present & (arm == 0), axis=1) | ~np.any(present & (arm == 1), axis=1)
    return np.where(present, time, -np.inf), np.where(present, event, 0), empty


def logrank_backend() -> str:
    """Which path computes the batch log-rank sums now: 'numba' (the sorted-arms merge) or 'numpy'.

    'numba' when numba is importable and ``SIMPOWER_NO_NUMBA`` is unset (or 0, false, no); read
    at each call. The two paths agree to rounding (about 1e-15 relative).
    """
    if os.environ.get("SIMPOWER_NO_NUMBA", "").strip().lower() not in ("", "0", "false", "no"):
        return "numpy"
    from . import _survival_kernels  # imports numba (if there) on first use only

    return "numba" if _survival_kernels.HAVE_NUMBA else "numpy"


def _columns(mask: np.ndarray):
    """The columns where ``mask`` (1-D) is True: a slice when they are one run (indexing gives views), else indices."""
    idx = np.flatnonzero(mask)
    if idx.size and idx[-1] - idx[0] + 1 == idx.size:
        return slice(int(idx[0]), int(idx[-1]) + 1)
    return idx


def merged_logrank_terms(time, event, arm, observed=None):
    """``(U, V)`` arrays over replicates by the compiled merge of each arm's sorted keys.

    Same inputs as :func:`batch_logrank_terms` (times finite and >= 0 and events 0/1 where
    observed); see :mod:`simpower.analyses._survival_kernels`. Runs over blocks of
    :data:`_MERGE_BLOCK_CELLS` cells, whose keys are built in place in two scratch arrays
    (one per arm) and sorted there.
    """
    from . import _survival_kernels as kern

    size, width = time.shape
    arm = np.asarray(arm)
    u, v = np.empty(size), np.empty(size)
    rows = max(1, min(size, _MERGE_BLOCK_CELLS // max(width, 1)))
    if arm.ndim == 1:  # shared design: each arm's columns, sorted apart
        cols = (_columns(arm == 0), _columns(arm == 1))
        bufs = [np.empty((rows, np.arange(width)[c].size), np.uint64) for c in cols]
    else:  # arms per replicate: the other arm's rows take no part in an arm's keys
        bufs = [np.empty((rows, width), np.uint64) for _ in (0, 1)]
    full = [np.full(rows, b.shape[1], np.int64) for b in bufs]
    for r0 in range(0, size, rows):
        sl = slice(r0, min(size, r0 + rows))
        k = sl.stop - r0
        keys, counts = [], []
        for label in (0, 1):
            if arm.ndim == 1:
                c = cols[label]
                t, e = time[sl, c], event[sl, c]
                take = None if observed is None else observed[sl, c]
            else:
                t, e = time[sl], event[sl]
                take = arm[sl] == label if observed is None else (arm[sl] == label) & observed[sl]
            key = kern.time_event_keys(t, e, take, out=bufs[label][:k])
            key.sort(axis=1)
            keys.append(key)
            counts.append(full[label][:k] if take is None else take.sum(axis=1, dtype=np.int64))
        kern.merge_terms(keys[0], keys[1], counts[0], counts[1], u[sl], v[sl])
    return u, v


def _plain(time, event, nan_ok: bool = False) -> bool:
    """Every time finite and >= 0 and every event 0 or 1 (whole-array reductions, no per-row masks).

    ``nan_ok``: missing times (NaN) are allowed (every time that is not NaN is checked).
    """
    if time.size == 0:
        return False
    with np.errstate(invalid="ignore"):
        if nan_ok:  # fmin / fmax pass over NaN (all NaN: NaN, and False below)
            low, high = np.fmin.reduce(time, axis=None), np.fmax.reduce(time, axis=None)
        else:
            low, high = time.min(), time.max()
        if not (low >= 0 and np.isfinite(high)):
            return False
    return bool(event.min() >= 0 and event.max() <= 1 and (event.dtype.kind in "iub" or np.all(event == np.round(event))))


class LogRank(Analysis):
    """Log-rank test comparing the survival of two arms.

    H0: the two arms have the same survival (hazard) function. ``Z = (O1 -
    E1) / sqrt(V)`` (module docstring); 'greater' means more events than
    expected in arm 1, i.e. a hazard ratio (arm 1 vs arm 0) above 1. The
    two-sided p-value of the per-replicate path is that of
    :func:`statsmodels.duration.survfunc.survdiff`; the batch path computes
    ``U`` and ``V`` for all replicates at once with sorting and cumulative
    sums and agrees with it to rounding.

    The estimate is the one-step (Peto) log hazard ratio ``U / V`` with SE
    ``1 / sqrt(V)`` and the matching CI; it is close to the Cox estimate for
    hazard ratios near 1 and biased towards 0 further away. Without any
    event ``V = 0``: the p-value is NaN (counted as ``nonfinite_pvalue``).

    ``analytic_power`` returns Schoenfeld's (1981) approximation
    (:func:`simpower.analytic.schoenfeld_power`) at the process's expected
    number of events, for processes that state it (``survival_two_arm``).
    It is an approximation: good for hazard ratios near 1 with many events,
    so a cross-check flag elsewhere means "approximation off", not
    necessarily a fault.
    """

    name = "logrank"
    estimand_label = "log hazard ratio"
    null_hypothesis = "the survival functions of the two arms are equal"
    params = {"alternative": ALTERNATIVE, "ci_level": CI_LEVEL}
    defaults = {"alternative": "two-sided", "ci_level": 0.95}

    def _out(self, u, v):
        with np.errstate(all="ignore"):
            z = u / np.sqrt(v)
            est, se = u / v, 1.0 / np.sqrt(v)
        crit = special.ndtri(0.5 + self.ci_level / 2)
        return {"pvalue": p_from_z(z, self.alternative), "estimate": est, "se": se,
                "ci_low": est - crit * se, "ci_high": est + crit * se, "statistic": z}

    def __call__(self, data):
        from statsmodels.duration.survfunc import survdiff

        time, event, arm = survival_columns(data)
        u, v = logrank_terms(time, event, arm)
        if not v > 0:
            return TestResult(pvalue=math.nan, estimate=math.nan)
        out = {k: float(x) for k, x in self._out(u, v).items()}
        if self.alternative == "two-sided":
            chisq, p = survdiff(time, event, arm)
            out["pvalue"] = float(p)
        return TestResult(**out)

    layouts = ("survival",)

    def _supports(self, layout):
        """Both arm labels in the design (shared or per replicate); padding and missing times are honoured."""
        return layout.labels == (0, 1)

    def batch(self, batch):
        layout = self.batch_layout(batch)
        time, arm = np.asarray(layout.time, float), np.asarray(layout.arm)
        event = np.asarray(layout.event)
        # replicates the per-replicate path refuses (it raises): a bad time or event among the rows
        # it keeps (present, time not NaN), or an arm without any such row; they are handed to it
        if layout.complete and arm.ndim == 1 and _plain(time, event):  # complete, shared arms, values fine
            refused, take = np.zeros(batch.size, bool), None
        else:
            keep = np.isnan(time)
            np.logical_not(keep, out=keep)
            if layout.present is not None:
                keep &= layout.present
            if _plain(time, event, nan_ok=True):  # every time that is there fine, every event 0/1: take = keep
                refused, take = np.zeros(batch.size, bool), keep
            else:
                with np.errstate(invalid="ignore"):
                    good = np.isfinite(time) & (time >= 0) & ((event == 0) | (event == 1))
                refused = np.any(keep & ~good, axis=1)
                take = keep & good
            for label in (0, 1):  # an arm without a kept row (shared arms: that arm's columns)
                seen = keep[:, _columns(arm == label)] if arm.ndim == 1 else keep & (arm == label)
                refused |= ~np.any(seen, axis=1)
            if refused.any():
                take = take & ~refused[:, None]
        terms = merged_logrank_terms if logrank_backend() == "numba" else batch_logrank_terms
        u, v = np.empty(batch.size), np.empty(batch.size)
        step = max(1, _BLOCK_CELLS // max(time.shape[1], 1))  # bounds the memory of the sort-and-count arrays
        for s in range(0, batch.size, step):
            sl = slice(s, s + step)
            u[sl], v[sl] = terms(time[sl], event[sl], arm if arm.ndim == 1 else arm[sl],
                                 None if take is None else take[sl])
        out = self._out(u, v)
        none = ~(v > 0)  # no event, or none with two at risk: the per-replicate path gives p = NaN only
        if none.any():
            for k in out:
                out[k] = np.where(none, np.nan, out[k])
        res = BatchResult(**{k: x for k, x in out.items() if k != "statistic"})
        return hand_over(self, batch, res, refused)


def _cox_event_terms(time, event, arm, ties: str):
    """Per-event constants of the Cox partial likelihood with one binary covariate, over replicates.

    Rows of ``time``, ``event`` (R, N) are replicates; ``arm`` (N,) is shared or (R, N) per replicate. Each row is sorted
    by time once; a run of equal times is one tie group with ``r0``, ``r1`` at risk (censored rows
    at that time included) and ``d0``, ``d1`` events in arms 0 and 1. The ``k``-th event of a
    group (k = 0 .. d - 1) contributes ``p_k = A e^b / (B + A e^b)`` to the expected number of
    arm-1 events, with ``A = r1 - f d1``, ``B = r0 - f d0``; ``f = 0`` (Breslow) or ``k / d``
    (Efron). Returns ``q = log A - log B`` (R, N), the event weights ``w`` (R, N) (0 off events,
    where ``q`` is 0), arm-1 events ``d1`` (R,), and the counts of events with ``r1 > 0`` and
    with ``r0 = 0`` (R,), which tell whether the estimate is finite (see :func:`_cox_newton`).
    """
    size, m = time.shape
    order = np.argsort(time, axis=1, kind="stable")
    t = np.take_along_axis(time, order, axis=1)
    d = np.take_along_axis(np.asarray(event, float), order, axis=1)
    a = np.asarray(arm, float)
    a = a[order] if a.ndim == 1 else np.take_along_axis(a, order, axis=1)  # shared (N,) or per replicate
    start = np.ones((size, m), bool)
    start[:, 1:] = t[:, 1:] != t[:, :-1]
    label = (np.cumsum(start, axis=1) - 1 + m * np.arange(size)[:, None]).ravel()
    nbin = size * m

    def per_group(values):  # a group's value, read back on each of its rows
        return np.bincount(label, weights=values.ravel(), minlength=nbin)[label].reshape(size, m)

    pos = np.arange(m)
    before = np.cumsum(d, axis=1) - d  # events on earlier rows of the sorted replicate
    r = per_group(np.where(start, m - pos, 0.0))
    r1 = per_group(np.where(start, a.sum(axis=1, keepdims=True) - (np.cumsum(a, axis=1) - a), 0.0))
    dg = per_group(d)
    d1 = per_group(d * a)
    r0, d0 = r - r1, dg - d1
    if ties == "efron":
        k = before - per_group(np.where(start, before, 0.0))  # rank of an event within its group
        with np.errstate(all="ignore"):
            f = np.where(d > 0, k / dg, 0.0)
    else:
        f = np.zeros_like(d)
    ev = d > 0
    with np.errstate(divide="ignore", invalid="ignore"):
        q = np.where(ev, np.log(r1 - f * d1) - np.log(r0 - f * d0), 0.0)
    n1 = np.sum(ev & (r1 > 0), axis=1)
    n0 = np.sum(ev & (r0 == 0), axis=1)
    return q, d, (d * a).sum(axis=1), n1, n0


def _cox_score_info(beta, q, w, d1):
    """Score ``U(b)`` and observed information ``I(b)`` of the log partial likelihood (arrays (R,))."""
    p = special.expit(beta[:, None] + q)
    return d1 - np.sum(w * p, axis=1), np.sum(w * p * (1.0 - p), axis=1)


def _cox_newton(q, w, d1, n1, n0, max_iter: int = _COX_MAX_ITER, tol: float = _COX_TOL):
    """Newton-Raphson from b = 0 on every replicate at once: ``(beta, info, ok)``.

    The score ``U(b) = d1 - sum p_k(b)`` decreases in b from ``U(-inf) = d1 - n0`` to
    ``U(+inf) = d1 - n1`` (``p_k`` tends to 1 or 0 by whether ``B`` or ``A`` is 0), so a finite
    estimate exists exactly when ``d1 - n1 < 0 < d1 - n0``; other replicates (an arm without
    events, or all of one arm's events while no one of the other arm was at risk) are not
    ``ok``, nor are those whose plain Newton steps (statsmodels' method, no step halving) do not
    settle within ``max_iter`` steps.
    """
    finite = (d1 - n1 < 0) & (d1 - n0 > 0)
    beta = np.zeros(d1.shape)
    active = finite.copy()
    done = np.zeros(d1.shape, bool)
    for _ in range(max_iter):
        idx = np.flatnonzero(active)
        if idx.size == 0:
            break
        u, info = _cox_score_info(beta[idx], q[idx], w[idx], d1[idx])
        with np.errstate(all="ignore"):
            step = u / info
        bad = ~np.isfinite(step)
        beta[idx] = np.where(bad, beta[idx], beta[idx] + step)
        settled = ~bad & (np.abs(step) <= tol * np.maximum(1.0, np.abs(beta[idx])))
        done[idx[settled]] = True
        active[idx[settled | bad]] = False
    ok = finite & done
    info = np.full(d1.shape, np.nan)
    if np.any(ok):
        info[ok] = _cox_score_info(beta[ok], q[ok], w[ok], d1[ok])[1]
    ok &= np.isfinite(beta) & (info > 0)
    return beta, info, ok


def _cox_score_residuals(beta, t, d, a):
    """Score residuals of every row at ``beta`` (R,): Breslow's form, rows already sorted by time.

    ``t``, ``d``, ``a`` (R, N): times sorted ascending within each row (rows taking no part at
    ``-inf`` with no event, so before every risk set), events, arm. With ``e = exp(beta a)``, the
    risk-set sums ``S0``, ``S1`` of ``e`` and ``e a`` over the rows with a time >= ``t_j`` (censored
    rows at ``t_j`` included), ``xbar_j = S1 / S0`` and ``d_j`` events at ``t_j``, row i's residual is

        L_i = delta_i (a_i - xbar(t_i)) - e_i sum_{t_j <= t_i} (d_j / S0_j) (a_i - xbar_j)

    (Lin & Wei 1989, JASA 84:1074-1078 -- from memory): what statsmodels
    ``PHReg.score_residuals`` computes for either ``ties`` (a row censored before the first event
    gets 0 here, NaN there). Their sum is the Breslow score at ``beta``; at 0 it is the log-rank
    ``U = O1 - E1``.
    """
    size, m = t.shape
    start = np.ones((size, m), bool)
    start[:, 1:] = t[:, 1:] != t[:, :-1]
    e = np.exp(beta[:, None] * a)
    s0 = np.cumsum(e[:, ::-1], axis=1)[:, ::-1]  # sum over this row and the later ones
    s1 = np.cumsum((e * a)[:, ::-1], axis=1)[:, ::-1]
    first = np.maximum.accumulate(np.where(start, np.arange(m), 0), axis=1)  # each row's tie group start
    big0, big1 = np.take_along_axis(s0, first, axis=1), np.take_along_axis(s1, first, axis=1)
    xbar = big1 / big0
    label = (np.cumsum(start, axis=1) - 1 + m * np.arange(size)[:, None]).ravel()
    dg = np.bincount(label, weights=d.ravel(), minlength=size * m)[label].reshape(size, m)
    h = np.where(start & (dg > 0), dg / big0, 0.0)  # the hazard increment, once per tie group
    h0, h1 = np.cumsum(h, axis=1), np.cumsum(h * xbar, axis=1)
    return d * (a - xbar) - e * (a * h0 - h1)


def _cluster_sums_squared(resid, codes, n_codes):
    """``sum_g (sum_{i in g} resid_i)^2`` per replicate; ``codes`` (R, N) in 0 .. n_codes - 1."""
    size = resid.shape[0]
    label = (codes + n_codes * np.arange(size)[:, None]).ravel()
    sums = np.bincount(label, weights=resid.ravel(), minlength=size * n_codes).reshape(size, n_codes)
    return np.sum(sums**2, axis=1)


def _cluster_codes(cluster, take):
    """Cluster ids as codes 0 .. K - 1 (R, N), K, and the clusters with a row in the fit per replicate."""
    cluster = np.asarray(cluster)
    uniq, inv = np.unique(cluster, return_inverse=True)
    codes = np.broadcast_to(inv.reshape(cluster.shape), take.shape)
    k = uniq.size
    size = take.shape[0]
    label = (codes + k * np.arange(size)[:, None])[take]
    seen = np.bincount(label, minlength=size * k).reshape(size, k) > 0
    return codes, k, seen.sum(axis=1)


class Cox(Analysis):
    """Cox proportional hazards regression on the arm (statsmodels ``PHReg``); Wald test.

    H0: the hazard ratio (arm 1 vs arm 0) is 1. The estimate is the log
    hazard ratio with its model SE (observed information at the estimate)
    and Wald CI; ``ties`` is 'breslow' (statsmodels' default) or 'efron'.
    An arm without events makes the partial likelihood monotone (no finite
    estimate): the per-replicate path warns :class:`PerfectSeparationWarning`
    before fitting so the engine counts the replicate as fit trouble; the
    fit's own warnings and errors propagate.

    The batch path (layout ``survival``, arm shared by the replicates;
    padding rows and missing times are left out, complete cases as on the
    per-replicate path) sorts each replicate's times once, reduces every event to one
    constant of the partial likelihood (:func:`_cox_event_terms`: risk sets
    by reversed cumulative counts per arm, Efron's correction within tie
    groups), and takes plain Newton-Raphson steps from 0 for all replicates
    at once, as statsmodels does for one. Replicates without a finite
    estimate (decided exactly from the event counts, see :func:`_cox_newton`)
    or whose steps do not settle are handed to the per-replicate path, so
    their fields and trouble are the same as there.

    Clustered data (``cov_type = 'cluster'``, grouping by the ``cluster``
    column): the estimate is the same, its variance the robust sandwich of
    Lin & Wei (1989), ``I^-1 (sum_g L_g^2) I^-1`` with ``I`` the observed
    information and ``L_g`` the sum of the score residuals of cluster g at
    the estimate (:func:`_cox_score_residuals`), which is what statsmodels
    ``PHReg(...).fit(groups=cluster)`` computes (its ``robust_covariance``;
    with ``ties = 'efron'`` it uses Efron's information and Breslow's score
    residuals, and so does this option). ``small_sample = true`` multiplies
    the robust variances by ``G / (G - 1)``, G the clusters with a
    participant in the fit (common practice, as the CR1 factor of
    cluster-robust regression). ``test = 'score'`` replaces the Wald p-value
    by the robust score test at beta = 0: ``Z = U / sqrt(sum_g L_g(0)^2)``
    with ``U = O1 - E1`` the log-rank numerator and ``L_g(0)`` the clusters'
    summed score residuals at 0 (the log-rank test for clustered data; Lin &
    Wei 1989), whatever ``ties``; the estimate, SE and CI stay the robust
    Wald ones. The batch path (layout ``survival`` with a ``cluster``
    column; arms and clusters shared or per replicate, padding and missing
    times left out as the per-replicate path leaves them out) computes the
    residuals for all replicates at once.
    """

    name = "cox"
    estimand_label = "log hazard ratio"
    null_hypothesis = "the hazard ratio (treatment vs control) is 1"
    # cov_type, test and small_sample are optional (unset = 'nonrobust', 'wald', false), so the specs,
    # fingerprints and seeds of the analyses written before them stay the same
    params = {"alternative": ALTERNATIVE, "ci_level": CI_LEVEL, "ties": Choice(("breslow", "efron")),
              "cov_type": Choice(("nonrobust", "cluster"), optional=True),
              "test": Choice(("wald", "score"), optional=True), "small_sample": Bool(optional=True)}
    defaults = {"alternative": "two-sided", "ci_level": 0.95, "ties": "breslow", "cov_type": None, "test": None,
                "small_sample": None}

    def _check(self):
        if self.cov_type != "cluster":
            if self.test == "score":
                raise ParameterError("`test` = 'score' is the cluster-robust score test: set `cov_type` = 'cluster' "
                                     "(the model-based score test is the `logrank` analysis).")
            if self.small_sample:
                raise ParameterError("`small_sample` corrects the cluster-robust variance: set `cov_type` = "
                                     "'cluster', or leave `small_sample` out.")

    @property
    def _robust(self) -> bool:
        return self.cov_type == "cluster"

    def __call__(self, data):
        from statsmodels.duration.hazard_regression import PHReg
        from statsmodels.tools.sm_exceptions import PerfectSeparationWarning

        time, event, arm = survival_columns(data)
        if self._robust:
            cluster = _cluster_column(data)
        for a in (0, 1):
            if not np.any(event[arm == a] > 0):
                warnings.warn(PerfectSeparationWarning(
                    f"no events in arm {a}: the log hazard ratio has no finite maximum partial likelihood estimate"))
                break
        if self._robust:
            return self._robust_fit(time, event, arm, cluster)
        fit = PHReg(time, arm[:, None], status=event, ties=self.ties).fit()
        out = wald(float(fit.params[0]), float(fit.bse[0]), self.alternative, self.ci_level)
        return TestResult(**{k: float(v) for k, v in out.items()})

    def _robust_fit(self, time, event, arm, cluster):
        """The per-replicate path with ``cov_type = 'cluster'``: statsmodels ``PHReg.fit(groups=)``."""
        from statsmodels.duration.hazard_regression import PHReg

        g = np.unique(cluster).size
        if g < 2:
            raise ValueError(f"cox with cov_type = 'cluster' needs at least 2 clusters; got {g}")
        factor = g / (g - 1.0) if self.small_sample else 1.0
        # rows censored before the first event are in no risk set: PHReg leaves them out of the fit
        # and gives them a NaN score residual (so a NaN robust variance); their residual is 0
        keep = time >= time[event == 1].min() if np.any(event == 1) else np.ones(time.size, bool)
        model = PHReg(time[keep], arm[keep][:, None], status=event[keep], ties=self.ties)
        fit = model.fit(groups=cluster[keep])
        se = math.sqrt(factor * float(fit.cov_params()[0, 0]))
        out = {k: float(v) for k, v in wald(float(fit.params[0]), se, self.alternative, self.ci_level).items()}
        if self.test == "score":
            resid = model.score_residuals(np.zeros(1))[:, 0]
            sums = np.bincount(np.unique(cluster[keep], return_inverse=True)[1], weights=resid)
            with np.errstate(all="ignore"):
                z = np.sum(resid) / np.sqrt(factor * np.sum(sums**2))
            out["pvalue"] = float(p_from_z(z, self.alternative))
        return TestResult(**out)

    layouts = ("survival",)

    def _supports(self, layout):
        """Both arms in a design shared by all replicates (padding rows and missing times are left out:
        complete cases, as on the per-replicate path).

        With ``cov_type = 'cluster'``: a ``cluster`` column and both arm labels (shared or per replicate;
        padding and missing times are left out).
        """
        if self._robust:
            return "cluster" in layout and layout.labels == (0, 1)
        return "arm" in layout.shared and layout.labels == (0, 1)

    def batch(self, batch):
        if self._robust:
            return self._robust_batch(batch)
        layout = self.batch_layout(batch)
        arm = np.asarray(layout.shared["arm"])
        present = layout.present
        if layout.missing:  # a missing time (NaN) leaves its row out, like padding
            seen = ~np.isnan(np.asarray(layout.time, float))
            present = seen if present is None else present & seen
        time, event, empty = absent_first(layout.time, layout.event, present, arm)
        event = np.asarray(event, float)
        beta, info = np.empty(batch.size), np.empty(batch.size)
        ok = np.empty(batch.size, bool)
        step = max(1, _BLOCK_CELLS // max(arm.size, 1))
        for s in range(0, batch.size, step):
            sl = slice(s, s + step)
            beta[sl], info[sl], ok[sl] = _cox_newton(*_cox_event_terms(time[sl], event[sl], arm, self.ties))
        # rows the per-replicate path would reject (it raises on them) go to it as well
        valid = np.all(np.isfinite(time) & (time >= 0) & ((event == 0) | (event == 1)), axis=1)
        if empty is not None:  # padding rows sit at -inf (see absent_first): only present rows are checked
            valid = np.all(~present | (np.isfinite(layout.time) & (layout.time >= 0)), axis=1) & ~empty & \
                np.all((event == 0) | (event == 1), axis=1)
        ok &= valid
        with np.errstate(all="ignore"):
            se = 1.0 / np.sqrt(info)
        res = BatchResult(**wald(np.where(ok, beta, np.nan), np.where(ok, se, np.nan),
                                 self.alternative, self.ci_level))
        return hand_over(self, batch, res, ~ok)

    def _robust_batch(self, batch):
        """The batch path with ``cov_type = 'cluster'`` (see the class docstring)."""
        layout = self.batch_layout(batch)
        time = np.asarray(layout.time, float)
        event = np.asarray(layout.event)
        arm = np.broadcast_to(np.asarray(layout.column("arm")), time.shape)
        keep = ~np.isnan(time) if layout.present is None else layout.present & ~np.isnan(time)
        with np.errstate(invalid="ignore"):
            good = np.isfinite(time) & (time >= 0) & ((event == 0) | (event == 1))
        # replicates the per-replicate path refuses (a bad time or event, an arm without a row, fewer
        # than 2 clusters) go to it, as do those without a finite estimate
        refused = np.any(keep & ~good, axis=1)
        for label in (0, 1):
            refused |= ~np.any(keep & (arm == label), axis=1)
        take = keep & good & ~refused[:, None]
        codes, n_codes, g = _cluster_codes(layout.column("cluster"), take)
        refused |= g < 2
        take &= ~refused[:, None]
        out = {k: np.full(batch.size, np.nan) for k in ("beta", "info", "meat", "u0", "meat0")}
        ok = np.zeros(batch.size, bool)
        step = max(1, _BLOCK_CELLS // max(time.shape[1], 1))
        for s in range(0, batch.size, step):
            sl = slice(s, s + step)
            tk = take[sl]
            t = np.where(tk, time[sl], -np.inf)  # rows taking no part sort first, in no risk set
            order = np.argsort(t, axis=1, kind="stable")
            t = np.take_along_axis(t, order, axis=1)
            d = np.take_along_axis(np.where(tk, event[sl], 0).astype(float), order, axis=1)
            a = np.take_along_axis(np.where(tk, arm[sl], 0).astype(float), order, axis=1)
            c = np.take_along_axis(codes[sl], order, axis=1)
            beta, info, ok[sl] = _cox_newton(*_cox_event_terms(t, d, a, self.ties))
            out["beta"][sl], out["info"][sl] = beta, info
            fin = np.where(ok[sl], beta, 0.0)
            out["meat"][sl] = _cluster_sums_squared(_cox_score_residuals(fin, t, d, a), c, n_codes)
            if self.test == "score":
                resid = _cox_score_residuals(np.zeros(t.shape[0]), t, d, a)
                out["u0"][sl] = resid.sum(axis=1)
                out["meat0"][sl] = _cluster_sums_squared(resid, c, n_codes)
        ok &= ~refused
        with np.errstate(all="ignore"):  # G < 2 (refused, handed over) would divide by 0
            factor = g / (g - 1.0) if self.small_sample else 1.0
            se = np.sqrt(factor * out["meat"]) / out["info"]
            res = wald(np.where(ok, out["beta"], np.nan), np.where(ok, se, np.nan), self.alternative, self.ci_level)
            if self.test == "score":
                res["pvalue"] = np.where(ok, p_from_z(out["u0"] / np.sqrt(factor * out["meat0"]), self.alternative),
                                         np.nan)
        return hand_over(self, batch, BatchResult(**res), ~ok)


def _cluster_column(data):
    """The ``cluster`` ids of the rows :func:`survival_columns` keeps (those with a time)."""
    if "cluster" not in data:
        raise ValueError("cox with cov_type = 'cluster' needs a 'cluster' column (the cluster ids)")
    time = np.asarray(data["time"], float)
    cluster = np.asarray(data["cluster"])
    return cluster[~np.isnan(time)]
