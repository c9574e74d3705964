"""Typed facts a process states about itself, for the analytic cross-check.

A process returns a tuple of these from :meth:`Process.facts` (empty when no
closed form applies, e.g. with missing outcomes); :mod:`simpower.crosscheck`
maps (analysis, fact type) to a closed form. The facts describe the *process*
only (what is drawn), never an analysis: whether a closed form covers the pair
is the table's business.

This module is a leaf (it imports nothing of simpower's), so processes, which
state the facts, and analyses, which read them through the table, may both
import it.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

NormalDesign = Literal["one-sample", "paired", "two-sample"]


@dataclass(frozen=True)
class NormalFacts:
    """Normal outcomes, complete: one sample, pairs, or two independent arms.

    ``effect`` is the true mean (one sample), the mean within-pair difference
    (paired) or treatment minus control mean (two arms), in outcome units.
    ``n`` counts observations, pairs, or the control arm; ``ratio`` is the
    treatment arm's size over the control arm's (1 otherwise). ``sd0`` and
    ``sd1`` are the SDs of the control and treatment arms; for one sample they
    are both the observations' SD, for pairs both the SD of a within-pair
    difference.
    """

    design: NormalDesign
    effect: float
    n: int
    sd0: float
    sd1: float
    ratio: float = 1.0

    @property
    def sd(self) -> float | None:
        """The common SD, or None when the arms' SDs differ."""
        return self.sd0 if self.sd0 == self.sd1 else None

    def as_dict(self) -> dict:
        """The older ``normal_case()`` dictionary (kept for code written against it)."""
        out = {"design": self.design, "effect": self.effect, "n": self.n, "sd": self.sd, "ratio": self.ratio}
        if self.design == "two-sample":
            out.update(sd0=self.sd0, sd1=self.sd1)
        return out

    @classmethod
    def from_dict(cls, d: dict) -> "NormalFacts":
        """Read an older ``normal_case()`` dictionary."""
        sd0 = d.get("sd0", d.get("sd"))
        sd1 = d.get("sd1", sd0)
        return cls(design=d["design"], effect=d["effect"], n=d["n"], sd0=sd0, sd1=sd1, ratio=d.get("ratio", 1.0))


@dataclass(frozen=True)
class BinaryFacts:
    """A binary outcome in two independent arms, complete: event risks ``p0`` (control) and ``p1``.

    ``n`` is the control arm's size, ``ratio`` the treatment arm's size over it.
    """

    p0: float
    p1: float
    n: int
    ratio: float = 1.0


@dataclass(frozen=True)
class SurvivalFacts:
    """Time to event in two arms under proportional hazards.

    ``hazard_ratio`` is treatment over control; ``events`` the expected number
    of observed events in both arms together; ``n`` the control arm's size and
    ``ratio`` the treatment arm's size over it.
    """

    hazard_ratio: float
    events: float
    n: int
    ratio: float = 1.0


@dataclass(frozen=True)
class ClusterFacts:
    """Normal outcomes in two arms of clusters with a random cluster intercept, complete.

    ``clusters`` per arm of mean size ``cluster_size`` (coefficient of
    variation ``cluster_size_cv``; 0 for equal clusters); intracluster
    correlation ``icc``; total SD of an outcome ``sd`` in the control arm and
    ``sd1`` in the treatment arm (deviations scaled, ICC kept); ``effect`` the
    treatment minus control mean. ``randomise`` is "cluster" (whole clusters
    to arms) or "individual" (within clusters), ``slope_sd`` the SD of a
    cluster-specific treatment effect (0: none).
    """

    clusters: int
    cluster_size: float
    cluster_size_cv: float
    icc: float
    effect: float
    sd: float
    sd1: float
    randomise: Literal["cluster", "individual"] = "cluster"
    slope_sd: float = 0.0

    @property
    def equal_sizes(self) -> bool:
        return self.cluster_size_cv == 0


@dataclass(frozen=True)
class ClusterBinaryFacts:
    """A binary outcome in two arms of clusters with a random cluster intercept, complete.

    ``p0`` and ``p1`` are the population-averaged (marginal) risks of the
    control and treatment arms; ``clusters`` per arm of mean size
    ``cluster_size`` (coefficient of variation ``cluster_size_cv``); ``icc``
    the intracluster correlation of the 0/1 outcomes in the control arm (the
    proportion scale); ``randomise`` as in :class:`ClusterFacts`.
    """

    p0: float
    p1: float
    clusters: int
    cluster_size: float
    cluster_size_cv: float
    icc: float
    randomise: Literal["cluster", "individual"] = "cluster"

    @property
    def equal_sizes(self) -> bool:
        return self.cluster_size_cv == 0


@dataclass(frozen=True)
class MultiArmFacts:
    """Normal outcomes in k >= 2 independent arms with a common SD, complete.

    ``means`` are each arm's mean difference from the control arm (control
    first, so ``means[0] == 0``), ``sizes`` the arm sizes (control first) and
    ``sd`` the common SD.
    """

    means: tuple[float, ...]
    sizes: tuple[int, ...]
    sd: float


@dataclass(frozen=True)
class CrossoverFacts:
    """A two-period, two-sequence (AB/BA) crossover with normal outcomes on the analysis scale, complete.

    ``n_ab`` and ``n_ba`` subjects in the two sequences; ``sd_within`` is the SD of the
    within-subject error (a period difference has variance ``2 sd_within**2``); ``effect`` is
    treatment B minus A and ``carryover`` the differential first-order carryover (of B minus
    that of A) into period 2, both on the analysis scale: outcome units for ``scale``
    "additive", the log of the outcome for "log" (where ``effect`` is the log ratio of
    geometric means).
    """

    effect: float
    n_ab: int
    n_ba: int
    sd_within: float
    carryover: float = 0.0
    scale: Literal["additive", "log"] = "additive"


@dataclass(frozen=True)
class OrdinalFacts:
    """An ordered categorical outcome in two independent arms under proportional odds, complete.

    ``p0`` and ``p1`` are the control and treatment arms' category
    probabilities (lowest category first), ``odds_ratio`` the common odds of
    a higher category, treated over control; ``n`` is the control arm's size
    and ``ratio`` the treatment arm's size over it.
    """

    p0: tuple[float, ...]
    p1: tuple[float, ...]
    odds_ratio: float
    n: int
    ratio: float = 1.0


@dataclass(frozen=True)
class SteppedFacts:
    """Normal outcomes of a multi-period cluster design (a stepped wedge), complete.

    ``sequences`` is the sequence matrix (rows of 0/1, None where a cell is not
    measured), each row followed by ``clusters_per_sequence`` clusters with ``m``
    individuals per measured cell; ``icc``, ``cac``, ``structure``
    ("exchangeable", "nested", "exponential"), ``sampling`` ("cross_sectional",
    "cohort") and ``individual_autocorr`` as in :mod:`simpower.analytic.stepped`;
    ``sd`` the total SD of an outcome and ``effect`` the treatment effect.
    """

    sequences: tuple[tuple[int | None, ...], ...]
    clusters_per_sequence: int
    m: int
    icc: float
    cac: float
    structure: str
    sampling: str
    individual_autocorr: float
    sd: float
    effect: float


@dataclass(frozen=True)
class RepeatedFacts:
    """Normal repeated measures in two arms with monotone dropout completely at random (or none).

    ``cov`` is the covariance of the outcomes over the visits (rows of a T x T
    matrix, both arms), ``structure`` its form ("exchangeable" or "ar1"),
    ``retention`` the share of each arm still observed at each visit (1 at the
    first, never increasing), ``effect`` the treatment minus control mean at the
    final visit, ``n`` the control arm's size and ``ratio`` the treatment arm's
    size over it.
    """

    effect: float
    n: int
    cov: tuple[tuple[float, ...], ...]
    retention: tuple[float, ...]
    structure: str = "exchangeable"
    ratio: float = 1.0


#: every fact type, for documentation and tests
FACT_TYPES = (NormalFacts, BinaryFacts, SurvivalFacts, ClusterFacts, ClusterBinaryFacts, MultiArmFacts,
              CrossoverFacts, OrdinalFacts, SteppedFacts, RepeatedFacts)
