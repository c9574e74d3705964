"""Power and sample size of MMRM's final-visit comparison under monotone dropout.

Source: Lu, Luo & Chen (2008), "Sample size estimation for repeated measures
analysis in randomized clinical trials with missing data", The International
Journal of Biostatistics 4(1), article 9. Under monotone dropout with
retention ``r_j`` (share of an arm still observed at visit j, ``r_1 = 1 >=
r_2 >= ... >= r_T``), a share ``r_j - r_{j+1}`` of subjects (``r_{T+1} = 0``)
is seen at visits 1..j exactly, and the information about the arm's visit
means per subject is

    I = sum_j (r_j - r_{j+1}) E_j' Sigma_[1..j]^-1 E_j

(``E_j`` selects visits 1..j, ``Sigma_[1..j]`` is their covariance). The
variance of the arm's final-visit mean is ``[I^-1]_TT / n``; the variance
inflation factor ``phi = [I^-1]_TT / Sigma_TT`` is 1 without dropout and at
most ``1 / r_T`` (the complete-case analysis). Lu, Luo & Chen give a closed
form of ``phi`` in the partial correlations; the matrix form above is the one
it is derived from (here from memory of the paper, and checked in
tests/test_mmrm.py by simulation). The test is then the normal approximation

    n_0 = (z_{1-alpha/2} + z_{1-beta})^2 Sigma_TT (phi_0 + phi_1 / ratio) / delta^2,

so the power is asymptotic (a z-test): with small arms the MMRM t-test's
power is a little lower.
"""

from __future__ import annotations

import numpy as np

from ..errors import ParameterError
from . import _common as c
from .normal import z_n, z_power


def _check(cov, retention, name="retention"):
    S = np.asarray(cov, float)
    if S.ndim != 2 or S.shape[0] != S.shape[1] or S.shape[0] < 1:
        raise ParameterError(f"`cov` must be a square T x T covariance matrix; got shape {S.shape}.")
    if not np.allclose(S, S.T) or np.any(np.linalg.eigvalsh(S) <= 0):
        raise ParameterError("`cov` must be symmetric positive definite.")
    r = c.real(name, retention, 0.0, 1.0, low_open=True)
    if r.shape != (S.shape[0],):
        raise ParameterError(f"`{name}` must give one retention per visit ({S.shape[0]}); got {r.size}.")
    if r[0] != 1.0 or np.any(np.diff(r) > 0):
        raise ParameterError(f"`{name}` must start at 1 and never increase (monotone dropout); got {list(r)}.")
    return S, r


def mmrm_inflation(cov, retention) -> float:
    """Variance inflation ``phi`` of the final-visit mean under monotone dropout (Lu, Luo & Chen 2008).

    Parameters
    ----------
    cov : array_like (T, T)
        Covariance of the outcomes over the visits.
    retention : array_like (T,)
        Share still observed at each visit: 1 at the first, never increasing.

    Examples
    --------
    No dropout, no inflation; dropout at the final visit only costs at most ``1 / r_T``
    (less when the visits are correlated):

    >>> import numpy as np
    >>> from simpower.analytic import mmrm_inflation
    >>> cov = 0.5 * np.ones((3, 3)) + 0.5 * np.eye(3)
    >>> mmrm_inflation(cov, [1, 1, 1])
    1.0
    >>> round(mmrm_inflation(cov, [1, 1, 0.8]), 4), 1 / 0.8
    (1.1667, 1.25)
    """
    S, r = _check(cov, retention)
    T = S.shape[0]
    share = r - np.append(r[1:], 0.0)
    info = np.zeros((T, T))
    for j in range(T):
        if share[j] > 0:
            info[: j + 1, : j + 1] += share[j] * np.linalg.inv(S[: j + 1, : j + 1])
    return float(np.linalg.inv(info)[-1, -1] / S[-1, -1])


def _sd(cov, retention, retention1, ratio):
    S, r0 = _check(cov, retention)
    r1 = r0 if retention1 is None else _check(cov, retention1, "retention1")[1]
    ratio = float(c.real("ratio", ratio, 0.0, low_open=True))
    phi0, phi1 = mmrm_inflation(S, r0), mmrm_inflation(S, r1)
    # z_power's two-sample SE is sd * sqrt((1 + 1/ratio) / n): match sigma_TT (phi0 + phi1/ratio) / n
    return float(np.sqrt(S[-1, -1] * (phi0 + phi1 / ratio) / (1.0 + 1.0 / ratio))), ratio


def mmrm_power(effect, n, *, cov, retention, retention1=None, alpha=0.05, alternative="two-sided", ratio=1.0):
    """Asymptotic power of MMRM's final-visit treatment comparison (Lu, Luo & Chen 2008).

    Parameters
    ----------
    effect : float or array_like
        Treatment minus control mean at the final visit.
    n : float or array_like
        Control-arm size (subjects randomised).
    cov : array_like (T, T)
        Covariance of the outcomes over the visits (both arms).
    retention : array_like (T,)
        Control arm's share still observed at each visit (1 at the first, never increasing).
    retention1 : array_like (T,), optional
        Treatment arm's, if it differs.
    alpha, alternative, ratio
        As in :func:`simpower.analytic.z_power` (ratio: treatment over control size).

    Examples
    --------
    Four visits, exchangeable correlation 0.5, 30% gone by the final visit, effect 0.5 SD:

    >>> import numpy as np
    >>> from simpower.analytic import mmrm_power, z_power
    >>> cov = 0.5 * np.ones((4, 4)) + 0.5 * np.eye(4)
    >>> round(mmrm_power(0.5, 60, cov=cov, retention=[1, 0.89, 0.79, 0.7]), 3)
    0.674
    >>> round(z_power(0.5, 60, design="two-sample"), 3)  # no dropout
    0.782
    """
    sd, ratio = _sd(cov, retention, retention1, ratio)
    return z_power(effect, n, sd=sd, alpha=alpha, alternative=alternative, design="two-sample", ratio=ratio)


def mmrm_n(effect, power, *, cov, retention, retention1=None, alpha=0.05, alternative="two-sided", ratio=1.0):
    """Continuous control-arm size at which :func:`mmrm_power` reaches ``power``."""
    sd, ratio = _sd(cov, retention, retention1, ratio)
    return z_n(effect, power, sd=sd, alpha=alpha, alternative=alternative, design="two-sample", ratio=ratio)
