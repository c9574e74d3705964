"""Independent arms with any continuous outcome: ``two_arm`` and ``multi_arm``.

A design composes an outcome distribution (``outcome``, see
:mod:`simpower.processes.outcomes`), a treatment effect, per-arm SDs, an
optional baseline covariate and an optional missingness mechanism
(``missing``, see :mod:`simpower.processes.missing`).

The treatment arm's values are the outcome's draws X transformed by the effect:

* ``effect_type = "shift"``: X + effect (a mean difference in outcome units);
* ``"d"``: X + effect * SD (a standardised mean difference, SD = the outcome's SD);
* ``"ratio"``: X * effect (a ratio of means; the outcome must be non-negative).

``sd_ratio`` (per-arm ``sds`` for ``multi_arm``) then scales the arm's deviations
around its mean, which leaves the mean alone and multiplies the SD.

The long table has columns ``y`` and ``arm`` (control = 0, rows in arm
order), plus ``baseline`` when a baseline covariate is asked for and
``observed`` (1/0) when a missingness mechanism is given (missing outcomes are
NaN in ``y``).
"""

from __future__ import annotations

import math
import numbers

import numpy as np

from .._validation import Anything, Int, Real
from ..components import Nested
from ..errors import ParameterError
from ..facts import MultiArmFacts
from .base import Batch, Process
from .composed import Arms
from .design import TwoArms, Vocabulary, apply_missing, arm_defaults, arm_params
from .effects import (  # noqa: F401 - the effect layer's helpers, importable from here as before
    CORR, EFFECT_TYPE, POSITIVE, _check_missing, _check_outcome_for, _describe_effect, _effect_values,
    _outcome_rules, copula_correlation, copula_series, latent_correlation)
from .factories import TrialFactory
from .outcomes import Described, Normal


class TwoArm(TwoArms, TrialFactory):
    """Two independent arms with any outcome distribution, effect type, SDs, baseline and missingness.

    Parameters
    ----------
    n : int >= 2
        Size of the control arm (arm 0).
    ratio : float > 0, default 1
        Allocation ratio n_treatment / n_control; the treatment arm has
        ``round(ratio * n)`` participants (at least 2).
    n1 : int >= 2, optional
        The treatment arm's size, given directly instead of ``ratio``
        (``sizes = [n0, n1]`` gives both arms at once).
    outcome : outcome, default normal(0, 1)
        Distribution of the control arm's outcome (object or ``{type = ...}`` table;
        a frozen scipy distribution works too).
    effect : float, default 0
        Size of the effect, in the units ``effect_type`` says.
    effect_type : {"shift", "d", "ratio"}, default "shift"
        ``shift``: treatment adds ``effect``; ``d``: treatment adds ``effect``
        times the outcome's SD; ``ratio``: treatment multiplies the outcome by
        ``effect`` (> 0; the outcome must be non-negative).
    sd_ratio : float > 0, default 1
        The treatment arm's deviations around its mean are multiplied by this
        (its SD becomes sd_ratio times what the effect alone gives).
    baseline_corr : float in (-1, 1), optional
        Adds a ``baseline`` column: a pre-randomisation measurement with the
        same distribution as the control-arm outcome, whose Pearson
        correlation with the outcome is ``baseline_corr`` in each arm. Baseline
        and outcome are joined by a Gaussian copula (normal scores with a
        correlation calibrated so that the Pearson correlation on the outcome
        scale is ``baseline_corr``; for a normal outcome the two coincide).
        For a skewed outcome, strongly negative values may be unreachable (an
        error says the range).
    missing : missingness, optional
        A mechanism (``mcar``, ``mar``, ``mnar``) applied after the effect;
        missing outcomes become NaN and an ``observed`` column is added.

    Notes
    -----
    ``true_effect()`` is the difference in population means (treatment minus
    control) in outcome units, which the t-tests and regression analyses
    estimate: ``effect`` for ``shift``, ``effect * sd`` for ``d``, and
    ``mean0 * (effect - 1)`` for ``ratio`` (the ratio itself is ``effect``).
    The null (``null()``) sets ``effect`` to 0, or to 1 for ``ratio``.

    A factory over ``trial``: ``design = arms(n, ratio, n1, baseline_corr)``,
    ``outcome``, ``effect``, ``effect_type``, ``sd_ratio``, ``missing`` (see
    :attr:`trial`).
    """

    name = "two_arm"
    params = arm_params({"n": Int(low=2), "ratio": POSITIVE, "outcome": Nested("outcome"), "effect": Real(),
                         "effect_type": EFFECT_TYPE, "sd_ratio": POSITIVE, "baseline_corr": CORR,
                         "missing": Nested("missingness", optional=True)})
    defaults = arm_defaults({"ratio": 1.0, "outcome": Normal(), "effect": 0.0, "effect_type": "shift",
                             "sd_ratio": 1.0, "baseline_corr": None, "missing": None})

    def layers(self):
        return {"design": Arms(n=self.n, ratio=self.ratio, n1=self._p["n1"], baseline_corr=self.baseline_corr),
                "outcome": self.outcome, "effect": self.effect, "effect_type": self.effect_type,
                "sd_ratio": self.sd_ratio, "missing": self.missing}

    @property
    def latent_corr(self) -> float | None:
        """Correlation of the normal scores of baseline and outcome (None without a baseline)."""
        return self._trial.latent_corr

    def describe(self):
        parts = [f"two independent arms of {self.n0} (control) and {self.n1} (treatment)",
                 f"outcome {self.outcome.describe()}",
                 _describe_effect(self.effect, self.effect_type, self.outcome)]
        if self.sd_ratio != 1:
            parts.append(f"treatment-arm deviations around its mean scaled by {self.sd_ratio:g}")
        if self.baseline_corr is not None:
            parts.append(f"a baseline covariate with the outcome's distribution, correlation {self.baseline_corr:g} "
                         f"with the outcome (Gaussian copula, normal-scores correlation {self.latent_corr:.3f})")
        if self.missing is not None:
            parts.append(self.missing.describe())
        parts.append(f"estimand: treatment minus control difference in mean outcome = {self.true_effect():.4g}")
        return "; ".join(parts)


def _numbers(field, value, k=None, positive=False):
    if isinstance(value, (str, bytes)) or not hasattr(value, "__len__"):
        raise ParameterError(f"`{field}` must be a list of numbers; got {value!r}.")
    vals = list(value)
    if k is not None and len(vals) != k:
        raise ParameterError(f"`{field}` must have one entry per arm ({k}); got {len(vals)}.")
    for v in vals:
        if isinstance(v, bool) or not isinstance(v, numbers.Real) or not math.isfinite(v) or (positive and v <= 0):
            need = "positive numbers" if positive else "finite numbers"
            raise ParameterError(f"`{field}` must hold {need}; got {value!r}.")
    return tuple(float(v) for v in vals)


class MultiArm(Vocabulary, Process):
    """k >= 2 independent arms (arm 0 = control) with per-arm effects, sizes and SDs.

    Parameters
    ----------
    effects : list of k numbers
        Effect of each arm relative to control, in the units of
        ``effect_type``; the first entry is the control arm and must be the
        null value (0, or 1 for ``ratio``). ``k`` is its length.
    n : int >= 2 or list of k ints >= 2
        Size of the control arm (then ``allocation`` gives the others), or
        the size of every arm. A list may also be given as ``sizes``.
    allocation : list of k positive numbers, optional
        Relative arm sizes: arm j has ``round(n * allocation[j] / allocation[0])``
        participants. Default: equal arms. Not with a list ``n``.
    sds : list of k positive numbers, optional
        SD of each arm in outcome units; arm j's deviations around its mean
        are multiplied by ``sds[j] / outcome.sd``. Default: the outcome's SD.
    outcome : outcome, default normal(0, 1)
    effect_type : {"shift", "d", "ratio"}, default "shift"
    missing : missingness, optional
        ``mcar``, ``mnar``, or ``mar`` with ``on = "arm"``.

    Notes
    -----
    Columns ``y`` and ``arm`` (0..k-1, in arm order). ``true_effects()`` gives
    each arm's mean difference from control in outcome units; ``true_effect()``
    is that of arm 1 when k = 2, else None (a k-arm analysis has several estimands).
    """

    name = "multi_arm"
    aliases = {"sizes": "n"}
    effect_param = "effects"
    params = {"effects": Described(text="a list of effects, one per arm, control first (e.g. [0, 0.3, 0.5])"),
              "n": Described(text="the control-arm size (an integer >= 2) or a list of arm sizes"),
              "allocation": Anything(),
              "sds": Anything(), "outcome": Nested("outcome"), "effect_type": EFFECT_TYPE,
              "missing": Nested("missingness", optional=True)}
    defaults = {"allocation": None, "sds": None, "outcome": Normal(), "effect_type": "shift", "missing": None}

    def __setstate__(self, state):
        super().__setstate__(state)
        self._check()

    def _check(self):
        p = dict(self._p)
        p["effects"] = effects = _numbers("effects", p["effects"])
        k = len(effects)
        if k < 2:
            raise ParameterError(f"`effects` must list at least 2 arms (control first); got {k}.")
        null = 1.0 if p["effect_type"] == "ratio" else 0.0
        if effects[0] != null:
            raise ParameterError(f"`effects[0]` is the control arm and must be {null:g}; got {effects[0]:g} "
                                 f"(give effects relative to control, e.g. [{null:g}, ...]).")
        if p["effect_type"] == "ratio" and min(effects) <= 0:
            raise ParameterError(f"`effects` must be > 0 when `effect_type` = 'ratio'; got {list(effects)}.")
        n = p["n"]
        if isinstance(n, numbers.Integral) and not isinstance(n, bool):
            n = Int(low=2).clean("n", n)
            if p["allocation"] is not None:
                p["allocation"] = alloc = _numbers("allocation", p["allocation"], k, positive=True)
                sizes = tuple(int(round(n * a / alloc[0])) for a in alloc)
            else:
                sizes = (n,) * k
        else:
            if isinstance(n, (str, bytes)) or not hasattr(n, "__len__"):
                raise ParameterError(f"`n` must be an integer >= 2 or a list of {k} integers >= 2; got {n!r}.")
            if p["allocation"] is not None:
                raise ParameterError("`allocation` and a list `n` were both given: give arm sizes or weights, not both.")
            n = tuple(Int(low=2).clean(f"n[{j}]", v) for j, v in enumerate(n))
            if len(n) != k:
                raise ParameterError(f"`n` must have one entry per arm ({k}); got {len(n)}.")
            sizes = n
        p["n"] = n
        small = [j for j, s in enumerate(sizes) if s < 2]
        if small:
            raise ParameterError(f"`allocation` gives arm {small[0]} only {sizes[small[0]]} participants (< 2); "
                                 "raise n or that arm's weight.")
        outcome = p["outcome"]
        if p["sds"] is not None:
            p["sds"] = _numbers("sds", p["sds"], k, positive=True)
            base_sd = outcome.sd
            factors = tuple(s / base_sd for s in p["sds"])
        else:
            factors = (1.0,) * k
        _check_outcome_for(outcome, p["effect_type"], any(f != 1 for f in factors))
        _check_missing(p["missing"], {"arm"}, self.name)
        self._set_params(p)
        object.__setattr__(self, "_sizes", sizes)
        object.__setattr__(self, "_factors", factors)

    @property
    def k(self) -> int:
        """Number of arms."""
        return len(self.effects)

    @property
    def sizes(self) -> tuple[int, ...]:
        """Participants per arm."""
        return self._sizes

    def null_value(self):
        return [1.0 if self.effect_type == "ratio" else 0.0] * self.k

    def true_effects(self) -> list[float]:
        """Mean difference of each arm from control, in outcome units (0 for the control arm)."""
        o = self.outcome
        if self.effect_type == "shift":
            return list(self.effects)
        if self.effect_type == "d":
            return [e * o.sd for e in self.effects]
        return [o.mean * (e - 1.0) for e in self.effects]

    def true_effect(self):
        return self.true_effects()[1] if self.k == 2 else None

    def facts(self):
        """Multi-arm facts for the closed forms (Dunnett, ANOVA F): a normal outcome with equal arm SDs
        and no missingness; none otherwise."""
        if not isinstance(self.outcome, Normal) or self.missing is not None or len(set(self._factors)) != 1:
            return ()
        return (MultiArmFacts(tuple(self.true_effects()), tuple(self._sizes), self.outcome.sd * self._factors[0]),)

    def draw_batch(self, rng, size):
        sizes = self._sizes
        total = sum(sizes)
        shape = (size, total)
        x = np.asarray(self.outcome.sample(rng, shape), dtype=float)
        start = 0
        for j, m in enumerate(sizes):
            if j > 0 or self._factors[j] != 1:
                x[:, start:start + m] = _effect_values(x[:, start:start + m], self.outcome, self.effects[j],
                                                       self.effect_type, self._factors[j])
            start += m
        arm = np.repeat(np.arange(self.k, dtype=np.int8), sizes)
        per_rep = {"y": x}
        info = {"sizes": sizes}
        apply_missing(self.missing, rng, x, {"arm": arm}, per_rep, info)
        return Batch(size, per_rep, {"arm": arm}, info)

    def describe(self):
        eff = ", ".join(f"{e:g}" for e in self.effects[1:])
        unit = {"shift": "added to the outcome", "d": "SDs added to the outcome",
                "ratio": "multiplying the outcome"}[self.effect_type]
        parts = [f"{self.k} independent arms of sizes {', '.join(map(str, self._sizes))} (arm 0 = control)",
                 f"outcome {self.outcome.describe()}", f"effects vs control {eff} ({unit})"]
        if self.sds is not None:
            parts.append(f"arm SDs {', '.join(f'{s:g}' for s in self.sds)}")
        if self.missing is not None:
            parts.append(self.missing.describe())
        te = ", ".join(f"{t:.4g}" for t in self.true_effects()[1:])
        parts.append(f"estimands: mean differences from control = {te}")
        return "; ".join(parts)
