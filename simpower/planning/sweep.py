"""Sweeps: a scenario over a grid of parameters, one tidy row per grid point and analysis.

A :class:`Grid` is a list of axes crossed with each other (a cartesian
product); an axis is one parameter with its values, or several parameters
whose values change *together* (zipped sets of equal length). Values are
lists or ranges (:class:`Range`: a step, a count of evenly spaced values, or a
count of log-spaced values).

:func:`sweep` runs every point with one pool of workers (parallel across grid
points and replicates) and returns a pandas DataFrame; :func:`null_check` runs
the same points with the effect on the boundary of each analysis's H0 (no
effect, or an equivalence / non-inferiority margin: :mod:`simpower.nullpoints`)
and judges the type I error by Bradley's (1978) liberal criterion.

Every point is seeded by its content key (:func:`simpower.sequential.point_key`),
so a point's numbers depend on its parameters and the seed only, not on
where it sits in the grid.
"""

from __future__ import annotations

import itertools
import math
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any, Iterable, Mapping, Sequence

import numpy as np
import pandas as pd

from ..engine.runner import normalize_seed
from ..engine.progress import session as progress_session
from ..engine.runner import point_labels, run_points
from ..execution import Execution

from ..errors import ParameterError
from .sweepresult import SweepResult
from .sequential import (as_memory_store, check_target_mcse, execution_of, point_key, run_many_to_mcse,
                         seed_with_store)
from ..summaries import bradley_liberal

#: columns of a sweep table after the grid parameters, in order
RESULT_COLUMNS = ("analysis", "power", "mcse", "ci_low", "ci_high", "reps", "n_ok", "failures",
                  "failure_causes", "analytic_power", "distance_mcse", "path", "seconds")


@dataclass(frozen=True)
class Range:
    """Evenly spaced values from ``start`` to ``stop`` (both included).

    Give ``step`` (an arithmetic sequence; ``stop`` is included when it falls
    on the step) or ``count`` (that many values, linear or, with
    ``scale="log"``, geometric). Values of an integer parameter are rounded
    and duplicates dropped.
    """

    start: float
    stop: float
    step: float | None = None
    count: int | None = None
    scale: str = "linear"

    def __post_init__(self):
        for f in ("start", "stop"):
            v = getattr(self, f)
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
                raise ParameterError(f"range `{f}` must be a finite number; got {v!r}.")
        if (self.step is None) == (self.count is None):
            raise ParameterError("a range needs exactly one of `step` or `count`.")
        if self.step is not None and (not isinstance(self.step, (int, float)) or self.step <= 0):
            raise ParameterError(f"range `step` must be > 0; got {self.step!r}.")
        if self.count is not None and (not isinstance(self.count, int) or isinstance(self.count, bool)
                                       or self.count < 1):
            raise ParameterError(f"range `count` must be an integer >= 1; got {self.count!r}.")
        if self.scale not in ("linear", "log"):
            raise ParameterError(f"range `scale` must be 'linear' or 'log'; got {self.scale!r}.")
        if self.scale == "log" and (self.step is not None or self.start <= 0 or self.stop <= 0):
            raise ParameterError("a log range needs `count` (not `step`) and `start`, `stop` > 0.")
        if self.stop < self.start:
            raise ParameterError(f"range `stop` ({self.stop:g}) must be >= `start` ({self.start:g}).")

    def values(self, integer: bool = False) -> list:
        if self.step is not None:
            k = int(math.floor((self.stop - self.start) / self.step + 1e-9))
            vals = [self.start + i * self.step for i in range(k + 1)]
        elif self.scale == "log":
            vals = list(np.geomspace(self.start, self.stop, self.count))
        else:
            vals = list(np.linspace(self.start, self.stop, self.count))
        if integer:
            return list(dict.fromkeys(int(round(v)) for v in vals))
        return [float(round(v, 12)) for v in vals]

    def __str__(self):
        if self.step is not None:
            return f"{self.start:g} to {self.stop:g} step {self.step:g}"
        return f"{self.count} {'log-spaced' if self.scale == 'log' else 'evenly spaced'} values from " \
               f"{self.start:g} to {self.stop:g}"


def _axis_values(name: str, values) -> list | Range:
    if isinstance(values, Range):
        return values
    if isinstance(values, Mapping):
        return range_from_table(name, values)
    if isinstance(values, (str, bytes)) or not isinstance(values, Iterable):
        return [values]
    vals = list(values)
    if not vals:
        raise ParameterError(f"the grid is empty: `{name}` has no values.")
    return vals


def range_from_table(name: str, table: Mapping[str, Any]) -> Range:
    """A :class:`Range` from a TOML inline table ``{from, to, step | count, scale}``."""
    allowed = {"from", "to", "step", "count", "scale"}
    for key in table:
        if key not in allowed:
            from ..errors import nearest

            raise ParameterError(f"range of `{name}`: unknown field `{key}`.{nearest(key, allowed)}")
    if "from" not in table or "to" not in table:
        raise ParameterError(f"range of `{name}` needs `from` and `to` (and `step` or `count`).")
    try:
        return Range(table["from"], table["to"], table.get("step"), table.get("count"), table.get("scale", "linear"))
    except ParameterError as exc:
        raise ParameterError(f"range of `{name}`: {exc}") from None


class Grid:
    """Grid points: axes crossed with each other; an axis may hold parameters that vary together.

    Build with :meth:`cross` (cartesian product of parameters), :meth:`together`
    (zipped sets) and ``*`` (cross two grids), or :meth:`points` (an explicit
    list of settings).

    Examples
    --------
    >>> g = Grid.cross(n=[40, 60], effect=Range(0.3, 0.5, step=0.1)) * Grid.together(sd=[8, 10], mean0=[0, 1])
    >>> len(g.settings())
    12
    >>> g.settings()[0]
    {'n': 40, 'effect': 0.3, 'sd': 8, 'mean0': 0}
    """

    def __init__(self, axes: Sequence[tuple[tuple[str, ...], Any]] = ()):
        self.axes = list(axes)
        seen: set[str] = set()
        for names, _ in self.axes:
            for n in names:
                if n in seen:
                    raise ParameterError(f"`{n}` appears twice in the grid; give each parameter once.")
                seen.add(n)

    @classmethod
    def cross(cls, **values) -> "Grid":
        """Every combination of the given parameters' values."""
        return cls([((name,), _axis_values(name, v)) for name, v in values.items()])

    @classmethod
    def together(cls, **values) -> "Grid":
        """Parameters whose values change together (equal-length lists, zipped)."""
        if not values:
            raise ParameterError("the grid is empty: `together` needs at least one parameter.")
        resolved = {n: _axis_values(n, v) for n, v in values.items()}
        return cls([(tuple(resolved), resolved)])

    @classmethod
    def points(cls, settings: Sequence[Mapping[str, Any]]) -> "Grid":
        """An explicit list of settings (every one naming the same parameters)."""
        settings = [dict(s) for s in settings]
        if not settings:
            raise ParameterError("the grid is empty: give at least one setting.")
        names = tuple(settings[0])
        for s in settings:
            if tuple(s) != names:
                raise ParameterError(f"every grid setting must name the same parameters {list(names)}; got {list(s)}.")
        return cls([(names, {n: [s[n] for s in settings] for n in names})])

    def __mul__(self, other: "Grid") -> "Grid":
        return Grid(self.axes + other.axes)

    @property
    def names(self) -> list[str]:
        return [n for names, _ in self.axes for n in names]

    def settings(self, scenario=None) -> list[dict[str, Any]]:
        """The grid points as dicts, first axis slowest; ranges resolved (rounded for integer parameters)."""
        if not self.axes:
            raise ParameterError("the grid is empty: give at least one parameter to vary.")
        current = scenario.get_params() if scenario is not None else {}
        columns = []
        for names, vals in self.axes:
            if len(names) == 1 and not isinstance(vals, dict):
                columns.append([(v,) for v in self._resolve(names[0], vals, current)])
                continue
            lists = [self._resolve(n, vals[n], current) for n in names]
            lengths = {len(v) for v in lists}
            if len(lengths) != 1:
                shown = ", ".join(f"{n}: {len(v)}" for n, v in zip(names, lists))
                raise ParameterError(f"parameters that vary together need equally many values; got {shown}.")
            columns.append(list(zip(*lists)))
        out = []
        for combo in itertools.product(*columns):
            point: dict[str, Any] = {}
            for (names, _), vals in zip(self.axes, combo):
                point.update(zip(names, vals))
            out.append(point)
        return out

    @staticmethod
    def _resolve(name, vals, current) -> list:
        integer = isinstance(current.get(name), (int, np.integer)) and not isinstance(current.get(name), bool)
        if isinstance(vals, Range):
            return vals.values(integer=integer)
        vals = list(vals)
        if not vals:
            raise ParameterError(f"the grid is empty: `{name}` has no values.")
        if integer:
            vals = [int(v) if isinstance(v, float) and v.is_integer() else v for v in vals]
        return vals

    def describe(self) -> list[str]:
        lines = []
        for names, vals in self.axes:
            if len(names) == 1 and not isinstance(vals, dict):
                lines.append(f"`{names[0]}`: {vals if isinstance(vals, Range) else ', '.join(map(str, vals))}")
            else:
                parts = "; ".join(f"`{n}` = {vals[n]}" for n in names)
                lines.append(f"together: {parts}")
        return lines

    def __repr__(self):
        return f"Grid({self.axes!r})"


def as_grid(grid) -> Grid:
    """A :class:`Grid` from a Grid, a mapping (crossed) or a list of settings."""
    if isinstance(grid, Grid):
        return grid
    if isinstance(grid, Mapping):
        if not grid:
            raise ParameterError("the grid is empty: give at least one parameter to vary.")
        return Grid.cross(**grid)
    if isinstance(grid, Sequence) and not isinstance(grid, (str, bytes)):
        return Grid.points(grid)
    raise ParameterError(f"`grid` must be a Grid, a mapping of parameter -> values, or a list of settings; got {grid!r}.")


def check_names(scenario, names: Sequence[str]) -> None:
    """Raise ParameterError naming the nearest valid parameter for a name the scenario does not have."""
    import difflib

    valid = list(scenario.get_params())
    ok = set(valid) | {f"process.{k}" for k in scenario.process.get_params()}
    for name in names:
        head = name.partition(".")[0]
        if name in ok or (head == "analysis" and name[9:] in scenario.analyses[scenario.primary].get_params()):
            continue
        hit = difflib.get_close_matches(name, valid, n=1, cutoff=0.0)
        hint = f" Did you mean {hit[0]!r}?" if hit else ""
        raise ParameterError(f"grid parameter `{name}` is not a parameter of this scenario.{hint}")


def grid_scenarios(scenario, grid) -> tuple[list[dict], list]:
    """The grid's settings and the scenario at each (bad names raise with the nearest valid one)."""
    g = as_grid(grid)
    check_names(scenario, g.names)
    settings = g.settings(scenario)
    return settings, [scenario.with_params(**s) for s in settings]


def _row(point, res, name, s) -> dict:
    row = dict(point)
    row.update({
        "analysis": name, "power": s["power"], "mcse": s["mcse"], "ci_low": s["ci_low"],
        "ci_high": s["ci_high"], "reps": s["reps"], "n_ok": s["n_ok"], "failures": s["n_failed"],
        "failure_causes": "; ".join(f"{c} x{k}" for c, k in s["failures"].items()),
        "analytic_power": s.get("analytic_power"), "distance_mcse": s.get("distance_mcse"),
        "path": s.get("path", ""), "seconds": res.chunk_seconds,
    })
    return row


def _rows(settings, results, extra=None) -> list[dict]:
    rows = []
    for point, res in zip(settings, results):
        for name, s in res.summaries.items():
            row = _row(point, res, name, s)
            if extra:
                row.update(extra(res, name, s))
            rows.append(row)
    return rows


@contextmanager
def _opened(store):
    """A MemoryStore in front of ``store`` (a path is opened, and closed afterwards); None without a store."""
    if store is None:
        yield None
        return
    mem = as_memory_store(store)
    try:
        yield mem
    finally:
        if mem is not store:
            mem.close()


def _run_points(scenarios, reps, ex: Execution, target_mcse, max_reps, min_reps, labels=None):
    """Run unique points once (content keys), in one pool; return results in the scenarios' order."""
    keys = [point_key(s) for s in scenarios]
    unique: dict[int, Any] = {}
    for k, s in zip(keys, scenarios):
        unique.setdefault(k, s)
    ukeys = list(unique)
    # messages name a point by its parameters ("n = 48, icc = 0.05"), not by its seed key
    labels = {**dict(zip(keys, point_labels(scenarios))), **dict(labels or {})}
    with progress_session(ex.progress, "sweeping"):
        outs = _run_unique(unique, reps, ex, target_mcse, max_reps, min_reps, labels)
    by_key = dict(zip(ukeys, outs))
    return [by_key[k] for k in keys]


def _run_unique(unique, reps, ex, target_mcse, max_reps, min_reps, labels):
    ukeys = list(unique)
    if target_mcse is not None:
        outs = run_many_to_mcse(list(unique.values()), target_mcse, max_reps=max_reps, min_reps=min_reps,
                                keys=ukeys, engine={"labels": labels}, execution=ex)
    else:
        outs = run_points(list(unique.values()), reps, ex, keys=ukeys, desc="sweeping", labels=labels)
    return outs


def sweep(scenario, grid, reps: int = 2000, *, seed=None, n_jobs: int | None = -1, chunk_size: int | None = None,
          store=None, progress: bool | None = None, fit_trouble: str = "failure", target_mcse: float | None = None,
          max_reps: int = 100_000, min_reps: int = 1000, max_failure_rate: float = 0.5,
          return_results: bool = False, engine=None, execution: Execution | None = None):
    """Simulate ``scenario`` at every point of ``grid``; one row per grid point and analysis.

    Parameters
    ----------
    scenario : Scenario
    grid : Grid, mapping or list of dicts
        A mapping ``{"n": [40, 60, 80], "effect": Range(0.3, 0.6, step=0.1)}``
        is crossed; see :class:`Grid` for zipped sets. Names are those of
        :meth:`Scenario.with_params` (``n``, ``outcome.cv``, ``alpha``,
        ``<analysis>.<param>``).
    reps : int
        Replicates per point (ignored when ``target_mcse`` is given).
    seed : int >= 0, SeedSequence or None
        Recorded in ``table.attrs["seed"]``; pass it back to reproduce the table.
    n_jobs : int
        Workers shared by all points (-1: all cores).
    chunk_size : int, optional
    store : run store, optional
        Finished chunks are reused and saved (e.g. the SQLite run store, for
        resumable overnight sweeps).
    target_mcse : float, optional
        Run each point until its power's MCSE reaches this (sequential
        stopping, between ``min_reps`` and ``max_reps``).
    return_results : bool
        Also return the list of RunResults (one per grid point).
    engine : mapping, optional
        Further keyword arguments for :func:`simpower.run_many` (``backend``,
        ``address``, ``timeout``, ``keep_records``); kept for old calls.
    execution : Execution, optional
        The execution settings (seed to chunk_size) as one value; a keyword
        argument that contradicts it is refused.

    Returns
    -------
    SweepResult
        A :class:`pandas.DataFrame`: grid parameter columns, then
        :data:`RESULT_COLUMNS`; ``attrs`` holds the seed, chunk size, scenario
        fingerprint and grid names. Its methods answer the sweep's question:
        ``required(target)`` (the size reaching the target per curve),
        ``answer()``, ``plot()`` (see :mod:`simpower.planning.sweepresult`).

    Examples
    --------
    >>> import simpower as sp
    >>> sc = sp.Scenario(sp.NormalTwoArm(n=64, effect=0.5), sp.TTest())
    >>> t = sweep(sc, {"n": [20, 64]}, reps=2000, seed=1, n_jobs=1)
    >>> list(t["n"]), bool(abs(t["power"][1] - t["analytic_power"][1]) < 4 * t["mcse"][1])
    ([20, 64], True)
    """
    if target_mcse is not None:
        target_mcse = check_target_mcse(target_mcse)
    ex, labels = execution_of(execution, engine, seed=seed, n_jobs=n_jobs, chunk_size=chunk_size, store=store,
                              progress=progress, fit_trouble=fit_trouble, max_failure_rate=max_failure_rate)
    fit_trouble = ex.fit_trouble
    settings, scenarios = grid_scenarios(scenario, grid)
    with _opened(ex.store) as mem:
        entropy = normalize_seed(ex.seed) if mem is None else seed_with_store(ex.seed, mem)
        results = _run_points(scenarios, reps, ex.replace(seed=entropy, store=mem), target_mcse, max_reps,
                              min_reps, labels)
    extra = None
    if target_mcse is not None:
        extra = lambda res, name, s: {"mcse_reached": res.extra["sequential"]["reached"]}  # noqa: E731
    table = pd.DataFrame(_rows(settings, results, extra))
    table.attrs.update({
        "kind": "sweep", "seed": entropy, "fingerprint": scenario.fingerprint(), "grid": list(settings[0]),
        "chunk_size": results[0].chunk_size, "reps": None if target_mcse is not None else reps,
        "target_mcse": target_mcse, "alpha": scenario.alpha, "fit_trouble": fit_trouble,
    })
    table = SweepResult.of(table, scenario)
    return (table, results) if return_results else table


def null_check(scenario, grid=None, reps: int = 10_000, *, seed=None, n_jobs: int | None = -1,
               chunk_size: int | None = None, store=None, progress: bool | None = None, fit_trouble: str = "failure",
               max_failure_rate: float = 0.5, engine=None, execution: Execution | None = None) -> pd.DataFrame:
    """Type I error of each analysis with the effect on the boundary of its H0, everything else kept.

    A test of "no effect" is run at the process's null (effect 0, or ratio
    1); a test whose H0 lies elsewhere at its boundary
    (:meth:`Analysis.null_boundary`): the TOST at its upper equivalence
    margin, a non-inferiority test at its margin, a t-test of H0: difference =
    ``null_mean`` at ``null_mean``. The effect parameter is converted to the
    process's scale (e.g. a margin in outcome units to Cohen's d); one scenario
    runs per distinct boundary (:func:`simpower.nullpoints.null_points`).

    With a ``grid``, at every grid point. Each row gives where the effect was
    put (``null_at``), the rejection rate there, its MCSE and Wilson interval,
    the closed-form rate where the analytic core covers the case, and whether
    the rate meets Bradley's (1978) liberal criterion 0.5 alpha <= rate <= 1.5
    alpha (Bradley, Br J Math Stat Psychol 31:144-152). With R replicates the
    MCSE at the nominal level is sqrt(alpha(1-alpha)/R): 0.0022 for alpha =
    0.05 and R = 10000. (On an equivalence margin the TOST's exact size is
    below alpha when the standard error is large against the range; the
    ``analytic_type1`` column then says what to expect.)

    Returns
    -------
    pandas.DataFrame
        Grid parameter columns (if any), ``analysis``, ``null_at``,
        ``null_effect`` (the process's effect parameter there), ``alpha``,
        ``type1_error``, ``mcse``, ``ci_low``, ``ci_high``, ``reps``, ``n_ok``,
        ``failures``, ``failure_causes``, ``analytic_type1``, ``bradley_low``,
        ``bradley_high``, ``meets_bradley``, ``distance_mcse`` (from alpha, at
        the MCSE of alpha), ``path``, ``seconds``.

    Examples
    --------
    >>> import simpower as sp
    >>> sc = sp.Scenario(sp.NormalTwoArm(n=20, effect=0.5), sp.TTest())
    >>> t = null_check(sc, reps=4000, seed=2, n_jobs=1)
    >>> bool(t["meets_bradley"][0]), bool(abs(t["type1_error"][0] - 0.05) < 4 * t["mcse"][0])
    (True, True)
    >>> t["null_at"][0]
    'no effect: effect = 0'
    """
    from .nullpoints import null_points

    if grid is None:
        settings, scenarios = [{}], [scenario]
    else:
        settings, scenarios = grid_scenarios(scenario, grid)
    ex, labels = execution_of(execution, engine, seed=seed, n_jobs=n_jobs, chunk_size=chunk_size, store=store,
                              progress=progress, fit_trouble=fit_trouble, max_failure_rate=max_failure_rate)
    points = [null_points(s) for s in scenarios]
    with _opened(ex.store) as mem:
        entropy = normalize_seed(ex.seed) if mem is None else seed_with_store(ex.seed, mem)
        results = _run_points([p.scenario for pts in points for p in pts], reps, ex.replace(seed=entropy, store=mem),
                              None, None, None, labels)
    done = iter(results)
    rows = []
    for setting, s, pts in zip(settings, scenarios, points):
        source = {}
        for p in pts:
            res = next(done)
            source.update({name: (p, res) for name in p.analyses})
        for name in s.analyses:
            p, res = source[name]
            rows.append(_null_row(setting, p, res, name, res.summaries[name]))
    table = pd.DataFrame(rows)
    table.attrs.update({"kind": "null_check", "seed": entropy, "fingerprint": scenario.fingerprint(),
                        "grid": list(settings[0]), "chunk_size": results[0].chunk_size, "reps": reps})
    return table


def _null_row(setting, point, res, name, s) -> dict:
    """A row of the null check table: where the effect was put, the rate, Bradley's verdict."""
    a = res.scenario.alpha
    row = _row(setting, res, name, s)
    m = math.sqrt(a * (1 - a) / s["n_ok"]) if s["n_ok"] else math.nan
    out = dict(setting)
    out.update({"analysis": name, "null_at": point.null_at, "null_effect": point.effect, "alpha": a,
                "type1_error": s["power"]})
    out.update({k: row[k] for k in ("mcse", "ci_low", "ci_high", "reps", "n_ok", "failures", "failure_causes")})
    out.update({"analytic_type1": s.get("analytic_power"), "bradley_low": 0.5 * a, "bradley_high": 1.5 * a,
                "meets_bradley": bool(s["n_ok"] and bradley_liberal(s["power"], a)),
                "distance_mcse": (s["power"] - a) / m if s["n_ok"] else math.nan,
                "path": row["path"], "seconds": row["seconds"]})
    return out


# -- the [sweep] and [null_check] blocks of a scenario file -------------------------
def _values_from_toml(name, v):
    if isinstance(v, dict):
        return range_from_table(name, v)
    if isinstance(v, list):
        if not v:
            raise ParameterError(f"the grid is empty: `{name}` has no values.")
        return v
    return [v]


def grid_from_block(block: Mapping[str, Any]) -> Grid | None:
    """The grid of a ``[sweep]`` block: ``[sweep.vary]`` (crossed) and ``[[sweep.together]]`` (zipped sets)."""
    axes = Grid()
    vary = block.get("vary")
    if vary is not None:
        if not isinstance(vary, dict):
            raise ParameterError("[sweep].vary must be a table of parameter = values.")
        axes = axes * Grid.cross(**{k: _values_from_toml(k, v) for k, v in vary.items()})
    together = block.get("together")
    if together is not None:
        groups = together if isinstance(together, list) else [together]
        for g in groups:
            if not isinstance(g, dict) or not g:
                raise ParameterError("each [[sweep.together]] must be a table of parameter = [values] (equal lengths).")
            axes = axes * Grid.together(**{k: _values_from_toml(k, v) for k, v in g.items()})
    return axes if axes.axes else None



def grid_to_data(grid: Grid) -> list[dict[str, Any]]:
    """The grid as data: one table per axis, parameter -> a list of values or a range table
    ``{from, to, step | count, scale}`` (several parameters in one table vary together).

    :func:`grid_from_data` rebuilds the same grid (same axes, same order, same points).
    """
    from ..components import to_plain

    def values(v):
        if isinstance(v, Range):
            out = {"from": v.start, "to": v.stop}
            out.update({"step": v.step} if v.step is not None else {"count": v.count, "scale": v.scale})
            return out
        return [to_plain(x) for x in v]

    return [{n: values(vals[n] if isinstance(vals, dict) else vals) for n in names} for names, vals in grid.axes]


def grid_from_data(data: Any, where: str = "sweep.grid") -> Grid:
    """The :class:`Grid` of :func:`grid_to_data`'s tables, each checked (a list of values or a range table)."""
    if not isinstance(data, list) or not data:
        raise ParameterError(f"`{where}` must be a non-empty list of axes (tables of parameter = values).")
    axes = []
    for i, axis in enumerate(data):
        if not isinstance(axis, dict) or not axis or not all(isinstance(k, str) for k in axis):
            raise ParameterError(f"`{where}[{i}]` must be a table of parameter = values.")
        for k, v in axis.items():
            if not isinstance(v, (list, dict)):
                raise ParameterError(f"`{where}[{i}].{k}` must be a list of values or a range table; got {v!r}.")
        vals = {k: _values_from_toml(k, v) for k, v in axis.items()}
        axes.append((tuple(vals), vals) if len(vals) > 1 else ((next(iter(vals)),), next(iter(vals.values()))))
    return Grid(axes)


def parse_axis(text: str) -> tuple[str, Any]:
    """A command-line axis ``name=values``: ``40,60,80`` (a list), ``20:100:10`` (from:to:step),
    ``20:100/5`` (5 evenly spaced values), ``10:1000//7`` (7 log-spaced values)."""
    from ..scenario_files import parse_assignment

    name, sep, spec = text.partition("=")
    name, spec = name.strip(), spec.strip()
    if not sep or not name:
        raise ParameterError(f"`{text}` must look like name=values (e.g. n=40,60,80 or n=20:100:10).")
    if not spec:
        raise ParameterError(f"the grid is empty: `{name}` has no values.")

    def num(s):
        v = parse_assignment(f"v={s}")[1]
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            raise ParameterError(f"`{name}`: range ends and steps must be numbers; got {s!r}.")
        return v

    if ":" in spec and "," not in spec:
        return name, _range_spec(name, spec, num)
    return name, [parse_assignment(f"v={p.strip()}")[1] for p in spec.split(",") if p.strip()]


def _range_spec(name: str, spec: str, num) -> Range:
    """The :class:`Range` of a command-line ``from:to:step``, ``from:to/count`` or ``from:to//count``."""
    forms = "a range is from:to:step, from:to/count or from:to//count"
    head, slash, count = spec.partition("/")
    log = count.startswith("/")
    parts = head.split(":")
    if len(parts) != (2 if slash else 3):
        raise ParameterError(f"`{name}={spec}`: {forms}.")
    start, stop = num(parts[0]), num(parts[1])
    if stop < start:
        tail = f"/{count}" if slash else f":{parts[2].strip()}"
        raise ParameterError(f"`{name}={spec}`: the range is empty (it descends from {start:g} to {stop:g}); "
                             f"from must not exceed to, e.g. {name}={parts[1].strip()}:{parts[0].strip()}{tail}.")
    step = None if slash else num(parts[2])
    try:
        if slash:
            return Range(start, stop, count=int(count.lstrip("/")), scale="log" if log else "linear")
        return Range(start, stop, step=step)
    except ParameterError as exc:   # e.g. step <= 0, count < 1, log range through 0
        raise ParameterError(f"`{name}={spec}`: {exc}") from None
    except ValueError:              # a count that is not an integer
        raise ParameterError(f"`{name}={spec}`: {forms}; the count must be an integer.") from None


def parse_together(text: str) -> Grid:
    """A command-line zipped set ``a=1,2,3;b=4,5,6``."""
    parts = [p for p in text.split(";") if p.strip()]
    if not parts:
        raise ParameterError("the grid is empty: `--together` needs name=values;name=values.")
    return Grid.together(**dict(parse_axis(p) for p in parts))
