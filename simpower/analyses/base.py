"""The analysis contract and its result.

An analysis is any callable ``data -> p-value`` or ``data -> result`` where the
result has a ``pvalue`` and optionally ``estimate``, ``se``, ``ci_low``,
``ci_high`` (attributes or mapping keys).  :func:`as_test_result` turns any of
these into a :class:`TestResult`.

Built-in analyses are :class:`Analysis` objects; those with a batch path
declare the layouts they handle (``layouts``, see :mod:`simpower.batch`) and
implement :meth:`Analysis.batch`, which takes a :class:`~simpower.batch.Batch`
and returns a :class:`BatchResult` (a dict with the same keys is accepted too),
equal to applying the analysis replicate by replicate.
"""

from __future__ import annotations

import math
import numbers
import threading
import warnings
from collections.abc import Mapping
from contextlib import contextmanager
from dataclasses import dataclass, field, fields
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

    The type I error check (:func:`simpower.planning.sweep.null_check`) sets the
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


def result_from_fields(out: Mapping) -> TestResult:
    """A :class:`TestResult` from a mapping of scalar fields (``pvalue``, ``estimate``, ...)."""
    return TestResult(**{k: float(v) for k, v in out.items()})


# -- the batch result ------------------------------------------------------------------------
@dataclass(eq=False)
class BatchResult(Mapping):
    """What a batch path returns: the fields of every replicate of a batch, arrays of shape (R,).

    Attributes
    ----------
    pvalue : ndarray (R,)
        The primary p-value (NaN where none could be computed: the engine then
        records ``nonfinite_pvalue`` unless ``trouble`` names a cause).
    estimate, se, ci_low, ci_high : ndarray (R,) or None
        None when the analysis has no such field (recorded as NaN).
    pvalues : ndarray (R, k) or None
        Several hypotheses in one analysis: the adjusted p-values, with their ``names``.
    names : tuple of str
    trouble : dict cause -> ndarray (R,) of bool
        Replicates the engine must record as failed, by cause: ``"error:<Type>"``
        (the per-replicate path would raise that exception) or
        ``"warning:<Type>"`` (it would warn: fit trouble, judged by the run's
        policy). Causes are numbered in the order of this dict. A replicate
        marked here keeps the values given above (an error's are usually NaN).
    trouble_messages : dict cause -> str
        One message per cause, shown in the failure summary.

    It reads as a mapping of its fields that are set (``res["pvalue"]``,
    ``"pvalues" in res``, ``res.get("trouble")``), like the dicts batch paths
    returned before; :func:`as_batch_result` turns such a dict into one.
    """

    pvalue: np.ndarray
    estimate: np.ndarray | None = None
    se: np.ndarray | None = None
    ci_low: np.ndarray | None = None
    ci_high: np.ndarray | None = None
    pvalues: np.ndarray | None = None
    names: tuple[str, ...] = ()
    trouble: dict[str, np.ndarray] = field(default_factory=dict)
    trouble_messages: dict[str, str] = field(default_factory=dict)

    __test__ = False  # not a pytest class

    def _set(self):
        for f in fields(self):
            v = getattr(self, f.name)
            if v is None or (f.name in ("names", "trouble", "trouble_messages") and not v):
                continue
            yield f.name, v

    def __getitem__(self, key: str):
        for k, v in self._set():
            if k == key:
                return v
        raise KeyError(key)

    def __iter__(self):
        return (k for k, _ in self._set())

    def __len__(self) -> int:
        return sum(1 for _ in self._set())

    def mark(self, cause: str, mask, message: str = "") -> None:
        """Add replicates ``mask`` to the trouble of ``cause`` (the first message of a cause is kept)."""
        mask = np.asarray(mask, bool)
        self.trouble[cause] = self.trouble[cause] | mask if cause in self.trouble else mask
        self.trouble_messages.setdefault(cause, message[:500])


_BATCH_KEYS = tuple(f.name for f in fields(BatchResult))


def as_batch_result(obj: Any) -> BatchResult:
    """A :class:`BatchResult` from what a batch path returned (a BatchResult, or a mapping with ``pvalue``).

    Keys other than the fields of :class:`BatchResult` are ignored.
    """
    if isinstance(obj, BatchResult):
        return obj
    if not isinstance(obj, Mapping) or "pvalue" not in obj:
        raise TypeError(f"a batch path returned {type(obj).__name__}; return a BatchResult or a dict with 'pvalue'")
    kw = {k: obj[k] for k in _BATCH_KEYS if k in obj and obj[k] is not None}
    if "names" in kw:
        kw["names"] = tuple(kw["names"])
    for k in ("trouble", "trouble_messages"):
        kw[k] = dict(kw.get(k) or {})
    return BatchResult(**kw)



#: Before Python 3.14 the warning filters and ``catch_warnings``' recorder are process-wide, so two
#: threads recording at once (the threading backend, a dask worker with several threads) lose or swap
#: each other's warnings, and a replicate's ``warning:<Type>`` cause would depend on the executor.
#: Every per-replicate call whose warnings are recorded holds this lock: under threads such calls run
#: one at a time (they hold the GIL most of the time anyway); processes are unaffected.
WARNINGS_LOCK = threading.RLock()


@contextmanager
def recording_warnings():
    """Record every warning raised inside the block (filter "always"), safely under threads."""
    with WARNINGS_LOCK, warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        yield caught


def rowwise(analysis, batch, rows) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray], dict[str, str]]:
    """Run ``analysis`` per replicate on ``rows`` of a batch, the way the engine would.

    Returns the fields of those rows, and trouble masks over the whole batch
    keyed by cause (``error:<Type>``, ``warning:<Type>``: the first warning
    that is not a deprecation-type warning), so a batch path can hand the
    few replicates it cannot compute in closed form to the per-replicate
    path and still agree with it exactly.
    """
    fields_ = {f: np.full(rows.size, np.nan) for f in ("pvalue", "estimate", "se", "ci_low", "ci_high")}
    trouble: dict[str, np.ndarray] = {}
    messages: dict[str, str] = {}

    def mark(cause, i, msg):
        trouble.setdefault(cause, np.zeros(batch.size, bool))[i] = True
        messages.setdefault(cause, msg[:500])

    for j, i in enumerate(rows):
        with recording_warnings() as caught:
            try:
                res = analysis(batch.replicate(int(i)))
            except Exception as exc:
                mark(f"error:{type(exc).__name__}", i, f"{type(exc).__name__}: {exc}")
                continue
        for f in fields_:
            fields_[f][j] = getattr(res, f)
        if not math.isfinite(res.pvalue):
            continue
        for w in caught:
            if not issubclass(w.category, IGNORED_WARNINGS):
                mark(f"warning:{w.category.__name__}", i, str(w.message))
                break
    return fields_, trouble, messages


def hand_over(analysis, batch, res: BatchResult, rows) -> BatchResult:
    """Replace replicates ``rows`` (a boolean mask (R,)) of ``res`` by the per-replicate path's.

    For the few replicates a batch path has no closed form for (too few observed values...):
    their fields and trouble become exactly what :func:`rowwise` gives. ``res`` is changed
    in place and returned.
    """
    rows = np.flatnonzero(np.asarray(rows, bool))
    if rows.size == 0:
        return res
    vals, trouble, messages = rowwise(analysis, batch, rows)
    for f, v in vals.items():
        cur = getattr(res, f)
        if cur is None:
            continue
        cur = np.array(np.broadcast_to(cur, (batch.size,)), float)
        cur[rows] = v
        setattr(res, f, cur)
    for cause, mask in trouble.items():
        res.mark(cause, mask, messages[cause])
    return res


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

    #: the batch layouts (:data:`simpower.batch.LAYOUTS`) the batch path handles, in order of
    #: preference; empty: no declaration (then :meth:`supports_batch` is True whenever there is a
    #: batch path, or the class overrides it)
    layouts: tuple[str, ...] = ()

    def batch(self, batch) -> BatchResult | None:
        """Statistics for all replicates of a batch, or None if there is no batch path."""
        return None

    @property
    def has_batch(self) -> bool:
        return type(self).batch is not Analysis.batch

    def _supports(self, layout) -> bool:
        """Extra conditions on a declared layout (e.g. no missing values); True by default."""
        return True

    def find_layout(self, batch):
        """The first declared layout that ``batch`` has and :meth:`_supports` accepts, or None."""
        for kind in self.layouts:
            layout = batch.layout(kind)
            if layout is not None and self._supports(layout):
                return layout
        return None

    def batch_layout(self, batch):
        """:meth:`find_layout` for a batch path: raises ``ValueError`` when there is none."""
        layout = self.find_layout(batch)
        if layout is None:
            raise ValueError(f"{self.name or type(self).__name__}: no batch path for this batch (it handles the "
                             f"layouts {', '.join(self.layouts) or 'none declared'}; the batch has "
                             f"{', '.join(batch.layouts()) or 'none'})")
        return layout

    def supports_batch(self, batch) -> bool:
        """Whether :meth:`batch` can handle this particular batch: it has a declared layout the analysis accepts."""
        if not self.has_batch:
            return False
        if not self.layouts:
            return True
        return self.find_layout(batch) is not None

    @property
    def analytic_exact(self) -> bool:
        """Whether :meth:`analytic_power` is exact (the cross-check flag then means something is wrong)
        or an approximation (Welch's Satterthwaite df, normal approximations, Schoenfeld): then a
        distance beyond 3 MCSE says how far the approximation is off, and is not flagged.

        Read from the cross-check table (:mod:`simpower.crosscheck`); a subclass that
        overrides :meth:`analytic_power` may set ``analytic_exact = False`` as a class attribute.
        """
        from .. import crosscheck  # here: a worker running a chunk never needs the closed forms

        return crosscheck.is_exact(self)

    def analytic_exact_for(self, process) -> bool:
        """:attr:`analytic_exact` for the closed form ``process`` gets (an analysis may have an exact
        entry for some facts and an approximation for others, e.g. ``cluster_means_t``); a class that
        sets ``analytic_exact`` as an attribute keeps it."""
        if not isinstance(getattr(type(self), "analytic_exact", None), property):
            return bool(self.analytic_exact)
        from .. import crosscheck

        return crosscheck.is_exact(self, process)

    def analytic_power(self, process, alpha: float) -> float | None:
        """Closed-form power of this analysis for ``process``, where the analytic core covers it.

        Looked up in :data:`simpower.crosscheck.TABLE` by this analysis's name and the
        process's :meth:`~simpower.processes.base.Process.facts`; None when no entry covers them.
        """
        from .. import crosscheck

        return crosscheck.power(self, process, alpha)

    def decision_rule(self) -> str | None:
        """How the analysis decides, when it decides by its own rule rather than by p <= alpha.

        None (the default): a replicate rejects H0 when its p-value is at most the
        scenario's alpha. Analyses that return their decision coded as the p-value
        (0 rejects, 1 does not), such as group-sequential designs and Bayesian rules,
        return one phrase naming the rule, and the scenario's description says that
        its alpha does not apply to them.
        """
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
