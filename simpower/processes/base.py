"""The data-generating process contract.

A process is any callable ``(rng, **params) -> data`` where ``data`` is a long
table: a dict of equal-length 1-D arrays (or a pandas DataFrame).  Built-in
processes are :class:`Process` objects holding their parameters; calling one
with an ``rng`` draws one replicate.

A process may also draw a whole chunk of replicates at once
(:meth:`Process.draw_batch`), returning a :class:`Batch`; the engine then hands
the batch to analyses that have a batch path, and per-replicate slices
(:meth:`Batch.replicate`) to those that do not, so every analysis sees the same
simulated data sets (common random numbers). :class:`Batch` and its typed
layouts live in :mod:`simpower.batch` (a leaf that analyses import too).
"""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np

from ..batch import Batch  # noqa: F401 - the container processes build, defined in the leaf module
from ..components import Component
from ..facts import NormalFacts


class Process(Component):
    """Base class of built-in data-generating processes."""

    kind = "process"

    #: name of the parameter that carries the effect (set to 0 for the null)
    effect_param: str | None = "effect"
    #: what :meth:`true_effect` is, in words; analyses whose ``estimand_label`` differs get no
    #: bias or coverage unless the scenario gives their true effect
    estimand_label: str = "mean difference"
    #: name of the sample-size parameter the required-n search varies
    size_param: str | None = "n"

    def __call__(self, rng: np.random.Generator) -> dict[str, np.ndarray]:
        """Draw one replicate (a long table)."""
        batch = self.draw_batch(rng, 1)
        if batch is None:  # pragma: no cover - subclasses override one or the other
            raise NotImplementedError(f"{type(self).__name__} draws neither one replicate nor a batch")
        return batch.replicate(0)

    def draw_batch(self, rng: np.random.Generator, size: int) -> Batch | None:
        """Draw ``size`` replicates at once, or return None if there is no batch path."""
        return None

    @property
    def has_batch(self) -> bool:
        return type(self).draw_batch is not Process.draw_batch

    def estimand_aliases(self) -> set[str]:
        """Other names under which :meth:`true_effect` is also the true value (e.g. a
        'location shift' when the arms differ by a pure shift)."""
        return set()

    def true_effect(self) -> float | None:
        """The estimand the analyses estimate (for bias and coverage), if known."""
        v = self._p.get(self.effect_param) if self.effect_param else None
        return float(v) if v is not None else None

    def null(self) -> "Process":
        """The same process with no effect (everything else kept)."""
        if not self.effect_param:
            from ..errors import ParameterError

            raise ParameterError(f"{self.name}: no effect parameter to set to zero; give the null scenario yourself.")
        return self.replace(**{self.effect_param: self.null_value()})

    def null_value(self) -> float:
        return 0.0

    def facts(self) -> tuple:
        """What this process draws, as typed facts for the analytic cross-check (:mod:`simpower.facts`).

        A tuple of :class:`~simpower.facts.NormalFacts`, :class:`~simpower.facts.BinaryFacts`,
        ... (empty when no closed form applies, e.g. with missing outcomes); the table in
        :mod:`simpower.crosscheck` turns (analysis, facts) into closed-form power. A subclass
        written against the older :meth:`normal_case` (a dictionary) still gets its facts read
        from it.
        """
        if type(self).normal_case is Process.normal_case:
            return ()
        nc = self.normal_case()
        return (NormalFacts.from_dict(nc),) if nc is not None else ()

    def normal_case(self) -> dict[str, Any] | None:
        """Deprecated: the :class:`~simpower.facts.NormalFacts` of :meth:`facts` as the older dictionary, or None.

        Keys: ``design`` ('one-sample' | 'paired' | 'two-sample'), ``effect``,
        ``n`` (control arm / pairs / sample), ``ratio``, ``sd`` (None when the
        arms' SDs differ) and, for two arms, ``sd0`` and ``sd1``.
        """
        warnings.warn("Process.normal_case() is deprecated; use facts() (simpower.facts.NormalFacts)",
                      DeprecationWarning, stacklevel=2)
        return next((f.as_dict() for f in self.facts() if isinstance(f, NormalFacts)), None)


def check_missing_columns(missing, available, owner: str, hint: str = "") -> None:
    """Refuse, at construction, a missingness mechanism that needs a column the design lacks.

    ``missing.requires`` names the covariates its mask depends on (e.g. MAR on
    ``baseline``); ``available`` is what the process passes to ``mask``.
    """
    if missing is None:
        return
    from ..errors import ParameterError

    for col in getattr(missing, "requires", ()):
        if col not in available:
            raise ParameterError(f"`missing.on` = {col!r} is not a column of {owner} (it has "
                                 f"{', '.join(sorted(available))}){hint}.")


class Missingness(Component):
    """Base class of missing-outcome mechanisms (MCAR, MAR, MNAR, ...), used as a nested component.

    A process holding one (conventionally in its ``missing`` parameter) calls
    :meth:`mask` after drawing complete outcomes, sets the masked outcomes to
    NaN, and sets ``Batch.info["missing"] = True`` (read by analyses as the layouts' ``missing``).
    """

    kind = "missingness"

    def mask(self, rng: np.random.Generator, y: np.ndarray, covariates: dict[str, np.ndarray]) -> np.ndarray:
        """Boolean array shaped like ``y`` (True = outcome missing).

        ``y`` holds the complete outcomes, shape ``(replicates, rows)`` (or
        ``(rows,)``); ``covariates`` holds observed variables of the same shape
        that a MAR mechanism may depend on (e.g. ``"baseline"``, ``"arm"``).
        """
        raise NotImplementedError

    def describe(self) -> str:
        return super().describe()


class Outcome(Component):
    """Base class of outcome distributions (normal, lognormal, gamma, ...), used as a nested component.

    An outcome knows its population ``mean`` and ``sd`` and draws control-arm
    values with :meth:`sample`; designs apply the effect (shift, ratio or
    standardised d) and per-arm SDs around it.
    """

    kind = "outcome"

    def sample(self, rng: np.random.Generator, size) -> np.ndarray:
        raise NotImplementedError

    @property
    def mean(self) -> float:
        raise NotImplementedError

    @property
    def sd(self) -> float:
        raise NotImplementedError
