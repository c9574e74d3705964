"""The result of a sweep: its table, with the answer to the question a sweep asks.

:func:`simpower.sweep` returns a :class:`SweepResult`, a :class:`pandas.DataFrame`
(one row per grid point and analysis, as before) with methods:

* :meth:`SweepResult.required` -- per curve (analysis x the other swept
  parameters), the size that reaches a target power, interpolated between the
  grid values around the crossing, with the interval where the curve's 95%
  Wilson band crosses the target;
* :meth:`SweepResult.answer` -- the answer block (see :mod:`simpower.answer`);
* :meth:`SweepResult.plot` -- power against the swept size with the target
  line and the required size per curve marked;
* ``_repr_html_`` -- the answer block and the table in a notebook.

Derived frames (a column selection, a filter) are plain DataFrames.

Interpolation: between the last grid value below the target and the first at
or above it, power is taken as linear in the swept value (common practice for
reading a required size off a tabulated power curve); the grid's spacing
bounds the precision, and a search (:func:`simpower.required_n`) gives the
value itself.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd


def _crossing(xs: np.ndarray, ys: np.ndarray, target: float) -> float:
    """The first x at which the piecewise-linear curve (xs, ys) reaches ``target``; nan if it never does,
    ``xs[0]`` if it is already there at the first point."""
    ok = np.flatnonzero(ys >= target)
    if not len(ok):
        return math.nan
    j = int(ok[0])
    if j == 0:
        return float(xs[0])
    x0, x1, y0, y1 = xs[j - 1], xs[j], ys[j - 1], ys[j]
    return float(x0 + (target - y0) * (x1 - x0) / (y1 - y0)) if y1 > y0 else float(x1)


def required_by_curve(table: pd.DataFrame, x: str, target: float, analysis: str | None = None) -> pd.DataFrame:
    """Per curve of a sweep (analysis x the other swept parameters): the ``x`` that reaches ``target`` power.

    Columns: ``analysis``, the other grid parameters, ``smallest_on_grid``
    (the smallest grid value of ``x`` whose power reaches the target; nan if
    none), ``interpolated`` (linear between the grid values around the
    crossing), ``low`` and ``high`` (where the 95% Wilson band's upper and
    lower edges reach the target: the interval of the interpolated value; nan
    where the band does not cross within the grid), ``note``.
    """
    if x not in table.columns:
        raise KeyError(f"`{x}` is not a column of the sweep table")
    if not 0 < target < 1:
        raise ValueError(f"`target` must be in (0, 1); got {target!r}")
    grid = [c for c in table.attrs.get("grid", []) if c in table.columns and c != x]
    part = table if analysis is None else table[table["analysis"] == analysis]
    rows = []
    for key, g in part.groupby(["analysis"] + grid, sort=False, dropna=False):
        key = key if isinstance(key, tuple) else (key,)
        g = g.sort_values(x)
        xs = g[x].to_numpy(float)
        p = g["power"].to_numpy(float)
        row: dict[str, Any] = dict(zip(["analysis"] + grid, key))
        reach = np.flatnonzero(p >= target)
        row["smallest_on_grid"] = float(xs[reach[0]]) if len(reach) else math.nan
        row["interpolated"] = _crossing(xs, p, target)
        row["low"] = _crossing(xs, g["ci_high"].to_numpy(float), target)
        row["high"] = _crossing(xs, g["ci_low"].to_numpy(float), target)
        if not len(reach):
            row["note"] = f"not reached in the grid (best power {np.nanmax(p):.2f} at {x} = {xs[np.nanargmax(p)]:g})"
        elif reach[0] == 0:
            row["note"] = "reached already at the smallest grid value"
        elif math.isnan(row["high"]):
            row["note"] = "the band's lower edge does not reach the target in the grid: the upper bound is open"
        else:
            row["note"] = ""
        rows.append(row)
    out = pd.DataFrame(rows)
    out.attrs.update({"x": x, "target": target})
    return out


class SweepResult(pd.DataFrame):
    """A sweep's table (one row per grid point and analysis) that also answers the sweep's question."""

    _metadata = ["_scenario"]

    @property
    def _constructor(self):
        return pd.DataFrame

    @classmethod
    def of(cls, table: pd.DataFrame, scenario=None) -> "SweepResult":
        out = cls(table)
        out.attrs.update(table.attrs)
        object.__setattr__(out, "_scenario", scenario)
        return out

    @property
    def scenario(self):
        """The swept scenario (its values before the grid's)."""
        return getattr(self, "_scenario", None)

    @property
    def grid(self) -> list[str]:
        """The swept parameters, in grid order."""
        return [c for c in self.attrs.get("grid", []) if c in self.columns]

    def _x(self, x: str | None) -> str:
        if x is not None:
            return x
        sc = self.scenario
        size = getattr(getattr(sc, "process", None), "size_param", None)
        if size in self.grid:
            return size
        numeric = [g for g in self.grid if pd.api.types.is_numeric_dtype(self[g])]
        if not numeric:
            raise ValueError("the sweep has no numeric swept parameter to read a size off; give `x`")
        return numeric[0]

    def required(self, target: float = 0.8, x: str | None = None, analysis: str | None = None) -> pd.DataFrame:
        """Per curve, the swept size ``x`` (default the process's size parameter) that reaches ``target`` power.

        See :func:`required_by_curve`.
        """
        return required_by_curve(pd.DataFrame(self), self._x(x), target, analysis)

    def answer(self, target: float | None = None, x: str | None = None, analysis: str | None = None):
        """The answer block (:class:`~simpower.answer.AnswerBlock`)."""
        from ..answer import sweep_block

        return sweep_block(pd.DataFrame(self).__finalize__(self), self.scenario, target=target,
                           x=self._x(x) if self.grid else None, analysis=analysis)

    def plot(self, x: str | None = None, target: float | None = None, stem=None, labels=None, title: str = ""):
        """Power against ``x`` (bands: 95% Wilson), the ``target`` line and each curve's required size.

        ``stem`` writes ``stem.png`` and ``stem.svg``; ``labels`` maps parameter names to axis words
        (see :func:`simpower.report.plots.axis_label`). Returns the matplotlib Figure.
        """
        from ..report import plots

        x = self._x(x)
        table = pd.DataFrame(self).__finalize__(self)
        per_curve = required_by_curve(table, x, target) if target is not None else None
        fig = plots.power_curve(table, x, target=target, labels=labels, title=title, per_curve=per_curve)
        if stem is not None:
            plots.save(fig, stem)
        return fig

    def _repr_html_(self) -> str:
        from ..labels import frame_html, readable

        head = ""
        if self.scenario is not None:
            try:
                head = self.answer().html()
            except Exception:  # noqa: BLE001 - the table still shows
                head = ""
        shown = readable(pd.DataFrame(self), "power", tuple(self.grid + [c for c in (
            "analysis", "power", "mcse", "ci_low", "ci_high", "analytic_power", "reps") if c in self.columns]))
        return head + frame_html(shown, "Power at each grid point")
