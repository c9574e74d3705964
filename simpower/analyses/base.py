"""The analysis contract and its result.

An analysis is any callable ``data -> p-value`` or ``data -> result`` where the
result has a ``pvalue`` and optionally ``estimate``, ``se``, ``ci_low``,
``ci_high`` (attributes or mapping keys).  :func:`as_test_result` turns any of
these into a :class:`TestResult`.

Built-in analyses are :class:`Analysis` objects; those with a batch path
implement :meth:`Analysis.batch`, which takes a
:class:`~simpower.processes.base.Batch` and returns a dict of arrays
(``pvalue`` required; ``estimate``, ``se``, ``ci_low``, ``ci_high`` optional),
equal to applying the analysis replicate by replicate.
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .._validation import Choice, Real
from ..components import Component

FIELDS = ("pvalue", "estimate", "se", "ci_low", "ci_high")

#: warning categories that are not fit trouble (library housekeeping); any other warning an
#: analysis raises is recorded per replicate as ``warning:<Type>``
IGNORED_WARNINGS = (DeprecationWarning, PendingDeprecationWarning, FutureWarning, ImportWarning, ResourceWarning)

ALTERNATIVE = Choice(("two-sided", "greater", "less"))


@dataclass
class TestResult:
    """Outcome of one analysis on one data set."""

    pvalue: float
    estimate: float = math.nan
    se: float = math.nan
    ci_low: float = math.nan
    ci_high: float = math.nan
    statistic: float = math.nan
    df: float = math.nan
    #: several hypotheses in one analysis (adjusted p-values), with their names
    pvalues: np.ndarray | None = None
    names: tuple[str, ...] = field(default_factory=tuple)

    __test__ = False  # not a pytest class

    def confidence_interval(self) -> tuple[float, float]:
        return (self.ci_low, self.ci_high)


@dataclass(frozen=True)
class NullBoundary:
    """Where an analysis's H0 meets its H1: the estimand's value there, and what that value is.

    The type I error check (:func:`simpower.sweep.null_check`) sets the
    process's effect so that its true effect equals ``value`` (in the units of
    what the analysis estimates), and shows ``label`` beside the rate.
    """

    value: float
    #: what the value is, in words: "upper equivalence margin", "`null_mean`", ...
    label: str


def _num(x: Any, field: str = "") -> float:
    if x is None:
        return math.nan
    if field and np.ndim(x) > 0 and np.size(x) != 1:
        raise TypeError(f"the analysis returned `{field}` of shape {np.shape(x)}; return one number per data set")
    try:
        return float(x)
    except (TypeError, ValueError):
        return math.nan


def as_test_result(obj: Any) -> TestResult:
    """Coerce what an analysis returned into a :class:`TestResult`.

    Accepts a number (the p-value), a mapping, or an object with attributes
    (``pvalue`` or ``p_value``; scipy result objects qualify).  Raises
    ``TypeError`` when no p-value can be found, or when a field holds several
    numbers (an array where one number belongs).
    """
    if isinstance(obj, TestResult):
        return obj
    if isinstance(obj, (numbers.Real, np.floating, np.integer)) and not isinstance(obj, bool):
        return TestResult(pvalue=float(obj))
    get = obj.get if isinstance(obj, dict) else (lambda k, d=None: getattr(obj, k, d))
    p = get("pvalue", None)
    if p is None:
        p = get("p_value", None)
    if p is None:
        raise TypeError(
            f"the analysis returned {type(obj).__name__}; return a p-value, or a dict/object with 'pvalue'"
        )
    ci = get("ci", None)
    lo, hi = (ci if ci is not None else (get("ci_low", None), get("ci_high", None)))
    pvals = get("pvalues", None)
    return TestResult(
        pvalue=_num(p, "pvalue"),
        estimate=_num(get("estimate", None), "estimate"),
        se=_num(get("se", None), "se"),
        ci_low=_num(lo, "ci_low"),
        ci_high=_num(hi, "ci_high"),
        statistic=_num(get("statistic", None)),
        df=_num(get("df", None)),
        pvalues=None if pvals is None else np.asarray(pvals, dtype=float),
        names=tuple(get("names", None) or ()),
    )


class Analysis(Component):
    """Base class of built-in analyses."""

    kind = "analysis"
    #: one sentence stating the null hypothesis, shown in reports
    null_hypothesis: str = ""
    #: what ``estimate`` estimates, e.g. "mean difference", "log hazard ratio"; None means
    #: "the process's estimand" (bias and coverage are then computed against its true effect)
    estimand_label: str | None = None

    def __call__(self, data) -> TestResult:  # pragma: no cover - abstract
        raise NotImplementedError

    def batch(self, batch) -> dict[str, np.ndarray] | None:
        """Statistics for all replicates of a batch, or None if there is no batch path."""
        return None

    @property
    def has_batch(self) -> bool:
        return type(self).batch is not Analysis.batch

    def supports_batch(self, batch) -> bool:
        """Whether :meth:`batch` can handle this particular batch (layout checks)."""
        return self.has_batch

    #: whether :meth:`analytic_power` is exact (the cross-check flag then means something is wrong)
    #: or an approximation (Welch's Satterthwaite df, normal approximations, Schoenfeld): then a
    #: distance beyond 3 MCSE says how far the approximation is off, and is not flagged
    analytic_exact: bool = True

    def analytic_power(self, process, alpha: float) -> float | None:
        """Closed-form power of this analysis for ``process``, where the analytic core covers it."""
        return None

    #: parameters that hold the estimand's value under a point H0 (t-tests' ``null_mean``, the rank,
    #: permutation, bootstrap and regression analyses' ``null_value``) with the value meaning "no effect"
    NULL_PARAMS = (("null_mean", 0.0), ("null_value", 0.0), ("null_ratio", 1.0))

    def null_boundary(self) -> NullBoundary | None:
        """The estimand's value on the boundary of H0, where the type I error is checked.

        None means H0 is "no effect": the check then uses the process's own
        null (:meth:`Process.null`: effect 0, or ratio 1). The default reads
        :data:`NULL_PARAMS` (a test of H0: mean difference = 0.3 is checked at
        0.3); analyses with a composite H0 (equivalence, non-inferiority)
        override it with their margin.
        """
        declared = getattr(self, "params", {}) or {}
        for name, none in self.NULL_PARAMS:
            if name in declared:
                v = getattr(self, name, None)
                if v is not None and float(v) != none:
                    return NullBoundary(float(v), f"`{name}`")
        return None


#: shared parameter declarations
ALPHA = Real(0.0, 1.0, low_open=True, high_open=True)
CI_LEVEL = Real(0.0, 1.0, low_open=True, high_open=True)
