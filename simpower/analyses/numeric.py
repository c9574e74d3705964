"""Numerical helpers shared by the analyses (one copy each; scalars or arrays).

Every analysis module takes these from here, never from another analysis
module: p-values from z and t statistics by alternative, the Wald test, the
two-sample SE and df, row-wise means and variances of a batch, and the
splitting of a long table into arms or pairs.

Only :mod:`scipy.special` is imported here: the normal and Student's t
probabilities are the special functions :mod:`scipy.stats` evaluates for them, so a
worker that runs a batch of t-tests never imports ``scipy.stats`` (about a second
of start-up on a cold worker).
"""

from __future__ import annotations

import numpy as np
from scipy import special


def p_from_z(z, alternative: str):
    """p-value of a standard normal statistic ``z`` for H1 ``alternative`` (arrays allowed).

    'two-sided': 2 Phi(-|z|); 'greater': Phi(-z); 'less': Phi(z). ``special.ndtr``
    is what ``scipy.stats.norm.sf`` / ``cdf`` evaluate (bit for bit), without their
    argument handling.
    """
    if alternative == "two-sided":
        return 2.0 * special.ndtr(-np.abs(z))
    if alternative == "greater":
        return special.ndtr(-z)
    return special.ndtr(z)


def t_sf(t, df):
    """``scipy.stats.t.sf(t, df)``, bit for bit: ``special.stdtr(df, -t)`` is what it evaluates (``t._sf``),
    and the special function gives its values for the edge cases too (df <= 0 or NaN, t infinite or NaN)."""
    return special.stdtr(df, -np.asarray(t))


def t_cdf(t, df):
    """``scipy.stats.t.cdf(t, df)``, bit for bit (``special.stdtr(df, t)``; see :func:`t_sf`)."""
    return special.stdtr(df, t)


def t_ppf(q, df):
    """``scipy.stats.t.ppf(q, df)``, bit for bit: ``special.stdtrit(df, q)`` (``t._ppf``), with scipy.stats'
    value -inf at ``q == 0`` (where the special function gives +inf)."""
    out = special.stdtrit(df, q)
    return np.where((np.asarray(q) == 0) & (np.asarray(df) > 0), -np.inf, out)[()]


def normal_ppf(q):
    """``scipy.stats.norm.ppf(q)``, bit for bit (``special.ndtri``, what ``norm._ppf`` evaluates)."""
    return special.ndtri(q)


def p_from_t(t, df, alternative: str):
    """p-value of a t statistic with ``df`` degrees of freedom for H1 ``alternative`` (arrays allowed)."""
    if alternative == "two-sided":
        return 2.0 * t_sf(np.abs(t), df)
    if alternative == "greater":
        return t_sf(t, df)
    return t_cdf(t, df)


def wald(est, se, alternative: str, ci_level: float) -> dict:
    """Wald z-test of ``est = 0`` with a two-sided ``ci_level`` interval (scalars or arrays).

    Returns the fields ``pvalue``, ``estimate``, ``se``, ``ci_low``, ``ci_high``.
    """
    crit = special.ndtri(0.5 + ci_level / 2)
    with np.errstate(all="ignore"):
        z = np.divide(est, se)
        return {"pvalue": p_from_z(z, alternative), "estimate": est, "se": se,
                "ci_low": est - crit * se, "ci_high": est + crit * se}


def p_and_crit(stat, df, alternative: str, ci_level: float):
    """(p-value of ``stat``, the CI multiplier): normal when ``df`` is None, else Student's t on ``df``
    (scalars or arrays); the reference of the Wald tests of the mixed models."""
    if df is None:
        return p_from_z(stat, alternative), normal_ppf(0.5 + ci_level / 2)
    return p_from_t(stat, df, alternative), t_ppf(0.5 + ci_level / 2, df)


def wald_fields(est, se, df, alternative: str, ci_level: float) -> tuple[dict, object]:
    """(fields, statistic) of the Wald test of ``est = 0`` with a normal (``df`` None) or t reference: the
    ``pvalue``, ``estimate``, ``se``, ``ci_low``, ``ci_high`` of a batch result (scalars or arrays)."""
    with np.errstate(all="ignore"):
        stat = est / se
        p, crit = p_and_crit(stat, df, alternative, ci_level)
    return {"pvalue": p, "estimate": est, "se": se, "ci_low": est - crit * se, "ci_high": est + crit * se}, stat


def two_sample_se_df(n0, n1, v0, v1, equal_var: bool):
    """SE of the difference in arm means and its df, from arm sizes and variances (scalars or arrays).

    ``equal_var``: the pooled variance and n0 + n1 - 2 df (Student); otherwise
    the Welch-Satterthwaite df (Welch 1947; Satterthwaite 1946).
    """
    if equal_var:
        df = n0 + n1 - 2.0
        return np.sqrt(((n0 - 1) * v0 + (n1 - 1) * v1) / df * (1 / n0 + 1 / n1)), df
    a0, a1 = v0 / n0, v1 / n1
    return np.sqrt(a0 + a1), (a0 + a1) ** 2 / (a0**2 / (n0 - 1) + a1**2 / (n1 - 1))


def mean_var(y):
    """Row means and sample variances (ddof 1) of a 2-D array (replicates x values)."""
    m = y.mean(axis=1)
    d = y - m[:, None]
    v = np.einsum("ij,ij->i", d, d) / (y.shape[1] - 1)
    return m, v


def masked_mean_var(y, mask):
    """Row counts, means and sample variances (ddof 1) of the values of ``y`` where ``mask`` is True.

    ``y`` and ``mask`` are (R, N); values outside the mask (NaN, padding) never enter the
    arithmetic (they are replaced by 0 before summing). Returns ``(n, m, v)``, each (R,);
    rows with n < 2 get a non-finite variance (n = 0: a NaN mean), without warnings.
    """
    n = np.count_nonzero(mask, axis=1)
    with np.errstate(all="ignore"):
        m = np.where(mask, y, 0.0).sum(axis=1) / n
        d = np.where(mask, y - m[:, None], 0.0)
        v = np.einsum("ij,ij->i", d, d) / (n - 1)
    return n, m, v


def masked_arms(layout, y=None):
    """``(n0, m0, v0), (n1, m1, v1)``: :func:`masked_mean_var` of each arm of a two-arm layout.

    Only observed outcomes count (``layout.observed``: finite and present). ``y`` (R, N)
    replaces the layout's outcomes (e.g. their logarithms) where given.
    """
    y = layout.y if y is None else y
    obs = layout.observed
    if layout.split is not None:
        s = layout.split
        return masked_mean_var(y[:, :s], obs[:, :s]), masked_mean_var(y[:, s:], obs[:, s:])
    return masked_mean_var(y, obs & (layout.arm == 0)), masked_mean_var(y, obs & (layout.arm == 1))


def masked_t_parts(layout, equal_var: bool = True, y=None):
    """``(estimate, se, df, few)`` of a t statistic from the observed outcomes of a layout (arrays (R,)).

    One sample: the mean; ``paired``: the mean within-pair difference arm 1 - arm 0 over
    pairs with both outcomes observed; ``two_arm``: mean(arm 1) - mean(arm 0), pooled
    (``equal_var``) or Welch's SE and df. ``y`` replaces the outcomes (e.g. their
    logarithms). ``few`` marks replicates with fewer than 2 observed values in a sample,
    whose statistics are not defined (a batch path hands them to the per-replicate path).
    """
    with np.errstate(all="ignore"):
        if layout.kind == "two_arm":
            (n0, m0, v0), (n1, m1, v1) = masked_arms(layout, y)
            se, df = two_sample_se_df(n0, n1, v0, v1, equal_var)
            return m1 - m0, se, df, (n0 < 2) | (n1 < 2)
        if layout.kind == "paired":
            y = layout.y if y is None else y
            k = layout.y0.shape[1]
            n, m, v = masked_mean_var(y[:, k:] - y[:, :k], layout.pair_observed)
        else:
            n, m, v = masked_mean_var(layout.y if y is None else y, layout.observed)
        return m, np.sqrt(v / n), n - 1.0, n < 2


def split_arms(data):
    """Finite outcomes of arm 0 and arm 1 of one long table (``y``, ``arm`` labels exactly 0 and 1).

    Raises
    ------
    ValueError
        If the arm labels are not exactly {0, 1}.
    """
    y = np.asarray(data["y"], dtype=float)
    arm = np.asarray(data["arm"])
    levels = np.unique(arm)
    if levels.size != 2 or set(levels.tolist()) != {0, 1}:
        raise ValueError(f"two-arm analyses need arm labels 0 and 1; got {levels.tolist()}")
    y0, y1 = y[arm == 0], y[arm == 1]
    return y0[np.isfinite(y0)], y1[np.isfinite(y1)]


def paired_differences(data):
    """Finite within-pair differences arm 1 - arm 0 of one long table (``y``, ``arm``, ``pair``).

    Pairs are matched by id; ids present in one arm only are dropped.
    """
    y = np.asarray(data["y"], float)
    arm = np.asarray(data["arm"])
    pair = np.asarray(data["pair"])
    o0 = np.argsort(pair[arm == 0], kind="stable")
    o1 = np.argsort(pair[arm == 1], kind="stable")
    p0, p1 = pair[arm == 0][o0], pair[arm == 1][o1]
    if p0.size != p1.size or np.any(p0 != p1):
        common, i0, i1 = np.intersect1d(pair[arm == 0], pair[arm == 1], return_indices=True)
        d = y[arm == 1][i1] - y[arm == 0][i0]
    else:
        d = y[arm == 1][o1] - y[arm == 0][o0]
    return d[np.isfinite(d)]
