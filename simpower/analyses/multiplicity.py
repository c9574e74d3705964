"""Several hypotheses in one analysis, with a multiplicity adjustment.

:class:`Multiple` runs component analyses over every combination of

* ``tests``: analyses (objects or ``{type = ...}`` tables),
* ``endpoints``: outcome columns (each becomes ``y`` for the component; by
  default the data go to the components as they are, so a time-to-event
  table with ``time`` and ``event`` and no ``y`` can be wrapped too),
* ``comparisons``: the data as given, each arm against the control (arm 0), or
  all pairs of arms (each pair relabelled 0/1 for the component),

adjusts their p-values as ``statsmodels.stats.multitest.multipletests`` does
(vectorised here, :func:`adjust`; equal to it in the tests), and
returns the adjusted ``pvalues`` with their ``names``. The primary p-value is
the smallest adjusted one, so the primary power is the power to reject at
least one hypothesis (for FWER methods: disjunctive power); the run result
also reports per-hypothesis, "any" and "all" power.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np

from .._validation import Anything, Choice
from ..errors import ParameterError
from ..registry import build, wrap_callable
from .base import Analysis, BatchResult, TestResult, as_batch_result, as_test_result

#: our method names -> statsmodels' names
METHODS = {"holm": "holm", "bonferroni": "bonferroni", "hochberg": "simes-hochberg", "hommel": "hommel",
           "sidak": "sidak", "holm-sidak": "holm-sidak", "fdr_bh": "fdr_bh", "none": None}


@dataclass(frozen=True)
class AnalysisList(Anything):
    """A non-empty list of analyses (objects, spec tables, or functions data -> p-value)."""

    optional: bool = False

    def describe(self) -> str:
        return "a list of analyses (objects or {type = ...} tables)"

    def clean(self, name, value):
        if isinstance(value, (Analysis, dict)) or value is None or not hasattr(value, "__iter__"):
            raise ParameterError(f"`{name}` must be {self.describe()}; got {value!r}.")
        out = []
        for i, item in enumerate(value):
            if isinstance(item, dict):
                item = build("analysis", item, where=f"{name}[{i}]")
            elif not isinstance(item, Analysis):
                if not callable(item):
                    raise ParameterError(f"`{name}[{i}]` must be an analysis or a {{type = ...}} table; got {item!r}.")
                item = wrap_callable("analysis", item)
            if isinstance(item, Multiple):
                raise ParameterError(f"`{name}[{i}]` is itself a `multiple` analysis; list its tests instead.")
            out.append(item)
        if not out:
            raise ParameterError(f"`{name}` is empty: give at least one analysis.")
        return out


@dataclass(frozen=True)
class ColumnList(Anything):
    """A non-empty list of distinct column names, or None."""

    optional: bool = True

    def describe(self) -> str:
        return "a list of outcome column names"

    def clean(self, name, value):
        if value is None:
            return None
        if isinstance(value, str) or not hasattr(value, "__iter__"):
            raise ParameterError(f"`{name}` must be {self.describe()}, e.g. [\"y\", \"y2\"]; got {value!r}.")
        cols = list(value)
        if not cols or not all(isinstance(c, str) and c for c in cols):
            raise ParameterError(f"`{name}` must be {self.describe()}, e.g. [\"y\", \"y2\"]; got {value!r}.")
        if len(set(cols)) != len(cols):
            raise ParameterError(f"`{name}` lists a column twice: {cols}.")
        return cols


def adjust(pvalues: np.ndarray, method: str) -> np.ndarray:
    """Adjusted p-values of each row of ``pvalues`` (R, m), vectorised.

    Same values as ``multipletests(row, method=METHODS[method])[1]`` (checked
    in the tests); a row with a non-finite p-value gives a row of NaN. Both
    paths use this function rather than calling multipletests per replicate:
    statsmodels' Holm branch runs ``gc.collect()`` on every call (some 10-20 ms
    each), which would dominate a simulation.
    """
    p = np.asarray(pvalues, float)
    r, m = p.shape
    bad = ~np.all(np.isfinite(p), axis=1)
    p = np.where(bad[:, None], 0.5, p)
    if method == "none":
        out = p.copy()
    elif method == "bonferroni":
        out = np.minimum(p * m, 1.0)
    elif method == "sidak":
        out = -np.expm1(m * np.log1p(-p))
    elif method == "hommel":
        from statsmodels.stats.multitest import multipletests

        out = np.array([multipletests(row, method="hommel")[1] for row in p])
    else:
        order = np.argsort(p, axis=1, kind="stable")
        s = np.take_along_axis(p, order, axis=1)
        i = np.arange(m)
        if method == "holm":
            adj = np.maximum.accumulate(s * (m - i), axis=1)
        elif method == "holm-sidak":
            adj = np.maximum.accumulate(-np.expm1((m - i) * np.log1p(-s)), axis=1)
        elif method == "hochberg":
            adj = np.minimum.accumulate((s * (m - i))[:, ::-1], axis=1)[:, ::-1]
        elif method == "fdr_bh":
            adj = np.minimum.accumulate((s * m / (i + 1))[:, ::-1], axis=1)[:, ::-1]
        else:  # pragma: no cover - guarded by the Choice constraint
            raise ValueError(method)
        out = np.empty_like(adj)
        np.put_along_axis(out, order, np.minimum(adj, 1.0), axis=1)
    out[bad] = np.nan
    return out


def _arm_pairs(levels, comparisons):
    levels = sorted(int(v) for v in levels)
    if comparisons == "single":
        return [None]
    if 0 not in levels or len(levels) < 2:
        raise ValueError(f"comparisons = {comparisons!r} needs arm 0 (control) and another arm; got arms {levels}")
    if comparisons == "each_vs_control":
        return [(0, j) for j in levels if j != 0]
    return list(itertools.combinations(levels, 2))


def _subset(table: dict, endpoint: str, pair):
    """Component input: ``endpoint`` as ``y`` (None: the data as they are), and only arms ``pair`` relabelled 0/1."""
    if endpoint is not None and endpoint not in table:
        raise ValueError(f"endpoint column {endpoint!r} not in the data (columns: {sorted(table)})")
    out = dict(table)
    if endpoint is not None:
        out["y"] = table[endpoint]
    if pair is None:
        return out
    arm = np.asarray(table["arm"])
    keep = (arm == pair[0]) | (arm == pair[1])
    n = arm.size
    out = {k: (np.asarray(v)[keep] if np.ndim(v) == 1 and len(v) == n else v) for k, v in out.items()}
    out["arm"] = (out["arm"] == pair[1]).astype(arm.dtype)
    return out


class Multiple(Analysis):
    """Several hypotheses with a multiplicity adjustment (per-hypothesis, any and all power).

    H0 (each hypothesis): that of its component analysis, on its endpoint and
    arm comparison. The primary p-value is the smallest adjusted p-value:
    it rejects when at least one hypothesis is rejected.

    Parameters
    ----------
    tests : list of analyses
        Component analyses (objects, ``{type = "...", ...}`` tables, or
        functions ``data -> p-value | result``).
    endpoints : list of str, optional
        Outcome columns to test; each is passed to the components as ``y``.
        Default: the data as they are (the components read ``y``, or
        ``time`` and ``event`` for a survival analysis).
    comparisons : {'single', 'each_vs_control', 'all_pairs'}, default 'single'
        'single' passes the data unchanged; 'each_vs_control' tests each arm
        1, 2, ... against arm 0; 'all_pairs' every pair of arms (i < j, arm j
        relabelled 1).
    method : {'holm', 'bonferroni', 'hochberg', 'hommel', 'sidak', 'holm-sidak', 'fdr_bh', 'none'}
        Adjustment (statsmodels' multipletests; 'hochberg' is its
        'simes-hochberg'), default 'holm' (Holm 1979, Scand J Stat 6:65-70).

    Hypotheses are ordered test, then endpoint, then comparison, and named by
    the parts that vary (e.g. ``"welch_t:y2:2-0"``). The estimate, SE and CI
    are those of the first hypothesis, unadjusted.
    """

    name = "multiple"
    null_hypothesis = "each component null hypothesis (the primary p-value rejects if any adjusted one does)"
    params = {"tests": AnalysisList(), "endpoints": ColumnList(),
              "comparisons": Choice(("single", "each_vs_control", "all_pairs")), "method": Choice(tuple(METHODS))}
    defaults = {"endpoints": None, "comparisons": "single", "method": "holm"}

    @property
    def estimand_label(self) -> str | None:
        """That of the first test (its estimate is reported)."""
        return getattr(self.tests[0], "estimand_label", None)

    # -- plan ------------------------------------------------------------
    @property
    def _endpoints(self):
        """The endpoint columns; ``[None]`` (the data as they are) when none is given."""
        return self.endpoints or [None]

    def _labels(self):
        names = [t.name or getattr(t, "label", "analysis") for t in self.tests]
        out, seen = [], {}
        for n in names:
            seen[n] = seen.get(n, 0) + 1
            out.append(n if seen[n] == 1 else f"{n}_{seen[n]}")
        return out

    def _plan(self, levels):
        pairs = _arm_pairs(levels, self.comparisons) if self.comparisons != "single" else [None]
        labels = self._labels()
        plan = []
        for (label, test), endpoint, pair in itertools.product(zip(labels, self.tests), self._endpoints, pairs):
            parts = []
            if len(self.tests) > 1:
                parts.append(label)
            if len(self._endpoints) > 1:
                parts.append(endpoint)
            if pair is not None and len(pairs) > 1 or (pair is not None and not parts):
                parts.append(f"{pair[1]}-{pair[0]}")
            plan.append((":".join(parts) or label, test, endpoint, pair))
        return plan

    def _levels(self, arm):
        if self.comparisons == "single":
            return []
        if arm is None:
            raise ValueError(f"comparisons = {self.comparisons!r} needs an 'arm' column")
        return np.unique(np.asarray(arm)).tolist()

    # -- per replicate -------------------------------------------------------
    def __call__(self, data):
        plan = self._plan(self._levels(data.get("arm") if hasattr(data, "get") else data["arm"]))
        results = [as_test_result(test(_subset(data, endpoint, pair))) for _, test, endpoint, pair in plan]
        adj = adjust(np.array([[r.pvalue for r in results]], float), self.method)[0]
        first = results[0]
        return TestResult(pvalue=float(np.min(adj)) if np.all(np.isfinite(adj)) else math.nan,
                          estimate=first.estimate, se=first.se, ci_low=first.ci_low, ci_high=first.ci_high,
                          pvalues=adj, names=tuple(name for name, *_ in plan))

    # -- batch -----------------------------------------------------------------
    def _sub_batches(self, batch):
        """[(name, test, sub-batch)] or None when a part cannot be sliced for all replicates alike."""
        if self.comparisons != "single" and "arm" not in batch.shared:
            return None
        for e in self._endpoints:
            if e is not None and e not in batch.per_rep:
                return None
        arm = batch.shared.get("arm")
        plan = self._plan(self._levels(arm) if self.comparisons != "single" else [])
        out = []
        for name, test, endpoint, pair in plan:
            out.append((name, test, _sub_batch(batch, endpoint, pair)))
        return out

    def supports_batch(self, batch):
        try:
            subs = self._sub_batches(batch)
        except ValueError:
            return False
        return subs is not None and all(t.has_batch and t.supports_batch(b) for _, t, b in subs)

    def batch(self, batch):
        subs = self._sub_batches(batch)
        outs = [as_batch_result(t.batch(b)) for _, t, b in subs]
        raw = np.column_stack([np.broadcast_to(np.asarray(o.pvalue, float), (batch.size,)) for o in outs])
        adj = adjust(raw, self.method)
        first = outs[0]
        res = BatchResult(pvalue=np.min(adj, axis=1), pvalues=adj, names=tuple(n for n, *_ in subs),
                          estimate=first.estimate, se=first.se, ci_low=first.ci_low, ci_high=first.ci_high)
        for o in outs:
            for cause, mask in o.trouble.items():
                res.trouble[cause] = res.trouble.get(cause, False) | np.asarray(mask, bool)
                res.trouble_messages.setdefault(cause, o.trouble_messages.get(cause, ""))
        return res


def _sub_batch(batch, endpoint, pair):
    """A batch of the same type with ``endpoint`` as ``y`` (None: as it is) and only arms ``pair`` (relabelled 0/1)."""
    per_rep = dict(batch.per_rep)
    if endpoint is not None:
        per_rep["y"] = batch.per_rep[endpoint]
    shared = dict(batch.shared)
    info = dict(batch.info)
    if pair is not None:
        arm = batch.shared["arm"]
        cols = np.flatnonzero((arm == pair[0]) | (arm == pair[1]))
        n = arm.size
        per_rep = {k: (v[:, cols] if v.ndim == 2 and v.shape[1] == n else v) for k, v in per_rep.items()}
        shared = {k: (v[cols] if v.ndim == 1 and v.size == n else v) for k, v in shared.items()}
        shared["arm"] = (arm[cols] == pair[1]).astype(arm.dtype)
        if "n0" in info or "n1" in info:
            info["n0"] = int(np.count_nonzero(shared["arm"] == 0))
            info["n1"] = int(np.count_nonzero(shared["arm"] == 1))
    return type(batch)(batch.size, per_rep, shared, info)
