"""A chunk of replicates as arrays (:class:`Batch`) and its typed layouts.

Processes build a :class:`Batch`: ``per_rep`` arrays with a leading replicate
axis, ``shared`` design columns, scalars in ``info``. Analyses read it through
a *layout*, a typed view computed from it on first use and cached on the batch:

* ``table`` (:class:`TableLayout`): ``y`` per replicate -- the generic long table;
* ``one_sample`` (:class:`OneSampleLayout`): ``y``, no ``arm``;
* ``two_arm`` (:class:`TwoArmLayout`): ``y`` and ``arm`` with labels in {0, 1};
* ``paired`` (:class:`PairedLayout`): two arms in two equal contiguous blocks with the same
  ``pair`` ids in both, no padding;
* ``clustered`` (:class:`ClusteredLayout`): ``y``, ``arm``, ``cluster``;
* ``longitudinal`` (:class:`LongitudinalLayout`): ``y``, ``arm``, ``visit`` (and ``subject``);
* ``survival`` (:class:`SurvivalLayout`): ``time``, ``event``, ``arm`` with labels in {0, 1};
* ``crossover`` (:class:`CrossoverLayout`): a two-period crossover, period 1 in columns ``[0, n)`` and
  period 2 in ``[n, 2n)`` with the same ``subject`` ids, and ``sequence``, ``period``, ``treat``;
* ``stepped`` (:class:`SteppedLayout`): ``y``, ``cluster``, ``period``, ``treat`` (a treatment
  indicator that varies by cluster and period, so not the two-arm ``arm``).

A batch may have several layouts at once (paired data are also two-arm data,
a cluster trial's table is also a two-arm table). Every layout carries the
outcome ``y`` (R, N), the padding mask ``present`` (R, N) or None (rows that
exist; variable sizes are padded to a common width), the observed-value mask
``observed`` (R, N) = finite outcome and present, and ``missing``: whether the
process leaves outcomes missing at all (a missingness mechanism is on, so some
chunk may have them even where this one has none).

This module is a leaf: it imports numpy only, so processes (which build
batches) and analyses (which read them) both import it without importing each
other. A batch must not be changed after a layout has been read from it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

import numpy as np

LAYOUTS = ("table", "one_sample", "two_arm", "paired", "clustered", "longitudinal", "survival", "crossover",
           "stepped")


@dataclass
class Batch:
    """``size`` replicates as arrays.

    ``per_rep`` arrays have a leading replicate axis of length ``size``;
    ``shared`` arrays are the same in every replicate (the design: arm
    labels, cluster ids...).  ``info`` carries scalars of the design (kept for
    compatibility: ``n0``, ``n1``, ``sizes``, ``missing``...; analyses read
    :meth:`layout` instead). Rows where ``per_rep['present']`` is False
    (padding for variable sizes) are dropped from per-replicate slices.
    """

    size: int
    per_rep: dict[str, np.ndarray]
    shared: dict[str, np.ndarray] = field(default_factory=dict)
    info: dict[str, Any] = field(default_factory=dict)
    _layouts: dict[str, Any] = field(default_factory=dict, init=False, repr=False, compare=False)

    def replicate(self, i: int) -> dict[str, np.ndarray]:
        """Replicate ``i`` as a long table (dict of equal-length 1-D arrays)."""
        row = {**self.shared, **{k: v[i] for k, v in self.per_rep.items()}}
        present = row.pop("present", None)
        if present is not None:
            row = {k: v[present] for k, v in row.items()}
        return row

    def __getitem__(self, key: str) -> np.ndarray:
        if key in self.per_rep:
            return self.per_rep[key]
        return self.shared[key]

    def __contains__(self, key: str) -> bool:
        return key in self.per_rep or key in self.shared

    @property
    def present(self) -> np.ndarray | None:
        """Padding mask (R, N), True where a row exists, or None without padding."""
        p = self.per_rep.get("present")
        return None if p is None else np.asarray(p, bool)

    @property
    def missing(self) -> bool:
        """Whether the process leaves outcomes missing (``info['missing']``)."""
        return bool(self.info.get("missing", False))

    def layout(self, kind: str):
        """The layout ``kind`` (one of :data:`LAYOUTS`) of this batch, or None if it does not have it."""
        if kind not in _BUILDERS:
            raise ValueError(f"unknown batch layout {kind!r}; layouts: {', '.join(LAYOUTS)}")
        if kind not in self._layouts:
            self._layouts[kind] = _BUILDERS[kind](self)
        return self._layouts[kind]

    def layouts(self) -> tuple[str, ...]:
        """The kinds of layout this batch has."""
        return tuple(k for k in LAYOUTS if self.layout(k) is not None)


# -- the layouts ------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class Layout:
    """What every layout has. Arrays are views of the batch's, never copies.

    Attributes
    ----------
    y : ndarray (R, N)
        Outcomes (NaN = missing).
    present : ndarray (R, N) of bool, or None
        Padding mask: True where a row exists; None when every row exists.
    missing : bool
        Whether the process leaves outcomes missing at all (a missingness mechanism is on).
    per_rep, shared : dict
        The batch's columns (the same dicts; other columns: :meth:`column`, ``name in layout``).
        A layout holds these, not the batch, so that the batch's cache of its layouts forms no
        reference cycle and a chunk's arrays are freed as soon as the chunk is done.
    """

    kind = ""

    y: np.ndarray
    present: np.ndarray | None
    missing: bool
    per_rep: dict = field(repr=False)
    shared: dict = field(repr=False)

    @property
    def size(self) -> int:
        """Replicates R."""
        return int(self.y.shape[0])

    @property
    def width(self) -> int:
        """Rows per replicate N (padding included)."""
        return int(self.y.shape[1])

    @property
    def complete(self) -> bool:
        """No padding and no missingness mechanism: every row of every replicate is observed."""
        return self.present is None and not self.missing

    @cached_property
    def observed(self) -> np.ndarray:
        """(R, N) bool: the outcome is finite and the row present."""
        ok = np.isfinite(self.y)
        return ok if self.present is None else ok & self.present

    def column(self, name: str) -> np.ndarray | None:
        """Another column of the batch ((R, N) per replicate or (N,) shared), or None."""
        if name in self.per_rep:
            return self.per_rep[name]
        return self.shared.get(name)

    def __contains__(self, name: str) -> bool:
        return name in self.per_rep or name in self.shared


def _labels(arm) -> tuple | None:
    """The arm labels that occur, (0,), (1,) or (0, 1); None when another label occurs."""
    is0, is1 = arm == 0, arm == 1
    if not np.all(is0 | is1):
        return None
    return tuple(label for label, hit in ((0, is0), (1, is1)) if hit.any())


@dataclass(frozen=True, eq=False)
class TableLayout(Layout):
    """Any batch with outcomes ``y``: the generic long table (other columns through :meth:`column`)."""

    kind = "table"


@dataclass(frozen=True, eq=False)
class OneSampleLayout(Layout):
    """One sample: outcomes ``y``, no arms."""

    kind = "one_sample"


@dataclass(frozen=True, eq=False)
class TwoArmLayout(Layout):
    """Two arms: outcomes ``y`` and ``arm`` labels in {0, 1} (control 0).

    Attributes
    ----------
    arm : ndarray (N,) or (R, N)
        Shared when every replicate has the same design.
    labels : tuple
        The arm labels that occur (over all cells, padding included): a subset of (0, 1).
    split : int or None
        When ``arm`` is shared, sorted and has both labels, arm 0 is columns
        ``[0, split)`` and arm 1 columns ``[split, N)`` (see :meth:`arms`); else None.
    """

    kind = "two_arm"

    arm: np.ndarray = None
    labels: tuple = ()
    split: int | None = None

    def arms(self) -> tuple[np.ndarray, np.ndarray] | None:
        """Views ``(y0, y1)``, shapes (R, n0) and (R, n1), when the arms are contiguous blocks."""
        if self.split is None:
            return None
        return self.y[:, : self.split], self.y[:, self.split:]

    @cached_property
    def n0(self) -> np.ndarray:
        """Observed outcomes in arm 0, per replicate (R,)."""
        return np.count_nonzero(self.observed & (self.arm == 0), axis=1)

    @cached_property
    def n1(self) -> np.ndarray:
        """Observed outcomes in arm 1, per replicate (R,)."""
        return np.count_nonzero(self.observed & (self.arm == 1), axis=1)


@dataclass(frozen=True, eq=False)
class PairedLayout(Layout):
    """Pairs: arm 0 in columns ``[0, n)``, arm 1 in ``[n, 2n)``, the same ``pair`` id in column j and n + j.

    ``y0`` and ``y1`` (R, n) are aligned by pair; ``pair`` (n,) are the ids.
    """

    kind = "paired"

    y0: np.ndarray = None
    y1: np.ndarray = None
    pair: np.ndarray = None

    @cached_property
    def pair_observed(self) -> np.ndarray:
        """(R, n) bool: both outcomes of the pair are finite."""
        return np.isfinite(self.y0) & np.isfinite(self.y1)


@dataclass(frozen=True, eq=False)
class ClusteredLayout(Layout):
    """Clusters: ``y``, ``arm`` and ``cluster`` ids ((N,) shared or (R, N) per replicate).

    Per-cluster arrays (R, G) are indexed by cluster code 0..G-1: the ids
    themselves when they are integers in [0, G), else their rank among the
    distinct ids.
    """

    kind = "clustered"

    arm: np.ndarray = None
    cluster: np.ndarray = None

    @cached_property
    def codes(self) -> tuple[np.ndarray, int]:
        """Cluster codes (shape of ``cluster``) and their number G."""
        c = np.asarray(self.cluster)
        if np.issubdtype(c.dtype, np.integer) and c.size and c.min() >= 0:
            return c.astype(np.intp), int(c.max()) + 1
        labels, inv = np.unique(c, return_inverse=True)
        return inv.reshape(c.shape), int(labels.size)

    @property
    def n_clusters(self) -> int:
        """G: the number of cluster codes."""
        return self.codes[1]

    def _per_cluster(self, mask, weights=None) -> np.ndarray:
        codes, g = self.codes
        r, n = self.y.shape
        idx = np.broadcast_to(codes, (r, n)) + g * np.arange(r)[:, None]
        w = None if weights is None else np.broadcast_to(weights, (r, n))[mask]
        return np.bincount(idx[mask], weights=w, minlength=r * g).reshape(r, g)

    @cached_property
    def members(self) -> np.ndarray:
        """(R, G) rows present in each cluster."""
        present = np.ones(self.y.shape, bool) if self.present is None else self.present
        return self._per_cluster(present)

    @cached_property
    def sizes(self) -> np.ndarray:
        """(R, G) observed outcomes in each cluster."""
        return self._per_cluster(self.observed)

    @cached_property
    def arm_sum(self) -> np.ndarray:
        """(R, G) sum of the arm labels of each cluster's present rows."""
        present = np.ones(self.y.shape, bool) if self.present is None else self.present
        return self._per_cluster(present, np.asarray(self.arm, float))

    @cached_property
    def cluster_arm(self) -> np.ndarray:
        """(R, G) the arm of each cluster (mean arm of its present rows; NaN for an empty cluster)."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.members > 0, self.arm_sum / self.members, np.nan)

    @cached_property
    def cluster_randomised(self) -> np.ndarray:
        """(R,) bool: with arms coded 0/1, every cluster's present rows are in a single arm."""
        s, m = self.arm_sum, self.members
        return ~np.any((s != 0) & (s != m), axis=1)


@dataclass(frozen=True, eq=False)
class LongitudinalLayout(Layout):
    """Repeated measures: ``y``, ``arm``, ``visit`` and ``subject`` (None when absent) per row."""

    kind = "longitudinal"

    arm: np.ndarray = None
    visit: np.ndarray = None
    subject: np.ndarray | None = None

    @property
    def n_visits(self) -> int:
        """Distinct visits."""
        return int(np.unique(self.visit).size)


@dataclass(frozen=True, eq=False)
class SurvivalLayout(Layout):
    """Time to event in two arms: ``y`` is the follow-up ``time``, ``event`` 1 = event, 0 = censored.

    ``arm``, ``labels`` as in :class:`TwoArmLayout`.
    """

    kind = "survival"

    event: np.ndarray = None
    arm: np.ndarray = None
    labels: tuple = ()

    @property
    def time(self) -> np.ndarray:
        return self.y


@dataclass(frozen=True, eq=False)
class CrossoverLayout(Layout):
    """Two-period crossover: period 1 in columns ``[0, n)``, period 2 in ``[n, 2n)``, aligned by subject.

    Column j and n + j hold the same ``subject``; ``sequence`` (n,) is 0 for AB (treatment A,
    then B) and 1 for BA; ``treat`` is 0 for A and 1 for B, so the treatment of a row is its
    sequence in period 1 and the other one in period 2. ``y1``, ``y2`` (R, n) are views of the
    two periods' outcomes.
    """

    kind = "crossover"

    y1: np.ndarray = None
    y2: np.ndarray = None
    subject: np.ndarray = None
    sequence: np.ndarray = None

    @cached_property
    def seen1(self) -> np.ndarray:
        """(R, n) bool: the period-1 outcome is observed."""
        return self.observed[:, : self.y1.shape[1]]

    @cached_property
    def seen2(self) -> np.ndarray:
        """(R, n) bool: the period-2 outcome is observed."""
        return self.observed[:, self.y1.shape[1]:]

    @cached_property
    def both(self) -> np.ndarray:
        """(R, n) bool: both periods observed (a complete pair)."""
        return self.seen1 & self.seen2


@dataclass(frozen=True, eq=False)
class SteppedLayout(Layout):
    """Multi-period cluster designs (stepped wedge): ``cluster``, ``period`` and ``treat`` per row.

    Each of the three is (N,) shared or (R, N) per replicate; ``treat`` is 0/1
    and may change within a cluster from one period to the next.
    """

    kind = "stepped"

    cluster: np.ndarray = None
    period: np.ndarray = None
    treat: np.ndarray = None


# -- building them from a batch -------------------------------------------------------------
def _base(batch: Batch, y) -> dict:
    return {"y": y, "present": batch.present, "missing": batch.missing, "per_rep": batch.per_rep,
            "shared": batch.shared}


def _table(batch):
    if "y" not in batch.per_rep:
        return None
    return TableLayout(**_base(batch, batch.per_rep["y"]))


def _one_sample(batch):
    if "y" not in batch.per_rep or "arm" in batch:
        return None
    return OneSampleLayout(**_base(batch, batch.per_rep["y"]))


def _split(arm, labels) -> int | None:
    """Where arm 1 starts, when ``arm`` is shared, sorted and has both labels."""
    if arm.ndim != 1 or labels != (0, 1) or np.any(arm[:-1] > arm[1:]):
        return None
    return int(np.count_nonzero(arm == 0))


def _two_arm(batch):
    if "y" not in batch.per_rep or "arm" not in batch:
        return None
    arm = batch["arm"]
    labels = _labels(arm)
    if labels is None:
        return None
    split = _split(arm, labels) if "arm" in batch.shared and "arm" not in batch.per_rep else None
    return TwoArmLayout(**_base(batch, batch.per_rep["y"]), arm=arm, labels=labels, split=split)


def _paired(batch):
    two = batch.layout("two_arm")
    if two is None or two.split is None or "pair" not in batch.shared or two.present is not None:
        return None
    pair, n0 = batch.shared["pair"], two.split
    if 2 * n0 != two.arm.size or not np.array_equal(pair[:n0], pair[n0:]):
        return None
    y0, y1 = two.arms()
    return PairedLayout(**_base(batch, two.y), y0=y0, y1=y1, pair=pair[:n0])


def _clustered(batch):
    if "y" not in batch.per_rep or "arm" not in batch or "cluster" not in batch:
        return None
    return ClusteredLayout(**_base(batch, batch.per_rep["y"]), arm=batch["arm"], cluster=batch["cluster"])


def _longitudinal(batch):
    if "y" not in batch.per_rep or "arm" not in batch or "visit" not in batch:
        return None
    subject = batch["subject"] if "subject" in batch else None
    return LongitudinalLayout(**_base(batch, batch.per_rep["y"]), arm=batch["arm"], visit=batch["visit"],
                              subject=subject)


def _survival(batch):
    if "time" not in batch.per_rep or "event" not in batch.per_rep or "arm" not in batch:
        return None
    arm = batch["arm"]
    labels = _labels(arm)
    if labels is None:
        return None
    return SurvivalLayout(**_base(batch, batch.per_rep["time"]), event=batch.per_rep["event"], arm=arm,
                          labels=labels)


def _crossover(batch):
    need = ("subject", "period", "sequence", "treat")
    if "y" not in batch.per_rep or not all(k in batch.shared for k in need) or "arm" in batch:
        return None
    subject, period, sequence, treat = (np.asarray(batch.shared[k]) for k in need)
    width = batch.per_rep["y"].shape[1]
    n = width // 2
    if width != 2 * n or n == 0 or subject.shape != (width,):
        return None
    if not (np.all(period[:n] == 1) and np.all(period[n:] == 2) and np.array_equal(subject[:n], subject[n:])
            and np.array_equal(sequence[:n], sequence[n:]) and np.all((sequence == 0) | (sequence == 1))):
        return None
    if not np.array_equal(treat, np.where(period == 1, sequence, 1 - sequence)):
        return None
    y = batch.per_rep["y"]
    return CrossoverLayout(**_base(batch, y), y1=y[:, :n], y2=y[:, n:], subject=subject[:n], sequence=sequence[:n])


def _stepped(batch):
    if "y" not in batch.per_rep or not all(c in batch for c in ("cluster", "period", "treat")):
        return None
    return SteppedLayout(**_base(batch, batch.per_rep["y"]), cluster=batch["cluster"], period=batch["period"],
                         treat=batch["treat"])


_BUILDERS = {"table": _table, "one_sample": _one_sample, "two_arm": _two_arm, "paired": _paired, "clustered": _clustered,
             "longitudinal": _longitudinal, "survival": _survival, "crossover": _crossover, "stepped": _stepped}
