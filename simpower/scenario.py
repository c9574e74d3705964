"""A scenario: one data-generating process, one or more analyses, and alpha.

Validated once at construction; a value that can be copied with changes
(:meth:`Scenario.with_params`) for sweeps and searches, described in words for
reports, and fingerprinted for the run store.
"""

from __future__ import annotations

import math
from typing import Any, Mapping

from ._validation import Real
from .components import fingerprint, to_plain
from .errors import ParameterError, nearest
from .functions import as_analysis, as_process

ALPHA = Real(0.0, 1.0, low_open=True, high_open=True)


class Scenario:
    """Process + analyses + alpha.

    Parameters
    ----------
    process : Process or callable
        A built-in process object, or a function ``f(rng, **params) -> data``.
    analysis : Analysis or callable, optional
        The planned analysis. Give ``analyses`` instead to compare several on
        the same simulated data sets; the first one is the primary.
    analyses : mapping of name -> analysis, or list of analyses
    alpha : float in (0, 1)
        Significance level; a replicate rejects when p <= alpha.
    params : dict, optional
        Parameters of a user process function.
    true_effect : float, optional
        The true value of the process's estimand, for bias and coverage, when
        the process cannot tell it (a user process). It applies only to the
        analyses that estimate that quantity (an ``estimand_label`` of None
        or the process's own, see :meth:`true_effect_for`); for a user process,
        whose estimand is unknown, only when the analyses (outside
        ``true_effects``) all estimate the same thing. Refused when it would
        apply to no analysis, or is ambiguous: give ``true_effects`` then.
    true_effects : mapping of analysis name -> float, optional
        The true value of what each analysis estimates, where it differs from
        the process's estimand (e.g. a ratio of geometric means).
    name, description : str
        Shown in reports.
    """

    def __init__(self, process, analysis=None, *, analyses=None, alpha: float = 0.05,
                 params: Mapping[str, Any] | None = None, true_effect: float | None = None,
                 true_effects: Mapping[str, float] | None = None, name: str = "", description: str = ""):
        self.process = as_process(process, dict(params) if params else None)
        if analysis is not None and analyses is not None:
            raise ParameterError("give `analysis` or `analyses`, not both.")
        if analysis is None and analyses is None:
            raise ParameterError("`analysis` is required: name the planned analysis.")
        if analyses is None:
            analyses = [analysis]
        if isinstance(analyses, Mapping):
            items = list(analyses.items())
        else:
            items = []
            for a in analyses:
                a = as_analysis(a)
                label = getattr(a, "name", None) or getattr(a, "label", "analysis")
                base, k = label, 2
                while label in dict(items):
                    label, k = f"{base}_{k}", k + 1
                items.append((label, a))
        if not items:
            raise ParameterError("`analyses` is empty: give at least one analysis.")
        self.analyses = {str(k): as_analysis(v) for k, v in items}
        self.alpha = ALPHA.clean("alpha", alpha)
        self._true_effect = None if true_effect is None else Real().clean("true_effect", true_effect)
        self.true_effects = {}
        for k, v in dict(true_effects or {}).items():
            if k not in self.analyses:
                raise ParameterError(f"`true_effects.{k}` names no analysis.{nearest(str(k), self.analyses)}")
            self.true_effects[k] = Real().clean(f"true_effects.{k}", v)
        if self._true_effect is not None:
            self._true_effect_targets()  # refuses a true_effect that fits no analysis, or is ambiguous
        self.name = name
        self.description = description

    # -- derived ---------------------------------------------------------
    @property
    def primary(self) -> str:
        return next(iter(self.analyses))

    @property
    def true_effect(self) -> float | None:
        if self._true_effect is not None:
            return self._true_effect
        try:
            return self.process.true_effect()
        except Exception:
            return None

    def true_effect_for(self, analysis: str) -> float | None:
        """The true value of what ``analysis`` estimates, or None when unknown.

        A value from ``true_effects`` wins; otherwise the process's true effect,
        but only when the analysis estimates the same quantity (its
        ``estimand_label`` is None or equals the process's).
        """
        if analysis in self.true_effects:
            return self.true_effects[analysis]
        if self._true_effect is not None:
            try:
                targets = self._true_effect_targets()
            except ParameterError:
                return None
            return self._true_effect if analysis in targets else None
        if not self._estimates_process_estimand(analysis):
            return None
        return self.true_effect

    def _estimand_of(self, analysis: str) -> str | None:
        return getattr(self.analyses[analysis], "estimand_label", None)

    def _estimates_process_estimand(self, analysis: str) -> bool:
        """Whether ``analysis`` estimates the process's estimand: its label is None (by convention the
        process's), or the process's label or one of its aliases. A process without a label (a user
        function: its estimand is unknown) matches only unlabelled analyses."""
        a_label = self._estimand_of(analysis)
        if a_label is None:
            return True
        p_label = getattr(self.process, "estimand_label", None)
        if p_label is None:
            return False
        if a_label == p_label:
            return True
        try:
            return a_label in self.process.estimand_aliases()
        except Exception:
            return False

    def _true_effect_targets(self) -> list[str]:
        """The analyses a top-level ``true_effect`` applies to; ParameterError if none, or if ambiguous."""
        open_ = [n for n in self.analyses if n not in self.true_effects]
        p_label = getattr(self.process, "estimand_label", None)

        def what(n):
            return f"{n}: {self._estimand_of(n) or 'not stated'}"

        example = f"(e.g. true_effects = {{ {open_[0] if open_ else self.primary} = ... }})"
        if not open_:
            raise ParameterError("`true_effect` applies to no analysis: [true_effects] gives every analysis its own "
                                 "true value; drop `true_effect`.")
        if p_label is None:
            labels = {self._estimand_of(n) for n in open_}
            if len(labels) > 1:
                raise ParameterError(
                    f"`true_effect` is ambiguous: the process does not say what its effect is, and the analyses "
                    f"estimate different things ({'; '.join(map(what, open_))}); give each analysis its true "
                    f"value in [true_effects] instead {example}.")
            return open_
        targets = [n for n in open_ if self._estimates_process_estimand(n)]
        if not targets:
            raise ParameterError(
                f"`true_effect` applies to no analysis: it is the process's {p_label}, and the analyses estimate "
                f"something else ({'; '.join(map(what, open_))}); give their true values in [true_effects] "
                f"instead {example}.")
        return targets

    def analytic_power(self) -> dict[str, float | None]:
        """Closed-form power of each analysis where the analytic core covers the case.

        Each analysis's :meth:`~simpower.analyses.base.Analysis.analytic_power`, which looks
        (analysis, the process's facts) up in :data:`simpower.crosscheck.TABLE`; None where no
        entry covers the pair or the closed form fails.
        """
        out = {}
        for name, a in self.analyses.items():
            try:
                v = a.analytic_power(self.process, self.alpha)
            except Exception:
                v = None
            out[name] = None if v is None or not math.isfinite(float(v)) else float(v)
        return out

    # -- copies ------------------------------------------------------------
    def get_params(self) -> dict[str, Any]:
        """Sweepable parameters: process ones by bare name, ``alpha``, and ``<analysis>.<param>``."""
        out = {k: v for k, v in self.process.get_params(deep=True).items()}
        out["alpha"] = self.alpha
        for name, a in self.analyses.items():
            for k, v in a.get_params(deep=True).items():
                out[f"{name}.{k}"] = v
        return out

    def with_params(self, **changes: Any) -> "Scenario":
        """A copy with parameters changed.

        Keys: a process parameter (``n``, ``effect``, ``outcome.cv``, also as
        ``process.n``), ``alpha``, ``true_effect``, or ``<analysis>.<param>``
        (``analysis.<param>`` reaches the primary analysis).
        """
        proc_changes: dict[str, Any] = {}
        an_changes: dict[str, dict[str, Any]] = {}
        alpha = self.alpha
        true_effect = self._true_effect
        proc_params = self.process.get_params(deep=True)
        for key, value in changes.items():
            if key == "alpha":
                alpha = value
                continue
            if key == "true_effect":
                true_effect = value
                continue
            head, _, rest = key.partition(".")
            if head == "process" and rest:
                proc_changes[rest] = value
            elif head == "analysis" and rest:
                an_changes.setdefault(self.primary, {})[rest] = value
            elif head in self.analyses and rest:
                an_changes.setdefault(head, {})[rest] = value
            elif key in proc_params:
                proc_changes[key] = value
            else:
                raise ParameterError(f"`{key}` is not a parameter of this scenario.{nearest(key, self.get_params())}")
        new = object.__new__(Scenario)
        new.process = self.process.replace(**proc_changes) if proc_changes else self.process
        new.analyses = {n: (a.replace(**an_changes[n]) if n in an_changes else a) for n, a in self.analyses.items()}
        new.alpha = ALPHA.clean("alpha", alpha)
        new._true_effect = None if true_effect is None else Real().clean("true_effect", true_effect)
        new.true_effects = dict(self.true_effects)
        new.name, new.description = self.name, self.description
        if new._true_effect is not None and (an_changes or true_effect is not self._true_effect):
            new._true_effect_targets()  # an analysis' estimand may have changed with its parameters
        return new

    def only(self, *names: str) -> "Scenario":
        """A copy with just the analyses ``names`` (in that order; the first is the primary).

        The copy draws the same data but its fingerprint (and so its
        :meth:`point_key`) differs: a planning step that runs a subset keeps the
        whole scenario's key as the seed key, so each kept analysis gets the same
        replicates as in the whole scenario.
        """
        if not names:
            raise ParameterError("`only` needs at least one analysis name.")
        for n in names:
            if n not in self.analyses:
                raise ParameterError(f"`{n}` is not an analysis of this scenario.{nearest(n, self.analyses)}")
        new = self.with_params()
        new.analyses = {n: self.analyses[n] for n in names}
        new.true_effects = {n: v for n, v in self.true_effects.items() if n in new.analyses}
        return new

    def null(self) -> "Scenario":
        """The same scenario with the effect set to its null value (everything else kept)."""
        new = self.with_params()
        new.process = self.process.null()
        if self._true_effect is not None:
            new._true_effect = self.process.null().true_effect() if self.process.effect_param else 0.0
        return new

    # -- description -----------------------------------------------------
    def spec(self) -> dict[str, Any]:
        return {
            "process": self.process.spec(),
            "analyses": {n: a.spec() for n, a in self.analyses.items()},
            "alpha": self.alpha,
            "true_effect": to_plain(self._true_effect),
            **({"true_effects": dict(self.true_effects)} if self.true_effects else {}),
        }

    def fingerprint(self) -> str:
        return fingerprint(self.spec())

    def point_key(self) -> int:
        """The seed key of this scenario as a grid point: the first 48 bits of its fingerprint.

        Runs, sweeps and searches all seed a scenario's chunks with
        ``SeedSequence(seed, spawn_key=(point_key, chunk))``, so the same
        parameters give the same numbers whichever command asked (with the
        same seed and chunk size).
        """
        return int(self.fingerprint()[:12], 16)

    def describe(self) -> list[str]:
        lines = [f"Data: {self.process.describe()}."]
        for n, a in self.analyses.items():
            h0 = getattr(a, "null_hypothesis", "")
            lines.append(f"Analysis `{n}`: {a.describe()}" + (f"; H0: {h0}." if h0 else "."))
        own = {n: r for n, a in self.analyses.items() if (r := a.decision_rule())}
        if len(own) < len(self.analyses):
            lines.append(f"A replicate rejects H0 when its p-value is at most alpha = {self.alpha:g}"
                         + (" (the analyses deciding by their own rule excepted)." if own else "."))
        for n, rule in own.items():
            lines.append(f"Analysis `{n}` decides by its own rule, not by the scenario's alpha: {rule}.")
        return lines

    def __repr__(self):
        an = ", ".join(f"{k}={v!r}" for k, v in self.analyses.items())
        return f"Scenario(process={self.process!r}, analyses={{{an}}}, alpha={self.alpha:g})"
