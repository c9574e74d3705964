"""Where the type I error check puts the effect: on the boundary of each analysis's H0.

A test of "no effect" is checked at the process's own null (:meth:`Process.null`:
effect 0, or ratio 1). A test whose H0 is elsewhere says so through
:meth:`Analysis.null_boundary`: an equivalence test (TOST) at its upper margin, a
non-inferiority test at its margin, a test of H0: mean difference = 0.3 (e.g. a
superiority-by-a-margin t-test) at 0.3. The boundary is a value of what the
analysis estimates; :func:`effect_on_boundary` finds the value of the process's
effect parameter whose true effect (:meth:`Process.true_effect`) equals it, so an
effect given as Cohen's d or as a ratio is converted, and a boundary on another
scale (a ratio of geometric means against a mean difference) is refused in one line.

:func:`null_points` groups a scenario's analyses by the effect they need: one
scenario to run per distinct boundary. The analyses tested against "no effect"
run together in ``scenario.null()`` with all the scenario's analyses, exactly as
before boundaries existed, so their numbers (same seed) do not change.
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass
from typing import Any

from ..errors import ParameterError

#: relative tolerance to which the true effect must meet the boundary
_TOL = 1e-9
_MAX_STEPS = 60


@dataclass(frozen=True)
class NullPoint:
    """One scenario the type I check runs, and the analyses whose rate is read from it."""

    scenario: Any
    analyses: tuple[str, ...]
    #: where the effect was put, in words, e.g. "upper equivalence margin 15: effect = 15"
    null_at: str
    #: the process's effect parameter there (NaN when it is not one number, e.g. a list of arm effects)
    effect: float


def _show(v) -> str:
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_show(x) for x in v) + "]"
    return f"{v:g}" if isinstance(v, numbers.Real) else repr(v)


def _scalar(v) -> float:
    return float(v) if isinstance(v, numbers.Real) and not isinstance(v, bool) else math.nan


def _true_effect_at(process, param: str, value: float) -> float:
    try:
        v = process.replace(**{param: value}).true_effect()
    except (ParameterError, ValueError, TypeError, ArithmeticError):
        return math.nan
    return math.nan if v is None else float(v)


def _solve(process, param: str, target: float) -> float | None:
    """The effect whose true effect is ``target``: secant steps from the null, the first one as if
    the effect were on the estimand's scale (exact at once for a shift, in one more step for any
    effect the true effect is affine in, such as Cohen's d or a ratio of means)."""
    tol = _TOL * max(1.0, abs(target))
    e0 = _scalar(process.null_value())
    f0 = _true_effect_at(process, param, e0) - target
    if not math.isfinite(f0):
        return None
    if abs(f0) <= tol:
        return e0
    e1 = e0 - f0
    f1 = _true_effect_at(process, param, e1) - target
    for h in (1e-3, -1e-3):
        if math.isfinite(f1):
            break
        e1 = e0 + h * max(1.0, abs(e0))
        f1 = _true_effect_at(process, param, e1) - target
    for _ in range(_MAX_STEPS):
        if abs(f1) <= tol:
            return e1
        if not math.isfinite(f1) or f1 == f0:
            return None
        e0, f0, e1 = e1, f1, e1 - f1 * (e1 - e0) / (f1 - f0)
        f1 = _true_effect_at(process, param, e1) - target
    return None


def effect_on_boundary(scenario, name: str, boundary) -> float:
    """The value of the process's effect parameter that puts analysis ``name`` on ``boundary``.

    Raises
    ------
    ParameterError
        One line naming the analysis and the fix, when the process has no
        scalar effect parameter, when what it calls its true effect is not what
        the analysis estimates, or when no effect reaches the boundary.
    """
    process = scenario.process
    analysis = scenario.analyses[name]
    where = f"the type I check of `{name}` puts the effect on its {boundary.label} {boundary.value:g}"
    param = getattr(process, "effect_param", None)
    if not param:
        raise ParameterError(f"{where}, but the process has no effect parameter; give the process an "
                             f"`effect_param`, or run the scenario with its effect on that boundary yourself.")
    current = process.get_params().get(param)
    if not isinstance(current, numbers.Real) or isinstance(current, bool):
        raise ParameterError(f"{where}, but the process's effect `{param}` is not one number ({_show(current)}); "
                             f"use a two-arm process, or run the scenario with its effect on that boundary yourself.")
    a_label = getattr(analysis, "estimand_label", None)
    p_label = getattr(process, "estimand_label", None)
    if name in scenario.true_effects or scenario.true_effect_for(name) is None:
        raise ParameterError(f"{where} ({a_label or 'its estimand'}), but the process's effect `{param}` is on "
                             f"another scale ({p_label or 'unknown'}); no conversion is known: run the scenario "
                             f"with its effect on that boundary yourself (its power there is the type I error).")
    try:
        known = process.true_effect() is not None
    except Exception:  # a user process that cannot tell
        known = False
    if not known:
        raise ParameterError(f"{where}, but the process cannot tell its true effect (`true_effect()` gives "
                             f"None), so the effect there is unknown; run the scenario with its effect on that "
                             f"boundary yourself.")
    value = _solve(process, param, float(boundary.value))
    if value is None:
        raise ParameterError(f"{where}, but no value of the process's `{param}` gives a true effect "
                             f"({p_label or 'effect'}) of {boundary.value:g}; check the margin against the "
                             f"process (e.g. a ratio effect must stay > 0).")
    return value


def null_points(scenario) -> list[NullPoint]:
    """The scenarios the type I check runs for ``scenario``, one per distinct H0 boundary.

    Analyses without a boundary (H0: no effect) come first, run in
    ``scenario.null()`` with all analyses; each boundary's analyses run in a
    scenario holding only them, with the process's effect on that boundary.
    """
    groups: dict[Any, list[str]] = {}
    labels: dict[Any, str] = {}
    for name, a in scenario.analyses.items():
        get = getattr(a, "null_boundary", None)
        boundary = get() if callable(get) else None
        if boundary is None:
            groups.setdefault(None, []).append(name)
            continue
        value = effect_on_boundary(scenario, name, boundary)
        groups.setdefault(value, []).append(name)
        labels.setdefault(value, f"{boundary.label} {boundary.value:g}")
    points = []
    param = getattr(scenario.process, "effect_param", None)
    if None in groups:
        null = scenario.null()
        value = null.process.get_params().get(param) if param else None
        points.append(NullPoint(null, tuple(groups[None]), f"no effect: {param} = {_show(value)}", _scalar(value)))
    for value, names in groups.items():
        if value is None:
            continue
        points.append(NullPoint(_sub_scenario(scenario, names, param, value), tuple(names),
                                f"{labels[value]}: {param} = {value:g}", value))
    return points


def _sub_scenario(scenario, names: list[str], param: str, value: float):
    """``scenario`` with only the analyses ``names`` and the effect parameter set to ``value``."""
    from ..scenario import Scenario

    moved = scenario.with_params(**{f"process.{param}": value})
    true_effect = getattr(scenario, "_true_effect", None)
    if true_effect is not None:  # the user's true effect described the old effect; the boundary is the new one
        true_effect = moved.process.true_effect()
    kept = {k: v for k, v in scenario.true_effects.items() if k in names}
    return Scenario(moved.process, analyses={n: scenario.analyses[n] for n in names}, alpha=scenario.alpha,
                    true_effect=true_effect, true_effects=kept, name=scenario.name, description=scenario.description)
