"""Helpers shared by the test modules (imported as a plain module: pytest puts tests/ on sys.path)."""

import warnings

import numpy as np

FIELDS = ("pvalue", "estimate", "se", "ci_low", "ci_high")


def per_replicate(analysis, batch):
    """Apply ``analysis`` replicate by replicate to ``batch``.

    Returns the per-replicate fields and the first warning of each replicate
    as the engine records it (``"warning:<Type>"``, or "").
    """
    out = {f: np.full(batch.size, np.nan) for f in FIELDS}
    warned = np.zeros(batch.size, object)
    for i in range(batch.size):
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            r = analysis(batch.replicate(i))
        for f in out:
            out[f][i] = getattr(r, f)
        warned[i] = next((f"warning:{w.category.__name__}" for w in caught), "")
    return out, warned


def cranky(data):
    """A user analysis that sometimes raises (first outcome above z_0.95) and sometimes warns (fit trouble)."""
    y = np.asarray(data["y"])
    if y[0] > 1.6448536269514722:
        raise ValueError("high")
    if y[1] > 1.0:
        warnings.warn("wobbly fit", RuntimeWarning)
    d = y[data["arm"] == 1].mean() - y[data["arm"] == 0].mean()
    return {"pvalue": float(min(1.0, abs(d))), "estimate": float(d), "se": 0.4, "ci_low": d - 0.8,
            "ci_high": d + 0.8}


def nct_power(ncp, df, alpha, alternative):
    """Rejection probability of a t-test whose statistic is noncentral t(df, ncp) (Cohen 1988, ch. 2;
    scipy.stats.nct): the independent reference of the closed-form checks."""
    from scipy import stats

    if alternative == "two-sided":
        c = stats.t.ppf(1 - alpha / 2, df)
        return stats.nct.sf(c, df, ncp) + stats.nct.cdf(-c, df, ncp)
    c = stats.t.ppf(1 - alpha, df)
    return stats.nct.sf(c, df, ncp) if alternative == "greater" else stats.nct.cdf(-c, df, ncp)
