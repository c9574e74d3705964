"""Group-sequential designs in simulation: an analysis applied at interim looks with stopping boundaries.

:class:`GroupSequential` (``group_sequential``) wraps a planned analysis (any
built-in or user analysis, the *inner* one) and a boundary design from
:mod:`simpower.analytic.groupseq`. Each replicate's one full-size data set is
analysed on its growing slices: look k uses the first ``n_k`` participants
(rows) of each arm in enrolment order (row order), ``n_k = round(t_k N_arm)``
for the planned information fractions ``t_k`` (the last one 1: the whole data
set). The trial stops at the first look whose statistic crosses the efficacy
boundary (H0 rejected) or, with a futility rule, falls on or below the
futility boundary; otherwise it runs to the last look.

The statistic at a look is, with ``scale = "z"``, the inner analysis's
``(estimate - null) / se`` (its sign turned for ``alternative = "less"``,
its absolute value for a two-sided design), compared with the z boundaries;
with ``scale = "p"``, the inner p-value compared with the nominal p-value
boundary ``1 - Phi(b_k)`` (two-sided: twice that), i.e. the inverse-normal
``Phi^-1(1 - p)`` compared with ``b_k``. For a z-test both scales agree; for
a t-test the p scale keeps the design's alpha at small n where the z scale
(a t statistic against normal boundaries) exceeds it.

Boundaries are computed once, at the planned fractions, by
:func:`~simpower.analytic.boundaries` (Lan-DeMets spending: O'Brien-Fleming
type, Pocock type, power and gamma families) or
:func:`~simpower.analytic.classical` (Pocock 1977; O'Brien & Fleming 1979).
Futility (one-sided designs only, as the analytic core): a fixed z value per
interim look, beta-spending (:class:`~simpower.analytic.BetaSpending`), or a
probability rule ``{rule = "predictive" | "conditional", threshold}``: stop
when the predictive probability of success at the final analysis, or the
conditional power, is at or below the threshold
(:mod:`simpower.analytic.futility`; a z boundary per look); binding or
non-binding.

What a replicate records (the run's usual fields):

* ``pvalue``: the design's decision, 0 when it rejected H0 (stopped for
  efficacy) and 1 when it did not, so the rejection rate at any scenario
  alpha is the design's overall rejection rate (type I error under H0,
  power under H1) at the design's own ``alpha``;
* ``estimate``, ``se``, ``ci_low``, ``ci_high``: the inner analysis's naive
  values at the look where the trial stopped (their bias and coverage are
  those of the naive estimate after a sequential design);
* ``pvalues`` with ``names``: stopping indicators, one column per look and
  reason, ``"look k efficacy"`` (k = 1..K) and, with a futility rule,
  ``"look k futility"`` (k = 1..K-1): 0 where the trial stopped there for
  that reason, else 1. The run's per-hypothesis rates are then the stopping
  proportions per look, each with its MCSE; the look where a replicate
  stopped, its decision and its sample size follow from them
  (:func:`stop_of`), and the expected sample size from their rates
  (:func:`looks_table`). A probability futility rule adds a last column
  ``"futility lost"``: 0 where the trial stopped for futility but, run on
  without the rule, would have crossed an efficacy boundary (its rate is the
  power the non-binding rule costs).

Time-to-event data (``time``, ``event``, no ``y``) are looked at event
counts instead: look k comes at the calendar time (``entry + time``) of the
``round(t_k D)``-th of the D events of the full data set and sees the data as
they stood then; this needs an ``entry`` column (calendar time of enrolment).
The batch path does this for every replicate at once, the participants not
yet enrolled masked out as padding (``present``).

A replicate fails (counted by cause, as every failure) when the inner
analysis fails at a look the trial reached.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, replace

import numpy as np
from scipy import special

from .._validation import Anything, Bool, Choice, Int, Real
from ..analytic import futility as frules
from ..analytic import groupseq as gs
from ..errors import ParameterError
from ..registry import build, wrap_callable
from .base import Analysis, BatchResult, TestResult, as_batch_result, as_test_result, WARNINGS_LOCK

#: the indicator of a replicate that stopped for futility but, run on, would have crossed an efficacy boundary
LOST = "futility lost"

_NO_EVENTS = "no events in the data set: a look at an event count cannot be placed"

#: columns that mean the rows are not one participant each: slicing rows would cut clusters or visits
_NOT_PARTICIPANTS = ("cluster", "visit", "subject")


@dataclass(frozen=True)
class OneAnalysis(Anything):
    """One analysis: an object, a ``{type = ...}`` table, or a function ``data -> p-value | result``."""

    optional: bool = False

    def describe(self) -> str:
        return "an analysis (object or {type = ...} table)"

    def clean(self, name, value):
        if isinstance(value, dict):
            value = build("analysis", value, where=name)
        elif not isinstance(value, Analysis):
            if not callable(value):
                raise ParameterError(f"`{name}` must be {self.describe()}; got {value!r}.")
            value = wrap_callable("analysis", value)
        if isinstance(value, GroupSequential):
            raise ParameterError(f"`{name}` is itself a `group_sequential` analysis; give the analysis it wraps.")
        return value


@dataclass(frozen=True)
class Fractions(Anything):
    """Information fractions of the looks: a number of equally spaced looks, or an increasing list ending at 1."""

    optional: bool = False

    def describe(self) -> str:
        return "a number of equally spaced looks or an increasing list of fractions ending at 1, e.g. [0.5, 1]"

    def clean(self, name, value):
        if isinstance(value, bool):
            raise ParameterError(f"`{name}` must be {self.describe()}; got {value!r}.")
        if isinstance(value, (int, np.integer)):
            if not 1 <= int(value) <= 20:
                raise ParameterError(f"`{name}` must be a number of looks in [1, 20] or a list of fractions "
                                     f"ending at 1; got {value}.")
            return int(value)
        if isinstance(value, (str, bytes)) or not hasattr(value, "__iter__"):
            raise ParameterError(f"`{name}` must be {self.describe()}; got {value!r}.")
        try:
            t = [float(v) for v in value]
        except (TypeError, ValueError):
            raise ParameterError(f"`{name}` must be {self.describe()}; got {value!r}.") from None
        if not t:
            raise ParameterError(f"`{name}` is empty; give the fractions of the looks, e.g. [0.5, 1].")
        bad = [v for v in t if not (0.0 < v <= 1.0)]
        if bad:
            raise ParameterError(f"`{name}` must hold fractions in (0, 1]; got {bad[0]:g}.")
        for i in range(1, len(t)):
            if t[i] <= t[i - 1]:
                raise ParameterError(f"`{name}` must increase from look to look; look {i + 1} ({t[i]:g}) is not "
                                     f"after look {i} ({t[i - 1]:g}).")
        if abs(t[-1] - 1.0) > 1e-12:
            raise ParameterError(f"`{name}` must end at 1 (the last look has all the data); got {t[-1]:g}: add 1.")
        return t


@dataclass(frozen=True)
class Futility(Anything):
    """None, a z value per interim look, or a beta-spending table ``{kind, beta, param}``."""

    optional: bool = True

    def describe(self) -> str:
        return ("a z value per interim look (e.g. [0.0, 0.5]), a beta-spending table "
                "{kind = \"obf\", beta = 0.1}, or a probability rule {rule = \"predictive\", threshold = 0.1}")

    def clean(self, name, value):
        if value is None:
            return None
        if isinstance(value, gs.BetaSpending):
            value = {"kind": value.kind, "beta": value.beta, "param": value.param}
        if isinstance(value, dict) and "rule" in value:
            return _probability_rule(name, value)
        if isinstance(value, dict):
            extra = set(value) - {"kind", "beta", "param"}
            if extra:
                raise ParameterError(f"`{name}.{sorted(extra)[0]}` is not a field of a beta-spending futility "
                                     f"rule (fields: kind, beta, param).")
            kind = Choice(gs.SPENDING).clean(f"{name}.kind", value.get("kind", "obf"))
            beta = Real(0.0, 1.0, low_open=True, high_open=True).clean(f"{name}.beta", value.get("beta", 0.1))
            out = {"kind": kind, "beta": beta}
            if value.get("param") is not None:
                out["param"] = Real().clean(f"{name}.param", value["param"])
            return out
        if isinstance(value, (str, bytes)) or not hasattr(value, "__iter__"):
            raise ParameterError(f"`{name}` must be {self.describe()}; got {value!r}.")
        try:
            return [float(v) for v in value]
        except (TypeError, ValueError):
            raise ParameterError(f"`{name}` must be {self.describe()}; got {value!r}.") from None


#: the fields of a probability futility rule (predictive probability or conditional power)
_RULE_FIELDS = ("rule", "threshold", "prior_mean", "prior_information", "drift")


def _probability_rule(name: str, value: dict) -> dict:
    """A futility rule ``{rule, threshold, ...}`` checked field by field (one line naming the field)."""
    extra = sorted(set(value) - set(_RULE_FIELDS))
    if extra:
        raise ParameterError(f"`{name}.{extra[0]}` is not a field of a probability futility rule (fields: "
                             f"{', '.join(_RULE_FIELDS)}).")
    rule = Choice(frules.RULES).clean(f"{name}.rule", value["rule"])
    if "threshold" not in value:
        raise ParameterError(f"`{name}.threshold` is required: the probability at or below which the trial stops "
                             f"for futility, in (0, 1), e.g. 0.1.")
    out = {"rule": rule,
           "threshold": Real(0.0, 1.0, low_open=True, high_open=True).clean(f"{name}.threshold", value["threshold"])}
    has_mean, has_info = value.get("prior_mean") is not None, value.get("prior_information") is not None
    if rule == "predictive":
        if has_mean != has_info:
            raise ParameterError(f"`{name}.prior_mean` and `prior_information`: give both (a normal prior on the "
                                 f"drift) or neither (a flat prior).")
        if has_mean:
            out["prior_mean"] = Real().clean(f"{name}.prior_mean", value["prior_mean"])
            out["prior_information"] = Real(0.0, low_open=True).clean(f"{name}.prior_information",
                                                                       value["prior_information"])
        if value.get("drift") is not None:
            raise ParameterError(f"`{name}.drift` belongs to rule = 'conditional'; a predictive rule takes "
                                 f"prior_mean and prior_information.")
    else:
        if has_mean or has_info:
            raise ParameterError(f"`{name}.prior_mean` and `prior_information` belong to rule = 'predictive'; "
                                 f"conditional power takes `drift` (omit it for the current trend).")
        if value.get("drift") is not None:
            out["drift"] = Real().clean(f"{name}.drift", value["drift"])
    return out


def _rule_text(rule: dict) -> str:
    """The rule in words, for the design's method line."""
    if rule["rule"] == "conditional":
        under = "the current trend" if "drift" not in rule else f"drift {rule['drift']:g}"
        return f"conditional power under {under} <= {rule['threshold']:g}"
    prior = "flat prior" if "prior_mean" not in rule else \
        f"normal prior on the drift, mean {rule['prior_mean']:g}, information {rule['prior_information']:g}"
    return f"predictive probability <= {rule['threshold']:g} ({prior})"


def look_sizes(fraction: float, n: np.ndarray) -> np.ndarray:
    """Participants of an arm of ``n`` seen at information fraction ``fraction``: round(t n), at least 1, n at t = 1."""
    n = np.asarray(n)
    if fraction >= 1.0:
        return n
    return np.clip(np.floor(fraction * n + 0.5 + 1e-9).astype(n.dtype if n.dtype.kind == "i" else np.int64), 1, n)


def _rank_in_arm(arm: np.ndarray, present: np.ndarray | None) -> tuple[np.ndarray, dict]:
    """Each row's 0-based position among the present rows of its arm (row order), and each arm's size.

    ``arm`` is (N,) or (R, N); ``present`` (R, N) or None. Returns ranks of ``arm``'s broadcast
    shape and {label: size} (sizes (R,) or scalars).
    """
    arm = np.asarray(arm)
    pres = np.ones(arm.shape, bool) if present is None else np.broadcast_to(present, np.broadcast_shapes(
        arm.shape, present.shape))
    arm = np.broadcast_to(arm, pres.shape)
    rank = np.zeros(arm.shape, np.int64)
    sizes = {}
    for label in np.unique(arm[pres]) if pres.any() else []:
        m = (arm == label) & pres
        c = np.cumsum(m, axis=-1)
        rank = np.where(m, c - 1, rank)
        sizes[label.item()] = c[..., -1]
    return rank, sizes


class GroupSequential(Analysis):
    """A group-sequential design around a planned analysis: interim looks with stopping boundaries.

    H0: that of the inner analysis. The decision (the recorded ``pvalue``: 0
    rejects, 1 does not) is the design's, at its own ``alpha``.

    Parameters
    ----------
    inner : analysis
        The planned analysis applied at every look (object, ``{type = ...}``
        table, or function ``data -> p-value | result``).
    fractions : int or list of float, default 3
        K equally spaced looks, or the information fractions of the looks
        (increasing, ending at 1); look k uses round(t_k N) participants of
        each arm of N.
    spending : {"obf", "pocock", "power", "gamma"}, default "obf"
        The alpha-spending family (Lan & DeMets 1983; Kim & DeMets 1987;
        Hwang, Shih & DeCani 1990); with ``boundary = "classical"`` the shape
        of the classical boundary ("obf" or "pocock").
    param : float, optional
        rho of the power family, gamma of the gamma family.
    boundary : {"spending", "classical", "nominal"}, default "spending"
        Spending-function boundaries, the classical ones, or ``"nominal"``:
        the unadjusted fixed-sample level ``alpha`` at every look (repeated
        significance testing, whose type I error exceeds alpha: Armitage,
        McPherson & Rowe 1969; its ``spent`` shows the real one).
    alpha : float, default 0.025
        The design's total type I error (one-sided for a one-sided design).
    sides : {1, 2}, optional
        One-sided (upper efficacy boundary) or symmetric two-sided; by default
        from the inner analysis's ``alternative`` (two-sided -> 2, else 1).
    futility : list of float or table, optional
        One-sided designs: a z value per interim look (stop for futility when
        the statistic is at or below it), beta-spending ``{kind, beta, param}``,
        or a probability rule ``{rule, threshold, ...}``: ``rule = "predictive"``
        (predictive probability of success at the final analysis; flat prior on
        the drift, or normal with ``prior_mean`` and ``prior_information``) or
        ``"conditional"`` (conditional power under the current trend, or under
        ``drift``); stop when it is at or below ``threshold`` in (0, 1).
    binding : bool, default False
        Whether the efficacy boundaries assume the futility rule is obeyed.
    scale : {"z", "p"}, default "z"
        Compare ``estimate / se`` with the z boundaries, or the inner p-value
        with the nominal p-value boundaries.
    """

    name = "group_sequential"
    #: its ``pvalues`` are stopping indicators per look, not adjusted p-values of several hypotheses
    #: (so the primary p-value is not their minimum when a futility stop is recorded)
    stopping_indicators = True
    null_hypothesis = "that of the inner analysis, tested at every look with group-sequential boundaries"
    params = {"inner": OneAnalysis(), "fractions": Fractions(), "spending": Choice(gs.SPENDING),
              "param": Real(optional=True), "boundary": Choice(("spending", "classical", "nominal")),
              "alpha": Real(0.0, 0.5, low_open=True, high_open=True), "sides": Int(1, 2, optional=True),
              "futility": Futility(), "binding": Bool(), "scale": Choice(("z", "p"))}
    defaults = {"fractions": 3, "spending": "obf", "param": None, "boundary": "spending", "alpha": 0.025,
                "sides": None, "futility": None, "binding": False, "scale": "z"}

    def _check(self):
        alt = getattr(self.inner, "alternative", None)
        sides = self.sides
        if sides is None:
            sides = 2 if alt == "two-sided" else 1
        elif alt is not None and (sides == 2) != (alt == "two-sided"):
            need = "'two-sided'" if sides == 2 else "'greater' or 'less'"
            raise ParameterError(f"`inner.alternative` must be {need} for a {'two' if sides == 2 else 'one'}-sided "
                                 f"design (sides = {sides}); got {alt!r}.")
        self.design()  # the boundaries, checked now: one line naming the field when they cannot be made

    # -- the design ----------------------------------------------------------------------------
    def design(self) -> gs.Boundaries:
        """The stopping boundaries (z scale), computed once at the planned fractions."""
        got = self.__dict__.get("_design")
        if got is not None:
            return got
        looks = self.fractions
        fut = self.futility
        rule = fut if isinstance(fut, dict) and "rule" in fut else None
        if isinstance(fut, dict):
            fut = rule or gs.BetaSpending(fut["kind"], fut["beta"], fut.get("param"))
        try:
            if self.boundary != "spending" and self.binding:
                raise ParameterError(f"`binding` must be false with boundary = {self.boundary!r} (it has no "
                                     f"futility rule).")
            if self.boundary == "classical":
                if self.spending not in gs.CLASSICAL:
                    raise ParameterError(f"`spending` must be 'obf' or 'pocock' with boundary = 'classical'; got "
                                         f"{self.spending!r}.")
                if fut is not None:
                    raise ParameterError("`futility` must be None with boundary = 'classical' (futility rules "
                                         "come with spending-function boundaries); set boundary = 'spending'.")
                if self.param is not None:
                    raise ParameterError("`param` must be None with boundary = 'classical'.")
                b = gs.classical(self.spending, looks, self.alpha, self._side_count())
            elif self.boundary == "nominal":
                if fut is not None or self.param is not None:
                    raise ParameterError("`futility` and `param` must be None with boundary = 'nominal' (the "
                                         "unadjusted level at every look).")
                b = _nominal(looks, self.alpha, self._side_count())
            elif rule is not None:
                b = self._probability_design(looks, rule)
            else:
                b = gs.boundaries(looks, self.alpha, self._side_count(), self.spending, self.param, fut,
                                  self.binding)
        except ParameterError as err:
            text = str(err)
            if text.startswith("`looks`"):
                text = "`fractions`" + text[len("`looks`"):]
            raise ParameterError(text) from None
        object.__setattr__(self, "_design", b)
        return b

    def _probability_design(self, looks, rule: dict) -> gs.Boundaries:
        """Spending boundaries with a predictive-probability or conditional-power futility rule.

        The rule is a z boundary per interim look (:func:`~simpower.analytic.futility.futility_z`),
        computed from the final efficacy boundary ``c``. Non-binding: the efficacy boundaries are
        those of the design without the rule. Binding: they are recomputed on the paths the rule lets
        through, which moves ``c`` and so the rule's z boundaries; the two are iterated to a fixed point.
        """
        if self._side_count() == 2:
            raise ParameterError("`futility` must be None for a two-sided design (futility rules are for "
                                 "one-sided designs); set the inner analysis's alternative to 'greater' or 'less'.")
        plain = gs.boundaries(looks, self.alpha, 1, self.spending, self.param)
        t = plain.fractions[:-1]
        extra = {k: rule[k] for k in ("prior_mean", "prior_information", "drift") if k in rule}
        b, c = plain, float(plain.efficacy[-1])
        for _ in range(100):
            lower = np.atleast_1d(frules.futility_z(rule["rule"], rule["threshold"], t, c, **extra)) if t.size \
                else np.empty(0)
            above = np.flatnonzero(lower >= b.efficacy[:-1])
            if above.size:
                k = int(above[0])
                raise ParameterError(f"`futility.threshold` {rule['threshold']:g} puts the futility boundary at look "
                                     f"{k + 1} (z {lower[k]:.3f}) at or above the efficacy boundary "
                                     f"({b.efficacy[k]:.3f}); lower the threshold.")
            b = gs.boundaries(looks, self.alpha, 1, self.spending, self.param, list(lower), self.binding)
            if not self.binding or abs(float(b.efficacy[-1]) - c) <= 1e-12:
                break
            c = float(b.efficacy[-1])
        return replace(b, method=f"{b.method}; futility {_rule_text(rule)}")

    def _tracks_lost(self) -> bool:
        """Whether a probability futility rule is set: its replicates record the power it took away."""
        return isinstance(self.futility, dict) and "rule" in self.futility

    def _side_count(self) -> int:
        """1 or 2: ``sides``, else from the inner analysis's ``alternative`` (computed, not stored: a
        pickled copy in a worker process holds the parameters only)."""
        return self.sides or (2 if getattr(self.inner, "alternative", None) == "two-sided" else 1)

    def _direction(self) -> float:
        """-1 when the inner analysis's H1 is 'less' (efficacy is a negative estimate), else 1."""
        return -1.0 if getattr(self.inner, "alternative", None) == "less" else 1.0

    @property
    def looks(self) -> int:
        return len(self.design().fractions)

    def hypothesis_names(self) -> tuple[str, ...]:
        """The stopping-indicator columns: ``look k efficacy`` (k = 1..K), then ``look k futility`` (k < K)."""
        k = self.looks
        names = [f"look {j + 1} efficacy" for j in range(k)]
        if self.design().futility is not None:
            names += [f"look {j + 1} futility" for j in range(k - 1)]
        if self._tracks_lost():
            names.append(LOST)
        return tuple(names)

    @property
    def estimand_label(self):
        """That of the inner analysis (its estimate at stopping is reported)."""
        return getattr(self.inner, "estimand_label", None)

    def null_boundary(self):
        return self.inner.null_boundary() if isinstance(self.inner, Analysis) else None

    def _null(self) -> float:
        nb = self.null_boundary()
        return 0.0 if nb is None else float(nb.value)

    def decision_rule(self) -> str:
        sides = "one" if self._side_count() == 1 else "two"
        return f"its group-sequential boundaries at its own alpha {self.alpha:g} ({sides}-sided)"

    def describe(self) -> str:
        b = self.design()
        fut = "" if b.futility is None else (" with a binding" if self.binding else " with a non-binding") + \
            " futility rule"
        return (f"{self.inner.describe() if hasattr(self.inner, 'describe') else self.inner!r} at {self.looks} "
                f"looks (fractions {', '.join(f'{t:g}' for t in b.fractions)}; {b.method}; alpha "
                f"{self.alpha:g} {'one' if b.sides == 1 else 'two'}-sided{fut}; {self.scale} scale)")

    def looks_lines(self, summary, process=None, name: str | None = None) -> list[str]:
        """The per-look table of a run's summary of this analysis as text (see :func:`looks_table`)."""
        rows, overall = looks_table(self, summary, None if process is None else arm_sizes_of(process))
        return format_looks(name or self.name, rows, overall)

    # -- the statistic at a look ---------------------------------------------------------------
    def _statistic(self, pvalue, estimate, se):
        """The value compared with the z boundaries (arrays or floats; NaN where it cannot be had)."""
        with np.errstate(all="ignore"):
            if self.scale == "p":
                p = np.asarray(pvalue, float)
                if self._side_count() == 2:
                    p = p / 2.0
                return -special.ndtri(np.clip(p, 0.0, 1.0))  # Phi^-1(1 - p)
            z = (np.asarray(estimate, float) - self._null()) / np.asarray(se, float)
            return np.abs(z) if self._side_count() == 2 else self._direction() * z

    def _decide(self, k: int, z):
        """+1 efficacy, -1 futility, 0 continue (or none at the last look), for statistic(s) ``z`` at look k."""
        b = self.design()
        eff = np.asarray(z) >= b.efficacy[k]
        out = np.where(eff, 1, 0)
        if b.futility is not None and k < len(b.fractions) - 1:
            out = np.where(~eff & (np.asarray(z) <= b.futility[k]), -1, out)
        return out

    # -- per replicate ---------------------------------------------------------------------------
    def _slice(self, data, k: int):
        """The long table of look k: the first n_k rows of each arm (row order)."""
        if "y" not in data and "time" in data and "event" in data:
            return self._event_slice(data, k)
        for col in _NOT_PARTICIPANTS:
            if col in data:
                raise ValueError(f"group_sequential looks take the first rows of each arm as participants; the "
                                 f"data have a `{col}` column (rows are not one participant each)")
        t = float(self.design().fractions[k])
        if t >= 1.0:
            return data
        n = len(np.asarray(data["y"]))
        arm = np.asarray(data["arm"]) if "arm" in data else np.zeros(n, np.int64)
        rank, sizes = _rank_in_arm(arm, None)
        keep = np.zeros(n, bool)
        for label, size in sizes.items():
            keep |= (arm == label) & (rank < look_sizes(t, np.asarray(size)))
        return {c: (np.asarray(v)[keep] if np.ndim(v) == 1 and len(v) == n else v) for c, v in data.items()}

    def _event_slice(self, data, k: int):
        """Time-to-event data at look k: the data as they stood when the d_k-th event happened.

        ``d_k = round(t_k D)`` of the D events of the full data set; at that calendar time ``c``
        (``entry + time`` of the d_k-th event in calendar order) the participants who had entered
        (``entry <= c``) are seen with follow-up ``min(time, c - entry)`` and an event only if it
        happened by ``c``. The last look is the full data set. Needs an ``entry`` column (calendar
        time of enrolment).
        """
        if "entry" not in data:
            raise ValueError("group_sequential looks at time-to-event data need an `entry` column (each "
                             "participant's calendar time of enrolment) to place the looks at event counts")
        t = float(self.design().fractions[k])
        if t >= 1.0:
            return data
        time = np.asarray(data["time"], float)
        event = np.asarray(data["event"]) > 0
        entry = np.asarray(data["entry"], float)
        calendar = np.sort((entry + time)[event])
        if calendar.size == 0:
            raise ValueError(_NO_EVENTS)
        d = int(np.clip(np.floor(t * calendar.size + 0.5 + 1e-9), 1, calendar.size))
        c = calendar[d - 1]
        keep = entry <= c
        n = time.size
        out = {col: (np.asarray(v)[keep] if np.ndim(v) == 1 and len(v) == n else v) for col, v in data.items()}
        out["time"] = np.minimum(time[keep], c - entry[keep])
        ev = event[keep] & (entry[keep] + time[keep] <= c)
        out["event"] = ev.astype(np.asarray(data["event"]).dtype)
        return out

    def __call__(self, data):
        k_max = self.looks
        names = self.hypothesis_names()
        for k in range(k_max):
            r = as_test_result(self.inner(self._slice(data, k)))
            z = float(self._statistic(r.pvalue, r.estimate, r.se))
            if not math.isfinite(z):
                return TestResult(pvalue=math.nan, estimate=r.estimate, se=r.se, ci_low=r.ci_low,
                                  ci_high=r.ci_high, pvalues=np.full(len(names), np.nan), names=names)
            d = int(self._decide(k, z))
            if d != 0 or k == k_max - 1:
                ind = np.ones(len(names))
                if d == 1:
                    ind[k] = 0.0
                elif d == -1:
                    ind[k_max + k] = 0.0
                    if self._tracks_lost() and self._run_on(data, k):
                        ind[-1] = 0.0
                return TestResult(pvalue=0.0 if d == 1 else 1.0, estimate=r.estimate, se=r.se, ci_low=r.ci_low,
                                  ci_high=r.ci_high, statistic=z, pvalues=ind, names=names)
        raise AssertionError("unreachable")  # pragma: no cover

    def _run_on(self, data, k: int) -> bool:
        """After a futility stop at look k: whether a later look's statistic would have crossed the efficacy
        boundary (the non-binding design run on). A look the inner analysis fails at (raises, or no finite
        statistic) ends the run without a crossing; its warnings are not the trial's."""
        eff = self.design().efficacy
        for j in range(k + 1, self.looks):
            with WARNINGS_LOCK, warnings.catch_warnings():
                warnings.simplefilter("ignore")
                try:
                    r = as_test_result(self.inner(self._slice(data, j)))
                except Exception:
                    return False
            z = float(self._statistic(r.pvalue, r.estimate, r.se))
            if not math.isfinite(z):
                return False
            if z >= eff[j]:
                return True
        return False

    # -- batch -------------------------------------------------------------------------------------
    def _sub_batches(self, batch):
        """One batch per look (the look's participants), or None when the batch does not fit."""
        if _is_time_to_event(batch):
            got = self._event_batches(batch)
            return None if got is None else got[0]
        if any(c in batch for c in _NOT_PARTICIPANTS) or "y" not in batch.per_rep:
            return None
        y = batch.per_rep["y"]
        if y.ndim != 2:
            return None
        width = y.shape[1]
        present = batch.present
        arm = batch["arm"] if "arm" in batch else np.zeros(width, np.int64)
        subs = []
        for t in self.design().fractions:
            if t >= 1.0:
                subs.append(batch)
            elif present is None and np.ndim(arm) == 1:  # one design for every replicate: select columns
                rank, sizes = _rank_in_arm(arm, None)
                keep = np.zeros(width, bool)
                for label, size in sizes.items():
                    keep |= (arm == label) & (rank < look_sizes(float(t), np.asarray(size)))
                subs.append(_columns(batch, np.flatnonzero(keep), width))
            else:  # per-replicate sizes or arms: the look's rows as a padding mask
                rank, sizes = _rank_in_arm(arm, present)
                keep = np.zeros(rank.shape, bool)
                armb = np.broadcast_to(arm, rank.shape)
                for label, size in sizes.items():
                    keep |= (armb == label) & (rank < look_sizes(float(t), np.asarray(size))[..., None])
                if present is not None:
                    keep &= present
                per_rep = dict(batch.per_rep)
                per_rep["present"] = keep
                subs.append(type(batch)(batch.size, per_rep, dict(batch.shared), dict(batch.info)))
        return subs

    def _event_batches(self, batch):
        """Time-to-event looks for every replicate at once: one batch per look, and the replicates that fail.

        As :meth:`_event_slice`, vectorised: per replicate the calendar time ``c`` of its d_k-th
        event; the rows that had not entered by then are masked out through ``present``, the others
        get follow-up ``min(time, c - entry)`` and an event only if it happened by ``c``. Returns
        ``(subs, fails)`` with ``fails`` (R,) the replicates without any event (the per-replicate path
        raises on them at the first interim look), or None when the batch has no ``entry`` column.
        """
        if "entry" not in batch or any(c in batch for c in _NOT_PARTICIPANTS):
            return None
        time = np.asarray(batch.per_rep["time"], float)
        if time.ndim != 2:
            return None
        event_col = np.asarray(batch.per_rep["event"])
        event = event_col > 0
        entry = np.broadcast_to(np.asarray(batch["entry"], float), time.shape)
        present = batch.present
        seen = event if present is None else event & present
        calendar = np.sort(np.where(seen, entry + time, np.inf), axis=1)
        n_events = np.count_nonzero(seen, axis=1)
        fails = n_events == 0
        subs = []
        for t in self.design().fractions:
            if t >= 1.0:
                subs.append(batch)
                continue
            d = np.clip(np.floor(float(t) * n_events + 0.5 + 1e-9).astype(np.int64), 1, np.maximum(n_events, 1))
            c = np.take_along_axis(calendar, (d - 1)[:, None], axis=1)  # (R, 1); inf without events
            keep = entry <= c
            if present is not None:
                keep &= present
            per_rep = dict(batch.per_rep)
            with np.errstate(invalid="ignore"):
                per_rep["time"] = np.minimum(time, c - entry)
            per_rep["event"] = (event & (entry + time <= c)).astype(event_col.dtype)
            per_rep["present"] = keep
            subs.append(type(batch)(batch.size, per_rep, dict(batch.shared), dict(batch.info)))
        return subs, fails

    def supports_batch(self, batch):
        if not self.has_batch:
            return False
        try:
            subs = self._sub_batches(batch)
        except Exception:
            return False
        return subs is not None and all(self.inner.supports_batch(s) for s in subs)

    @property
    def has_batch(self) -> bool:
        return isinstance(self.inner, Analysis) and self.inner.has_batch

    def batch(self, batch):
        no_events = None  # time-to-event looks: replicates without events fail at the first interim look
        if _is_time_to_event(batch):
            subs, no_events = self._event_batches(batch)
        else:
            subs = self._sub_batches(batch)
        r = batch.size
        k_max = self.looks
        names = self.hypothesis_names()
        out = {f: np.full(r, np.nan) for f in ("estimate", "se", "ci_low", "ci_high")}
        pvalue = np.full(r, np.nan)
        ind = np.ones((r, len(names)))
        active = np.ones(r, bool)
        errors: list[tuple[str, np.ndarray, str]] = []
        warns: list[tuple[str, np.ndarray, str]] = []
        track = self._tracks_lost()
        running_on = np.zeros(r, bool)  # stopped for futility, run on to see whether they would have rejected
        eff = self.design().efficacy
        for k, sub in enumerate(subs):
            if not (active.any() or running_on.any()):
                break
            res = as_batch_result(self.inner.batch(sub))
            field = {f: (None if getattr(res, f) is None else np.broadcast_to(np.asarray(getattr(res, f), float), (r,)))
                     for f in ("pvalue", "estimate", "se", "ci_low", "ci_high")}
            nan = np.full(r, np.nan)
            z = np.broadcast_to(self._statistic(field["pvalue"], field["estimate"] if field["estimate"] is not None
                                                else nan, field["se"] if field["se"] is not None else nan), (r,))
            failed = np.zeros(r, bool)
            if no_events is not None and self.design().fractions[k] < 1.0:
                # the per-replicate path raises before the inner analysis runs: only this cause, no fields
                failed = no_events & active
                if failed.any():
                    errors.append(("error:ValueError", failed.copy(), "ValueError: " + _NO_EVENTS))
                    field = {f: (None if v is None else np.where(failed, np.nan, v)) for f, v in field.items()}
                no_events = None
            for cause, mask in res.trouble.items():
                m = np.asarray(mask, bool) & active & ~failed
                if cause.startswith("warning:"):
                    warns.append((cause, m, res.trouble_messages.get(cause, "")))
                else:
                    errors.append((cause, m, res.trouble_messages.get(cause, "")))
                    failed |= m
            if running_on.any():  # as _run_on: a look the inner analysis fails at ends the run without a crossing
                err = np.zeros(r, bool)
                for cause, mask in res.trouble.items():
                    if not cause.startswith("warning:"):
                        err |= np.asarray(mask, bool)
                going = running_on & ~err & np.isfinite(z)
                hit = going & (np.where(going, z, -np.inf) >= eff[k])
                ind[hit, -1] = 0.0
                running_on = going & ~hit
            bad = active & (failed | ~np.isfinite(z))
            d = np.where(np.isfinite(z), self._decide(k, np.where(np.isfinite(z), z, 0.0)), 0)
            stop = active & ~bad & ((d != 0) | (k == k_max - 1))
            ends = stop | bad
            for f in out:
                if field[f] is not None:
                    out[f][ends] = field[f][ends]
            pvalue[stop] = np.where(d[stop] == 1, 0.0, 1.0)
            ind[stop & (d == 1), k] = 0.0
            if len(names) > k_max and k < k_max - 1:
                ind[stop & (d == -1), k_max + k] = 0.0
            ind[bad] = np.nan
            if track and k < k_max - 1:
                running_on |= stop & (d == -1)
            active &= ~ends
        res = BatchResult(pvalue=pvalue, pvalues=ind, names=names, **out)
        for cause, m, msg in errors + warns:
            if m.any():
                res.mark(cause, m, msg)
        return res


def _is_time_to_event(batch) -> bool:
    """Time-to-event data (``time`` and ``event`` per replicate, no outcome ``y``): looks at event counts."""
    return "y" not in batch.per_rep and "time" in batch.per_rep and "event" in batch.per_rep


def _nominal(looks, alpha: float, sides: int) -> gs.Boundaries:
    """The fixed-sample critical value at every look, and its real crossing probabilities under H0."""
    t = np.arange(1, looks + 1) / looks if isinstance(looks, int) else np.asarray(looks, float)
    z = np.full(t.size, float(special.ndtri(1.0 - alpha / sides)))
    plain = gs.Boundaries(t, z, None, np.zeros(t.size), alpha, sides, "nominal (unadjusted) level at every look")
    cr = gs.crossing_probabilities(plain, 0.0)
    crossing = cr.upper + (cr.lower if sides == 2 else 0.0)
    return gs.Boundaries(t, z, None, crossing, alpha, sides, plain.method)


def _columns(batch, cols: np.ndarray, width: int):
    """The batch restricted to columns ``cols`` (one design shared by every replicate)."""
    per_rep = {k: (v[:, cols] if v.ndim == 2 and v.shape[1] == width else v) for k, v in batch.per_rep.items()}
    shared = {k: (v[cols] if np.ndim(v) == 1 and v.size == width else v) for k, v in batch.shared.items()}
    info = dict(batch.info)
    arm = shared.get("arm")
    if arm is not None:
        if "n0" in info:
            info["n0"] = int(np.count_nonzero(arm == 0))
        if "n1" in info:
            info["n1"] = int(np.count_nonzero(arm == 1))
        if "sizes" in info:
            info["sizes"] = [int(np.count_nonzero(arm == j)) for j in range(len(info["sizes"]))]
    elif "n" in info:
        info["n"] = int(cols.size)
    return type(batch)(batch.size, per_rep, shared, info)


# -- reading a run ---------------------------------------------------------------------------------
def stop_of(pvalues: np.ndarray, looks: int) -> tuple[np.ndarray, np.ndarray]:
    """Per replicate, the look where the trial stopped (1-based; 0 for a failed replicate) and its decision.

    ``pvalues`` are the recorded stopping indicators (R, columns) of :class:`GroupSequential`;
    decisions are "efficacy", "futility", "none" (ran to the last look without rejecting) or "" (failed).
    """
    p = np.asarray(pvalues, float)
    r = p.shape[0]
    look = np.zeros(r, np.int64)
    decision = np.full(r, "", dtype=object)
    ok = np.all(np.isfinite(p), axis=1)
    eff = p[:, :looks] == 0
    fut = p[:, looks:2 * looks - 1] == 0  # a last column past them is the power-lost indicator (LOST)
    for k in range(looks):
        m = ok & eff[:, k]
        look[m], decision[m] = k + 1, "efficacy"
        if k < fut.shape[1]:
            m = ok & fut[:, k]
            look[m], decision[m] = k + 1, "futility"
    m = ok & (look == 0)
    look[m], decision[m] = looks, "none"
    return look, decision


def looks_table(analysis: GroupSequential, summary, arm_sizes=None):
    """The per-look table of a run of a group-sequential analysis, and its overall figures.

    Parameters
    ----------
    analysis : GroupSequential
    summary : AnalysisSummary
        The run's summary of that analysis (its ``per_hypothesis`` rates are
        the stopping proportions).
    arm_sizes : sequence of int, optional
        The full size of each arm (for the sample size at each look and the
        expected sample size); None: reported as fractions of the maximum.

    Returns
    -------
    (list of dict, dict)
        One row per look (fraction, efficacy boundary on the z and p scale,
        futility boundary, cumulative alpha spent, participants, proportion
        stopping for efficacy / futility with MCSE), and the overall figures
        (rejection rate and MCSE, expected sample size and MCSE, replicates; with a probability
        futility rule ``power_lost`` and its MCSE: the share of replicates that stopped for futility
        but would have crossed an efficacy boundary had they run on, which is the rejection rate
        the non-binding rule costs; None otherwise).
    """
    b = analysis.design()
    k_max = len(b.fractions)
    per = summary.get("per_hypothesis", {}) or {}
    n_ok = summary.get("n_ok", 0)
    sizes = None if arm_sizes is None else [np.asarray(look_sizes(float(t), np.asarray(arm_sizes)))
                                            for t in b.fractions]
    totals = [float(t) if sizes is None else float(np.sum(s)) for t, s in zip(b.fractions, sizes or b.fractions)]
    rows, stop = [], []
    for k in range(k_max):
        e = per.get(f"look {k + 1} efficacy", {"power": math.nan, "mcse": math.nan})
        f = per.get(f"look {k + 1} futility") if b.futility is not None and k < k_max - 1 else None
        stop_k = e["power"] + (f["power"] if f else 0.0)
        stop.append(stop_k)
        rows.append({"look": k + 1, "fraction": float(b.fractions[k]),
                     "n": None if sizes is None else int(np.sum(sizes[k])),
                     "efficacy_z": float(b.efficacy[k]), "nominal_p": float(b.nominal[k]),
                     "futility_z": None if b.futility is None or k == k_max - 1 else float(b.futility[k]),
                     "alpha_spent": float(b.spent[k]),
                     "stop_efficacy": e["power"], "stop_efficacy_mcse": e["mcse"],
                     "stop_futility": f["power"] if f else None, "stop_futility_mcse": f["mcse"] if f else None})
    # the last look takes every replicate still running
    stop[-1] = max(0.0, 1.0 - sum(stop[:-1]))
    mean = sum(p * n for p, n in zip(stop, totals))
    var = max(0.0, sum(p * n * n for p, n in zip(stop, totals)) - mean * mean)
    overall = {"rejection": summary.get("power"), "rejection_mcse": summary.get("mcse"),
               "expected_n": mean, "expected_n_mcse": math.sqrt(var / n_ok) if n_ok else math.nan,
               "expected_n_unit": "participants" if sizes is not None else "fraction of the maximum",
               "max_n": totals[-1], "reps": n_ok, "method": b.method,
               "bias": summary.get("bias"), "bias_mcse": summary.get("bias_mcse")}
    lost = per.get(LOST)
    overall["power_lost"] = None if lost is None else lost["power"]
    overall["power_lost_mcse"] = None if lost is None else lost["mcse"]
    return rows, overall


def arm_sizes_of(process) -> list[int] | None:
    """The full size of each arm of one drawn data set (a fixed generator: the design, not the run's numbers)."""
    try:
        data = process(np.random.default_rng(0)) if not getattr(process, "has_batch", False) else \
            process.draw_batch(np.random.default_rng(0), 1).replicate(0)
        if any(c in data for c in _NOT_PARTICIPANTS):
            return None
        n = len(np.asarray(data["y"]))
        arm = np.asarray(data["arm"]) if "arm" in data else np.zeros(n, np.int64)
        return [int(np.count_nonzero(arm == a)) for a in np.unique(arm)]
    except Exception:
        return None


def lost_text(overall) -> str:
    """"; power lost to futility x (MCSE y)" when the run tracked it, else ""."""
    if overall.get("power_lost") is None:
        return ""
    return (f"; power lost to futility {overall['power_lost']:.4f} (MCSE {overall['power_lost_mcse']:.4f}: "
            f"stopped for futility, would have rejected had they run on)")


def format_looks(name: str, rows, overall) -> list[str]:
    """The per-look table as text lines (for the terminal and the report)."""
    unit = overall["expected_n_unit"]
    lines = [f"Group-sequential design of `{name}` ({overall['method']}): rejection rate "
             f"{overall['rejection']:.4f} (MCSE {overall['rejection_mcse']:.4f}); expected sample size "
             f"{overall['expected_n']:.4g} (MCSE {overall['expected_n_mcse']:.2g}) of {overall['max_n']:g} "
             f"{unit}" + ("" if overall.get("bias") is None else
                          f"; bias of the estimate at stopping {overall['bias']:.4g} "
                          f"(MCSE {overall['bias_mcse']:.2g})") + lost_text(overall)]
    head = f"{'look':>4} {'fraction':>8} {'n':>6} {'eff. z':>7} {'nominal p':>9} {'fut. z':>7} {'alpha spent':>11} " \
           f"{'stop eff.':>9} {'MCSE':>6} {'stop fut.':>9} {'MCSE':>6}"
    lines.append(head)
    for r in rows:
        def f(v, fmt):
            return "-" if v is None or (isinstance(v, float) and not math.isfinite(v)) else format(v, fmt)
        lines.append(f"{r['look']:>4} {r['fraction']:>8.3f} {f(r['n'], 'd'):>6} {f(r['efficacy_z'], '.3f'):>7} "
                     f"{f(r['nominal_p'], '.5f'):>9} {f(r['futility_z'], '.3f'):>7} {r['alpha_spent']:>11.5f} "
                     f"{f(r['stop_efficacy'], '.4f'):>9} {f(r['stop_efficacy_mcse'], '.4f'):>6} "
                     f"{f(r['stop_futility'], '.4f'):>9} {f(r['stop_futility_mcse'], '.4f'):>6}")
    return lines
