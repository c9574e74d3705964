"""Outcome distributions for continuous outcomes, used as the ``outcome`` of a design.

Each class is an :class:`~simpower.processes.base.Outcome` (kind ``"outcome"``):
a value holding validated parameters that draws control-arm values with
:meth:`sample` and knows its population ``mean``, ``sd``, ``skewness`` and
``excess_kurtosis`` (closed forms). Designs apply the effect and per-arm SDs.

Every outcome here also has :meth:`~Distribution.from_normal`, the quantile
function applied to standard normal scores, ``F^{-1}(Phi(z))``; designs use it
to correlate a baseline covariate with the outcome through a Gaussian copula.

=====================  ===============================================================
TOML ``type``           parameters
=====================  ===============================================================
``normal``              ``mean``, ``sd``
``lognormal``           one of ``median`` / ``mean``; one of ``cv`` / ``sigma``
``gamma``               ``shape`` (and ``scale``), or ``mean`` and ``cv``
``skew_normal``         ``location``, ``scale``, ``shape``; or ``mean``, ``sd``, ``skewness``
``fleishman``           ``mean``, ``sd``, ``skewness``, ``excess_kurtosis``
``student_t``           ``df``, ``location``, ``scale``
``contaminated_normal`` ``location``, ``scale``, ``contamination``, ``scale_factor``
``scipy``               ``dist`` (a frozen ``scipy.stats`` distribution, or its name),
                        ``args``, ``kwds``
=====================  ===============================================================
"""

from __future__ import annotations

import functools
import math
import numbers
from dataclasses import dataclass

import numpy as np
from scipy import interpolate, optimize, special, stats

from .._validation import Anything, Real
from ..errors import ParameterError, nearest
from .base import Outcome

POSITIVE = Real(0.0, low_open=True)
OPT_POSITIVE = Real(0.0, low_open=True, optional=True)
OPT_REAL = Real(optional=True)
#: quantiles at normal scores are tabulated on [-TABLE_EDGE, TABLE_EDGE] (see Distribution.from_normal)
TABLE_EDGE, TABLE_NODES = 8.0, 2049


@dataclass(frozen=True)
class Described(Anything):
    """A parameter checked by the component itself, with its own wording for messages."""

    text: str = "any value"
    optional: bool = False

    def describe(self) -> str:
        return self.text


def _one_of(owner: str, values: dict, a: str, b: str, required: bool = True) -> str | None:
    """Name of the one parameter of the pair (a, b) that was given; error if both (or neither)."""
    given = [k for k in (a, b) if values[k] is not None]
    if len(given) == 2:
        raise ParameterError(f"`{a}`: give exactly one of `{a}` or `{b}` for {owner}, not both.")
    if not given:
        if required:
            raise ParameterError(f"`{a}` or `{b}` is required for {owner}: give exactly one of them.")
        return None
    return given[0]


class Distribution(Outcome):
    """Shared behaviour of the built-in continuous outcomes.

    Subclasses give ``mean``, ``sd``, ``skewness``, ``excess_kurtosis`` and
    either :meth:`frozen` (a scipy distribution used for draws and quantiles)
    or their own :meth:`sample` and :meth:`from_normal`.
    """

    #: smallest value the outcome can take (``ratio`` effects need >= 0)
    lower_bound: float = -math.inf

    def __setstate__(self, state):  # derived values are recomputed after unpickling
        super().__setstate__(state)
        self._check()

    def frozen(self):
        """The equivalent frozen ``scipy.stats`` distribution."""
        raise NotImplementedError

    def sample(self, rng: np.random.Generator, size) -> np.ndarray:
        """Draw an array of shape ``size``."""
        return np.asarray(self.frozen().rvs(size=size, random_state=rng), dtype=float)

    def from_normal(self, z) -> np.ndarray:
        """Quantiles at standard normal scores: ``F^{-1}(Phi(z))`` (accurate in both tails).

        For |z| <= 8 this is a cubic Hermite interpolant of the exact quantiles
        on 2049 nodes with exact slopes phi(z) / f(F^{-1}(Phi(z))) (relative
        error of order 1e-10), because scipy's quantile functions can be slow;
        beyond 8 the exact quantile is used.
        """
        z = np.asarray(z, dtype=float)
        table = self._table()
        if table is None:
            return self._exact_from_normal(z)
        out = np.empty_like(z)
        inner = np.abs(z) <= TABLE_EDGE
        out[inner] = table(z[inner])
        if not inner.all():
            out[~inner] = self._exact_from_normal(z[~inner])
        return out

    def _exact_from_normal(self, z):
        f = self.frozen()
        out = np.empty_like(z)
        low = z <= 0
        out[low] = f.ppf(special.ndtr(z[low]))
        out[~low] = f.isf(special.ndtr(-z[~low]))
        bad = ~np.isfinite(out) & (np.abs(z) > TABLE_EDGE)
        if bad.any():  # scipy cannot invert some tails below ~1e-16 (e.g. discrete isf): clamp to the edge
            edge = np.where(z[bad] > 0, f.isf(special.ndtr(-TABLE_EDGE)), f.ppf(special.ndtr(-TABLE_EDGE)))
            out[bad] = edge
        return out

    def _density(self, x):
        return self.frozen().pdf(x)

    def _table(self):
        if "_spline" not in self.__dict__:
            spline = None
            try:
                nodes = np.linspace(-TABLE_EDGE, TABLE_EDGE, TABLE_NODES)
                values = self._exact_from_normal(nodes)
                slopes = stats.norm.pdf(nodes) / self._density(values)
                if np.all(np.isfinite(values)) and np.all(np.isfinite(slopes)) and np.all(np.diff(values) > 0):
                    spline = interpolate.CubicHermiteSpline(nodes, values, slopes)
            except (AttributeError, NotImplementedError, ValueError):  # e.g. a discrete scipy distribution
                spline = None
            object.__setattr__(self, "_spline", spline)
        return self.__dict__["_spline"]

    @property
    def center(self) -> float:
        """The point per-arm SD changes scale deviations around (the mean)."""
        return self.mean

    @property
    def skewness(self) -> float:
        return math.nan

    @property
    def excess_kurtosis(self) -> float:
        return math.nan


class Normal(Distribution):
    """Normal outcome N(mean, sd^2).

    Parameters
    ----------
    mean : float, default 0
    sd : float > 0, default 1
    """

    name = "normal"
    params = {"mean": Real(), "sd": POSITIVE}
    defaults = {"mean": 0.0, "sd": 1.0}
    shadows = ("mean", "sd")

    mean = property(lambda self: self._p["mean"])
    sd = property(lambda self: self._p["sd"])
    skewness = property(lambda self: 0.0)
    excess_kurtosis = property(lambda self: 0.0)

    def frozen(self):
        return stats.norm(self.mean, self.sd)

    def sample(self, rng, size):
        return self.mean + self.sd * rng.standard_normal(size)

    def from_normal(self, z):
        return self.mean + self.sd * np.asarray(z, dtype=float)

    def describe(self):
        return f"normal (mean {self.mean:g}, SD {self.sd:g})"


class Lognormal(Distribution):
    """Lognormal outcome: log(Y) ~ N(mu, sigma^2).

    Give exactly one of ``median`` (= e^mu) or ``mean`` (= e^(mu + sigma^2/2)),
    and exactly one of ``cv`` (SD / mean = sqrt(e^(sigma^2) - 1)) or ``sigma``
    (the SD of log Y).

    Closed forms (Johnson, Kotz & Balakrishnan 1994, ch. 14): with w = e^(sigma^2),
    SD = mean * sqrt(w - 1), skewness (w + 2) sqrt(w - 1), excess kurtosis
    w^4 + 2 w^3 + 3 w^2 - 6.
    """

    name = "lognormal"
    params = {"median": OPT_POSITIVE, "mean": OPT_POSITIVE, "cv": OPT_POSITIVE, "sigma": OPT_POSITIVE}
    defaults = {"median": None, "mean": None, "cv": None, "sigma": None}
    shadows = ("mean",)  # the population mean, also when `median` was given
    lower_bound = 0.0

    def _check(self):
        location = _one_of("lognormal", self._p, "median", "mean")
        spread = _one_of("lognormal", self._p, "cv", "sigma")
        s = self._p["sigma"] if spread == "sigma" else math.sqrt(math.log1p(self._p["cv"] ** 2))
        mu = math.log(self._p["median"]) if location == "median" else math.log(self._p["mean"]) - s * s / 2
        object.__setattr__(self, "_mu", mu)
        object.__setattr__(self, "_s", s)

    @property
    def mu(self) -> float:
        """Mean of log Y."""
        return self._mu

    @property
    def log_sd(self) -> float:
        """SD of log Y (sigma)."""
        return self._s

    @property
    def mean(self):
        return math.exp(self._mu + self._s**2 / 2)

    @property
    def sd(self):
        return self.mean * math.sqrt(math.expm1(self._s**2))

    @property
    def skewness(self):
        w = math.exp(self._s**2)
        return (w + 2) * math.sqrt(w - 1)

    @property
    def excess_kurtosis(self):
        w = math.exp(self._s**2)
        return w**4 + 2 * w**3 + 3 * w**2 - 6

    def frozen(self):
        return stats.lognorm(self._s, scale=math.exp(self._mu))

    def sample(self, rng, size):
        return rng.lognormal(self._mu, self._s, size)

    def from_normal(self, z):
        return np.exp(self._mu + self._s * np.asarray(z, dtype=float))

    def describe(self):
        return (f"lognormal (median {math.exp(self._mu):.4g}, mean {self.mean:.4g}, "
                f"CV {self.sd / self.mean:.3g}, SD of log {self._s:.3g}, skewness {self.skewness:.3g})")


class Gamma(Distribution):
    """Gamma outcome, by ``shape`` (and ``scale``, default 1) or by ``mean`` and ``cv``.

    shape = 1 / cv^2 and scale = mean * cv^2. Skewness 2 / sqrt(shape), excess
    kurtosis 6 / shape (Johnson, Kotz & Balakrishnan 1994, ch. 17).
    """

    name = "gamma"
    params = {"shape": OPT_POSITIVE, "scale": OPT_POSITIVE, "mean": OPT_POSITIVE, "cv": OPT_POSITIVE}
    defaults = {"shape": None, "scale": None, "mean": None, "cv": None}
    shadows = ("mean",)  # the population mean, also when `shape` and `scale` were given
    lower_bound = 0.0

    def _check(self):
        p = self._p
        by_shape = p["shape"] is not None or p["scale"] is not None
        by_mean = p["mean"] is not None or p["cv"] is not None
        if by_shape and by_mean:
            a = "shape" if p["shape"] is not None else "scale"
            b = "mean" if p["mean"] is not None else "cv"
            raise ParameterError(f"`{a}`: give `shape` (and `scale`) or `mean` and `cv` for gamma, not both "
                                 f"(`{b}` was given too).")
        if by_mean:
            for k in ("mean", "cv"):
                if p[k] is None:
                    raise ParameterError(f"`{k}` is required for gamma when `mean` or `cv` is given: give both.")
            k, theta = 1.0 / p["cv"] ** 2, p["mean"] * p["cv"] ** 2
        else:
            if p["shape"] is None:
                raise ParameterError("`shape` is required for gamma: give `shape` (and `scale`), or `mean` and `cv`.")
            k, theta = p["shape"], 1.0 if p["scale"] is None else p["scale"]
        object.__setattr__(self, "_k", k)
        object.__setattr__(self, "_theta", theta)

    mean = property(lambda self: self._k * self._theta)
    sd = property(lambda self: math.sqrt(self._k) * self._theta)
    skewness = property(lambda self: 2.0 / math.sqrt(self._k))
    excess_kurtosis = property(lambda self: 6.0 / self._k)

    @property
    def shape_scale(self) -> tuple[float, float]:
        """The resolved (shape, scale), whichever way the distribution was given."""
        return (self._k, self._theta)

    def frozen(self):
        return stats.gamma(self._k, scale=self._theta)

    def sample(self, rng, size):
        return rng.gamma(self._k, self._theta, size)

    def describe(self):
        return (f"gamma (shape {self._k:.4g}, scale {self._theta:.4g}; mean {self.mean:.4g}, "
                f"SD {self.sd:.4g}, skewness {self.skewness:.3g})")


#: largest |skewness| a skew-normal distribution reaches (as the shape -> infinity)
SKEW_NORMAL_MAX = (4 - math.pi) / 2 * (2 / (math.pi - 2)) ** 1.5


class SkewNormal(Distribution):
    """Azzalini's skew-normal outcome, by (``location``, ``scale``, ``shape``) or by target moments.

    Give ``location`` (xi), ``scale`` (omega) and ``shape`` (alpha), as in
    ``scipy.stats.skewnorm(shape, location, scale)``; or give ``skewness``
    (|skewness| < 0.9953) with ``mean`` (default 0) and ``sd`` (default 1),
    and the direct parameters are solved in closed form (Azzalini 1985): with
    delta = alpha / sqrt(1 + alpha^2) and m = delta sqrt(2/pi), the mean is
    xi + omega m, the variance omega^2 (1 - m^2), the skewness
    (4 - pi)/2 * m^3 / (1 - m^2)^(3/2) and the excess kurtosis
    2 (pi - 3) m^4 / (1 - m^2)^2.
    """

    name = "skew_normal"
    params = {"location": OPT_REAL, "scale": OPT_POSITIVE, "shape": OPT_REAL,
              "mean": OPT_REAL, "sd": OPT_POSITIVE, "skewness": OPT_REAL}
    defaults = {k: None for k in params}
    shadows = ("mean", "sd", "skewness")  # the population moments, however the distribution was given

    def _check(self):
        p = self._p
        direct = [k for k in ("location", "scale", "shape") if p[k] is not None]
        target = [k for k in ("mean", "sd", "skewness") if p[k] is not None]
        if direct and target:
            raise ParameterError(f"`{direct[0]}`: give `location`/`scale`/`shape` or `mean`/`sd`/`skewness` for "
                                 f"skew_normal, not both (`{target[0]}` was given too).")
        if target:
            if p["skewness"] is None:
                raise ParameterError("`skewness` is required for skew_normal when `mean` or `sd` is given.")
            g = p["skewness"]
            if abs(g) >= SKEW_NORMAL_MAX:
                raise ParameterError(f"`skewness` must be in (-{SKEW_NORMAL_MAX:.4f}, {SKEW_NORMAL_MAX:.4f}) for "
                                     f"skew_normal; got {g:g}. Use fleishman, gamma or lognormal for more skew.")
            mean = 0.0 if p["mean"] is None else p["mean"]
            sd = 1.0 if p["sd"] is None else p["sd"]
            r = math.copysign(abs(2 * g / (4 - math.pi)) ** (1 / 3), g)
            m = r / math.sqrt(1 + r * r)
            delta = m * math.sqrt(math.pi / 2)
            alpha = delta / math.sqrt(1 - delta * delta)
            omega = sd / math.sqrt(1 - m * m)
            xi = mean - omega * m
        else:
            xi = 0.0 if p["location"] is None else p["location"]
            omega = 1.0 if p["scale"] is None else p["scale"]
            alpha = 0.0 if p["shape"] is None else p["shape"]
        object.__setattr__(self, "_d", (xi, omega, alpha))

    @property
    def _m(self):
        a = self._d[2]
        return a / math.sqrt(1 + a * a) * math.sqrt(2 / math.pi)

    mean = property(lambda self: self._d[0] + self._d[1] * self._m)
    sd = property(lambda self: self._d[1] * math.sqrt(1 - self._m**2))
    skewness = property(lambda self: (4 - math.pi) / 2 * self._m**3 / (1 - self._m**2) ** 1.5)
    excess_kurtosis = property(lambda self: 2 * (math.pi - 3) * self._m**4 / (1 - self._m**2) ** 2)

    @property
    def direct(self) -> tuple[float, float, float]:
        """(location, scale, shape) as scipy.stats.skewnorm takes them."""
        return self._d

    def frozen(self):
        xi, omega, alpha = self._d
        return stats.skewnorm(alpha, loc=xi, scale=omega)

    def describe(self):
        xi, omega, alpha = self._d
        return (f"skew-normal (location {xi:.4g}, scale {omega:.4g}, shape {alpha:.4g}; mean {self.mean:.4g}, "
                f"SD {self.sd:.4g}, skewness {self.skewness:.3g})")


# -- Fleishman's power method ---------------------------------------------------------------

def fleishman_equations(x, skewness, excess_kurtosis):
    """Residuals of Fleishman's (1978) moment equations for Y = -c + bZ + cZ^2 + dZ^3.

    Zero when Y has mean 0, variance 1 and the given skewness and excess kurtosis.
    """
    b, c, d = x
    return [
        b * b + 6 * b * d + 2 * c * c + 15 * d * d - 1,
        2 * c * (b * b + 24 * b * d + 105 * d * d + 2) - skewness,
        24 * (b * d + c * c * (1 + b * b + 28 * b * d) + d * d * (12 + 48 * b * d + 141 * c * c + 225 * d * d))
        - excess_kurtosis,
    ]


_FLEISHMAN_STARTS = [(b0, d0) for b0 in (1.0, 0.9, 0.75, 0.5, 0.3) for d0 in (0.0, 0.03, 0.1, 0.2, -0.05, -0.15)]
FLEISHMAN_TOL = 1e-10


@functools.lru_cache(maxsize=256)
def fleishman_coefficients(skewness: float, excess_kurtosis: float) -> tuple[float, float, float, float] | None:
    """Coefficients (a, b, c, d) of Fleishman's power method, or None if the equations have no solution.

    Solved with ``scipy.optimize.least_squares`` from fixed starting points
    (so the answer is deterministic); a solution counts only if every residual
    is below 1e-10. Of the solutions found (b > 0), the one with the smallest
    cubic term |d| (the closest to a normal) is returned; for skewness 0 and
    excess kurtosis 0 that is (0, 1, 0, 0).
    """
    g1 = abs(skewness)
    found = []
    for b0, d0 in _FLEISHMAN_STARTS:
        c0 = g1 / (2 * (b0 * b0 + 24 * b0 * d0 + 105 * d0 * d0 + 2))
        res = optimize.least_squares(fleishman_equations, [b0, c0, d0], args=(g1, excess_kurtosis),
                                     xtol=1e-15, ftol=1e-15, gtol=1e-15)
        if np.all(np.isfinite(res.fun)) and np.max(np.abs(res.fun)) < FLEISHMAN_TOL:
            b, c, d = (float(v) for v in res.x)
            if b < 0:  # (b, c, d) and (-b, c, -d) solve the same equations
                b, d = -b, -d
            found.append((abs(d), -b, b, c, d))
    if not found:
        return None
    _, _, b, c, d = min(found)
    if skewness < 0:
        c = -c
    if abs(c) < 1e-13:
        c = 0.0
    if abs(d) < 1e-13:
        d = 0.0
    return (-c, b, c, d)


class Fleishman(Distribution):
    """Outcome with a requested mean, SD, skewness and excess kurtosis (Fleishman's power method).

    Y = mean + sd * (a + bZ + cZ^2 + dZ^3) with Z standard normal and a = -c
    (Fleishman 1978, Psychometrika 43:521-532); (b, c, d) solve the three
    moment equations (variance 1, the skewness, the excess kurtosis). Not every
    pair is reachable: every distribution needs excess_kurtosis >=
    skewness^2 - 2, and the power method needs roughly excess_kurtosis >=
    1.5 * skewness^2 - 2 and a little more; an unreachable pair is a
    ParameterError.

    Parameters
    ----------
    mean : float, default 0
    sd : float > 0, default 1
    skewness : float, default 0
    excess_kurtosis : float, default 0
        Kurtosis minus 3 (0 for a normal).
    """

    name = "fleishman"
    params = {"mean": Real(), "sd": POSITIVE, "skewness": Real(), "excess_kurtosis": Real()}
    defaults = {"mean": 0.0, "sd": 1.0, "skewness": 0.0, "excess_kurtosis": 0.0}
    shadows = ("mean", "sd", "skewness", "excess_kurtosis")

    def _check(self):
        g1, g2 = self._p["skewness"], self._p["excess_kurtosis"]
        if g2 < g1 * g1 - 2:
            raise ParameterError(
                f"`excess_kurtosis` = {g2:g} with `skewness` = {g1:g} is impossible for any distribution "
                f"(needs excess_kurtosis >= skewness^2 - 2 = {g1 * g1 - 2:g}).")
        coef = fleishman_coefficients(float(g1), float(g2))
        if coef is None:
            raise ParameterError(
                f"`skewness` = {g1:g} with `excess_kurtosis` = {g2:g} cannot be reached by Fleishman's power "
                f"method (its moment equations have no solution; it needs roughly excess_kurtosis >= "
                f"1.5 * skewness^2 - 2 = {1.5 * g1 * g1 - 2:g}, and more): raise `excess_kurtosis` or lower "
                "`skewness`.")
        object.__setattr__(self, "_coef", coef)

    mean = property(lambda self: self._p["mean"])
    sd = property(lambda self: self._p["sd"])
    skewness = property(lambda self: self._p["skewness"])
    excess_kurtosis = property(lambda self: self._p["excess_kurtosis"])

    @property
    def coefficients(self) -> tuple[float, float, float, float]:
        """(a, b, c, d) of the standardised polynomial a + bZ + cZ^2 + dZ^3."""
        return self._coef

    def from_normal(self, z):
        a, b, c, d = self._coef
        z = np.asarray(z, dtype=float)
        return self.mean + self.sd * (a + z * (b + z * (c + z * d)))

    def sample(self, rng, size):
        return self.from_normal(rng.standard_normal(size))

    def describe(self):
        a, b, c, d = self._coef
        return (f"Fleishman power-method outcome (mean {self.mean:g}, SD {self.sd:g}, skewness {self.skewness:g}, "
                f"excess kurtosis {self.excess_kurtosis:g}; b = {b:.4f}, c = {c:.4f}, d = {d:.4f})")


class StudentT(Distribution):
    """Heavy-tailed outcome: location + scale * T with T ~ Student t on ``df`` degrees of freedom.

    The mean (= location) exists for df > 1, the SD (scale * sqrt(df / (df - 2)))
    for df > 2; using ``sd`` (e.g. an effect in SD units) with df <= 2 is a
    ParameterError. Skewness is 0 for df > 3; excess kurtosis 6 / (df - 4) for
    df > 4 (infinite for 2 < df <= 4).
    """

    name = "student_t"
    params = {"df": POSITIVE, "location": Real(), "scale": POSITIVE}
    defaults = {"location": 0.0, "scale": 1.0}

    @property
    def mean(self):
        if self.df <= 1:
            raise ParameterError(f"`df` must be > 1 for student_t to have a mean; got {self.df:g}.")
        return self.location

    @property
    def sd(self):
        if self.df <= 2:
            raise ParameterError(f"`df` must be > 2 for student_t to have an SD; got {self.df:g}.")
        return self.scale * math.sqrt(self.df / (self.df - 2))

    @property
    def center(self):
        return self.location

    @property
    def skewness(self):
        return 0.0 if self.df > 3 else math.nan

    @property
    def excess_kurtosis(self):
        if self.df > 4:
            return 6.0 / (self.df - 4)
        return math.inf if self.df > 2 else math.nan

    def frozen(self):
        return stats.t(self.df, loc=self.location, scale=self.scale)

    def sample(self, rng, size):
        return self.location + self.scale * rng.standard_t(self.df, size)

    def describe(self):
        return f"Student t (df {self.df:g}, location {self.location:g}, scale {self.scale:g})"


class ContaminatedNormal(Distribution):
    """Normal outcome with outliers: a two-component scale mixture.

    With probability ``1 - contamination`` a value is N(location, scale^2), with
    probability ``contamination`` N(location, (scale_factor * scale)^2) (Tukey
    1960). Mean = location; variance scale^2 (1 - p + p k^2); excess kurtosis
    3 (1 - p + p k^4) / (1 - p + p k^2)^2 - 3.

    Parameters
    ----------
    location : float, default 0
    scale : float > 0, default 1
        SD of the main component.
    contamination : float in [0, 1), default 0.1
    scale_factor : float > 0, default 3
    """

    name = "contaminated_normal"
    params = {"location": Real(), "scale": POSITIVE, "contamination": Real(0.0, 1.0, high_open=True),
              "scale_factor": POSITIVE}
    defaults = {"location": 0.0, "scale": 1.0, "contamination": 0.1, "scale_factor": 3.0}

    def _moment(self, power):
        p, k = self.contamination, self.scale_factor
        return 1 - p + p * k**power

    mean = property(lambda self: self.location)
    sd = property(lambda self: self.scale * math.sqrt(self._moment(2)))
    skewness = property(lambda self: 0.0)
    excess_kurtosis = property(lambda self: 3 * self._moment(4) / self._moment(2) ** 2 - 3)

    def sample(self, rng, size):
        z = rng.standard_normal(size)
        wide = rng.random(size) < self.contamination
        return self.location + self.scale * np.where(wide, self.scale_factor * z, z)

    def _density(self, x):
        u = (np.asarray(x) - self.location) / self.scale
        k = self.scale_factor
        return ((1 - self.contamination) * stats.norm.pdf(u) + self.contamination * stats.norm.pdf(u / k) / k) / self.scale

    def _exact_from_normal(self, z):
        """Mixture quantile at Phi(z), by vectorised bisection (60 halvings, in the nearer tail)."""
        z = np.asarray(z, dtype=float)
        p, k = self.contamination, self.scale_factor
        t = -np.abs(z)  # solve in the lower tail, then mirror (the mixture is symmetric)
        target = special.ndtr(t)
        lo, hi = np.minimum(t, k * t), np.maximum(t, k * t)
        for _ in range(60):
            mid = 0.5 * (lo + hi)
            f = (1 - p) * special.ndtr(mid) + p * special.ndtr(mid / k)
            below = f < target
            lo = np.where(below, mid, lo)
            hi = np.where(below, hi, mid)
        x = 0.5 * (lo + hi)
        return self.location + self.scale * np.where(z > 0, -x, x)

    def describe(self):
        return (f"contaminated normal (location {self.location:g}, SD {self.scale:g}, with probability "
                f"{self.contamination:g} an SD {self.scale_factor:g} times larger; overall SD {self.sd:.4g})")


class ScipyOutcome(Distribution):
    """Any ``scipy.stats`` distribution as an outcome.

    Give ``dist`` as a frozen distribution (``scipy.stats.gamma(2.0, scale=3)``)
    or, in a scenario file, as the distribution's name with ``args`` and
    ``kwds``: ``{type = "scipy", dist = "gamma", args = [2.0], kwds = {scale = 3}}``.
    The name is looked up among ``scipy.stats`` distributions only (nothing is
    evaluated). Mean, SD, skewness and excess kurtosis come from the
    distribution's ``stats``; ``spec()`` is the name-and-arguments form.
    """

    name = "scipy"
    params = {"dist": Described(text="a scipy.stats distribution name or a frozen distribution"),
              "args": Anything(), "kwds": Anything()}
    defaults = {"args": None, "kwds": None}

    def _check(self):
        dist, args, kwds = self._p["dist"], self._p["args"], self._p["kwds"]
        if hasattr(dist, "dist") and hasattr(dist, "args"):  # a frozen distribution
            if args or kwds:
                raise ParameterError("`args` and `kwds` go with a distribution name; a frozen `dist` carries its own.")
            name, args, kwds = dist.dist.name, tuple(dist.args), dict(dist.kwds)
            if getattr(stats, name, None) is None or type(getattr(stats, name)) is not type(dist.dist):
                raise ParameterError(f"`dist` must be a scipy.stats distribution; {name!r} is not one "
                                     "(write a process or an outcome class for a custom distribution).")
        elif isinstance(dist, str):
            name = dist
        else:
            raise ParameterError(f"`dist` must be a frozen scipy.stats distribution or its name; got {dist!r}.")
        gen = getattr(stats, name, None)
        if not isinstance(gen, (stats.rv_continuous, stats.rv_discrete)):
            valid = [n for n in dir(stats) if isinstance(getattr(stats, n), (stats.rv_continuous, stats.rv_discrete))]
            raise ParameterError(f"`dist` = {name!r} is not a scipy.stats distribution.{nearest(name, valid)}")
        args = [] if args is None else args
        kwds = {} if kwds is None else kwds
        if not isinstance(args, (list, tuple)) or not all(_is_number(a) for a in args):
            raise ParameterError(f"`args` must be a list of numbers; got {args!r}.")
        if not isinstance(kwds, dict) or not all(isinstance(k, str) and _is_number(v) for k, v in kwds.items()):
            raise ParameterError(f"`kwds` must be a table of names to numbers; got {kwds!r}.")
        args = [float(a) for a in args]
        kwds = {k: float(v) for k, v in kwds.items()}
        try:
            frozen = gen(*args, **kwds)
            ok = bool(np.isfinite(frozen.ppf(0.5)))
        except Exception as exc:  # scipy raises TypeError for wrong argument counts
            raise ParameterError(f"`args`/`kwds` do not fit scipy.stats.{name}: {exc}") from None
        if not ok:
            raise ParameterError(f"`args` = {args} with `kwds` = {kwds} are outside the valid range of "
                                 f"scipy.stats.{name} (shape parameters and scale must be valid).")
        self._set_params({"dist": name, "args": args, "kwds": kwds})
        object.__setattr__(self, "_frozen", frozen)

    def frozen(self):
        return self._frozen

    def _stat(self, label, value):
        v = float(value)
        if not math.isfinite(v):
            raise ParameterError(f"`dist` = scipy.stats.{self.dist} has no finite {label} with these arguments.")
        return v

    mean = property(lambda self: self._stat("mean", self._frozen.mean()))
    sd = property(lambda self: self._stat("SD", self._frozen.std()))
    skewness = property(lambda self: float(self._frozen.stats(moments="s")))
    excess_kurtosis = property(lambda self: float(self._frozen.stats(moments="k")))
    lower_bound = property(lambda self: float(self._frozen.support()[0]))

    def describe(self):
        parts = [f"{a:g}" for a in self.args] + [f"{k}={v:g}" for k, v in self.kwds.items()]
        return f"scipy.stats.{self.dist}({', '.join(parts)})"


def _is_number(v) -> bool:
    return isinstance(v, numbers.Real) and not isinstance(v, bool)
