"""Shared plumbing of the analytic core: input checks, output shape, root finding.

Every public function of :mod:`simpower.analytic` broadcasts its numeric
arguments with numpy, checks them here (one message shape:
"`alpha` must be in (0, 1); got 1.5."), and hands back a Python float when
every numeric input was a scalar, an ndarray otherwise.
"""

from __future__ import annotations

import numbers

import numpy as np
from scipy import optimize, special

from ..errors import ParameterError, nearest

ALTERNATIVES = ("two-sided", "greater", "less")

# Tolerances of the scalar root finder; tight enough that power(n(power))
# reproduces the target power to better than 1e-10.
_XTOL = 1e-13
_RTOL = 4 * np.finfo(float).eps
_MAX_DOUBLINGS = 200


def _interval(low, high, low_open, high_open) -> str:
    if low is not None and high is not None:
        return f"in {'(' if low_open else '['}{low:g}, {high:g}{')' if high_open else ']'}"
    if low is not None:
        return f"{'>' if low_open else '>='} {low:g}"
    if high is not None:
        return f"{'<' if high_open else '<='} {high:g}"
    return "finite"


def _show(arr: np.ndarray, bad: np.ndarray) -> str:
    """Format the first offending value (with its index when ``arr`` is an array)."""
    idx = tuple(int(i[0]) for i in np.nonzero(bad)) if arr.ndim else ()
    value = arr[idx] if idx else arr[()]
    where = f" (element {list(idx)})" if idx else ""
    return f"{float(value):g}{where}"


def real(name, value, low=None, high=None, *, low_open=False, high_open=False) -> np.ndarray:
    """Return ``value`` as a float ndarray after checking every element lies in range.

    Raises
    ------
    ParameterError
        If ``value`` is not numeric, not finite, or outside the interval;
        the message names the parameter and the interval.
    """
    if isinstance(value, (bool, np.bool_, str, bytes)) or value is None:
        raise ParameterError(f"`{name}` must be a number {_interval(low, high, low_open, high_open)}; got {value!r}.")
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise ParameterError(
            f"`{name}` must be a number {_interval(low, high, low_open, high_open)}; got {value!r}."
        ) from None
    bad = ~np.isfinite(arr)
    if low is not None:
        bad |= (arr <= low) if low_open else (arr < low)
    if high is not None:
        bad |= (arr >= high) if high_open else (arr > high)
    if np.any(bad):
        rng = _interval(low, high, low_open, high_open)
        verb = "be finite" if rng == "finite" else f"be {rng}"
        raise ParameterError(f"`{name}` must {verb}; got {_show(arr, bad)}.")
    return arr


def choice(name: str, value, options: tuple[str, ...]) -> str:
    """Check that ``value`` is one of ``options`` (with a 'Did you mean' hint)."""
    if not isinstance(value, str) or value not in options:
        hint = nearest(str(value), options) if isinstance(value, str) else ""
        opts = ", ".join(repr(o) for o in options)
        raise ParameterError(f"`{name}` must be one of {opts}; got {value!r}.{hint if 'Did' in hint else ''}")
    return value


def flag(name: str, value) -> bool:
    """Check a true/false switch."""
    if not isinstance(value, (bool, np.bool_)):
        raise ParameterError(f"`{name}` must be True or False; got {value!r}.")
    return bool(value)


def alpha_power(alpha, power=None):
    """Check ``alpha`` in (0, 1) and, when given, ``power`` in (alpha, 1)."""
    a = real("alpha", alpha, 0.0, 1.0, low_open=True, high_open=True)
    if power is None:
        return a
    p = real("power", power, 0.0, 1.0, low_open=True, high_open=True)
    bad = p <= a
    if np.any(bad):
        pb, ab = np.broadcast_arrays(p, a)
        raise ParameterError(
            f"`power` must exceed `alpha` (power at a zero effect is alpha); got power "
            f"{_show(pb, bad)} with alpha {float(ab[bad][0]):g}."
        )
    return a, p


def directed(name: str, effect: np.ndarray, alternative: str, null: float = 0.0) -> None:
    """Check that an effect lies on the side of the null that ``alternative`` tests."""
    if alternative == "greater":
        bad, need = effect <= null, f"> {null:g}"
    elif alternative == "less":
        bad, need = effect >= null, f"< {null:g}"
    else:
        bad, need = effect == null, f"!= {null:g}"
    if np.any(bad):
        raise ParameterError(
            f"`{name}` must be {need} for alternative={alternative!r} (no sample size reaches "
            f"a power above alpha otherwise); got {_show(effect, bad)}."
        )


def is_scalar(*values) -> bool:
    """True when every value is a Python or numpy scalar (or a 0-d array)."""
    return all(isinstance(v, numbers.Number) or np.ndim(v) == 0 for v in values)


def finish(result, scalar: bool):
    """Return a Python float for scalar calls, else an ndarray."""
    result = np.asarray(result, dtype=float)
    return float(result) if scalar else result


def critical_z(alpha, alternative: str):
    """Upper critical value of the standard normal for the given alternative."""
    a = np.asarray(alpha, dtype=float)
    return -special.ndtri(a / 2 if alternative == "two-sided" else a)


def normal_tails(shift, crit, alternative: str, scale=1.0, offset=0.0):
    """Rejection probability of a normal statistic.

    The test rejects for ``X - offset > crit`` ("greater"), ``X + offset < -crit``
    ("less"), or either ("two-sided", with ``crit`` the two-sided value), where
    ``X ~ N(shift, scale**2)``.
    """
    upper = special.ndtr((shift - offset - crit) / scale)
    lower = special.ndtr((-shift - offset - crit) / scale)
    if alternative == "greater":
        return upper
    if alternative == "less":
        return lower
    return upper + lower


def root_increasing(fun, target: float, lo: float, hi: float) -> float:
    """Root of ``fun(x) = target`` for ``fun`` increasing on [lo, inf).

    ``fun(lo) <= target`` is the caller's promise; ``hi`` is doubled until
    ``fun(hi) >= target``.
    """
    f_hi = fun(hi) - target
    for _ in range(_MAX_DOUBLINGS):
        if f_hi >= 0:
            break
        lo, hi = hi, 2.0 * hi
        f_hi = fun(hi) - target
    else:  # pragma: no cover - only for targets numerically equal to 1
        raise ParameterError(f"`power` = {target:g} cannot be reached (is it numerically 1?).")
    if f_hi == 0:
        return hi
    if fun(lo) - target >= 0:
        return lo
    return optimize.brentq(lambda x: fun(x) - target, lo, hi, xtol=_XTOL, rtol=_RTOL, maxiter=500)


def each(fun, *arrays) -> np.ndarray:
    """Apply scalar ``fun`` elementwise over the broadcast of ``arrays``."""
    b = np.broadcast_arrays(*[np.asarray(a, dtype=float) for a in arrays])
    out = np.empty(b[0].shape if b else ())
    for idx in np.ndindex(out.shape):
        out[idx] = fun(*(float(x[idx]) for x in b))
    return out
