"""Exact order statistics of pairwise sums of two sorted samples, without forming all of them.

The Hodges-Lehmann estimates need a few order statistics of m pairwise values per
replicate: the differences ``x_j - y_i`` of two samples (m = n_x n_y) or the Walsh
averages ``(d_i + d_j) / 2``, i <= j, of one sample (m = n (n + 1) / 2). Forming
all m values and partitioning them costs O(m) per replicate. Sorted, both samples
give a matrix ``M[i, j] = scale * (u[i] + v[j])`` that does not decrease along rows
or columns, and the number of entries <= t is a staircase walk of O(n_u + n_v)
steps. :func:`select_sorted_sums` keeps, for each wanted rank, a bracket
``(lo, hi]`` of thresholds with the row counts at both ends (per-row column bounds,
as in the selection in a sorted matrix of Johnson & Mizoguchi 1978, SIAM J Comput
7:147-153, used for the Hodges-Lehmann estimate by Monahan 1984, ACM TOMS
10:265-270, Algorithm 616 -- both from memory). Where those pick pivots among the
candidate entries (at random, or medians of rows), this kernel guesses thresholds:
first from a normal model of the pairwise values, then by interpolating the counts.
All thresholds of a round are counted in one interleaved walk. Once a bracket
holds a few candidates per row it enumerates them and finishes with counting
passes over that short list (at candidate values when ties stall the
interpolation, counting < and <= so that a tied value settles all the ranks it
holds). Typical cost: two or three O(n_u + n_v) walks per order statistic; the
guesses decide only the speed, never the answer.

Every returned value is an entry ``scale * (u[i] + v[j])``, computed with the same
floating-point operations as the full matrix, so it equals ``np.partition`` of that
matrix exactly. Differences use ``u = -sort(y)[::-1]`` and ``v = sort(x)`` with
``scale = 1`` (``x_j + (-y_i)`` is ``x_j - y_i`` exactly in IEEE arithmetic);
Walsh averages use ``u = v = sort(d)``, ``scale = 0.5`` and only the columns
``j >= i`` (triangular); the selection runs on the sums ``u[i] + v[j]`` and scales
at the end (halving preserves order). Inputs must be finite (no NaN, no inf). Of
two entries equal as numbers but not as bits (-0.0 and 0.0), either may be returned.

The kernel is compiled with numba (a dependency of simpower; the code still runs
where numba cannot be imported), and numba caches the machine code beside this
file (``cache=True``), so only the first process of an installation compiles
(several seconds). Without numba the same functions stay plain Python (slow, but
importable and testable), and the analyses use their numpy reference path instead
(:func:`simpower.analyses.nonparametric.order_statistic_backend`).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import special

try:  # optional: the compiled kernel
    import numba
except ImportError:  # pragma: no cover - exercised where numba is not installed
    numba = None

#: True when the kernel below is compiled (numba importable)
HAVE_NUMBA = numba is not None

#: a target's bracket is enumerated once it holds at most this many candidates per row and column
_FLAT = 2
#: rounds of staircase thresholds after which every open bracket is enumerated, however large
_MAX_ROUNDS = 12
#: counting passes over the enumerated candidates before the rest are sorted
_FLAT_STEPS = 16
#: candidates few enough to sort directly
_FEW = 12
#: entries of a row copied as one fixed-length block when enumerating
_PAD = 4
#: half-width of the first bracket around the normal model's guess, in ranks per sqrt(m)
_FIRST_REACH = 1.0


def _jit(fn):
    """``numba.njit(cache=True)`` when numba is there, else the plain function."""
    return numba.njit(cache=True)(fn) if HAVE_NUMBA else fn


@_jit
def _count_many(u, v, ts, owner, nq, lo_c, out, ii, jj):
    """Row counts ``c_i(t) = #{j : u[i] + v[j] <= t}`` for the thresholds ``ts[:nq]``.

    ``v`` ends with +inf (index n_v). Threshold q belongs to target ``owner[q]``,
    whose bracket's lower counts ``lo_c[owner[q]]`` are row by row at most the
    counts at ``ts[q]``. Each count climbs the staircase from the last row (the
    counts grow from row to row); the walks run interleaved, so the latency of one
    overlaps the others. Writes the counts to ``out[q]``.
    """
    nr = u.size
    active = nq
    for q in range(nq):
        ii[q] = nr - 1
        jj[q] = lo_c[owner[q], nr - 1]
    while active > 0:
        for q in range(nq):
            i = ii[q]
            if i >= 0:
                j = jj[q]
                le = u[i] + v[j] <= ts[q]
                j += le
                out[q, i] = j
                i -= 1 - le
                if i >= 0:
                    low = lo_c[owner[q], i]
                    if low > j:
                        j = low
                else:
                    active -= 1
                ii[q] = i
                jj[q] = j


@_jit
def _valid_total(c, nr, tri):
    """Number of valid entries (columns j >= i when ``tri``) below the row counts ``c[:nr]``."""
    total = 0
    if tri:
        for i in range(nr):
            x = c[i] - i
            total += x if x > 0 else 0
    else:
        for i in range(nr):
            total += c[i]
    return total


@_jit
def _smallest_from(u, v, tri, c):
    """Smallest valid entry in the columns ``j >= c[i]`` of any row (+inf if none)."""
    best = np.inf
    for i in range(u.size):
        j = c[i]
        if tri and j < i:
            j = i
        x = u[i] + v[j]   # v[n_v] = +inf
        if x < best:
            best = x
    return best


@_jit
def _largest_before(u, v, tri, c):
    """Largest valid entry in the columns ``j < c[i]`` of any row (-inf if none)."""
    best = -np.inf
    for i in range(u.size):
        j = c[i] - 1
        if j >= 0 and (j >= i or not tri):
            x = u[i] + v[j]
            if x > best:
                best = x
    return best


@_jit
def _enumerate(u, v, tri, lo, hi, buf):
    """Copy the valid entries of the columns ``lo[i] <= j < hi[i]`` of every row to ``buf``.

    ``v`` carries _PAD values of +inf past its end and ``buf`` _PAD spare slots, so a
    row of at most _PAD entries is copied as a fixed-length block (no branch on its
    length); the slots past the row's entries are overwritten by the next row.
    """
    p = 0
    for i in range(u.size):
        a = lo[i]
        b = hi[i]
        if tri:
            a = a if a > i else i
            b = b if b > i else i
        ui = u[i]
        w = b - a
        if w <= _PAD:
            for d in range(_PAD):
                buf[p + d] = ui + v[a + d]
        else:
            for d in range(w):
                buf[p + d] = ui + v[a + d]
        p += w
    return p


@_jit
def _insertion_sort(a, n):
    for p in range(1, n):
        x = a[p]
        q = p - 1
        while q >= 0 and a[q] > x:
            a[q + 1] = a[q]
            q -= 1
        a[q + 1] = x


@_jit
def _sift_down(a, start, end):
    root = start
    while 2 * root + 1 < end:
        child = 2 * root + 1
        if child + 1 < end and a[child] < a[child + 1]:
            child += 1
        if a[root] >= a[child]:
            return
        a[root], a[child] = a[child], a[root]
        root = child


@_jit
def _heap_sort(a, n):
    """Sort ``a[:n]`` in place (a small own sort: numba's np.sort would add a second to the compile)."""
    for start in range(n // 2 - 1, -1, -1):
        _sift_down(a, start, n)
    for end in range(n - 1, 0, -1):
        a[0], a[end] = a[end], a[0]
        _sift_down(a, 0, end)


@_jit
def _below_above(buf, c, t):
    """Largest value < t and smallest value > t in ``buf[:c]`` (-inf / +inf if none)."""
    below = -np.inf
    above = np.inf
    for i in range(c):
        x = buf[i]
        if x < t and x > below:
            below = x
        if x > t and x < above:
            above = x
    return below, above


@_jit
def _select_flat(buf, c, r1, r2, a, b, ext):
    """The r1-th and r2-th smallest (0-based, r1 <= r2 <= r1 + 1) of ``buf[:c]``, all in (a, b].

    Narrows the value bracket (a, b] by counting passes over the candidates (no
    data moved, so each pass is a plain loop): at thresholds interpolated from the
    counts, and at the candidate nearest the interpolated value when a pass made no
    progress (ties and near-ties, whose values the interpolation cannot separate).
    Each pass counts the values < t and <= t, so a threshold equal to a tied value
    settles every rank that value holds. The few values left are sorted. ``ext``
    is a work array of at least _FEW + 1 values.
    """
    if not (a > -np.inf and b < np.inf):
        a = np.inf
        b = -np.inf
        for i in range(c):
            x = buf[i]
            if x < a:
                a = x
            if x > b:
                b = x
        a = np.nextafter(a, -np.inf)
    na = 0
    nb = c
    tau = 0.5 * (r1 + r2 + 1)
    stalled = False
    for step in range(_FLAT_STEPS):
        width = nb - na
        if width <= _FEW:
            break
        reach = 0.5 * math.sqrt(width) + 1.0
        aim = tau + reach if nb - tau > tau - na else tau - reach
        if aim < na + 0.5:
            aim = na + 0.5
        elif aim > nb - 0.5:
            aim = nb - 0.5
        t = a + (aim - na) * ((b - a) / width)
        if stalled or not (t > a and t < b):   # the candidate nearest t (inside the bracket)
            best = np.inf
            near = b
            for i in range(c):
                x = buf[i]
                if x > a and x <= b and abs(x - t) < best:
                    best = abs(x - t)
                    near = x
            t = near
        lt = 0
        le = 0
        for i in range(c):
            x = buf[i]
            lt += x < t
            le += x <= t
        in1 = lt <= r1 and r1 < le    # rank r1 holds the value t
        in2 = lt <= r2 and r2 < le
        if in1 and in2:
            return t, t
        if in1:                       # r2 = r1 + 1 = le
            return t, _below_above(buf, c, t)[1]
        if in2:                       # r1 = r2 - 1 = lt - 1
            return _below_above(buf, c, t)[0], t
        if r1 < lt and r2 >= le:      # t (no candidate) splits the two
            below, above = _below_above(buf, c, t)
            return below, above
        stalled = True
        if r2 < lt:
            if lt < nb:
                nb = lt
                b = np.nextafter(t, -np.inf)
                stalled = False
        elif le > na:
            na = le
            a = t
            stalled = False
    k = nb - na
    if k + 1 > ext.size:
        ext = np.empty(k + 1)
    q = 0
    for i in range(c):
        x = buf[i]
        ext[q] = x
        q += (x > a) & (x <= b)
    if q <= 64:
        _insertion_sort(ext, q)
    else:   # only when the counting passes ran out
        _heap_sort(ext, q)
    return ext[r1 - na], ext[r2 - na]


@_jit
def _location_spread(x, n):
    """Interquartile mean and IQR / 1.349 (else range / 4) of the sorted ``x[:n]``."""
    a = n // 4
    b = n - a
    s = 0.0
    for i in range(a, b):
        s += x[i]
    spread = (x[(3 * (n - 1)) // 4] - x[(n - 1) // 4]) / 1.349
    if not spread > 0.0:
        spread = (x[n - 1] - x[0]) / 4.0
    return s / (b - a), spread


@_jit
def _select_one(u, v, tri, k1s, k2s, zs, m, res1, res2, w_int, lo_c, hi_c, out, ts, t_lo, t_hi, slope, buf,
                ext):
    """Ranks ``k1s[p]`` and ``k2s[p]`` (k2 <= k1 + 1) of the valid sums ``u[i] + v[j]`` of one replicate.

    Each target keeps a bracket (t_lo, t_hi] of thresholds with counts
    n_lo <= k1 <= k2 < n_hi and the row counts at both ends. Every round gives each
    open target two thresholds (first around the normal model's guess, then by
    interpolating the counts a little either side of the target), counted in one
    interleaved pass; a target whose bracket holds few candidates is finished by
    enumerating them. ``v`` ends with +inf. The rest are work arrays.
    """
    n_targets = k1s.size
    nr = u.size
    nc = v.size - _PAD
    owner = w_int[0]
    ii = w_int[1]
    jj = w_int[2]
    n_lo = w_int[3]
    n_hi = w_int[4]
    state = w_int[5]   # 0 open, 1 found, 2 to enumerate
    stalled = w_int[6]  # 1 when the target's last round left its counts as they were
    flat_max = _FLAT * (nr + nc)
    cu, su = _location_spread(u, nr)
    cv, sv = _location_spread(v, nc)
    centre = cu + cv
    spread = math.hypot(su, sv)
    for p in range(n_targets):
        t_lo[p] = -np.inf
        t_hi[p] = np.inf
        n_lo[p] = 0
        n_hi[p] = m
        for i in range(nr):
            lo_c[p, i] = 0
            hi_c[p, i] = nc
        z = zs[p]
        slope[p] = m * math.exp(-0.5 * z * z) / (math.sqrt(2.0 * math.pi) * spread) if spread > 0.0 else 0.0
        state[p] = 0
        stalled[p] = 0
    for rnd in range(_MAX_ROUNDS + 1):
        nq = 0
        for p in range(n_targets):
            if state[p] != 0:
                continue
            k1 = k1s[p]
            k2 = k2s[p]
            c = n_hi[p] - n_lo[p]
            if c <= flat_max or rnd == _MAX_ROUNDS:
                state[p] = 2
                continue
            tau = 0.5 * (k1 + k2 + 1)
            t1 = np.nan
            t2 = np.nan
            if rnd == 0:
                if slope[p] > 0.0:
                    g = centre + zs[p] * spread
                    d = _FIRST_REACH * math.sqrt(m) / slope[p]
                    t1 = g - d
                    t2 = g + d
            elif slope[p] > 0.0 and t_lo[p] == -np.inf:   # both first thresholds above the targets: step down
                miss = n_hi[p] - tau
                t1 = t_hi[p] - (3.0 * miss + 4.0) / slope[p]
                t2 = t_hi[p] - (1.5 * miss + 2.0) / slope[p]
                slope[p] *= 0.5
            elif slope[p] > 0.0 and t_hi[p] == np.inf:    # both below: step up
                miss = tau - n_lo[p]
                t1 = t_lo[p] + (1.5 * miss + 2.0) / slope[p]
                t2 = t_lo[p] + (3.0 * miss + 4.0) / slope[p]
                slope[p] *= 0.5
            elif t_lo[p] == -np.inf or t_hi[p] == np.inf:
                pass                   # no model slope (no spread): the smallest candidate below
            else:                      # interpolate the counts, a little either side of the targets
                reach = 0.5 * math.sqrt(c) + 1.0
                aim1 = tau - reach
                aim2 = tau + reach
                if aim1 < n_lo[p] + 0.5:
                    aim1 = n_lo[p] + 0.5
                if aim2 > n_hi[p] - 0.5:
                    aim2 = n_hi[p] - 0.5
                w = (t_hi[p] - t_lo[p]) / c
                t1 = t_lo[p] + (aim1 - n_lo[p]) * w
                t2 = t_lo[p] + (aim2 - n_lo[p]) * w
            if not (t1 > t_lo[p] and t1 < t_hi[p]):
                t1 = np.nan
            if not (t2 > t_lo[p] and t2 < t_hi[p] and t2 != t1):
                t2 = np.nan
            # a closed bracket whose counts stopped narrowing (ties, near-ties), or no threshold fits
            stuck = stalled[p] == 1 and t_lo[p] > -np.inf and t_hi[p] < np.inf
            if stuck or (t1 != t1 and t2 != t2):
                a = _smallest_from(u, v, tri, lo_c[p])
                b = _largest_before(u, v, tri, hi_c[p])
                if a == b:    # every candidate has one value
                    res1[p] = a
                    res2[p] = a
                    state[p] = 1
                    continue
                if stuck:
                    state[p] = 2   # enumerate: the counting passes there test tied values directly
                    continue
                t1 = a        # the smallest candidate: its count always narrows the bracket
            if t1 == t1:
                ts[nq] = t1
                owner[nq] = p
                nq += 1
            if t2 == t2:
                ts[nq] = t2
                owner[nq] = p
                nq += 1
        if nq == 0:
            break
        _count_many(u, v, ts, owner, nq, lo_c, out, ii, jj)
        for q in range(nq):
            stalled[owner[q]] = 1
        for q in range(nq):
            p = owner[q]
            if state[p] != 0:
                continue
            t = ts[q]
            n = _valid_total(out[q], nr, tri)
            if n <= k1s[p]:
                if t > t_lo[p]:
                    if n > n_lo[p]:
                        stalled[p] = 0
                    t_lo[p] = t
                    n_lo[p] = n
                    for i in range(nr):
                        lo_c[p, i] = out[q, i]
            elif n > k2s[p]:
                if t < t_hi[p]:
                    if n < n_hi[p]:
                        stalled[p] = 0
                    t_hi[p] = t
                    n_hi[p] = n
                    for i in range(nr):
                        hi_c[p, i] = out[q, i]
            else:             # n == k1 + 1 == k2: t falls between the two targets
                res1[p] = _largest_before(u, v, tri, out[q])
                res2[p] = _smallest_from(u, v, tri, out[q])
                state[p] = 1
    for p in range(n_targets):
        if state[p] != 2:
            continue
        c = n_hi[p] - n_lo[p]
        if c + _PAD > buf.size:
            buf = np.empty(c + _PAD)
        got = _enumerate(u, v, tri, lo_c[p], hi_c[p], buf)
        res1[p], res2[p] = _select_flat(buf, got, k1s[p] - n_lo[p], k2s[p] - n_lo[p], t_lo[p], t_hi[p], ext)


@_jit
def _select_rows(u, v, scale, tri, k1s, k2s, zs, out1, out2):
    """:func:`_select_one` for every row of ``u`` and ``v``; results times ``scale``."""
    reps, nr = u.shape
    nc = v.shape[1]
    n_targets = k1s.size
    m = 0
    for i in range(nr):
        m += (nc - i) if tri else nc
    vpad = np.full(nc + _PAD, np.inf)
    res1 = np.empty(n_targets)
    res2 = np.empty(n_targets)
    w_int = np.empty((7, 2 * n_targets), np.int64)
    lo_c = np.empty((n_targets, nr), np.int64)
    hi_c = np.empty((n_targets, nr), np.int64)
    out = np.empty((2 * n_targets, nr), np.int64)
    ts = np.empty(2 * n_targets)
    t_lo = np.empty(n_targets)
    t_hi = np.empty(n_targets)
    slope = np.empty(n_targets)
    buf = np.empty((_FLAT + 1) * (nr + nc) + _PAD)
    ext = np.empty(_FEW + 1)
    for r in range(reps):
        vpad[:nc] = v[r]
        _select_one(u[r], vpad, tri, k1s, k2s, zs, m, res1, res2, w_int, lo_c, hi_c, out, ts, t_lo, t_hi,
                    slope, buf, ext)
        for p in range(n_targets):
            out1[r, p] = scale * res1[p]
            out2[r, p] = scale * res2[p]


@_jit
def _count_rows(u, v, ts, out):
    """``out[r, q]`` = number of pairs (i, j) with ``u[r, i] + v[r, j] <= ts[q]``."""
    reps, nr = u.shape
    nc = v.shape[1]
    nq = ts.size
    vpad = np.full(nc + _PAD, np.inf)
    lo = np.zeros((1, nr), np.int64)
    owner = np.zeros(nq, np.int64)
    counts = np.empty((nq, nr), np.int64)
    ii = np.empty(nq, np.int64)
    jj = np.empty(nq, np.int64)
    for r in range(reps):
        vpad[:nc] = v[r]
        _count_many(u[r], vpad, ts, owner, nq, lo, counts, ii, jj)
        for q in range(nq):
            out[r, q] = _valid_total(counts[q], nr, False)


# -- whole rank tests, row by row: rank sums, tie terms and Hodges-Lehmann order statistics ------
@_jit
def _tie_merge(a, na, b, nb):
    """Twice U and the tie term of the sorted samples ``a[:na]`` and ``b[:nb]``, by one merge.

    Twice U: 2 #(b_j > a_i) + #(b_j = a_i) over all pairs (an integer, so U is exact);
    the tie term: sum over groups of tied pooled values of t^3 - t (t the group size),
    summed as floats of integers (exact), as :func:`~simpower.analyses.nonparametric.rank_rows`.
    """
    i = 0
    j = 0
    twice = 0
    tie = 0.0
    while i < na or j < nb:
        if j >= nb:
            w = a[i]
        elif i >= na:
            w = b[j]
        else:
            w = a[i] if a[i] < b[j] else b[j]
        c0 = 0
        while i < na and a[i] == w:
            i += 1
            c0 += 1
        c1 = 0
        while j < nb and b[j] == w:
            j += 1
            c1 += 1
        twice += c1 * (2 * (i - c0) + c0)
        t = c0 + c1
        if t > 1:
            tie += t * (t * t - 1.0)
    return twice, tie


@_jit
def _signed_rank_terms(x, n):
    """Twice the positive rank sum, the tie term (zeros' group left out) and the zeros of sorted ``x[:n]``.

    Ranks are those of ``|x|`` among all n values, ties averaged, zeros first; the
    rank sum of the positive values counts each rank less the number of zeros
    (Wilcoxon's method: zeros dropped). Integers throughout (exact).
    """
    q = 0
    while q < n and x[q] < 0.0:
        q += 1
    p = q
    while p < n and x[p] == 0.0:
        p += 1
    nz = p - q
    i = q - 1       # negatives, largest first: |x| ascending
    j = p           # positives ascending
    pos = nz        # ranks given so far
    twice = 0
    tie = 0.0
    while i >= 0 or j < n:
        if j >= n:
            w = -x[i]
        elif i < 0:
            w = x[j]
        else:
            a = -x[i]
            w = a if a < x[j] else x[j]
        cn = 0
        while i >= 0 and -x[i] == w:
            i -= 1
            cn += 1
        cp = 0
        while j < n and x[j] == w:
            j += 1
            cp += 1
        t = cn + cp
        # each positive of the group: rank pos + (t + 1) / 2, less nz
        twice += cp * (2 * (pos - nz) + t + 1)
        if t > 1:
            tie += t * (t * t - 1.0)
        pos += t
    return twice, tie, nz


@_jit
def _pairs_of(ks, nk, zk, k1s, k2s, zs):
    """Sort the ranks ``ks[:nk]`` (with their guesses ``zk``), drop repeats, pair neighbours as
    :func:`_target_pairs` does; writes the pairs to ``k1s``, ``k2s`` (the guess of each pair:
    that of its first rank) and returns their number."""
    for p in range(1, nk):
        x = ks[p]
        zx = zk[p]
        q = p - 1
        while q >= 0 and ks[q] > x:
            ks[q + 1] = ks[q]
            zk[q + 1] = zk[q]
            q -= 1
        ks[q + 1] = x
        zk[q + 1] = zx
    u = 0
    for p in range(nk):
        if u == 0 or ks[p] != ks[u - 1]:
            ks[u] = ks[p]
            zk[u] = zk[p]
            u += 1
    npairs = 0
    i = 0
    while i < u:
        k1s[npairs] = ks[i]
        zs[npairs] = zk[i]
        if i + 1 < u and ks[i + 1] == ks[i] + 1:
            k2s[npairs] = ks[i + 1]
            i += 2
        else:
            k2s[npairs] = ks[i]
            i += 1
        npairs += 1
    return npairs


@_jit
def _select_ranks(u, v, tri, scale, m, kq, zq, est, res1, res2, w_int, lo_c, hi_c, out, ts, t_lo, t_hi,
                  slope, buf, ext, ks, zk, k1s, k2s, zs):
    """The ranks ``kq`` (0-based; -1: none, NaN) of ``scale * (u[i] + v[j])`` of one replicate, into ``est``.

    ``v`` ends with _PAD values of +inf; ``zq``: the normal model's guess for each rank
    (speed only). The rest are work arrays of :func:`_select_one`.
    """
    nk = 0
    for q in range(kq.size):
        if kq[q] >= 0:
            ks[nk] = kq[q]
            zk[nk] = zq[q]
            nk += 1
    npairs = _pairs_of(ks, nk, zk, k1s, k2s, zs)
    if npairs > 0:
        _select_one(u, v, tri, k1s[:npairs], k2s[:npairs], zs[:npairs], m, res1, res2, w_int, lo_c, hi_c,
                    out, ts, t_lo, t_hi, slope, buf, ext)
    for q in range(kq.size):
        k = kq[q]
        est[q] = np.nan
        if k < 0:
            continue
        for p in range(npairs):
            if k2s[p] == k:
                est[q] = scale * res2[p]
                break
            if k1s[p] == k:
                est[q] = scale * res1[p]
                break


@_jit
def _rank_test_rows(a, na, b, nb, kind, kq, zq, stat, tie, zeros, est):
    """Rank statistics and Hodges-Lehmann order statistics of each row r.

    ``kind`` 0 (two samples): ``a[r, :na[r]]`` arm 0 and ``b[r, :nb[r]]`` arm 1, sorted;
    ``stat`` twice U1, order statistics of the differences b_j - a_i. ``kind`` 1 (one
    sample): ``a[r, :na[r]]`` sorted (``b`` unused); ``stat`` twice the signed-rank sum
    of the positive values, ``zeros`` their number, order statistics of the Walsh averages.
    ``kq`` (R, K) 0-based ranks (all -1: no order statistics for that row), ``zq`` their
    guesses; ``est`` (R, K) the order statistics (NaN where the rank is -1).
    """
    reps, wa = a.shape
    wb = b.shape[1]
    nt = kq.shape[1]
    wr = wa
    wc = wa if kind == 1 else wb
    ub = np.empty(wr)
    vb = np.full(wc + _PAD, np.inf)
    res1 = np.empty(nt)
    res2 = np.empty(nt)
    w_int = np.empty((7, 2 * nt), np.int64)
    lo_c = np.empty((nt, wr), np.int64)
    hi_c = np.empty((nt, wr), np.int64)
    out = np.empty((2 * nt, wr), np.int64)
    ts = np.empty(2 * nt)
    t_lo = np.empty(nt)
    t_hi = np.empty(nt)
    slope = np.empty(nt)
    buf = np.empty((_FLAT + 1) * (wr + wc) + _PAD)
    ext = np.empty(_FEW + 1)
    ks = np.empty(nt, np.int64)
    zk = np.empty(nt)
    k1s = np.empty(nt, np.int64)
    k2s = np.empty(nt, np.int64)
    zs = np.empty(nt)
    for r in range(reps):
        n0 = na[r]
        if kind == 0:
            n1 = nb[r]
            tw, tt = _tie_merge(a[r], n0, b[r], n1)
            zeros[r] = 0
            m = n0 * n1
        else:
            n1 = n0
            tw, tt, nz = _signed_rank_terms(a[r], n0)
            zeros[r] = nz
            m = n0 * (n0 + 1) // 2
        stat[r] = tw
        tie[r] = tt
        if m == 0 or kq[r, 0] < 0:
            for q in range(nt):
                est[r, q] = np.nan
            continue
        if kind == 0:
            for i in range(n0):
                ub[i] = -a[r, n0 - 1 - i]
            for j in range(n1):
                vb[j] = b[r, j]
        else:
            for i in range(n0):
                ub[i] = a[r, i]
                vb[i] = a[r, i]
        for j in range(n1, n1 + _PAD):
            vb[j] = np.inf
        _select_ranks(ub[:n0], vb[:n1 + _PAD], kind == 1, 1.0 if kind == 0 else 0.5, m, kq[r], zq[r], est[r],
                      res1, res2, w_int, lo_c, hi_c, out, ts, t_lo, t_hi, slope, buf, ext, ks, zk, k1s, k2s, zs)


def rank_test_rows(a, na, b, nb, kind, kq, zq):
    """:func:`_rank_test_rows` with its outputs allocated: (stat, tie, zeros, est).

    ``a`` (R, Wa) and ``b`` (R, Wb) sorted rows whose first ``na[r]`` / ``nb[r]`` values
    are the sample (finite); ``kind`` 'two' or 'one'; ``kq`` (R, K) int ranks, ``zq`` (R, K).
    """
    a = np.ascontiguousarray(a, float)
    b = np.ascontiguousarray(b, float)
    reps = a.shape[0]
    kq = np.ascontiguousarray(kq, np.int64)
    zq = np.ascontiguousarray(zq, float)
    stat = np.zeros(reps, np.int64)
    tie = np.zeros(reps)
    zeros = np.zeros(reps, np.int64)
    est = np.empty(kq.shape)
    if reps:
        with _compile_notice("rank-test"):
            _rank_test_rows(a, np.ascontiguousarray(na, np.int64), b, np.ascontiguousarray(nb, np.int64),
                            0 if kind == "two" else 1, kq, zq, stat, tie, zeros, est)
    return stat, tie, zeros, est


#: seconds a first kernel call may take before the user is told it is compiling
COMPILE_NOTICE_AFTER = 1.0
_first_call_done: set[str] = set()


class _compile_notice:
    """Around a kernel's first call in this process: if it takes longer than :data:`COMPILE_NOTICE_AFTER`
    seconds (numba compiling it for this machine, before its cache exists), say so once on standard error."""

    def __init__(self, kernel: str):
        self.kernel = kernel
        self.timer = None

    def __enter__(self):
        if HAVE_NUMBA and self.kernel not in _first_call_done:
            import threading

            self.timer = threading.Timer(COMPILE_NOTICE_AFTER, self._say)
            self.timer.daemon = True
            self.timer.start()
        return self

    def _say(self):
        import sys

        sys.stderr.write(f"simpower: compiling the {self.kernel} kernel for this machine (first use only; "
                         f"10-20 s; later runs load it from numba's cache)...\n")
        sys.stderr.flush()

    def __exit__(self, *exc):
        if self.timer is not None:
            self.timer.cancel()
            _first_call_done.add(self.kernel)
        return False


def count_sorted_sums(u, v, ts):
    """Number of pairs (i, j) with ``u[r, i] + v[r, j] <= t`` for each row r and threshold t.

    ``u`` (R, n_u) and ``v`` (R, n_v) with rows sorted ascending; ``ts`` floats.
    Returns an int64 array (R, len(ts)). A staircase count, O(n_u + n_v) per row
    and threshold.
    """
    u = np.ascontiguousarray(u, float)
    v = np.ascontiguousarray(v, float)
    ts = np.asarray(ts, float)
    out = np.zeros((u.shape[0], ts.size), np.int64)
    if u.shape[0] and ts.size and u.shape[1] and v.shape[1]:
        with _compile_notice("rank-count"):
            _count_rows(u, v, ts, out)
    return out


def _target_pairs(ks, m):
    """Group the 0-based ranks ``ks`` into pairs (k, k) or (k, k + 1) of neighbours."""
    ks = sorted(set(int(k) for k in ks))
    if ks and (ks[0] < 0 or ks[-1] >= m):
        raise ValueError(f"order statistics must be in 0..{m - 1}; got {ks}")
    pairs = []
    i = 0
    while i < len(ks):
        if i + 1 < len(ks) and ks[i + 1] == ks[i] + 1:
            pairs.append((ks[i], ks[i + 1]))
            i += 2
        else:
            pairs.append((ks[i], ks[i]))
            i += 1
    return pairs


def select_sorted_sums(u, v, ks, scale=1.0, triangular=False):
    """Order statistics ``ks`` (0-based) of ``scale * (u[r, i] + v[r, j])`` for each row r.

    Parameters
    ----------
    u : ndarray, shape (R, n_u)
        Rows sorted ascending.
    v : ndarray, shape (R, n_v)
        Rows sorted ascending (``v is u`` and ``n_u == n_v`` when ``triangular``).
    ks : iterable of int
        Ranks in 0..m-1, m = n_u n_v (or n (n + 1) / 2 when ``triangular``).
    scale : float
        1 for sums (differences, with ``u`` negated), 0.5 for Walsh averages.
    triangular : bool
        Only the entries with column j >= row i (Walsh averages, i <= j).

    Returns
    -------
    dict
        rank -> ndarray (R,) of exact entries of the matrix.
    """
    u = np.ascontiguousarray(u, float)
    v = np.ascontiguousarray(v, float)
    reps, nu = u.shape
    nv = v.shape[1]
    m = nu * (nu + 1) // 2 if triangular else nu * nv
    pairs = _target_pairs(ks, m)
    k1s = np.array([p[0] for p in pairs], np.int64)
    k2s = np.array([p[1] for p in pairs], np.int64)
    zs = special.ndtri((0.5 * (k1s + k2s + 1)) / m) if m > 0 else np.zeros(len(pairs))
    out1 = np.empty((reps, len(pairs)))
    out2 = np.empty((reps, len(pairs)))
    if reps and len(pairs):
        with _compile_notice("rank-selection"):
            _select_rows(u, v, float(scale), bool(triangular), k1s, k2s, np.asarray(zs, float), out1, out2)
    res = {}
    for q, (k1, k2) in enumerate(pairs):
        res[k1] = out1[:, q]
        res[k2] = out2[:, q]
    return res


def sorted_difference_terms(x, y):
    """``(u, v)`` with ``u[r, i] + v[r, j]`` running over the differences ``x[r, j] - y[r, i]``, rows sorted."""
    return np.ascontiguousarray(-np.sort(y, axis=1)[:, ::-1]), np.sort(x, axis=1)


def difference_order_stats(x, y, ks):
    """Order statistics ``ks`` (0-based) of the n_x n_y differences ``x[r, j] - y[r, i]`` of each row."""
    u, v = sorted_difference_terms(x, y)
    return select_sorted_sums(u, v, ks, 1.0, False)


def walsh_order_stats(d, ks):
    """Order statistics ``ks`` (0-based) of the Walsh averages ``(d[r, i] + d[r, j]) / 2``, i <= j."""
    s = np.sort(d, axis=1)
    return select_sorted_sums(s, s, ks, 0.5, True)
