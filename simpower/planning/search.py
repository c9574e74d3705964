"""Required sample size for a target power, and the minimal detectable effect at a fixed size.

The search treats power as a monotone function of the searched parameter and
spends the replicates where they tell most:

1. *Pilot*: a few values spread over the range (evenly on the model's
   scale), a few hundred replicates each.
2. *Model*: a binomial probit regression of all results so far,
   ``probit(power) = a + b * t(value)``, with ``t = sqrt`` for sizes and the
   identity for effects. For a regular test the power is close to
   Phi(c * effect * sqrt(n) - z_crit) (the noncentrality grows with sqrt(n)
   and with the effect), so the model is nearly exact near the target;
   points whose fitted power is far from the target (probit distance above
   :data:`WINDOW`) are left out of the fit once enough points are near it.
3. *Placement*: the next replicates go to the current estimate of the value
   reaching the target (for the inverse prediction of a probit model this
   one-point placement is locally c-optimal: the information there is
   proportional to (1, t)(1, t)', the gradient of the crossing point), in
   an amount predicted to bring the interval to the tolerance.
4. *Stop* when the Monte Carlo interval for the value (Fieller's interval
   for the ratio (z_target - a) / b, Fieller 1954, JRSS B 16:175-185) is
   narrower than ``rel_tol`` of the estimate (or half a step for integer
   sizes), or when ``max_reps`` are spent (the result says it did not
   converge).

Revisited values extend their earlier runs chunk for chunk (prefix-stable
seeds, an in-memory chunk store), so no replicate is simulated twice.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from .._validation import Int, Real
from ..engine.progress import session as progress_session, status
from ..engine.runner import run_points
from ..execution import Execution
from ..errors import ParameterError, nearest
from .sequential import as_memory_store, execution_of, point_key, seed_with_store
from ..summaries import wilson_interval

#: replicates per chunk (and per pilot point) of a search
SEARCH_CHUNK = 200
PILOT_POINTS = 5
#: probit distance from the target beyond which a point leaves the fit
WINDOW = 1.5
#: at most this many rounds after the pilot
MAX_ROUNDS = 40

SCALES = {
    "sqrt": (np.sqrt, np.square),
    "log": (np.log, np.exp),
    "linear": (lambda v: np.asarray(v, float), lambda x: np.asarray(x, float)),
}


# -- the monotone model ------------------------------------------------------
@dataclass
class ProbitFit:
    """probit(power) = a + b * t(value), fitted by maximum likelihood to grouped binomial counts."""

    a: float
    b: float
    cov: np.ndarray
    scale: str

    def power(self, values) -> np.ndarray:
        t = SCALES[self.scale][0](np.asarray(values, float))
        return stats.norm.cdf(self.a + self.b * t)

    def band(self, values, level: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
        """Pointwise interval of the fitted power (delta method on the probit scale)."""
        t = SCALES[self.scale][0](np.asarray(values, float))
        eta = self.a + self.b * t
        se = np.sqrt(self.cov[0, 0] + 2 * t * self.cov[0, 1] + t * t * self.cov[1, 1])
        q = stats.norm.ppf(0.5 + level / 2)
        return stats.norm.cdf(eta - q * se), stats.norm.cdf(eta + q * se)

    def crossing(self, target: float, level: float = 0.95) -> tuple[float, float, float]:
        """Value at which the fitted power equals ``target`` and Fieller's interval (nan/inf if unbounded)."""
        inv = SCALES[self.scale][1]
        z = stats.norm.ppf(target)
        t_hat = (z - self.a) / self.b
        q2 = stats.norm.ppf(0.5 + level / 2) ** 2
        vaa, vab, vbb = self.cov[0, 0], self.cov[0, 1], self.cov[1, 1]
        A = self.b**2 - q2 * vbb
        B = 2 * ((self.a - z) * self.b - q2 * vab)
        C = (self.a - z) ** 2 - q2 * vaa
        disc = B * B - 4 * A * C
        if A <= 0 or disc < 0:
            return float(self._inv(inv, t_hat)), -math.inf, math.inf
        r = math.sqrt(disc)
        lo, hi = sorted(((-B - r) / (2 * A), (-B + r) / (2 * A)))
        return float(self._inv(inv, t_hat)), float(self._inv(inv, lo)), float(self._inv(inv, hi))

    def _inv(self, inv, t):
        if self.scale == "sqrt" and t < 0:
            return 0.0
        return inv(t)


def fit_probit(values, k, r, scale: str) -> ProbitFit | None:
    """Maximum-likelihood probit fit (Fisher scoring); None if it fails or is not increasing."""
    t = SCALES[scale][0](np.asarray(values, float))
    k = np.asarray(k, float)
    r = np.asarray(r, float)
    if np.unique(t).size < 2 or r.sum() <= 0:
        return None
    X = np.column_stack([np.ones_like(t), t])
    emp = stats.norm.ppf((k + 0.5) / (r + 1))
    w0 = r / np.maximum(r, 1)
    beta = np.linalg.lstsq(X * np.sqrt(w0)[:, None], emp * np.sqrt(w0), rcond=None)[0]

    def loglik(bt):
        mu = np.clip(stats.norm.cdf(X @ bt), 1e-300, 1 - 1e-16)
        return float(np.sum(k * np.log(mu) + (r - k) * np.log1p(-mu)))

    ll = loglik(beta)
    info = None
    for _ in range(100):
        eta = X @ beta
        mu = np.clip(stats.norm.cdf(eta), 1e-12, 1 - 1e-12)
        phi = stats.norm.pdf(eta)
        w = r * phi * phi / (mu * (1 - mu))
        score = X.T @ (r * phi * (k / np.maximum(r, 1) - mu) / (mu * (1 - mu)))
        info = (X * w[:, None]).T @ X
        try:
            step = np.linalg.solve(info, score)
        except np.linalg.LinAlgError:
            return None
        h = 1.0
        while h > 1e-6:
            new = beta + h * step
            ll_new = loglik(new)
            if ll_new >= ll - 1e-10:
                break
            h /= 2
        beta, ll_old, ll = new, ll, ll_new
        if np.max(np.abs(h * step)) < 1e-10 or abs(ll - ll_old) < 1e-12:
            break
    if info is None or not np.all(np.isfinite(beta)) or beta[1] <= 0:
        return None
    try:
        cov = np.linalg.inv(info)
    except np.linalg.LinAlgError:
        return None
    if not np.all(np.isfinite(cov)) or cov[1, 1] <= 0:
        return None
    return ProbitFit(float(beta[0]), float(beta[1]), cov, scale)


def fit_near(values, k, r, scale: str, target: float) -> tuple[ProbitFit | None, np.ndarray]:
    """Fit all points, then refit on those whose fitted probit lies within :data:`WINDOW` of the target's."""
    values = np.asarray(values, float)
    used = np.ones(values.size, bool)
    fit = fit_probit(values, k, r, scale)
    if fit is None:
        return None, used
    z = stats.norm.ppf(target)
    for _ in range(3):
        eta = stats.norm.ppf(np.clip(fit.power(values), 1e-300, 1 - 1e-16))
        near = np.abs(eta - z) <= WINDOW
        if np.unique(values[near]).size < 2 or np.array_equal(near, used):
            break
        refit = fit_probit(values[near], np.asarray(k)[near], np.asarray(r)[near], scale)
        if refit is None:
            break
        fit, used = refit, near
    return fit, used


# -- the result ---------------------------------------------------------------
@dataclass
class SearchResult:
    """Outcome of a required-size or detectable-effect search.

    Attributes
    ----------
    parameter : str
        The searched parameter (``n``, ``clusters``, ``effect``...).
    kind : {'size', 'effect'}
    target : float
        The power asked for.
    value : int or float
        The answer: the smallest allowed size whose fitted power reaches the
        target, or the effect at which it does.
    estimate : float
        The continuous value at which the fitted power equals the target.
    interval : (float, float)
        Monte Carlo interval (``level``) for the answer (sizes rounded up to
        the step, as the answer is).
    estimate_interval : (float, float)
        Fieller's interval for ``estimate``.
    converged : bool
        Whether the interval met the tolerance within ``max_reps``.
    reps_total : int
        Replicates simulated (each replicate counted once).
    table : pandas.DataFrame
        One row per evaluated value: reps, rejections, power, MCSE, Wilson
        interval, fitted power, whether it entered the final fit.
    rounds : pandas.DataFrame
        The search's history: value placed, replicates added, and the
        estimate and interval that led to the placement (the last row holds
        the final estimate and interval).
    fit : ProbitFit or None
    analytic : float or None
        The answer by the analysis's closed form where it applies (smallest
        allowed size, or the effect), and ``analytic_estimate`` its
        continuous version.
    """

    parameter: str
    kind: str
    target: float
    value: Any
    estimate: float
    interval: tuple
    estimate_interval: tuple
    level: float
    converged: bool
    reps_total: int
    table: pd.DataFrame
    rounds: pd.DataFrame
    fit: ProbitFit | None
    analysis: str
    scenario: Any
    seed: int
    chunk_size: int
    settings: dict = field(default_factory=dict)
    analytic: float | None = None
    analytic_estimate: float | None = None
    note: str = ""
    #: -1 when an effect was searched in the negative direction (the fit is on its magnitude)
    sign: float = 1.0

    @property
    def n(self):
        """The required size (None for an effect search)."""
        return self.value if self.kind == "size" else None

    @property
    def half_width(self) -> float:
        lo, hi = self.estimate_interval
        return (hi - lo) / 2

    def curve(self, values=None, level: float | None = None) -> pd.DataFrame:
        """Fitted power (and its pointwise band) over ``values`` (default: the evaluated range)."""
        if values is None:
            lo, hi = self.table["value"].min(), self.table["value"].max()
            values = np.linspace(lo, hi, 200)
        values = np.asarray(values, float)
        if self.fit is None:
            return pd.DataFrame({"value": values, "power": np.nan, "low": np.nan, "high": np.nan})
        low, high = self.fit.band(self.sign * values, level or self.level)
        return pd.DataFrame({"value": values, "power": self.fit.power(self.sign * values), "low": low,
                             "high": high})

    def at_answer(self):
        """The scenario at the answer (e.g. to read the arm sizes in words)."""
        return self.scenario.with_params(**{self.parameter: self.value})

    def answer(self):
        """The answer first, in the units that get recruited: an :class:`~simpower.answer.AnswerBlock`."""
        from ..answer import search_block

        return search_block(self)

    def justification(self, null=None):
        """The sample-size justification paragraph for a protocol (give ``null``, a null-check table, to cite it).

        Returns a :class:`~simpower.answer.Justification`: ``str()`` of
        it is the paragraph with its references and caution; ``.markdown()``
        and ``.html()`` render the same text.
        """
        from ..answer import justification

        return justification(self, null=null)

    def plot(self, stem=None, labels=None, title: str = ""):
        """The search as a figure: evaluated values with Wilson intervals, fitted curve, target and answer.

        ``stem`` writes ``stem.png`` and ``stem.svg``; ``labels`` maps parameter names to words (and units).
        Returns the matplotlib Figure.
        """
        from ..report import plots

        fig = plots.search_plot(self, title=title, labels=labels)
        if stem is not None:
            plots.save(fig, stem)
        return fig

    def summary(self) -> str:
        """The answer block as plain text (what the terminal shows)."""
        text = self.answer().text()
        if self.note:
            text += f"\n  Note: {self.note}"
        return text

    def _repr_html_(self) -> str:
        from ..answer import search_block
        from ..labels import frame_html, readable

        shown = readable(self.table, "power", ("value", "reps", "power", "mcse", "ci_low", "ci_high", "fitted_power"))
        return search_block(self).html() + frame_html(shown.rename(columns={"Value": self.parameter}),
                                                      "Values evaluated by the search")

    def __str__(self):
        return self.summary()

    def to_dict(self) -> dict:
        return {
            "parameter": self.parameter, "kind": self.kind, "target_power": self.target, "value": self.value,
            "estimate": self.estimate, "interval": list(self.interval),
            "estimate_interval": list(self.estimate_interval), "level": self.level, "converged": self.converged,
            "reps_total": self.reps_total, "analysis": self.analysis, "seed": str(self.seed),
            "chunk_size": self.chunk_size, "settings": self.settings, "analytic": self.analytic,
            "analytic_estimate": self.analytic_estimate, "note": self.note,
            "model": None if self.fit is None else {"a": self.fit.a, "b": self.fit.b, "scale": self.fit.scale,
                                                    "cov": self.fit.cov.tolist()},
        }


# -- the search ------------------------------------------------------------------
class _Evaluations:
    """Results so far per value; extends a value's run when asked for more replicates."""

    def __init__(self, scenario, parameter, analysis, ex: Execution, setter, labels=None, all_analyses=False):
        self.scenario, self.parameter, self.analysis = scenario, parameter, analysis
        # only the deciding analysis is fitted unless asked for all; its seeds stay those of the whole scenario
        self.running = scenario if all_analyses else scenario.only(analysis)
        self.stage = "pilot"  # what the progress display says the search is doing
        self.ex, self.labels = ex, dict(labels or {})
        self.seed = ex.seed
        self.setter = setter
        self.stats: dict[float, dict] = {}
        self.order: list[float] = []

    @property
    def total(self) -> int:
        return sum(s["reps"] for s in self.stats.values())

    def run(self, wanted: dict) -> None:
        todo = {v: r for v, r in wanted.items() if r > self.stats.get(v, {}).get("reps", 0)}
        if not todo:
            return
        changes = [{self.parameter: self.setter(v)} for v in todo]
        keys = [point_key(self.scenario.with_params(**c)) for c in changes]
        scs = [self.running.with_params(**c) for c in changes]
        labels = {k: f"{self.parameter} = {self.setter(v):g}" for k, v in zip(keys, todo)}
        status(f"{self.stage}: " + ", ".join(f"{self.parameter} = {self.setter(v):g}" for v in todo))
        outs = run_points(scs, list(todo.values()), self.ex, keys=keys, desc="searching",
                          labels={**labels, **self.labels})
        for v, res in zip(todo, outs):
            s = res.summaries[self.analysis]
            if v not in self.stats:
                self.order.append(v)
            self.stats[v] = {"reps": res.reps, "n_ok": s["n_ok"], "rejections": s["rejections"],
                             "power": s["power"], "mcse": s["mcse"], "failures": s["n_failed"],
                             "path": s.get("path", "")}

    def arrays(self):
        vs = sorted(self.stats)
        return (np.array(vs, float), np.array([self.stats[v]["rejections"] for v in vs], float),
                np.array([self.stats[v]["n_ok"] for v in vs], float))


def _round_up(x: float, chunk: int) -> int:
    return int(math.ceil(max(x, 1) / chunk) * chunk)


def _check_common(scenario, target, level, rel_tol, max_reps, analysis):
    if isinstance(target, bool) or not isinstance(target, (int, float)) or not (scenario.alpha < target < 1):
        raise ParameterError(f"`power` must be in (alpha, 1) = ({scenario.alpha:g}, 1); got {target!r}.")
    target = float(target)
    level = Real(0.5, 1.0, high_open=True).clean("level", level)
    rel_tol = Real(0.0, 1.0, low_open=True, high_open=True).clean("rel_tol", rel_tol)
    max_reps = Int(low=1).clean("max_reps", max_reps)
    if analysis is None:
        analysis = scenario.primary
    elif analysis not in scenario.analyses:
        raise ParameterError(f"`analysis` {analysis!r} is not in the scenario.{nearest(analysis, scenario.analyses)}")
    return target, level, rel_tol, max_reps, analysis


def _parameter(scenario, parameter, attr: str) -> str:
    if parameter is None:
        parameter = getattr(scenario.process, attr, None)
        if not parameter:
            what = "size_param" if attr == "size_param" else "effect_param"
            raise ParameterError(f"the process names no {what}; give `parameter` (the one to search over).")
    params = scenario.get_params()
    if parameter not in params:
        raise ParameterError(f"`{parameter}` is not a parameter of this scenario.{nearest(parameter, params)}")
    return parameter


def _not_reached(ev, parameter, target, lo, hi, best_note="") -> ParameterError:
    best_v = max(ev.stats, key=lambda v: ev.stats[v]["power"])
    s = ev.stats[best_v]
    return ParameterError(
        f"target power {target:g} is not reached for `{parameter}` in [{lo:g}, {hi:g}]: the best power seen is "
        f"{s['power']:.3f} (MCSE {s['mcse']:.3f}) at {parameter} = {best_v:g}{best_note}; raise `high` "
        f"or revisit the assumptions."
    )


def _search(scenario, *, parameter, kind, target, low, high, scale, step, setter, level, rel_tol, abs_tol,
            max_reps, ex: Execution, analysis, pilot_points, pilot_reps, labels=None, all_analyses=False):
    pilot_points = Int(low=2).clean("pilot_points", pilot_points)
    mem = as_memory_store(ex.store)
    try:
        entropy = seed_with_store(ex.seed, mem)
        ev = _Evaluations(scenario, parameter, analysis, ex.replace(seed=entropy, store=mem), setter, labels,
                          all_analyses)
        with progress_session(ex.progress, "searching"):
            return _rounds(ev, parameter=parameter, kind=kind, target=target, low=low, high=high, scale=scale,
                           step=step, level=level, rel_tol=rel_tol, abs_tol=abs_tol, max_reps=max_reps,
                           chunk_size=ex.chunk_size, pilot_points=pilot_points, pilot_reps=pilot_reps)
    finally:
        if mem is not ex.store:
            mem.close()


def _search_execution(execution, engine, chunk_size, **keywords) -> tuple[Execution, dict | None]:
    """The search's Execution: its chunk size is SEARCH_CHUNK unless the call or ``execution`` gives another."""
    ex, labels = execution_of(execution, engine, **keywords)
    if ex.chunk_size is not None and chunk_size != SEARCH_CHUNK and chunk_size != ex.chunk_size:
        raise ParameterError(f"`chunk_size` = {chunk_size!r} contradicts `execution.chunk_size` = {ex.chunk_size!r}; "
                             f"give it in one place.")
    chunk_size = Int(low=1).clean("chunk_size", ex.chunk_size if ex.chunk_size is not None else chunk_size)
    return ex.replace(chunk_size=chunk_size), labels


def _rounds(ev, *, parameter, kind, target, low, high, scale, step, level, rel_tol, abs_tol, max_reps, chunk_size,
            pilot_points, pilot_reps):
    entropy = ev.seed
    fwd, inv = SCALES[scale]
    snap = _snapper(low, high, step)
    pilot = sorted({snap(float(v)) for v in inv(np.linspace(fwd(low), fwd(high), pilot_points))})
    ev.run({v: pilot_reps for v in pilot})
    rounds = [{"round": 0, "placed": ", ".join(f"{v:g}" for v in pilot), "reps_added": ev.total,
               "reps_total": ev.total}]
    # the range must hold the target
    top = ev.stats[max(ev.stats)]
    if top["power"] < target:
        ev.stage = "checking the range"
        ev.run({max(ev.stats): 4 * pilot_reps})
        top = ev.stats[max(ev.stats)]
        up = wilson_interval(top["rejections"], top["n_ok"], 0.999)[1]
        if up < target:
            raise _not_reached(ev, parameter, target, low, high)
    note = ""
    converged = False
    fit, used = None, None
    est, elo, ehi = math.nan, -math.inf, math.inf
    for rnd in range(1, MAX_ROUNDS + 1):
        v, k, r = ev.arrays()
        fit, used = fit_near(v, k, r, scale, target)
        before = ev.total
        if fit is None:
            nxt = _bisect(ev, target, snap)
            placed, add = nxt, 2 * pilot_reps
        else:
            est, elo, ehi = fit.crossing(target, level)
            tol = max(rel_tol * est, abs_tol)
            if math.isfinite(elo) and math.isfinite(ehi) and (ehi - elo) / 2 <= tol:
                converged = True
                break
            placed = snap(min(max(est, low), high))
            r_near = float(r[used].sum())
            if math.isfinite(elo) and math.isfinite(ehi):
                ratio = ((ehi - elo) / 2 / tol) ** 2
                add = 0.8 * r_near * (ratio - 1)
            else:
                add = r_near
            add = min(max(add, 2 * pilot_reps), 4 * r_near + 2 * pilot_reps)
        if before >= max_reps:
            break
        ev.stage = f"round {rnd}"
        add = min(_round_up(add, chunk_size), _round_up(max_reps - before, chunk_size))
        ev.run({placed: ev.stats.get(placed, {}).get("reps", 0) + add})
        rounds.append({"round": rnd, "placed": f"{placed:g}", "reps_added": ev.total - before,
                       "reps_total": ev.total, "estimate": est, "low": elo, "high": ehi})
    if fit is None:
        raise ParameterError(
            f"could not fit a monotone power curve for `{parameter}` in [{low:g}, {high:g}] within "
            f"{ev.total} replicates; narrow the range or check that power grows with `{parameter}`.")
    if est > high:
        raise _not_reached(ev, parameter, target, low, high, f" (the fitted curve reaches it near {est:.4g})")
    if est < low:
        note = f"the target is reached already at the lower end of the range ({low:g})"
    rounds.append({"round": len(rounds), "placed": "", "reps_added": 0, "reps_total": ev.total, "estimate": est,
                   "low": elo, "high": ehi})
    answer = _answer(est, low, high, step, kind)
    interval = tuple(_answer(x, low, high, step, kind) if math.isfinite(x) else x for x in (elo, ehi))
    table = _table(ev, fit, used, level)
    return dict(value=answer, estimate=est, interval=interval, estimate_interval=(elo, ehi), converged=converged,
                reps_total=ev.total, table=table, rounds=pd.DataFrame(rounds), fit=fit, seed=entropy, note=note)


def _snapper(low, high, step):
    if step is None:
        return lambda v: float(min(max(v, low), high))

    def snap(v):
        s = round(v / step) * step
        s = min(max(s, math.ceil(low / step - 1e-9) * step), math.floor(high / step + 1e-9) * step)
        return int(s) if float(step).is_integer() else float(s)

    return snap


def _answer(x, low, high, step, kind):
    if kind == "effect" or step is None:
        return float(x)
    v = math.ceil(x / step - 1e-9) * step
    v = max(v, math.ceil(low / step - 1e-9) * step)
    return int(v) if float(step).is_integer() else float(v)


def _bisect(ev, target, snap):
    vals = sorted(ev.stats)
    below = [v for v in vals if ev.stats[v]["power"] < target]
    above = [v for v in vals if ev.stats[v]["power"] >= target]
    if below and above:
        lo = max([v for v in below if v < min(above)] or [min(vals)])
        hi = min(above)
        return snap((lo + hi) / 2)
    return snap(vals[-1] if not above else vals[0])


def _table(ev, fit, used, level) -> pd.DataFrame:
    vs = sorted(ev.stats)
    rows = []
    used_set = set(np.asarray(sorted(ev.stats), float)[used].tolist()) if used is not None else set()
    for v in vs:
        s = ev.stats[v]
        lo, hi = wilson_interval(s["rejections"], s["n_ok"], level)
        rows.append({"value": v, "reps": s["reps"], "n_ok": s["n_ok"], "rejections": s["rejections"],
                     "power": s["power"], "mcse": s["mcse"], "ci_low": lo, "ci_high": hi,
                     "failures": s["failures"], "fitted_power": float(fit.power([v])[0]) if fit else math.nan,
                     "in_fit": float(v) in used_set, "path": s["path"],
                     "first_order": ev.order.index(v)})
    return pd.DataFrame(rows)


# -- analytic references -----------------------------------------------------------
def _analytic_power(scenario, analysis, parameter, value):
    try:
        return scenario.with_params(**{parameter: value}).analytic_power().get(analysis)
    except Exception:
        return None


def analytic_size(scenario, analysis, parameter, target, low, high, step=1):
    """Smallest allowed size with closed-form power >= target, and a continuous version; (None, None) if n/a."""
    lo, hi = int(math.ceil(low / step)), int(math.floor(high / step))
    p_hi = _analytic_power(scenario, analysis, parameter, hi * step)
    if p_hi is None or p_hi < target:
        return None, None
    p_lo = _analytic_power(scenario, analysis, parameter, lo * step)
    if p_lo is None:
        return None, None
    if p_lo >= target:
        return lo * step, float(lo * step)
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if _analytic_power(scenario, analysis, parameter, mid * step) >= target:
            hi = mid
        else:
            lo = mid
    p0 = _analytic_power(scenario, analysis, parameter, lo * step)
    p1 = _analytic_power(scenario, analysis, parameter, hi * step)
    cont = step * (lo + (target - p0) / (p1 - p0)) if p1 > p0 else float(hi * step)
    return hi * step, float(cont)


def analytic_effect(scenario, analysis, parameter, target, low, high, setter):
    from scipy.optimize import brentq

    f = lambda u: (_analytic_power(scenario, analysis, parameter, setter(u)) or math.nan) - target  # noqa: E731
    try:
        a, b = f(low), f(high)
        if not (math.isfinite(a) and math.isfinite(b)) or a > 0 or b < 0:
            return None
        return float(brentq(f, low, high, xtol=1e-10))
    except Exception:
        return None


# -- public entry points ---------------------------------------------------------------
def required_n(scenario, power: float = 0.8, *, parameter: str | None = None, low: float | None = None,
               high: float | None = None, step: int | None = None, scale: str = "sqrt", level: float = 0.95,
               rel_tol: float = 0.02, max_reps: int = 200_000, seed=None, n_jobs: int | None = -1,
               chunk_size: int = SEARCH_CHUNK, store=None, progress: bool | None = None,
               fit_trouble: str = "failure", analysis: str | None = None, max_failure_rate: float = 0.5,
               pilot_points: int = PILOT_POINTS, all_analyses: bool = False, engine=None,
               execution: Execution | None = None) -> SearchResult:
    """The smallest sample size (or number of clusters) that reaches ``power``, with a Monte Carlo interval.

    Parameters
    ----------
    scenario : Scenario
    power : float in (alpha, 1)
        Target power.
    parameter : str, optional
        The size to search over; default the process's ``size_param``
        (``n``: the control arm of a two-arm design, whose treatment arm
        follows from the allocation ratio; ``clusters`` for cluster trials).
    low, high : number, optional
        The search range; default from the parameter's smallest valid value
        to 16 times the scenario's current value. A range in which the
        target is not reached raises ParameterError with the best power seen.
    step : int, optional
        Sizes allowed (multiples of ``step``, e.g. 2 for blocks of two);
        default 1 for integer parameters.
    scale : {'sqrt', 'log', 'linear'}
        The model's scale for the size (see the module notes).
    level : float
        Confidence level of the Monte Carlo interval.
    rel_tol : float
        Stop when the interval's half-width is at most this share of the
        estimate (or half a step, whichever is larger).
    max_reps : int
        Budget of replicates; the result says if it ran out first.
    execution : Execution, optional
        The execution settings as one value (instead of the keywords below).
    seed, n_jobs, chunk_size, store, progress, fit_trouble, max_failure_rate
        As for :func:`simpower.run`; ``chunk_size`` is fixed by the search
        (default :data:`SEARCH_CHUNK`) and recorded, so the numbers reproduce.
    analysis : str, optional
        Whose power must reach the target (default the primary analysis).
    all_analyses : bool
        Fit every analysis of the scenario at each size (default False: only
        ``analysis``, which alone decides). Either way ``analysis`` gets the
        same replicates, so the answer is the same; the other analyses' power
        at the answer is one ``run`` away.
    engine : mapping, optional
        Further keyword arguments for :func:`simpower.run_many` (``backend``,
        ``address``, ``timeout``, ``keep_records``).

    Returns
    -------
    SearchResult

    Examples
    --------
    Cohen (1988, Table 2.4.1): d = 0.5, power 0.8, two-sided alpha 0.05 needs 64 per arm.

    >>> import simpower as sp
    >>> sc = sp.Scenario(sp.NormalTwoArm(n=50, effect=0.5), sp.TTest())
    >>> res = required_n(sc, 0.8, low=20, high=200, seed=4, n_jobs=1)
    >>> res.interval[0] <= 64 <= res.interval[1]
    True
    """
    ex, labels = _search_execution(execution, engine, chunk_size, seed=seed, n_jobs=n_jobs, store=store,
                                   progress=progress, fit_trouble=fit_trouble, max_failure_rate=max_failure_rate)
    target, level, rel_tol, max_reps, analysis = _check_common(scenario, power, level, rel_tol, max_reps, analysis)
    parameter = _parameter(scenario, parameter, "size_param")
    if scale not in SCALES:
        raise ParameterError(f"`scale` must be one of {', '.join(map(repr, SCALES))}; got {scale!r}.")
    current = scenario.get_params()[parameter]
    integer = isinstance(current, (int, np.integer)) and not isinstance(current, bool)
    if step is None:
        step = 1 if integer else None
    elif not (isinstance(step, (int, float)) and step > 0):
        raise ParameterError(f"`step` must be > 0; got {step!r}.")
    moved = ""
    if low is None:
        start = _default_low(scenario, parameter)
        low = runnable_low(scenario if all_analyses else scenario.only(analysis), parameter, start, current,
                         integer, ex.max_failure_rate)
        if low != start:
            moved = (f"the range starts at {parameter} = {low:g}, the smallest size (doubling from {start:g}) at "
                     f"which every analysis ran on trial replicates; give `low` (--range) to start elsewhere")
    high = 16 * max(current, low) if high is None else high
    low = Real(0.0, low_open=True).clean("low", low)
    high = Real(0.0, low_open=True).clean("high", high)
    if high <= low:
        raise ParameterError(f"`high` ({high:g}) must be above `low` ({low:g}).")
    setter = (lambda v: int(v)) if integer else (lambda v: float(v))
    out = _search(scenario, parameter=parameter, kind="size", target=target, low=low, high=high, scale=scale,
                  step=step, setter=setter, level=level, rel_tol=rel_tol,
                  abs_tol=0.5 * step if step else 0.0, max_reps=max_reps, ex=ex, analysis=analysis,
                  pilot_points=pilot_points, pilot_reps=ex.chunk_size, labels=labels, all_analyses=all_analyses)
    if moved:
        out["note"] = "; ".join(filter(None, (moved, out["note"])))
    chunk_size = ex.chunk_size
    an, an_cont = analytic_size(scenario, analysis, parameter, target, low, high, step or 1) if integer else (None, None)
    settings = {"power": target, "parameter": parameter, "low": low, "high": high, "step": step, "scale": scale,
                "level": level, "rel_tol": rel_tol, "max_reps": max_reps, "chunk_size": chunk_size,
                "pilot_points": pilot_points}
    return SearchResult(parameter=parameter, kind="size", target=target, level=level, analysis=analysis,
                        scenario=scenario, chunk_size=chunk_size, settings=settings, analytic=an,
                        analytic_estimate=an_cont, **out)


#: replicates each analysis is tried on at a candidate lowest size (fixed generator, not the run's)
TRIAL_REPLICATES = 20


def _trial_failure_share(scenario, limit: float = 1.0) -> float:
    """The largest share, over the analyses, of hard failures (an exception or a non-finite p-value) on
    :data:`TRIAL_REPLICATES` replicates drawn with a fixed generator; 1.0 if the process cannot draw them
    or as soon as one analysis fails on more than ``limit`` of them."""
    import warnings

    from ..engine.runner import trial_data

    data = trial_data(scenario, TRIAL_REPLICATES)
    if data is None:
        return 1.0
    worst = 0
    # fit trouble is not a hard failure; record=True keeps warnings off stderr even when an analysis's first
    # import of statsmodels inserts its "always" filters (statsmodels.tools.sm_exceptions) ahead of "ignore"
    with warnings.catch_warnings(record=True):
        warnings.simplefilter("ignore")
        for analysis in scenario.analyses.values():
            failed = 0
            for d in data:
                try:
                    ok = math.isfinite(float(getattr(analysis(d), "pvalue", math.nan)))
                except Exception:
                    ok = False
                failed += not ok
                if failed > limit * TRIAL_REPLICATES:
                    return 1.0  # already too many: no need to fit the rest
            worst = max(worst, failed)
    return worst / TRIAL_REPLICATES


def runnable_low(scenario, parameter: str, start: float, current: float, integer: bool,
                 max_failure_rate: float = 0.5) -> float:
    """The smallest size, doubling from ``start`` up to the scenario's ``current`` one, at which every analysis
    runs: at most half of ``max_failure_rate`` of its trial replicates fail hard (see
    :func:`_trial_failure_share`). ``start`` when none up to ``current`` does (the run then reports why).

    A default search range that starts where the analyses cannot fit (a negative binomial model on two
    patients per arm) would stop the search with a failure instead of treating the size as too small.
    """
    ok_rate = isinstance(max_failure_rate, (int, float)) and 0 < max_failure_rate <= 1
    limit = (max_failure_rate if ok_rate else 0.5) / 2  # an invalid rate is refused by the run itself
    v = start
    while v <= current:
        try:
            sc = scenario.with_params(**{parameter: int(v) if integer else float(v)})
        except Exception:
            sc = None
        if sc is not None and _trial_failure_share(sc, limit) <= limit:
            return v
        v = math.ceil(2 * v) if integer else 2 * v
    return start


def _default_low(scenario, parameter) -> float:
    head = parameter.split(".")[-1]
    con = getattr(scenario.process, "params", {}).get(head)
    low = getattr(con, "low", None)
    return float(low) if low is not None and low > 0 else 2.0


def detectable_effect(scenario, power: float = 0.8, *, parameter: str | None = None, low: float | None = None,
                      high: float | None = None, level: float = 0.95, rel_tol: float = 0.02,
                      max_reps: int = 200_000, seed=None, n_jobs: int | None = -1, chunk_size: int = SEARCH_CHUNK,
                      store=None, progress: bool | None = None, fit_trouble: str = "failure",
                      analysis: str | None = None, max_failure_rate: float = 0.5,
                      pilot_points: int = PILOT_POINTS, all_analyses: bool = False, engine=None,
                      execution: Execution | None = None) -> SearchResult:
    """The minimal detectable effect: the smallest effect reaching ``power`` at the scenario's size.

    The effect is searched on its magnitude in the direction of the
    scenario's current effect (negative effects for ``alternative='less'``),
    from ``low`` (default 0) to ``high`` (default 3 times the current
    magnitude). Other parameters (``all_analyses``...) as in :func:`required_n`; the model is
    probit-linear in the effect.

    Examples
    --------
    Cohen (1988, Table 2.4.1): 64 per arm detect d = 0.5 with power 0.80 (two-sided alpha 0.05).

    >>> import simpower as sp
    >>> sc = sp.Scenario(sp.NormalTwoArm(n=64, effect=0.3), sp.TTest())
    >>> res = detectable_effect(sc, 0.8, high=1.0, seed=5, n_jobs=1)
    >>> res.interval[0] <= 0.4986 <= res.interval[1]   # t_effect(64, 0.8, design="two-sample")
    True
    """
    ex, labels = _search_execution(execution, engine, chunk_size, seed=seed, n_jobs=n_jobs, store=store,
                                   progress=progress, fit_trouble=fit_trouble, max_failure_rate=max_failure_rate)
    target, level, rel_tol, max_reps, analysis = _check_common(scenario, power, level, rel_tol, max_reps, analysis)
    parameter = _parameter(scenario, parameter, "effect_param")
    current = float(scenario.get_params()[parameter])
    sign = -1.0 if current < 0 else 1.0
    low = 0.0 if low is None else abs(Real().clean("low", low))
    if high is None:
        if current == 0:
            raise ParameterError(f"`high` is required when the scenario's `{parameter}` is 0: give the largest "
                                 f"effect to consider.")
        high = 3 * abs(current)
    high = abs(Real().clean("high", high))
    if high <= low:
        raise ParameterError(f"`high` ({high:g}) must be above `low` ({low:g}) in magnitude.")
    setter = lambda u: sign * float(u)  # noqa: E731
    out = _search(scenario, parameter=parameter, kind="effect", target=target, low=low, high=high, scale="linear",
                  step=None, setter=setter, level=level, rel_tol=rel_tol, abs_tol=0.0, max_reps=max_reps, ex=ex,
                  analysis=analysis, pilot_points=pilot_points, pilot_reps=ex.chunk_size, labels=labels,
                  all_analyses=all_analyses)
    if sign < 0:
        out["value"], out["estimate"] = -out["value"], -out["estimate"]
        lo, hi = out["interval"]
        out["interval"] = (-hi, -lo)
        lo, hi = out["estimate_interval"]
        out["estimate_interval"] = (-hi, -lo)
        out["table"]["value"] = -out["table"]["value"]
    chunk_size = ex.chunk_size
    an = analytic_effect(scenario, analysis, parameter, target, low, high, setter)
    settings = {"power": target, "parameter": parameter, "low": low, "high": high, "scale": "linear",
                "level": level, "rel_tol": rel_tol, "max_reps": max_reps, "chunk_size": chunk_size,
                "pilot_points": pilot_points, "direction": "negative" if sign < 0 else "positive"}
    return SearchResult(parameter=parameter, kind="effect", target=target, level=level, analysis=analysis,
                        scenario=scenario, chunk_size=chunk_size, settings=settings,
                        analytic=None if an is None else sign * an, analytic_estimate=None if an is None else sign * an,
                        sign=sign, **out)



def search(scenario, find: str = "size", **options) -> SearchResult:
    """:func:`required_n` (``find='size'``) or :func:`detectable_effect` (``find='effect'``)."""
    if find == "size":
        step = options.get("step")
        if step is not None and float(step).is_integer():
            options["step"] = int(step)
        return required_n(scenario, **options)
    if find == "effect":
        for key in ("step", "scale"):
            if options.pop(key, None) is not None:
                raise ParameterError(f"`{key}` applies to size searches only (find = 'size').")
        return detectable_effect(scenario, **options)
    raise ParameterError(f"`find` must be 'size' or 'effect'; got {find!r}.")
