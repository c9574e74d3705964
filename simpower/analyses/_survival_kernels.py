"""Log-rank sums ``(U, V)`` of many replicates from each arm's sorted times (a compiled merge).

Each participant's follow-up time and event indicator are packed into one unsigned 64-bit
key, ``2 * bits(time) + event``: for times >= 0 the IEEE bit pattern orders as the number
does, so sorting the keys sorts the times exactly, and equal times stay equal (ties are
kept, never broken or created). Each arm's keys are sorted on their own (numpy's sort of
unsigned integers, the fastest sort numpy has), and :func:`merge_terms` walks the two
sorted arms of a replicate together, one distinct time at a time: the numbers at risk are
the entries not yet passed (censored participants at an event's time included), and the
event counts are the keys' low bits. Unobserved rows (padding, missing times) get the
largest key and lie beyond each arm's count of observed rows, which is where the walk stops.

The sums run in order of time, the same terms as the module docstring of
:mod:`simpower.analyses.survival`; they differ from numpy's pairwise sums only by rounding
(about 1e-15 relative). Compiled with numba (a dependency of simpower; ``cache=True`` keeps
the machine code beside this file); without numba, or with ``SIMPOWER_NO_NUMBA=1``, the
log-rank analysis uses its numpy path (sort-and-count over all rows) instead.
"""

from __future__ import annotations

import numpy as np

try:  # optional: the compiled kernel
    import numba
except ImportError:  # pragma: no cover - exercised where numba is not installed
    numba = None

#: True when the kernel below is compiled (numba importable)
HAVE_NUMBA = numba is not None

_ONE = np.uint64(1)
_ZERO = np.uint64(0)
#: the key of a row that takes no part (padding, a missing time): sorts after every real key
NO_KEY = np.uint64(np.iinfo(np.uint64).max)


def _jit(fn):
    """``numba.njit(cache=True)`` when numba is there, else the plain function."""
    return numba.njit(cache=True)(fn) if HAVE_NUMBA else fn


def time_event_keys(time: np.ndarray, event: np.ndarray, take: np.ndarray | None) -> np.ndarray:
    """Keys ``2 * bits(time) + event`` (uint64), :data:`NO_KEY` where ``take`` is False.

    ``time`` must be finite and >= 0 where taken (-0.0 gives the key of 0.0), ``event`` 0 or 1.
    """
    bits = np.ascontiguousarray(time, dtype=np.float64).view(np.uint64)
    key = (bits << _ONE) | np.asarray(event).astype(np.uint64)
    if take is not None:
        key[~take] = NO_KEY
    return key


@_jit
def merge_terms(k0, k1, c0, c1, u, v):  # pragma: no cover - compiled; its Python twin is tested
    """``U``, ``V`` of each replicate from the sorted keys ``k0`` (R, n0) and ``k1`` (R, n1) of its two arms.

    ``c0[i]``, ``c1[i]``: observed rows of arm 0 and 1 in replicate i (the leading entries of
    its sorted keys). Writes ``u[i]`` and ``v[i]``.
    """
    for i in range(k0.shape[0]):
        n0 = c0[i]
        n1 = c1[i]
        p0 = 0
        p1 = 0
        uu = 0.0
        vv = 0.0
        while p0 < n0 or p1 < n1:
            if p1 >= n1 or (p0 < n0 and (k0[i, p0] >> _ONE) <= (k1[i, p1] >> _ONE)):
                t = k0[i, p0] >> _ONE
            else:
                t = k1[i, p1] >> _ONE
            r = float(n0 - p0 + n1 - p1)  # at risk at time t, censored ones at t included
            r1 = float(n1 - p1)
            e0 = _ZERO
            e1 = _ZERO
            while p0 < n0 and (k0[i, p0] >> _ONE) == t:
                e0 += k0[i, p0] & _ONE
                p0 += 1
            while p1 < n1 and (k1[i, p1] >> _ONE) == t:
                e1 += k1[i, p1] & _ONE
                p1 += 1
            d = float(e0 + e1)
            if d > 0:
                d1 = float(e1)
                uu += d1 - r1 * d / r
                if r > 1:
                    vv += d * (r - d) * r1 * (r - r1) / (r * r * (r - 1))
        u[i] = uu
        v[i] = vv
