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


def time_event_keys(time: np.ndarray, event: np.ndarray, take: np.ndarray | None, out: np.ndarray | None = None
                    ) -> np.ndarray:
    """Keys ``2 * bits(time) + event`` (uint64), :data:`NO_KEY` where ``take`` is False.

    ``time`` must be finite and >= 0 where taken (-0.0 gives the key of 0.0), ``event`` 0 or 1.
    ``out`` (uint64, the shape of ``time``) receives the keys (else a new array). A float64
    ``time`` is read in place (a view of its bits, any strides), a one-byte ``event`` too.
    """
    time = np.asarray(time)
    bits = (time if time.dtype == np.float64 else time.astype(np.float64)).view(np.uint64)
    key = np.left_shift(bits, _ONE, out=out)
    event = np.asarray(event)
    if event.dtype.itemsize == 1 and event.dtype.kind in "biu":
        ev = event.view(np.uint8)
    else:
        with np.errstate(invalid="ignore"):  # a bad value lies in a row not taken (its key is replaced)
            ev = event.astype(np.uint8)
    np.bitwise_or(key, ev, out=key)
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
        a = k0[i]
        b = k1[i]
        n0 = c0[i]
        n1 = c1[i]
        p0 = 0
        p1 = 0
        uu = 0.0
        vv = 0.0
        while True:
            if p0 < n0:  # t: the next distinct time (the smaller of the two arms' next keys)
                t = a[p0] >> _ONE
                if p1 < n1:
                    t1 = b[p1] >> _ONE
                    if t1 < t:
                        t = t1
            elif p1 < n1:
                t = b[p1] >> _ONE
            else:
                break
            m0 = n0 - p0  # at risk at time t in each arm, censored ones at t included
            m1 = n1 - p1
            e0 = _ZERO
            e1 = _ZERO
            while p0 < n0 and (a[p0] >> _ONE) == t:
                e0 += a[p0] & _ONE
                p0 += 1
            while p1 < n1 and (b[p1] >> _ONE) == t:
                e1 += b[p1] & _ONE
                p1 += 1
            if e0 + e1 > _ZERO:
                r = float(m0 + m1)
                r1 = float(m1)
                d = float(e0 + e1)
                d1 = float(e1)
                uu += d1 - r1 * d / r
                if r > 1:
                    vv += d * (r - d) * r1 * (r - r1) / (r * r * (r - 1))
        u[i] = uu
        v[i] = vv
