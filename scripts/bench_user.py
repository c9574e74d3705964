"""User code for the benchmark's parallel row: an analysis the engine can only call per replicate.

Loaded by reference (``path/bench_user.py:scipy_pair``), the way a scenario
file names a user function, so worker processes import it afresh.
"""

import numpy as np
from scipy import stats


def scipy_pair(data):
    """Welch's t-test and the Mann-Whitney test by scipy, one data set at a time.

    Returns the larger of the two p-values (a made-up decision rule: reject
    only when both tests reject), with the mean difference as the estimate.
    """
    y = np.asarray(data["y"], float)
    arm = np.asarray(data["arm"])
    y0, y1 = y[arm == 0], y[arm == 1]
    welch = stats.ttest_ind(y1, y0, equal_var=False)
    mw = stats.mannwhitneyu(y1, y0, alternative="two-sided", method="asymptotic")
    return {"pvalue": max(float(welch.pvalue), float(mw.pvalue)), "estimate": float(y1.mean() - y0.mean())}
