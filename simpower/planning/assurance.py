"""Assurance: the probability of success when the assumptions themselves are uncertain.

A *prior* puts a distribution on any parameters of a scenario (the effect, the
SD, the ICC, the dropout rate, a control event rate...). :func:`assurance`
draws ``draws`` parameter sets from it, runs the scenario at each with
``reps_per_draw`` replicates (a two-level Monte Carlo: every draw is a grid
point of its own), and reports

* the **assurance**: the mean over draws of each draw's success rate (a
  rejection with the estimate on the favourable side of the null), with
  MCSE ``sd(rates) / sqrt(draws)`` (the draws are independent, so this counts
  both the prior's spread and the replicates' noise);
* its **ceiling**: the share of draws whose true effect is favourable (above
  the process's null value for ``favourable = "greater"``), the limit of the
  assurance as the trial grows;
* the assurance **given a favourable effect**;
* the distribution of the **conditional power** over the prior: the closed-form
  power at each draw where the analytic core covers the case, else each draw's
  simulated rate (which adds its Monte Carlo noise to the spread: the quantiles
  say which).

:func:`required_n_for_assurance` finds the size whose assurance reaches a
target, on the same prior draws at every size.

Reproducibility: the prior draws come from ``SeedSequence(seed,
spawn_key=(PRIOR_KEY,))``, and each draw's replicates from a seed key derived
from its scenario and its index, so the numbers are the same for any number of
jobs, any executor, and after a resume.

References: O'Hagan, Stevens & Campbell (2005) Pharm Stat 4:187-201 (assurance);
Spiegelhalter, Freedman & Blackburn (1986) Control Clin Trials 7:8-17 (predictive
power). Assurance rests on the prior as much as on the design: state where each
prior comes from.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Mapping

import numpy as np
import pandas as pd

from .._validation import Int, Real
from ..components import fingerprint
from ..engine.runner import normalize_seed
from ..engine.progress import session as progress_session, status
from ..engine.runner import run_points
from ..errors import ParameterError, nearest
from ..execution import Execution
from .sequential import execution_of

#: the spawn key of the prior's own random stream (distinct from every grid point key, which are 48-bit)
PRIOR_KEY = 2**52 + 7
FAVOURABLE = ("greater", "less")


class PriorDistribution:
    """One parameter's prior: a scipy.stats distribution (frozen, or by name with its arguments) or a sample.

    ``{"dist": "norm", "loc": 0.4, "scale": 0.15}``, ``scipy.stats.gamma(a=20, scale=0.5)``,
    ``{"sample": [0.01, 0.02, 0.05]}`` (resampled with replacement), or a plain list (a sample).
    """

    def __init__(self, name: str, spec: Any):
        from scipy import stats

        self.name = name
        self.sample = None
        self.frozen = None
        if hasattr(spec, "rvs") and hasattr(spec, "mean"):
            self.frozen = spec
        elif isinstance(spec, (list, tuple, np.ndarray)):
            self.sample = self._sample(spec)
        elif isinstance(spec, Mapping):
            spec = dict(spec)
            if "sample" in spec:
                if len(spec) > 1:
                    raise ParameterError(f"`prior.{name}` gives `sample` and other fields; give a sample or a "
                                         f"distribution, not both.")
                self.sample = self._sample(spec["sample"])
            else:
                dist = spec.pop("dist", None)
                if not isinstance(dist, str):
                    raise ParameterError(f'`prior.{name}` needs `dist`, a scipy.stats name (e.g. {{dist = "norm", '
                                         f'loc = 0.4, scale = 0.15}}), or `sample = [...]`.')
                family = getattr(stats, dist, None)
                if not isinstance(family, (stats.rv_continuous, stats.rv_discrete)):
                    names = [n for n in dir(stats) if isinstance(getattr(stats, n, None),
                                                                 (stats.rv_continuous, stats.rv_discrete))]
                    raise ParameterError(f"`prior.{name}.dist` = {dist!r} is not a scipy.stats distribution."
                                         f"{nearest(dist, names)}")
                try:
                    self.frozen = family(**spec)
                    self.frozen.rvs(size=1, random_state=np.random.default_rng(0))
                except Exception as exc:  # noqa: BLE001 - scipy says what is wrong with the arguments
                    raise ParameterError(f"`prior.{name}`: scipy.stats.{dist} does not take {spec} "
                                         f"({type(exc).__name__}: {exc}).") from None
        else:
            raise ParameterError(f"`prior.{name}` must be a scipy.stats distribution, a table {{dist = ..., ...}} "
                                 f"or a sample (a list); got {spec!r}.")

    def _sample(self, values) -> np.ndarray:
        try:
            arr = np.asarray(values, dtype=float)
        except (TypeError, ValueError):
            raise ParameterError(f"`prior.{self.name}` sample must be numbers; got {values!r}.") from None
        if arr.ndim != 1 or arr.size == 0 or not np.all(np.isfinite(arr)):
            raise ParameterError(f"`prior.{self.name}` sample must be a non-empty list of finite numbers.")
        return arr

    def draw(self, rng: np.random.Generator, m: int) -> np.ndarray:
        if self.sample is not None:
            return self.sample[rng.integers(0, self.sample.size, m)]
        return np.asarray(self.frozen.rvs(size=m, random_state=rng), dtype=float)

    def to_data(self) -> dict:
        """The prior as data (``{"sample": [...]}`` or ``{"dist": name, keyword: value...}``) that rebuilds it.

        A frozen scipy distribution given positional arguments has no table form and is refused.
        """
        if self.sample is not None:
            return {"sample": [float(v) for v in self.sample]}
        d = self.frozen
        if d.args:
            raise ParameterError(f"`prior.{self.name}`: give scipy.stats.{d.dist.name} its arguments by keyword "
                                 f"(e.g. loc=..., scale=...) so the prior can be recorded as data.")
        return {"dist": d.dist.name, **{k: (v.item() if isinstance(v, np.generic) else v) for k, v in d.kwds.items()}}

    def describe(self) -> str:
        if self.sample is not None:
            return f"resampled from {self.sample.size} values (mean {self.sample.mean():.4g})"
        d = self.frozen
        args = ", ".join([f"{a:g}" for a in d.args] + [f"{k} = {v:g}" for k, v in d.kwds.items()])
        return f"{d.dist.name}({args}), mean {float(d.mean()):.4g}, SD {float(d.std()):.4g}"


def as_prior(prior: Mapping[str, Any]) -> dict[str, PriorDistribution]:
    """The prior as ``{parameter: PriorDistribution}`` (names in sorted order: the draw order)."""
    if not isinstance(prior, Mapping) or not prior:
        raise ParameterError("`prior` must be a non-empty table of parameter = distribution.")
    return {k: (v if isinstance(v, PriorDistribution) else PriorDistribution(k, v)) for k, v in sorted(prior.items())}


def draw_parameters(prior: Mapping[str, PriorDistribution], draws: int, entropy: int) -> pd.DataFrame:
    """``draws`` parameter sets, one column per parameter, from the prior's own stream."""
    rng = np.random.default_rng(np.random.SeedSequence(entropy, spawn_key=(PRIOR_KEY,)))
    return pd.DataFrame({k: d.draw(rng, draws) for k, d in prior.items()})


def _value(scenario, name, v):
    current = scenario.get_params().get(name)
    if isinstance(current, (int, np.integer)) and not isinstance(current, bool):
        if float(v) != round(float(v)):
            raise ParameterError(f"`prior.{name}` drew {v:g}, but `{name}` takes whole numbers: use a discrete "
                                 f"distribution or a sample of whole numbers.")
        return int(round(float(v)))
    return float(v)


def _scenarios(scenario, params: pd.DataFrame) -> list:
    out = []
    for i, row in enumerate(params.itertuples(index=False)):
        values = {k: _value(scenario, k, v) for k, v in zip(params.columns, row)}
        try:
            out.append(scenario.with_params(**values))
        except ParameterError as exc:
            shown = ", ".join(f"{k} = {v:g}" for k, v in values.items())
            raise ParameterError(f"prior draw {i} ({shown}) is not a valid scenario ({exc}); give the prior a "
                                 f"support inside the parameters' ranges (e.g. a gamma or beta distribution, or "
                                 f"scipy.stats.truncnorm).") from None
    return out


def _draw_key(sc, i: int) -> int:
    return int(fingerprint([sc.fingerprint(), "assurance draw", int(i)])[:12], 16)


def _favourable(sc, direction: str) -> bool | None:
    try:
        effect = float(sc.process.true_effect())
        null = float(sc.process.null_value()) if hasattr(sc.process, "null_value") else 0.0
    except Exception:  # noqa: BLE001 - a process that does not state its effect
        return None
    return effect > null if direction == "greater" else effect < null


@dataclass
class AssuranceResult:
    """Assurance with its MCSE, the ceiling, the assurance given a favourable effect, and the draws."""

    assurance: float
    mcse: float
    ceiling: float | None
    ceiling_mcse: float | None
    given_favourable: float | None
    given_favourable_mcse: float | None
    draws: pd.DataFrame
    conditional_power: str
    analysis: str
    scenario: Any
    prior: dict
    seed: int
    reps_per_draw: int
    level: float = 0.95
    settings: dict = field(default_factory=dict)

    @property
    def interval(self) -> tuple[float, float]:
        from scipy import stats

        z = stats.norm.ppf(0.5 + self.level / 2)
        return max(0.0, self.assurance - z * self.mcse), min(1.0, self.assurance + z * self.mcse)

    def quantiles(self, q=(0.1, 0.25, 0.5, 0.75, 0.9)) -> pd.Series:
        """Quantiles of the conditional power over the prior (see ``conditional_power`` for its source)."""
        return self.draws["conditional_power"].quantile(list(q))

    def plot(self, stem=None, title: str = ""):
        """The conditional power over the prior (histogram), with the assurance and the ceiling marked.

        ``stem`` writes ``stem.png`` and ``stem.svg``. Returns the matplotlib Figure.
        """
        from ..report import plots

        fig, ax = plots.new_figure(7.5, 4.2)
        cp = self.draws["conditional_power"].to_numpy(float)
        cp = cp[np.isfinite(cp)]
        ax.hist(cp, bins=np.linspace(0, 1, 21), color=plots.COLORS[0], alpha=0.7,
                label=f"conditional power at each of {len(cp)} prior draws")
        ax.axvline(self.assurance, color="#000", lw=1.2, ls="-.", label=f"assurance {self.assurance:.2f}")
        if self.ceiling is not None:
            ax.axvline(self.ceiling, color=plots.COLORS[1], lw=1, ls=":",
                       label=f"ceiling (P(effect favourable)) {self.ceiling:.2f}")
        ax.set_xlabel("power at the drawn parameter values (" + self.conditional_power.split(":")[0] + ")")
        ax.set_ylabel("prior draws")
        ax.set_xlim(0, 1)
        ax.set_title(title or f"Power over the prior ({self.analysis})")
        ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0, frameon=False)
        if stem is not None:
            plots.save(fig, stem)
        return fig

    def summary(self) -> str:
        lo, hi = self.interval
        lines = [f"Assurance ({self.analysis}): {self.assurance:.3f} (MCSE {self.mcse:.3f}; {self.level:.0%} "
                 f"interval {lo:.3f} to {hi:.3f})",
                 f"  Over {len(self.draws)} prior draws x {self.reps_per_draw} simulated trials each; seed {self.seed}"]
        if self.ceiling is not None:
            lines.append(f"  Ceiling (probability the effect is favourable): {self.ceiling:.3f} "
                         f"(MCSE {self.ceiling_mcse:.3f})")
        if self.given_favourable is not None:
            lines.append(f"  Assurance given a favourable effect: {self.given_favourable:.3f} "
                         f"(MCSE {self.given_favourable_mcse:.3f})")
        q = self.quantiles()
        lines.append("  Conditional power over the prior (" + self.conditional_power + "): "
                     + ", ".join(f"{int(100 * k)}% {v:.2f}" for k, v in q.items()))
        lines.append("  Prior: " + "; ".join(f"{k} ~ {d.describe()}" for k, d in self.prior.items()))
        lines.append("  Caution: assurance rests on the prior as much as on the design; state where each prior "
                     "comes from.")
        return "\n".join(lines)

    def __str__(self):
        return self.summary()

    def _repr_html_(self) -> str:
        import html

        return "<pre>" + html.escape(self.summary()) + "</pre>"

    def to_dict(self) -> dict:
        return {"assurance": self.assurance, "mcse": self.mcse, "interval": list(self.interval),
                "ceiling": self.ceiling, "ceiling_mcse": self.ceiling_mcse,
                "given_favourable": self.given_favourable, "given_favourable_mcse": self.given_favourable_mcse,
                "conditional_power": self.conditional_power, "analysis": self.analysis, "seed": str(self.seed),
                "draws": len(self.draws), "reps_per_draw": self.reps_per_draw, "settings": self.settings,
                "prior": {k: d.describe() for k, d in self.prior.items()}}


def _direction(scenario, favourable) -> str:
    """``favourable``, or (None) the side of the null the scenario's own effect lies on."""
    if favourable is not None:
        return favourable
    try:
        return "less" if float(scenario.process.true_effect()) < float(scenario.process.null_value()) else "greater"
    except Exception:  # noqa: BLE001 - a process that does not state its effect
        return "greater"


def _check(scenario, prior, draws, reps_per_draw, favourable, analysis):
    prior = as_prior(prior)
    favourable = _direction(scenario, favourable)
    params = scenario.get_params()
    for k in prior:
        if k not in params:
            raise ParameterError(f"`prior.{k}` is not a parameter of this scenario.{nearest(k, params)}")
    draws = Int(low=2).clean("draws", draws)
    reps_per_draw = Int(low=1).clean("reps_per_draw", reps_per_draw)
    if favourable not in FAVOURABLE:
        raise ParameterError(f"`favourable` must be 'greater' or 'less'; got {favourable!r}.")
    if analysis is None:
        analysis = scenario.primary
    elif analysis not in scenario.analyses:
        raise ParameterError(f"`analysis` {analysis!r} is not in the scenario.{nearest(analysis, scenario.analyses)}")
    return prior, draws, reps_per_draw, analysis, favourable


def _evaluate(scenario, prior, params, analysis, reps_per_draw, ex: Execution, favourable) -> pd.DataFrame:
    # each draw's records are needed (the side of each rejection), and they are small: keep them
    ex = ex.replace(keep_records=None)
    scs = [s.only(analysis) for s in _scenarios(scenario, params)]
    keys = [_draw_key(s, i) for i, s in enumerate(scs)]
    labels = {k: f"prior draw {i}" for i, k in enumerate(keys)}
    outs = run_points(scs, reps_per_draw, ex, keys=keys, desc="assurance", labels=labels)
    rows = []
    for i, (sc, res) in enumerate(zip(scs, outs)):
        s = res.summaries[analysis]
        wrong = _wrong_way(sc, res, analysis, favourable)
        analytic = sc.analytic_power().get(analysis)
        rej = int(s["rejections"]) - wrong
        rows.append({"draw": i, **params.iloc[i].to_dict(), "reps": res.reps, "n_ok": s["n_ok"],
                     "rejections": rej, "rejections_wrong_way": wrong,
                     "rate": rej / s["n_ok"] if s["n_ok"] else math.nan, "closed_form_power": analytic,
                     "favourable": _favourable(sc, favourable)})
    return pd.DataFrame(rows)


def _wrong_way(sc, res, analysis, favourable) -> int:
    """Rejections whose estimate lies on the unfavourable side of the null (a two-sided test's harmful
    'success'): they do not count as success. Replicates without an estimate count as favourable."""
    try:
        rec = res.records[analysis]
    except Exception:  # noqa: BLE001 - records not kept: every rejection counts
        return 0
    try:
        null = float(sc.process.null_value())
    except Exception:  # noqa: BLE001
        null = 0.0
    est = np.asarray(rec.estimate, float)
    rejected = (np.asarray(rec.status) == 0) & (np.asarray(rec.pvalue, float) <= sc.alpha)
    wrong = est < null if favourable == "greater" else est > null
    return int(np.count_nonzero(rejected & wrong & np.isfinite(est)))


def _summarise(table: pd.DataFrame) -> dict:
    rates = table["rate"].to_numpy(float)
    ok = np.isfinite(rates)
    m = int(ok.sum())
    if m < 2:
        raise ParameterError("fewer than two prior draws gave a usable rejection rate; check the failures "
                             "(run the scenario at the prior mean).")
    out = {"assurance": float(rates[ok].mean()), "mcse": float(rates[ok].std(ddof=1) / math.sqrt(m))}
    fav = table["favourable"]
    if fav.notna().all():
        f = fav.to_numpy(bool)
        c = float(f.mean())
        out.update(ceiling=c, ceiling_mcse=math.sqrt(c * (1 - c) / len(f)))
        rf = rates[f & ok]
        if rf.size >= 2:
            out.update(given_favourable=float(rf.mean()), given_favourable_mcse=float(rf.std(ddof=1) / math.sqrt(rf.size)))
        else:
            out.update(given_favourable=None, given_favourable_mcse=None)
    else:
        out.update(ceiling=None, ceiling_mcse=None, given_favourable=None, given_favourable_mcse=None)
    cf = table["closed_form_power"]
    if cf.notna().all():
        table["conditional_power"] = cf.astype(float)
        out["conditional_power"] = "closed form at each draw"
    else:
        table["conditional_power"] = table["rate"]
        out["conditional_power"] = (f"simulated at each draw from {int(table['reps'].iloc[0])} replicates: its Monte "
                                    f"Carlo noise widens the spread")
    return out


def assurance(scenario, prior: Mapping[str, Any], *, draws: int = 1000, reps_per_draw: int = 20,
              favourable: str | None = None, analysis: str | None = None, seed=None, n_jobs: int | None = -1,
              progress: bool | None = None, execution: Execution | None = None) -> AssuranceResult:
    """The probability that ``analysis`` (default the primary) rejects, averaged over a prior on the parameters.

    Parameters
    ----------
    scenario : Scenario
    prior : mapping
        Parameter name (as :meth:`Scenario.with_params` takes it: ``effect``,
        ``sd``, ``design.icc``, ``missing.rate``...) -> a scipy.stats frozen
        distribution, a table ``{"dist": "norm", "loc": ..., "scale": ...}``,
        or a sample (list) to resample.
    draws : int >= 2
        Parameter sets drawn from the prior.
    reps_per_draw : int >= 1
        Simulated trials at each draw.
    favourable : {'greater', 'less'}, optional
        Which side of the process's null value counts as a favourable true
        effect (for the ceiling) and as a success: a rejection whose estimate
        lies on the other side (a two-sided test finding harm) is not one.
        Default: the side the scenario's own effect lies on.
    seed, n_jobs, progress, execution
        As for :func:`simpower.run`.

    Examples
    --------
    A normal prior on the effect of a z-test has a closed form (O'Hagan, Stevens & Campbell 2005):

    >>> import simpower as sp
    >>> from simpower.analytic.assurance import normal_prior_assurance, two_sample_z_se
    >>> sc = sp.Scenario(sp.NormalTwoArm(n=50, effect=0.4), sp.ZTest())
    >>> res = assurance(sc, {"effect": {"dist": "norm", "loc": 0.4, "scale": 0.2}}, draws=400,
    ...                 reps_per_draw=10, seed=3, n_jobs=1, progress=False)
    >>> exact = normal_prior_assurance(0.4, 0.2, two_sample_z_se(50), favourable="greater")
    >>> bool(abs(res.assurance - exact) < 4 * res.mcse)
    True
    """
    ex, _ = execution_of(execution, None, seed=seed, n_jobs=n_jobs, progress=progress)
    prior, draws, reps_per_draw, analysis, favourable = _check(scenario, prior, draws, reps_per_draw, favourable,
                                                               analysis)
    entropy = normalize_seed(ex.seed)
    ex = ex.replace(seed=entropy)
    params = draw_parameters(prior, draws, entropy)
    with progress_session(ex.progress, "assurance"):
        table = _evaluate(scenario, prior, params, analysis, reps_per_draw, ex, favourable)
    out = _summarise(table)
    settings = {"draws": draws, "reps_per_draw": reps_per_draw, "favourable": favourable}
    return AssuranceResult(draws=table, analysis=analysis, scenario=scenario, prior=prior, seed=entropy,
                           reps_per_draw=reps_per_draw, settings=settings, **out)


@dataclass
class AssuranceSizeResult:
    """The size whose assurance reaches a target: evaluated sizes, the interpolated answer and its interval."""

    parameter: str
    target: float
    value: float | None
    interval: tuple[float, float]
    table: pd.DataFrame
    ceiling: float | None
    analysis: str
    seed: int
    note: str = ""

    def summary(self) -> str:
        lo, hi = self.interval
        if self.value is None:
            head = f"No {self.parameter} in the range reaches assurance {self.target:g} ({self.analysis})"
        else:
            head = (f"Assurance {self.target:g} ({self.analysis}) needs {self.parameter} = {self.value:g} "
                    f"(interpolated; {self.parameter} from {lo:g} to {hi:g} where the assurance's 95% band "
                    f"crosses the target)")
        lines = [head]
        if self.ceiling is not None:
            lines.append(f"  Ceiling (probability the effect is favourable): {self.ceiling:.3f}; no size gives "
                         f"more assurance than this")
        for _, r in self.table.iterrows():
            lines.append(f"  {self.parameter} = {r['value']:g}: assurance {r['assurance']:.3f} (MCSE {r['mcse']:.3f})")
        if self.note:
            lines.append("  Note: " + self.note)
        lines.append(f"  Seed: {self.seed}. Caution: assurance rests on the prior as much as on the design.")
        return "\n".join(lines)

    def __str__(self):
        return self.summary()

    def to_dict(self) -> dict:
        return {"parameter": self.parameter, "target": self.target, "value": self.value,
                "interval": list(self.interval), "ceiling": self.ceiling, "analysis": self.analysis,
                "seed": str(self.seed), "note": self.note, "table": self.table.to_dict(orient="records")}


def required_n_for_assurance(scenario, prior: Mapping[str, Any], target: float, *, low: float, high: float,
                             points: int = 6, parameter: str | None = None, draws: int = 500,
                             reps_per_draw: int = 20, favourable: str | None = None, analysis: str | None = None,
                             seed=None, n_jobs: int | None = -1, progress: bool | None = None,
                             execution: Execution | None = None) -> AssuranceSizeResult:
    """The size (default the process's size parameter) whose assurance reaches ``target``.

    The assurance is evaluated at ``points`` sizes spread on the square-root
    scale over [low, high], on the same prior draws at every size (so the
    curve is smooth in the size), and the answer is interpolated linearly
    between the two sizes around the crossing; the interval is where the 95%
    band (assurance +- 1.96 MCSE) crosses the target. A target above the
    ceiling cannot be reached at any size: that is refused with the ceiling.
    """
    ex, _ = execution_of(execution, None, seed=seed, n_jobs=n_jobs, progress=progress)
    prior, draws, reps_per_draw, analysis, favourable = _check(scenario, prior, draws, reps_per_draw, favourable,
                                                               analysis)
    target = Real(0.0, 1.0, low_open=True, high_open=True).clean("target", target)
    points = Int(low=2).clean("points", points)
    parameter = parameter or getattr(scenario.process, "size_param", None)
    if not parameter or parameter not in scenario.get_params():
        raise ParameterError("give `parameter`, the size to vary (the process names none).")
    low = Real(0.0, low_open=True).clean("low", low)
    high = Real(0.0, low_open=True).clean("high", high)
    if high <= low:
        raise ParameterError(f"`high` ({high:g}) must be above `low` ({low:g}).")
    integer = isinstance(scenario.get_params()[parameter], (int, np.integer))
    sizes = np.linspace(math.sqrt(low), math.sqrt(high), points) ** 2
    sizes = sorted({int(round(v)) if integer else float(v) for v in sizes})
    entropy = normalize_seed(ex.seed)
    ex = ex.replace(seed=entropy)
    params = draw_parameters(prior, draws, entropy)
    rows, ceiling = [], None
    with progress_session(ex.progress, "assurance by size"):
        for v in sizes:
            status(f"{parameter} = {v:g}")
            table = _evaluate(scenario.with_params(**{parameter: v}), prior, params, analysis, reps_per_draw, ex,
                              favourable)
            s = _summarise(table)
            if ceiling is None and s["ceiling"] is not None:
                ceiling = s["ceiling"]
                if target >= ceiling + 4 * s["ceiling_mcse"]:
                    raise ParameterError(f"assurance {target:g} is above the ceiling {ceiling:.3f} (the prior's "
                                         f"probability of a favourable effect): no size reaches it; lower the "
                                         f"target or revisit the prior.")
            rows.append({"value": v, "assurance": s["assurance"], "mcse": s["mcse"]})
    table = pd.DataFrame(rows)
    from .sweepresult import _crossing

    xs = table["value"].to_numpy(float)
    a = table["assurance"].to_numpy(float)
    m = table["mcse"].to_numpy(float)
    est = _crossing(xs, a, target)
    lo, hi = _crossing(xs, a + 1.96 * m, target), _crossing(xs, a - 1.96 * m, target)
    note = ""
    value = None if math.isnan(est) else (int(math.ceil(est)) if integer else est)
    if integer:  # whole sizes: the interval rounded outwards
        lo = math.floor(lo) if math.isfinite(lo) else lo
        hi = math.ceil(hi) if math.isfinite(hi) else hi
    if value is None:
        note = f"the largest assurance seen is {a.max():.3f} at {parameter} = {xs[a.argmax()]:g}; raise `high`"
    elif est == xs[0]:
        note = "the target is reached already at the lower end of the range"
    return AssuranceSizeResult(parameter=parameter, target=target, value=value, interval=(lo, hi), table=table,
                               ceiling=ceiling, analysis=analysis, seed=entropy, note=note)


# -- the [assurance] block of a scenario file -----------------------------------------------
def check_block(scenario, block: Mapping[str, Any]) -> dict:
    """The ``[assurance]`` block checked against the scenario (the prior's names and distributions), before
    anything runs; returns the block with the prior as :class:`PriorDistribution` objects."""
    out = dict(block)
    if "prior" not in out:
        raise ParameterError('[assurance] needs [assurance.prior]: parameter = {dist = "norm", loc = ..., '
                             'scale = ...} (or = [a sample]).')
    _check(scenario, out["prior"], out.get("draws", 1000), out.get("reps_per_draw", 20),
           out.get("favourable"), out.get("analysis"))
    out["prior"] = as_prior(out["prior"])
    sized = [k for k in ("target", "low", "high") if k in out]
    if sized and len(sized) < 3:
        missing = [k for k in ("target", "low", "high") if k not in out]
        raise ParameterError(f"[assurance] with `{sized[0]}` needs `target`, `low` and `high` (the size range to "
                             f"search); `{missing[0]}` is missing.")
    return out


def run_block(scenario, block: Mapping[str, Any], ex: Execution):
    """Run an ``[assurance]`` block: the assurance at the scenario's size, or (with ``target``) the size for it."""
    common = {k: block[k] for k in ("draws", "reps_per_draw", "favourable", "analysis") if k in block}
    if "target" in block:
        return required_n_for_assurance(scenario, block["prior"], block["target"], low=block["low"],
                                        high=block["high"], points=block.get("points", 6),
                                        parameter=block.get("parameter"), execution=ex, **common)
    return assurance(scenario, block["prior"], execution=ex, **common)
