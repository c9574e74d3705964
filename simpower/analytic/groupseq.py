"""Group-sequential designs for a normal statistic: boundaries, exit probabilities, sizes.

A trial looks at its data K times, at planned information fractions
``0 < t_1 < ... < t_K = 1`` of the maximum information ``I_max``. The z
statistics at the looks behave like a Brownian motion observed on that grid:
the score ``S_k = Z_k sqrt(t_k)`` has independent increments
``S_k - S_{k-1} ~ N(drift (t_k - t_{k-1}), t_k - t_{k-1})``, so that
``Corr(Z_i, Z_j) = sqrt(t_i / t_j)`` for ``i <= j`` and ``E Z_k = drift sqrt(t_k)``
with ``drift = theta sqrt(I_max)`` (Jennison & Turnbull 2000, ch. 3).

The trial stops for efficacy at the first look with ``Z_k >= b_k`` (two-sided:
``|Z_k| >= b_k``) and, with a futility boundary, for futility at the first look
with ``Z_k <= a_k``. Every probability here comes from one deterministic
recursion (Armitage, McPherson & Rowe 1969; Jennison & Turnbull 2000, ch. 19):
the sub-density of the score on paths still running is carried from look to
look on a grid of composite Gauss-Legendre nodes, by convolution with the normal
density of the increment; exit probabilities at a look are sums of normal tail
areas over the previous grid, so the last step needs no quadrature.

Boundaries come from Lan & DeMets (1983) spending functions (``spending``), the
cumulative type I error allowed by information fraction ``t``:

- ``"obf"``: ``2 - 2 Phi(z_{1 - alpha/2} / sqrt(t))`` (O'Brien-Fleming type,
  Lan & DeMets 1983, Biometrika 70:659-663);
- ``"pocock"``: ``alpha log(1 + (e - 1) t)`` (Pocock type, same source);
- ``"power"``: ``alpha t^rho``, ``rho > 0`` (Kim & DeMets 1987, Biometrika
  74:149-154);
- ``"gamma"``: ``alpha (1 - exp(-gamma t)) / (1 - exp(-gamma))``, ``gamma != 0``,
  ``alpha t`` at ``gamma = 0`` (Hwang, Shih & DeCani 1990, Stat Med 9:1439-1445);

or are the classical constant-type boundaries of Pocock (1977, Biometrika
64:191-199; ``b_k = C``) and O'Brien & Fleming (1979, Biometrics 35:549-556;
``b_k = C / sqrt(t_k)``), ``C`` found by root finding on the same recursion.

``alpha`` is the total type I error of the design: one-sided for ``sides=1``,
split evenly between the two tails for ``sides=2``, where each tail spends
``f(t; alpha/2)`` (the spending function taken at ``alpha/2``), so a symmetric
two-sided design at 0.05 has the boundaries of the one-sided design at 0.025
up to paths that cross the lower boundary and would later have crossed the
upper one (the boundaries differ by 2e-10 for five looks with O'Brien-Fleming-
type spending, 1.5e-5 with Pocock-type spending). Accuracy: the grid keeps
9 standard deviations of the score either side of its mean and panels of at
most one increment SD with 10 Gauss-Legendre nodes each; halving the panels and
keeping 11 SDs changes boundaries and probabilities by less than 1e-15, and
``scipy.stats.multivariate_normal.cdf`` agrees to its own error (about 1e-9).
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass

import numpy as np
from scipy import optimize, special

from ..errors import ParameterError
from . import _common as c

SPENDING = ("obf", "pocock", "power", "gamma")
CLASSICAL = ("obf", "pocock")

_SPREAD = 9.0  # score SDs kept either side of the mean (normal mass beyond: 1e-19)
_GL_X, _GL_W = np.polynomial.legendre.leggauss(10)
_PANEL = 1.0  # panel width in SDs of the narrower neighbouring increment
_BIG = 37.0  # |z| beyond which a normal tail is below 1e-298: "never crossed"
_MIN_GAP = 0.01  # smallest increment of information fraction between looks
_MAX_LOOKS = 100
_BLOCK = 1 << 21  # kernel entries computed at once (caps memory at ~16 MB)
_GAMMA_MAX = 40.0


# ---------------------------------------------------------------------------
# input checks


def _looks(looks) -> np.ndarray:
    """Information fractions from an int K (equal spacing) or an increasing sequence ending at 1."""
    if isinstance(looks, (numbers.Integral, np.integer)) and not isinstance(looks, (bool, np.bool_)):
        k = int(looks)
        if not 1 <= k <= _MAX_LOOKS:
            raise ParameterError(f"`looks` must be a number of looks in [1, {_MAX_LOOKS}] or a list of "
                                 f"information fractions; got {k}.")
        return np.arange(1, k + 1) / k
    if isinstance(looks, (str, bytes)) or np.ndim(looks) != 1:
        raise ParameterError("`looks` must be a number of looks or an increasing list of information "
                             f"fractions ending at 1, e.g. [0.5, 1]; got {looks!r}.")
    t = c.real("looks", looks, 0.0, 1.0, low_open=True)
    if len(t) > _MAX_LOOKS:
        raise ParameterError(f"`looks` must hold at most {_MAX_LOOKS} fractions; got {len(t)}.")
    if abs(t[-1] - 1.0) > 1e-12:
        raise ParameterError(f"`looks` must end at 1 (the final look has all the information); got {t[-1]:g}.")
    t = t.copy()
    t[-1] = 1.0
    gaps = np.diff(np.concatenate([[0.0], t]))
    if np.any(gaps < _MIN_GAP):
        i = int(np.argmax(gaps < _MIN_GAP))
        raise ParameterError(f"`looks` must increase by at least {_MIN_GAP:g} from look to look; "
                             f"look {i + 1} is at {t[i]:g}.")
    return t


def _sides(sides) -> int:
    if isinstance(sides, (bool, np.bool_)) or sides not in (1, 2):
        raise ParameterError(f"`sides` must be 1 (one-sided, upper boundary) or 2 (symmetric two-sided); "
                             f"got {sides!r}.")
    return int(sides)


def _scalar_alpha(alpha) -> float:
    if not c.is_scalar(alpha):
        raise ParameterError(f"`alpha` must be a single number in (0, 1); got {alpha!r}.")
    a = float(c.alpha_power(alpha))
    if a >= 0.5:
        raise ParameterError(f"`alpha` must be below 0.5 for a sequential design; got {a:g}.")
    return a


def _param(kind: str, param):
    if kind in ("obf", "pocock"):
        if param is not None:
            raise ParameterError(f"`param` must be None for spending {kind!r} (it has no parameter); "
                                 f"got {param!r}.")
        return None
    if param is None:
        need = "rho > 0, e.g. 3" if kind == "power" else "gamma, e.g. -4"
        raise ParameterError(f"`param` is required for spending {kind!r} ({need}).")
    if kind == "power":
        return c.real("param", param, 0.0, low_open=True)
    return c.real("param", param, -_GAMMA_MAX, _GAMMA_MAX)


def _spend(kind: str, t: np.ndarray, alpha, param) -> np.ndarray:
    t = np.asarray(t, dtype=float)
    if kind == "obf":
        with np.errstate(divide="ignore"):
            return 2.0 * special.ndtr(-c.critical_z(alpha, "two-sided") / np.sqrt(t))
    if kind == "pocock":
        return alpha * np.log1p((math.e - 1.0) * t)
    if kind == "power":
        return alpha * t ** param
    g = np.asarray(param, dtype=float)
    zero = g == 0
    safe = np.where(zero, 1.0, g)
    return np.where(zero, alpha * t, alpha * np.expm1(-safe * t) / np.expm1(-safe))


def spending(kind, t, alpha=0.025, param=None):
    """Cumulative type I error a spending function allows by information fraction ``t``.

    Parameters
    ----------
    kind : {"obf", "pocock", "power", "gamma"}
        O'Brien-Fleming type and Pocock type (Lan & DeMets 1983), the power
        family ``alpha t^rho`` (Kim & DeMets 1987) or the gamma family
        (Hwang, Shih & DeCani 1990); formulas in the module docstring.
    t : float or array_like
        Information fraction(s) in [0, 1].
    alpha : float or array_like
        Total type I error to spend, in (0, 1).
    param : float, optional
        ``rho > 0`` for "power", ``gamma`` in [-40, 40] for "gamma"; None otherwise.

    Returns
    -------
    float or ndarray
        Alpha spent by ``t``: 0 at ``t = 0``, ``alpha`` at ``t = 1``, increasing.

    Examples
    --------
    The O'Brien-Fleming-type function spends almost nothing early:

    >>> from simpower.analytic import spending
    >>> round(spending("obf", 0.5, 0.025), 5), round(spending("pocock", 0.5, 0.025), 5)
    (0.00153, 0.0155)
    """
    kind = c.choice("kind", kind, SPENDING)
    scalar = c.is_scalar(t, alpha, param)
    tt = c.real("t", t, 0.0, 1.0)
    a = c.alpha_power(alpha)
    p = _param(kind, param)
    return c.finish(_spend(kind, tt, a, p), scalar)


# ---------------------------------------------------------------------------
# the recursion (Jennison & Turnbull 2000, ch. 19)


class _Walk:
    """Sub-density of the score ``S(t) = Z(t) sqrt(t)`` over paths that have not stopped.

    ``s`` are grid nodes and ``w`` the probability masses they carry (density
    times quadrature weight); the start is a point mass at ``S(0) = 0``.
    """

    def __init__(self) -> None:
        self.t = 0.0
        self.s = np.zeros(1)
        self.w = np.ones(1)

    def _x(self, z: float, t: float, drift: float) -> np.ndarray:
        d = t - self.t
        return (z * math.sqrt(t) - self.s - drift * d) / math.sqrt(d)

    def above(self, z: float, t: float, drift: float) -> float:
        """P(still running, Z(t) >= z)."""
        if z >= _BIG:
            return 0.0
        return float(self.w @ special.ndtr(-self._x(z, t, drift)))

    def below(self, z: float, t: float, drift: float) -> float:
        """P(still running, Z(t) <= z)."""
        if z <= -_BIG:
            return 0.0
        return float(self.w @ special.ndtr(self._x(z, t, drift)))

    def step(self, lo: float, hi: float, t: float, drift: float, t_next: float) -> None:
        """Move to look ``t``, keeping the paths with ``lo < Z(t) < hi``.

        ``t_next`` (the look after) sets the panel width, since the next step
        integrates against a normal kernel with SD ``sqrt(t_next - t)``.
        """
        d = t - self.t
        rt = math.sqrt(t)
        mean = drift * t
        a = max(lo * rt, mean - _SPREAD * rt)
        b = min(hi * rt, mean + _SPREAD * rt)
        if b <= a:  # nobody continues
            self.t, self.s, self.w = t, np.zeros(1), np.zeros(1)
            return
        width = _PANEL * math.sqrt(min(d, t_next - t))
        panels = max(1, math.ceil((b - a) / width))
        edges = np.linspace(a, b, panels + 1)
        half = 0.5 * np.diff(edges)
        mid = 0.5 * (edges[:-1] + edges[1:])
        nodes = (mid[:, None] + half[:, None] * _GL_X).ravel()
        qw = (half[:, None] * _GL_W).ravel()
        keep = self.w > 0
        s_old, w_old = self.s[keep], self.w[keep]
        dens = np.empty(nodes.size)
        rows = max(1, _BLOCK // max(1, s_old.size))
        shift = s_old + drift * d
        norm = 1.0 / math.sqrt(2.0 * math.pi * d)
        for i in range(0, nodes.size, rows):
            u = nodes[i:i + rows, None] - shift[None, :]
            dens[i:i + rows] = np.exp(-0.5 * u * u / d) @ w_old * norm
        self.t, self.s, self.w = t, nodes, dens * qw


def _exits(t: np.ndarray, upper: np.ndarray, lower: np.ndarray, drift: float):
    """Per-look probabilities of stopping above ``upper`` and below ``lower``."""
    walk = _Walk()
    up = np.zeros(len(t))
    down = np.zeros(len(t))
    for k in range(len(t)):
        up[k] = walk.above(upper[k], t[k], drift)
        down[k] = walk.below(lower[k], t[k], drift)
        if k < len(t) - 1:
            walk.step(lower[k], upper[k], t[k], drift, t[k + 1])
    return up, down


def _decreasing_root(fun, target: float, lo: float) -> float:
    """The ``b`` in [lo, _BIG] with ``fun(b) = target`` for ``fun`` decreasing; inf if fun(_BIG) >= target."""
    if fun(_BIG) >= target:
        return math.inf
    if fun(lo) <= target:
        return lo
    return optimize.brentq(lambda b: fun(b) - target, lo, _BIG, xtol=1e-13, rtol=4 * np.finfo(float).eps,
                           maxiter=500)


# ---------------------------------------------------------------------------
# results


@dataclass(frozen=True)
class Boundaries:
    """Stopping boundaries of a group-sequential design, on the z scale.

    Attributes
    ----------
    fractions : ndarray
        Information fractions of the looks, the last one 1.
    efficacy : ndarray
        Upper z boundary per look (two-sided: stop when ``|Z| >= efficacy``);
        ``inf`` where the design cannot stop.
    futility : ndarray or None
        One-sided designs with a futility rule: stop for futility when
        ``Z <= futility``; the last entry equals the last efficacy value.
    crossing : ndarray
        Per-look probability under H0 of stopping for efficacy (both tails for
        two-sided designs), with the futility rule only if it is binding.
    alpha, sides, method, binding
        Total type I error, 1 or 2, how the boundaries were made (e.g.
        ``"spending obf"``, ``"classical pocock"``), and whether the futility
        rule is binding.
    drift : float or None
        For a beta-spending futility rule, the design drift ``theta sqrt(I_max)``
        at which the power is ``1 - beta``.
    """

    fractions: np.ndarray
    efficacy: np.ndarray
    futility: np.ndarray | None
    crossing: np.ndarray
    alpha: float
    sides: int
    method: str
    binding: bool = False
    drift: float | None = None

    @property
    def spent(self) -> np.ndarray:
        """Cumulative type I error spent by each look (H0, as in ``crossing``)."""
        return np.cumsum(self.crossing)

    @property
    def nominal(self) -> np.ndarray:
        """Nominal p-value thresholds per look: ``1 - Phi(b_k)`` (one-sided), twice that (two-sided)."""
        return self.sides * special.ndtr(-self.efficacy)

    @property
    def lower(self) -> np.ndarray:
        """The z boundary below which the trial stops: futility, lower efficacy, or -inf."""
        if self.sides == 2:
            return -self.efficacy
        if self.futility is not None:
            return self.futility
        return np.full(len(self.fractions), -math.inf)

    def rows(self) -> list[dict]:
        """One dict per look (fraction, boundaries, nominal p, crossing, spent) for a table."""
        lower = self.lower
        return [{"look": k + 1, "fraction": float(self.fractions[k]), "efficacy_z": float(self.efficacy[k]),
                 "lower_z": float(lower[k]), "nominal_p": float(self.nominal[k]),
                 "crossing_h0": float(self.crossing[k]), "spent": float(self.spent[k])}
                for k in range(len(self.fractions))]


@dataclass(frozen=True)
class Crossing:
    """Exit probabilities of a design under ``drift = theta sqrt(I_max)``.

    ``upper[k]`` is the probability of stopping at look k above the efficacy
    boundary, ``lower[k]`` below the lower boundary (futility; lower efficacy
    for two-sided designs; the final look's "accept" for a one-sided design
    with a futility rule).
    """

    fractions: np.ndarray
    drift: float
    upper: np.ndarray
    lower: np.ndarray
    sides: int

    @property
    def rejection(self) -> float:
        """Probability of rejecting H0 (both tails for two-sided designs): power, or alpha at drift 0."""
        total = self.upper.sum() + (self.lower.sum() if self.sides == 2 else 0.0)
        return float(total)

    @property
    def stopping(self) -> np.ndarray:
        """Probability the trial ends at each look (the final look takes every path still running)."""
        stop = self.upper + self.lower
        stop[-1] = max(0.0, 1.0 - stop[:-1].sum())
        return stop

    @property
    def expected_fraction(self) -> float:
        """Expected information at stopping as a fraction of ``I_max``."""
        return float(self.fractions @ self.stopping)


# ---------------------------------------------------------------------------
# public functions


def _futility(futility, t: np.ndarray, sides: int):
    if futility is None:
        return None
    if sides == 2:
        raise ParameterError("`futility` must be None for sides=2 (only one-sided designs take a futility "
                             "boundary here).")
    if isinstance(futility, (str, bytes)) or np.ndim(futility) != 1 or len(futility) != len(t) - 1:
        raise ParameterError(f"`futility` must list one z value per interim look ({len(t) - 1} values; "
                             f"-inf for none at a look); got {futility!r}.")
    try:
        a = np.asarray(futility, dtype=float)
    except (TypeError, ValueError):
        raise ParameterError(f"`futility` must be numbers (z values); got {futility!r}.") from None
    if np.any(np.isnan(a)) or np.any(a == math.inf):
        raise ParameterError(f"`futility` must be finite z values or -inf; got {futility!r}.")
    return np.maximum(a, -_BIG)


def boundaries(looks, alpha=0.025, sides=1, spending="obf", param=None, futility=None, binding=False):
    """Efficacy boundaries from an alpha-spending function, by the recursion.

    At look k the boundary ``b_k`` is set so that the probability under H0 of
    stopping for efficacy at look k equals ``alpha(t_k) - alpha(t_{k-1})``
    (Lan & DeMets 1983).

    Parameters
    ----------
    looks : int or sequence of float
        K equally spaced looks, or the information fractions (increasing,
        steps of at least 0.01, ending at 1).
    alpha : float
        Total type I error (one-sided for ``sides=1``, both tails for ``sides=2``).
    sides : {1, 2}
        One-sided (upper boundary) or symmetric two-sided.
    spending : {"obf", "pocock", "power", "gamma"}
        The spending function; see :func:`spending`.
    param : float, optional
        ``rho`` for "power", ``gamma`` for "gamma".
    futility : sequence of float or BetaSpending, optional
        One-sided only: a z value per interim look (K - 1 values, ``-inf`` for
        none), or a :class:`BetaSpending` rule; the trial stops for futility
        when ``Z_k <= futility[k]``.
    binding : bool
        If True the efficacy boundaries are computed on the paths the futility
        rule lets through (lower boundaries, alpha exact only if the rule is
        always obeyed); if False (non-binding) they ignore it, so the type I
        error is at most alpha whether or not the rule is obeyed.

    Returns
    -------
    Boundaries

    Examples
    --------
    Five equally spaced looks, O'Brien-Fleming-type spending, two-sided 0.05
    (DeMets & Lan 1994, Stat Med 13:1341, Table I; from memory):

    >>> from simpower.analytic import boundaries
    >>> [round(float(b), 3) for b in boundaries(5, 0.05, sides=2).efficacy]
    [4.877, 3.357, 2.68, 2.29, 2.031]
    """
    t = _looks(looks)
    a = _scalar_alpha(alpha)
    sides = _sides(sides)
    kind = c.choice("spending", spending, SPENDING)
    if not c.is_scalar(param):
        raise ParameterError(f"`param` must be a single number; got {param!r}.")
    p = _param(kind, param)
    binding = c.flag("binding", binding)
    if futility is None and binding:
        raise ParameterError("`binding` must be False without a `futility` boundary.")
    tail = a / sides  # two-sided: each tail spends alpha/2 by the function taken at alpha/2
    cum = _spend(kind, np.concatenate([[0.0], t]), tail, p)
    cum[-1] = tail
    alpha_incr = sides * np.diff(cum)
    method = f"spending {kind}"
    if isinstance(futility, BetaSpending):
        if sides == 2:
            raise ParameterError("`futility` must be None for sides=2 (only one-sided designs take a "
                                 "futility boundary here).")
        beta_incr = futility._increments(t, a)
        drift = _beta_drift(t, alpha_incr, beta_incr, binding, a, futility.beta)
        eff, low, crossing = _design(t, alpha_incr, sides, binding, beta_incr=beta_incr, drift=drift)
        low[-1] = eff[-1]
        return Boundaries(t, eff, low, crossing, a, sides, f"{method}; futility beta-spending {futility.kind}",
                          binding, drift)
    lower = _futility(futility, t, sides)
    eff, _, crossing = _design(t, alpha_incr, sides, binding, fixed_lower=lower)
    fut = None
    if lower is not None:
        if np.any(lower >= eff[:-1]):
            k = int(np.argmax(lower >= eff[:-1]))
            raise ParameterError(f"`futility` must lie below the efficacy boundary; at look {k + 1} "
                                 f"{lower[k]:g} >= {eff[k]:.4g}.")
        fut = np.concatenate([lower, eff[-1:]])
    return Boundaries(t, eff, fut, crossing, a, sides, method, binding)


def _increasing_root(fun, target: float) -> float:
    """The ``a`` in [-_BIG, _BIG] with ``fun(a) = target`` for ``fun`` increasing (clamped at the ends)."""
    if fun(-_BIG) >= target:
        return -_BIG
    if fun(_BIG) <= target:
        return _BIG
    return optimize.brentq(lambda x: fun(x) - target, -_BIG, _BIG, xtol=1e-13,
                           rtol=4 * np.finfo(float).eps, maxiter=500)


def _design(t, alpha_incr, sides, binding, fixed_lower=None, beta_incr=None, drift=0.0):
    """Efficacy boundaries (H0 walk) and, with ``beta_incr``, beta-spending futility ones (walk at ``drift``).

    Returns the efficacy z, the futility z (the final entry unclamped, so the
    caller can compare it with the final efficacy value) and the H0 crossings.
    """
    k_max = len(t)
    h0 = _Walk()
    h1 = _Walk() if beta_incr is not None else None
    eff = np.empty(k_max)
    low = np.full(k_max, -_BIG)
    crossing = np.empty(k_max)
    for k in range(k_max):
        def cross(b, k=k):
            out = h0.above(b, t[k], 0.0)
            return out + h0.below(-b, t[k], 0.0) if sides == 2 else out
        eff[k] = _decreasing_root(cross, alpha_incr[k], 0.0 if sides == 2 else -_BIG)
        crossing[k] = cross(eff[k])
        if h1 is not None:
            low[k] = _increasing_root(lambda a, k=k: h1.below(a, t[k], drift), beta_incr[k])
            if k < k_max - 1:
                low[k] = min(low[k], eff[k])
        elif fixed_lower is not None and k < k_max - 1:
            low[k] = fixed_lower[k]
        if k < k_max - 1:
            lo0 = -eff[k] if sides == 2 else (low[k] if binding else -_BIG)
            h0.step(lo0, eff[k], t[k], 0.0, t[k + 1])
            if h1 is not None:
                h1.step(low[k], eff[k], t[k], drift, t[k + 1])
    return eff, low, crossing


def _beta_drift(t, alpha_incr, beta_incr, binding, alpha, beta) -> float:
    """The drift at which beta-spending futility meets the efficacy boundary at the final look.

    There the design has power exactly ``1 - beta``: every path that does not
    stop for futility rejects H0.
    """
    def gap(drift):
        eff, low, _ = _design(t, alpha_incr, 1, binding, beta_incr=beta_incr, drift=drift)
        return low[-1] - eff[-1]

    fixed = float(c.critical_z(alpha, "greater") + c.critical_z(beta, "greater"))
    lo, hi = 0.5 * fixed, fixed
    for _ in range(60):
        if gap(hi) > 0:
            break
        lo, hi = hi, 1.5 * hi
    return optimize.brentq(gap, lo, hi, xtol=1e-12, rtol=4 * np.finfo(float).eps, maxiter=200)


@dataclass(frozen=True)
class BetaSpending:
    """A futility rule from a beta-spending function (one-sided designs).

    The type II error ``beta`` is spent over the looks like alpha (same
    ``kind`` and ``param`` as :func:`spending`): at look k the futility
    boundary ``a_k`` is set so that the probability of stopping for futility
    at look k under the design drift equals ``beta(t_k) - beta(t_{k-1})``,
    and the design drift is found so that ``a_K = b_K``, which gives power
    ``1 - beta`` at that drift (Pampallona, Tsiatis & Kim 2001, Stat Med
    20:1077; Jennison & Turnbull 2000, sec. 7.3; from memory).
    """

    kind: str = "obf"
    beta: float = 0.1
    param: float | None = None

    def _increments(self, t: np.ndarray, alpha: float) -> np.ndarray:
        kind = c.choice("futility.kind", self.kind, SPENDING)
        if not c.is_scalar(self.beta):
            raise ParameterError(f"`futility.beta` must be a single number; got {self.beta!r}.")
        beta = float(c.real("futility.beta", self.beta, 0.0, 1.0 - alpha, low_open=True, high_open=True))
        if not c.is_scalar(self.param):
            raise ParameterError(f"`futility.param` must be a single number; got {self.param!r}.")
        try:
            p = _param(kind, self.param)
        except ParameterError as err:
            raise ParameterError("`futility." + str(err)[1:]) from None
        cum = _spend(kind, np.concatenate([[0.0], t]), beta, p)
        cum[-1] = beta
        return np.diff(cum)


def classical(kind, looks, alpha=0.025, sides=1):
    """Pocock (``b_k = C``) or O'Brien-Fleming (``b_k = C / sqrt(t_k)``) boundaries.

    ``C`` is the root of "total type I error = alpha" on the recursion. For
    equally spaced looks the O'Brien-Fleming boundary is ``C sqrt(K / k)``, and
    ``C`` is the final-look value tabulated by Jennison & Turnbull (2000, ch. 2).

    Examples
    --------
    Pocock's constant for five looks, two-sided 0.05 (Pocock 1977; Jennison &
    Turnbull 2000, ch. 2; from memory: 2.413):

    >>> from simpower.analytic import classical
    >>> round(float(classical("pocock", 5, 0.05, sides=2).efficacy[0]), 3)
    2.413
    """
    kind = c.choice("kind", kind, CLASSICAL)
    t = _looks(looks)
    a = _scalar_alpha(alpha)
    sides = _sides(sides)
    shape = 1.0 / np.sqrt(t) if kind == "obf" else np.ones(len(t))

    def total(const):
        upper = np.minimum(const * shape, _BIG)
        lower = -upper if sides == 2 else np.full(len(t), -_BIG)
        up, down = _exits(t, upper, lower, 0.0)
        return up.sum() + (down.sum() if sides == 2 else 0.0)

    low = float(c.critical_z(a, "two-sided" if sides == 2 else "greater"))
    const = _decreasing_root(total, a, low)
    eff = const * shape
    lower = -eff if sides == 2 else np.full(len(t), -_BIG)
    up, down = _exits(t, np.minimum(eff, _BIG), lower, 0.0)
    crossing = up + down if sides == 2 else up
    return Boundaries(t, eff, None, crossing, a, sides, f"classical {kind}")


def _check_bounds(bounds) -> Boundaries:
    if not isinstance(bounds, Boundaries):
        raise ParameterError(f"`bounds` must be a Boundaries value from boundaries() or classical(); "
                             f"got {type(bounds).__name__}.")
    return bounds


def _crossing(b: Boundaries, drift: float) -> Crossing:
    upper = np.minimum(b.efficacy, _BIG)
    lower = np.maximum(b.lower, -_BIG)
    up, down = _exits(b.fractions, upper, lower, drift)
    return Crossing(b.fractions, drift, up, down, b.sides)


def crossing_probabilities(bounds, drift=0.0) -> Crossing:
    """Exit probabilities per look under ``drift = theta sqrt(I_max)`` (``E Z_k = drift sqrt(t_k)``).

    Futility boundaries are applied (the rule is obeyed), binding or not.

    Examples
    --------
    At drift 0 the rejection probability is the design's alpha:

    >>> from simpower.analytic import boundaries, crossing_probabilities
    >>> round(crossing_probabilities(boundaries(3, 0.025), 0.0).rejection, 6)
    0.025
    """
    b = _check_bounds(bounds)
    if not c.is_scalar(drift):
        raise ParameterError(f"`drift` must be a single number; got {drift!r}.")
    return _crossing(b, float(c.real("drift", drift)))


def drift_for_power(bounds, power=0.9):
    """The drift ``theta sqrt(I_max)`` at which the design rejects H0 with probability ``power``."""
    b = _check_bounds(bounds)
    scalar = c.is_scalar(power)
    _, pw = c.alpha_power(b.alpha, power)

    def one(p):
        return c.root_increasing(lambda d: _crossing(b, d).rejection, p, 0.0, 1.0)

    return c.finish(c.each(one, pw), scalar)


def inflation_factor(bounds, power=0.9):
    """Maximum information of the design relative to a fixed-sample test of the same alpha and power.

    ``R = (drift_gs / drift_fixed)^2``, where the fixed test rejects for
    ``Z >= z_{1-alpha}`` (two-sided: ``|Z| >= z_{1-alpha/2}``, both tails
    counted) and each drift gives the same power.

    Examples
    --------
    O'Brien-Fleming's design with five looks, two-sided 0.05, power 0.9 needs
    2.6% more information than a fixed test (Jennison & Turnbull 2000, ch. 2;
    from memory: 1.026):

    >>> from simpower.analytic import classical, inflation_factor
    >>> round(inflation_factor(classical("obf", 5, 0.05, sides=2), 0.9), 3)
    1.026
    """
    b = _check_bounds(bounds)
    scalar = c.is_scalar(power)
    _, pw = c.alpha_power(b.alpha, power)
    alt = "two-sided" if b.sides == 2 else "greater"
    crit = float(c.critical_z(b.alpha, alt))

    def one(p):
        fixed = c.root_increasing(lambda d: float(c.normal_tails(d, crit, alt)), p, 0.0, 1.0)
        seq = c.root_increasing(lambda d: _crossing(b, d).rejection, p, 0.0, 1.0)
        return (seq / fixed) ** 2

    return c.finish(c.each(one, pw), scalar)


def expected_information(bounds, drift=0.0):
    """Expected information at stopping as a fraction of ``I_max`` under ``drift``.

    Multiply by :func:`inflation_factor` for the fraction of the fixed-sample
    size; use ``drift = 0`` for H0 and :func:`drift_for_power` for H1.
    """
    b = _check_bounds(bounds)
    scalar = c.is_scalar(drift)
    d = c.real("drift", drift)
    return c.finish(c.each(lambda x: _crossing(b, x).expected_fraction, d), scalar)


def naive_alpha(looks, alpha=0.05, sides=2):
    """Type I error of testing at the fixed-sample level ``alpha`` at every look.

    Repeated significance testing without adjustment (Armitage, McPherson &
    Rowe 1969, J R Stat Soc A 132:235-244): the z test at nominal ``alpha``
    (two-sided by default, as in their table) applied at each of the looks.

    Examples
    --------
    Five equally spaced looks at two-sided 0.05 (Armitage, McPherson & Rowe
    1969; from memory: 0.142):

    >>> from simpower.analytic import naive_alpha
    >>> round(naive_alpha(5, 0.05), 3)
    0.142
    """
    t = _looks(looks)
    a = _scalar_alpha(alpha)
    sides = _sides(sides)
    z = float(c.critical_z(a, "two-sided" if sides == 2 else "greater"))
    upper = np.full(len(t), z)
    lower = -upper if sides == 2 else np.full(len(t), -_BIG)
    up, down = _exits(t, upper, lower, 0.0)
    return float(up.sum() + (down.sum() if sides == 2 else 0.0))
