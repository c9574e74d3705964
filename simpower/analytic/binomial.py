"""One-sample exact binomial test: rejection region, exact power, required n.

The test of H0: p = p0 from ``X ~ Binomial(n, p)`` rejects when its exact
p-value is at most alpha. The p-values are those of ``scipy.stats.binomtest``:

* "greater": ``P0(X >= x)``; "less": ``P0(X <= x)``;
* "two-sided": the probability under p0 of every outcome no more likely than
  the one observed, ``sum of P0(y) over P0(y) <= P0(x) * (1 + 1e-7)``, capped
  at 1 (the "minimum likelihood" p-value; the relative tolerance 1e-7 is
  scipy's and treats numerically tied outcomes as tied).

The rejection region ``R = {x : p-value(x) <= alpha}`` is computed exactly for
each n, and the power is the binomial probability of it,

    power(n, p) = sum over x in R of C(n, x) p**x (1 - p)**(n - x),

with no approximation. Its attained size, ``power(n, p0)``, is at most alpha
and usually below it, because X is discrete.

**The saw-tooth.** As n grows by one the critical count moves only now and then,
so the attained size, and with it the power, rises and drops in a saw-tooth
with a period of roughly ``1 / min(p0, 1 - p0)`` observations; power at n + 1
can be lower than at n. This is a real property of the exact test (Chernick &
Liu 2002, The American Statistician 56:149-155, "The saw-toothed behavior of
power versus sample size and software solutions"; reference from memory), not
numerical noise. :func:`binom_exact_n` therefore offers two answers: the
smallest n whose power reaches the target (the usual one), and with
``robust=True`` the smallest n from which the power stays at or above the
target over a horizon of further sizes.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import optimize, stats

from ..errors import ParameterError
from . import _common as c

_RERR = 1.0 + 1e-7  # scipy.stats.binomtest's tolerance for tied probabilities


# --------------------------------------------------------------------------- the test itself
def _pvalues(n: int, p0: float, alternative: str) -> np.ndarray:
    """Exact p-values of x = 0..n, computed as scipy.stats.binomtest computes them."""
    x = np.arange(n + 1)
    if alternative == "less":
        return stats.binom.cdf(x, n, p0)
    if alternative == "greater":
        return stats.binom.sf(x - 1, n, p0)
    pmf = stats.binom.pmf(x, n, p0)
    thr = pmf * _RERR
    centre = p0 * n
    pval = np.ones(n + 1)
    below, above = x < centre, x > centre
    # outcomes below n*p0: add the upper-side outcomes no more likely (a suffix: the pmf
    # decreases from ceil(n*p0) on)
    upper = pmf[int(math.ceil(centre)):][::-1]  # increasing
    y = np.searchsorted(upper, thr[below], side="right")
    pval[below] = stats.binom.cdf(x[below], n, p0) + stats.binom.sf(n - y, n, p0)
    # outcomes above n*p0: add the lower-side outcomes no more likely (a prefix)
    lower = pmf[: int(math.floor(centre)) + 1]  # increasing
    y = np.searchsorted(lower, thr[above], side="right")
    pval[above] = stats.binom.cdf(y - 1, n, p0) + stats.binom.sf(x[above] - 1, n, p0)
    return np.minimum(pval, 1.0)


def _region(n: int, p0: float, alpha: float, alternative: str) -> np.ndarray:
    return _pvalues(n, p0, alternative) <= alpha


def _power(n: int, p: float, p0: float, alpha: float, alternative: str) -> float:
    mask = _region(n, p0, alpha, alternative)
    if not mask.any():
        return 0.0
    return float(np.sum(stats.binom.pmf(np.flatnonzero(mask), n, p)))


def _mp_power(n: int, p: float, p0: float, alpha: float) -> float:
    """Power of the randomised most powerful level-alpha test of p0 against p (Neyman-Pearson).

    No level-alpha test of the point null p0, one- or two-sided, exact or not,
    has more power at p; and this power never decreases in n. So the first n at
    which it reaches a target is a lower bound for the exact test's n.
    """
    if p < p0:  # mirror: count failures instead
        p, p0 = 1.0 - p, 1.0 - p0
    x = np.arange(n + 2)
    tail0 = stats.binom.sf(x - 1, n, p0)  # P0(X >= x), x = 0..n+1
    k = int(np.argmax(tail0 <= alpha))  # first x whose upper tail fits in alpha (k >= 1)
    gamma = (alpha - tail0[k]) / stats.binom.pmf(k - 1, n, p0)
    return float(stats.binom.sf(k - 1, n, p) + gamma * stats.binom.pmf(k - 1, n, p))


# --------------------------------------------------------------------------- checks
def _whole(name, value, low=1):
    arr = c.real(name, value, float(low))
    bad = arr != np.floor(arr)
    if np.any(bad):
        raise ParameterError(f"`{name}` must be a whole number >= {low}; got {c._show(arr, bad)}.")
    return arr


def _check(p0, alpha, alternative, power=None):
    c.choice("alternative", alternative, c.ALTERNATIVES)
    q0 = c.real("p0", p0, 0.0, 1.0, low_open=True, high_open=True)
    return q0, c.alpha_power(alpha, power)


# --------------------------------------------------------------------------- public
def binom_exact_region(n, p0, *, alpha=0.05, alternative="two-sided"):
    """Rejection region of the exact binomial test, as a boolean mask over x = 0..n.

    Parameters
    ----------
    n : int
        Number of trials (>= 1).
    p0 : float
        Success probability under H0, in (0, 1).
    alpha : float
        Significance level.
    alternative : {"two-sided", "greater", "less"}
        H1: p != p0, p > p0, p < p0.

    Returns
    -------
    ndarray of bool, shape (n + 1,)
        ``mask[x]`` is True when ``scipy.stats.binomtest(x, n, p0).pvalue <= alpha``.

    Examples
    --------
    20 trials, p0 = 0.5, two-sided 5%: reject for 0-5 and 15-20 successes:

    >>> from simpower.analytic import binom_exact_region
    >>> import numpy as np
    >>> np.flatnonzero(binom_exact_region(20, 0.5)).tolist()
    [0, 1, 2, 3, 4, 5, 15, 16, 17, 18, 19, 20]
    """
    m = int(_whole("n", n))
    q0, a = _check(p0, alpha, alternative)
    return _region(m, float(q0), float(a), alternative)


def binom_exact_power(n, p, p0, *, alpha=0.05, alternative="two-sided"):
    """Exact power of the exact binomial test: the probability of its rejection region.

    Parameters
    ----------
    n : int or array_like of int
        Number of trials (>= 1).
    p : float or array_like
        True success probability, in [0, 1].
    p0 : float or array_like
        Success probability under H0, in (0, 1).
    alpha : float or array_like
        Significance level; the attained size ``binom_exact_power(n, p0, p0)`` is at most alpha.
    alternative : {"two-sided", "greater", "less"}
        H1: p != p0, p > p0, p < p0.

    Returns
    -------
    float or ndarray
        ``sum over x in R of P(X = x | n, p)``, exact. Not monotone in n (see the
        module docstring on the saw-tooth).

    Examples
    --------
    The attained size of the two-sided test with 20 trials and p0 = 0.5 is
    0.041, not 0.05; its power at p = 0.8 is 0.804:

    >>> from simpower.analytic import binom_exact_power
    >>> round(binom_exact_power(20, 0.5, 0.5), 4), round(binom_exact_power(20, 0.8, 0.5), 3)
    (0.0414, 0.804)
    """
    scalar = c.is_scalar(n, p, p0, alpha)
    m = _whole("n", n)
    q = c.real("p", p, 0.0, 1.0)
    q0, a = _check(p0, alpha, alternative)
    return c.finish(c.each(lambda m_, q_, q0_, a_: _power(int(m_), q_, q0_, a_, alternative), m, q, q0, a), scalar)


def _first_n(p, p0, target, alpha, alternative, n_max):
    """Smallest n <= n_max whose exact power reaches ``target``, and a power look-up."""
    mp = lambda m: _mp_power(m, p, p0, alpha)  # noqa: E731
    lo, hi = 0, 1  # invariant: mp(lo) < target (or lo = 0), mp(hi) >= target once found
    while mp(hi) < target:
        if hi >= n_max:
            raise ParameterError(
                f"`n_max` = {n_max} is too small: even the most powerful test needs more trials "
                f"for power {target:g} at p = {p:g} against p0 = {p0:g}; raise n_max."
            )
        lo, hi = hi, min(2 * hi, n_max)
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if mp(mid) >= target:
            hi = mid
        else:
            lo = mid
    cache: dict[int, float] = {}

    def power(m):
        if m not in cache:
            cache[m] = _power(m, p, p0, alpha, alternative)
        return cache[m]

    for m in range(hi, n_max + 1):
        if power(m) >= target:
            return m, power
    raise ParameterError(
        f"`n_max` = {n_max} is too small: the exact test does not reach power {target:g} at "
        f"p = {p:g} against p0 = {p0:g} by then; raise n_max."
    )


def _robust_n(first, power, target, horizon, n_max):
    start, m = first, first
    while m <= start + horizon:
        if m > n_max:
            raise ParameterError(
                f"`n_max` = {n_max} is too small to confirm power {target:g} over a horizon of "
                f"{horizon} beyond n = {start}; raise n_max."
            )
        if power(m) < target:
            start = m + 1
        m += 1
    return start


def default_horizon(p0) -> int:
    """Three saw-tooth periods, ``max(10, ceil(3 / min(p0, 1 - p0)))`` further sizes."""
    return max(10, int(math.ceil(3.0 / min(p0, 1.0 - p0))))


def binom_exact_n(p, p0, power, *, alpha=0.05, alternative="two-sided", robust=False, horizon=None,
                  n_max=100_000):
    """Number of trials at which the exact binomial test reaches ``power``.

    Because power saw-tooths in n (module docstring), "the n for 80% power" has
    two readings:

    * ``robust=False`` (default): the smallest n with ``power(n) >= target``.
      A few larger n may have less power than the target.
    * ``robust=True``: the smallest n such that ``power(m) >= target`` for every
      m from n to n + ``horizon``; a plan that recruits a few more (or fewer
      evaluable) participants than planned keeps its power.

    The search is exact: it starts at the first n where the randomised most
    powerful test (Neyman-Pearson), which bounds the exact test's power, reaches
    the target, and steps up one n at a time from there. Each step costs O(n),
    and a two-sided search steps through about a fifth of the answer, so answers
    of a few hundred take a fraction of a second and answers near 6500 (p = 0.52
    against 0.5) about 15 s on one core; at such sizes a normal approximation
    serves as well.

    Parameters
    ----------
    p : float or array_like
        True success probability in [0, 1], on the side of ``p0`` that H1 names.
    p0 : float or array_like
        Success probability under H0, in (0, 1).
    power : float or array_like
        Target power in (alpha, 1).
    alpha, alternative
        As in :func:`binom_exact_power`.
    robust : bool
        Ask for the n beyond which power stays above the target (see above).
    horizon : int, optional
        How many further sizes ``robust=True`` checks; default
        :func:`default_horizon`, three saw-tooth periods ``max(10, ceil(3 / min(p0, 1 - p0)))``.
    n_max : int
        Largest n searched; a ParameterError says so if the target is not reached by then.

    Returns
    -------
    int or ndarray of int

    Examples
    --------
    p = 0.8 against p0 = 0.5, two-sided 5%, power 0.8: 20 trials are enough, yet
    21 and 22 are not (power 0.77 and 0.73), and from 23 on the power stays above 0.8:

    >>> from simpower.analytic import binom_exact_n, binom_exact_power
    >>> binom_exact_n(0.8, 0.5, 0.8), round(binom_exact_power(21, 0.8, 0.5), 2)
    (20, 0.77)
    >>> binom_exact_n(0.8, 0.5, 0.8, robust=True)
    23
    """
    scalar = c.is_scalar(p, p0, power, alpha)
    q = c.real("p", p, 0.0, 1.0)
    q0, (a, pw) = _check(p0, alpha, alternative, power)
    c.directed("p - p0", q - q0, alternative)
    robust = c.flag("robust", robust)
    limit = int(_whole("n_max", n_max))
    if horizon is not None:
        horizon = int(_whole("horizon", horizon))

    def one(q_, q0_, a_, pw_):
        first, lookup = _first_n(q_, q0_, pw_, a_, alternative, limit)
        if not robust:
            return first
        span = default_horizon(q0_) if horizon is None else horizon
        return _robust_n(first, lookup, pw_, span, limit)

    out = c.each(one, q, q0, a, pw).astype(np.int64)
    return int(out) if scalar else out


def binom_exact_effect(n, p0, power, *, alpha=0.05, alternative="two-sided"):
    """True success probability at which the exact test with ``n`` trials has the given power.

    Power is monotone in p for one-sided tests and first falls then rises for the
    two-sided one (its derivative changes sign once), so the solution on H1's side
    of ``p0`` is unique; it is found by Brent's method.

    Parameters
    ----------
    n : int or array_like of int
        Number of trials (>= 1).
    p0 : float or array_like
        Success probability under H0, in (0, 1).
    power : float or array_like
        Target power in (alpha, 1).
    alpha, alternative
        As in :func:`binom_exact_power`.

    Returns
    -------
    float or ndarray
        ``p > p0`` for "two-sided" and "greater", ``p < p0`` for "less".

    Raises
    ------
    ParameterError
        If no p on that side reaches the power (``n`` too small).

    Examples
    --------
    >>> from simpower.analytic import binom_exact_effect
    >>> round(binom_exact_effect(20, 0.5, 0.804), 3)
    0.8
    """
    scalar = c.is_scalar(n, p0, power, alpha)
    m = _whole("n", n)
    q0, (a, pw) = _check(p0, alpha, alternative, power)

    def one(m_, q0_, a_, pw_):
        m_ = int(m_)
        end = 0.0 if alternative == "less" else 1.0
        f = lambda q: _power(m_, q, q0_, a_, alternative) - pw_  # noqa: E731
        if f(end) < 0:
            side = "below" if alternative == "less" else "above"
            raise ParameterError(f"`n` = {m_} is too small: no p {side} p0 = {q0_:g} reaches power {pw_:g}.")
        return optimize.brentq(f, q0_, end, xtol=c._XTOL, rtol=c._RTOL)

    return c.finish(c.each(one, m, q0, a, pw), scalar)
