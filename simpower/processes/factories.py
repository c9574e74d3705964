"""The older process names as thin factories over ``trial``.

``normal_two_arm``, ``two_arm``, ``binary_two_arm``, ``count_two_arm``,
``cluster_trial``, ``ordinal_two_arm`` and ``survival_two_arm`` keep their names, TOML ``type``, parameters, defaults,
aliases, specs and words; each builds one :class:`~simpower.processes.composed.Trial`
from its parameters at construction (:meth:`TrialFactory.layers`: a design, an
outcome or outcome layer, the effect, the missingness) and hands drawing, true
values and facts to it, so the numbers are the trial's, replicate for
replicate. The mapping is listed in DEVELOPERS.md ("Design vocabulary").
"""

from __future__ import annotations

from typing import Any

from ..errors import ParameterError
from .base import Process
from .composed import Trial


class TrialFactory(Process):
    """Base class of a process name that is a vocabulary over ``trial``.

    A subclass declares its parameters (``params``, ``defaults``, aliases) and
    :meth:`layers`, the mapping of its parameters to the trial's fields, and
    keeps its own ``describe()``; the trial it builds (:attr:`trial`, built
    once per object) draws the data and gives ``true_effect()``, ``facts()``,
    ``estimand_aliases()``, ``estimand_label`` and ``null_value()``.
    """

    #: prefixes of the trial's field names that this name's users write without them (for messages)
    unprefixed: tuple[str, ...] = ("design.",)

    def __setstate__(self, state):  # the trial is rebuilt from the parameters after unpickling
        super().__setstate__(state)
        self._check()

    def _check(self):
        layers = self.layers()
        try:
            trial = Trial(**layers)
        except ParameterError as exc:  # name the fields as this process's users write them
            raise ParameterError(self._as_written(str(exc))) from None
        object.__setattr__(self, "_trial", trial)

    def layers(self) -> dict[str, Any]:
        """The trial's fields for this object's parameters: ``design``, ``outcome``, ``missing`` (and, with an
        outcome distribution, ``effect``, ``effect_type``, ``sd_ratio``)."""
        raise NotImplementedError

    def _as_written(self, message: str) -> str:
        for prefix in self.unprefixed:
            message = message.replace(f"`{prefix}", "`")
        return message.replace(f" of {Trial.name} (", f" of {self.name} (")

    @property
    def trial(self) -> Trial:
        """The composed process this object stands for (it draws the data)."""
        return self._trial

    def draw_batch(self, rng, size):
        return self._trial.draw_batch(rng, size)

    def true_effect(self):
        return self._trial.true_effect()

    def null_value(self):
        return self._trial.null_value()

    def facts(self):
        return self._trial.facts()

    def estimand_aliases(self):
        return self._trial.estimand_aliases()

    @property
    def estimand_label(self) -> str:  # type: ignore[override]
        return self._trial.estimand_label
