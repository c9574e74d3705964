"""Pilot data as the process: ``pilot_resample`` draws trials by resampling a pilot data set.

Many planners hold a pilot (or historical) data set and want the outcome's real
shape -- skew, ties, outliers, a floor -- rather than a named distribution. This
process resamples the pilot's units with replacement to any size and imposes the
*planned* effect on the treatment arm:

* ``effect_type = "shift"``: add ``effect`` (outcome units);
* ``"ratio"``: multiply by ``effect`` (a ratio of means; the outcome must be >= 0);
* ``"odds_ratio"``: for a 0/1 outcome, change the treatment arm's probability
  from the pilot's p to p1 = OR p / (1 - p + OR p) by turning a share
  (p1 - p) / (1 - p) of its 0s into 1s (or a share (p - p1) / p of its 1s into
  0s), so every value stays 0 or 1.

The pilot's own arms: with an ``arm`` column, ``arms = "pool"`` (default)
centres each pilot arm on the pooled mean before resampling, so the pilot's
observed difference is *not* carried into the simulation (a pilot is too small
to estimate an effect, and carrying it in would be sizing on a noisy estimate);
``"control"`` resamples the pilot's control rows only; ``"separate"`` resamples
each arm from its own rows, carrying the pilot difference in -- only when asked.

A bootstrap sample's spread is too small by a factor sqrt((m - 1) / m) on
average for m pilot units (the resampled values' variance has expectation
(m - 1)/m times the pilot's unbiased variance). ``spread = "inflate"`` scales
each resampled deviation from the pilot mean by sqrt(m / (m - 1)), which
restores the pilot's variance in expectation; ``"smooth"`` adds Gaussian kernel
noise with Silverman's bandwidth and shrinks back so the variance is kept
(the shrunk smoothed bootstrap; Silverman 1986, section 6.4.1; Efron &
Tibshirani 1993, section 16.5); ``"none"`` resamples as is.

Cautions the process states (:meth:`PilotResample.pilot_summary`, ``describe``):
a pilot of fewer than 35 units per arm estimates an SD poorly (Teare et al.
2014, Trials 15:264); the power at the upper 80% one-sided confidence limit of
the pilot SD (Browne 1995, Stat Med 14:1933-1940) shows how much a larger true
SD would cost.

Data: ``data = "pilot.csv"`` (a CSV file, relative to the scenario file) with
the column ``outcome`` (default "y"), optionally ``arm`` (0/1) -- or the values
themselves (``values``, ``arm_values``), which :meth:`PilotResample.from_frame`
fills from a DataFrame. A file is read once, at construction, into ``values``,
so the scenario's fingerprint (and so its seeds) follows the data's content.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
from scipy import stats

from .._validation import Anything, Choice, Real, Text
from ..errors import ParameterError
from .base import Batch, Process
from .design import TwoArms, apply_missing, arm_defaults, arm_params
from .normal import MISSING

#: fewer pilot units per arm than this: the SD is poorly estimated (Teare et al. 2014)
SMALL_PILOT = 35


def _numbers(name, values, integer=False):
    try:
        arr = np.asarray(values, dtype=float)
    except (TypeError, ValueError):
        raise ParameterError(f"`{name}` must be a list of numbers; got {values!r}.") from None
    if arr.ndim != 1 or arr.size == 0:
        raise ParameterError(f"`{name}` must be a non-empty list of numbers.")
    return arr


def check_pilot_effect(spec, y) -> None:
    """The planned effect fits the pilot outcomes ``y``: a ratio needs y >= 0, an odds ratio 0/1 values and no
    spread correction (``spec``: ``effect``, ``effect_type``, ``spread``); else a one-line ParameterError."""
    if spec.effect_type == "ratio":
        if not spec.effect > 0:
            raise ParameterError(f"`effect` must be > 0 when `effect_type` = 'ratio'; got {spec.effect:g}.")
        if np.any(y < 0):
            raise ParameterError("`effect_type` = 'ratio' needs a non-negative outcome; the pilot has negative "
                                 "values: use 'shift'.")
    if spec.effect_type == "odds_ratio":
        if not np.all((y == 0) | (y == 1)):
            raise ParameterError("`effect_type` = 'odds_ratio' needs a 0/1 pilot outcome.")
        if not spec.effect > 0:
            raise ParameterError(f"`effect` must be > 0 (an odds ratio) when `effect_type` = 'odds_ratio'; got "
                                 f"{spec.effect:g}.")
        if spec.spread != "none":
            raise ParameterError("`spread` must be 'none' for a 0/1 outcome (a correction would leave 0/1).")


def planned_difference(spec, m0: float, m1: float) -> float:
    """Treatment minus control mean outcome when the planned effect (``spec.effect``, ``spec.effect_type``) is
    imposed on a treatment pool of mean ``m1`` against a control pool of mean ``m0``: a shift adds it, a ratio
    multiplies, an odds ratio moves the proportion m1 to OR m1 / (1 - m1 + OR m1)."""
    if spec.effect_type == "shift":
        return m1 + spec.effect - m0
    if spec.effect_type == "ratio":
        return m1 * spec.effect - m0
    p1 = spec.effect * m1 / (1 - m1 + spec.effect * m1)
    return p1 - m0


def read_pilot(path, outcome: str = "y", arm: str | None = "arm") -> tuple[list[float], list[int] | None]:
    """(outcome values, arm labels or None) of a pilot CSV file; rows with a missing outcome are dropped."""
    import pandas as pd

    from ..registry import current_reference_folder

    p = Path(path)
    if not p.is_absolute() and current_reference_folder() is not None:
        p = Path(current_reference_folder()) / p
    try:
        frame = pd.read_csv(p)
    except FileNotFoundError:
        raise ParameterError(f"`data`: no pilot file {str(p)!r}; give a CSV path relative to the scenario "
                             f"file.") from None
    except Exception as exc:  # noqa: BLE001 - pandas says what is wrong with the file
        raise ParameterError(f"`data`: cannot read {str(p)!r} as CSV ({type(exc).__name__}: {exc}).") from None
    if outcome not in frame.columns:
        raise ParameterError(f"`outcome` column {outcome!r} is not in {p.name} (columns: "
                             f"{', '.join(map(str, frame.columns))}).")
    keep = frame[outcome].notna()
    y = pd.to_numeric(frame.loc[keep, outcome], errors="coerce")
    if y.isna().any():
        raise ParameterError(f"`outcome` column {outcome!r} of {p.name} has values that are not numbers.")
    arms = None
    if arm is not None and arm in frame.columns:
        a = frame.loc[keep, arm]
        if not set(a.unique()) <= {0, 1}:
            raise ParameterError(f"the `arm` column {arm!r} of {p.name} must hold 0 (control) and 1 (treatment).")
        arms = [int(v) for v in a]
    return [float(v) for v in y], arms


class PilotResample(TwoArms, Process):
    """Trials resampled from pilot data, with the planned effect imposed on the treatment arm.

    Parameters
    ----------
    n, ratio, n1
        Arm sizes of the planned trial (see :class:`~simpower.processes.design.TwoArms`).
    data : str, optional
        A CSV file of the pilot (relative to the scenario file); read at construction into ``values``.
    outcome, arm : str
        Column names in ``data`` (default "y" and "arm"; the arm column is optional).
    values : list of float, optional
        The pilot outcomes themselves (instead of ``data``).
    arm_values : list of 0/1, optional
        The pilot arm of each value.
    arms : {"pool", "control", "separate"}
        How the pilot's arms are used (see the module notes); without arms, ignored.
    effect : float
        The planned effect, imposed by ``effect_type``.
    effect_type : {"shift", "ratio", "odds_ratio"}
    spread : {"none", "inflate", "smooth"}
        The bootstrap spread correction (see the module notes).
    missing : missingness, optional
    """

    name = "pilot_resample"
    estimand_label = "mean difference"
    params = arm_params({"n": None, "data": Text(optional=True), "outcome": Text(), "arm": Text(),
                         "values": Anything(), "arm_values": Anything(), "arms": Choice(("pool", "control", "separate")),
                         "effect": Real(), "effect_type": Choice(("shift", "ratio", "odds_ratio")),
                         "spread": Choice(("none", "inflate", "smooth")), "missing": MISSING})
    defaults = arm_defaults({"data": None, "outcome": "y", "arm": "arm", "values": None, "arm_values": None,
                             "arms": "pool", "effect": 0.0, "effect_type": "shift", "spread": "none",
                             "missing": None})

    def __init__(self, **kwargs):
        if "unit" in kwargs:  # the whole-unit sibling: name it rather than the nearest parameter
            raise ParameterError("`unit` is not a parameter of pilot_resample, which resamples single rows; to "
                                 "resample whole clusters or participants use type = \"pilot_units\" "
                                 "(docs/pilot-data.md).")
        super().__init__(**kwargs)

    def _check(self):
        p = dict(self._p)
        if p["values"] is None:
            if p["data"] is None:
                raise ParameterError("`data` (a pilot CSV file) or `values` (the pilot outcomes) is required for "
                                     "pilot_resample.")
            p["values"], p["arm_values"] = read_pilot(p["data"], p["outcome"], p["arm"])
        y = _numbers("values", p["values"])
        if not np.all(np.isfinite(y)):
            raise ParameterError("`values` must be finite numbers (drop missing pilot outcomes).")
        p["values"] = [float(v) for v in y]
        if p["arm_values"] is not None:
            a = _numbers("arm_values", p["arm_values"])
            if a.size != y.size or not np.all((a == 0) | (a == 1)):
                raise ParameterError(f"`arm_values` must give 0 or 1 for each of the {y.size} pilot values.")
            p["arm_values"] = [int(v) for v in a]
        self._set_params(p)
        self._check_arms()
        pools = self._pools()
        for label, pool in pools.items():
            if pool.size < 2:
                raise ParameterError(f"the pilot has {pool.size} usable value(s) for the {label}; at least 2 are "
                                     f"needed to resample.")
        check_pilot_effect(self, y)

    # -- the pilot ----------------------------------------------------------------
    def _pools(self) -> dict[str, np.ndarray]:
        """The values each trial arm resamples from: {"control": ..., "treatment": ...} (the same array when pooled)."""
        y = np.asarray(self.values, float)
        if self.arm_values is None:
            return {"control": y, "treatment": y}
        a = np.asarray(self.arm_values)
        y0, y1 = y[a == 0], y[a == 1]
        if self.arms == "control":
            return {"control": y0, "treatment": y0}
        if self.arms == "separate":
            return {"control": y0, "treatment": y1}
        if self.effect_type == "odds_ratio":  # 0/1 data cannot be centred: pool the rows as they are
            return {"control": y, "treatment": y}
        grand = y.mean()
        if y0.size == 0 or y1.size == 0:
            return {"control": y, "treatment": y}
        if self.effect_type == "ratio":  # remove the pilot's ratio: scale each arm to the pooled mean
            centred = np.where(a == 0, y * grand / y0.mean(), y * grand / y1.mean())
        else:
            centred = np.where(a == 0, y - y0.mean() + grand, y - y1.mean() + grand)
        return {"control": centred, "treatment": centred}

    def _resample(self, rng, pool: np.ndarray, shape) -> np.ndarray:
        idx = rng.integers(0, pool.size, size=shape)
        y = pool[idx]
        if self.spread == "none":
            return y
        m, mean, sd = pool.size, pool.mean(), pool.std(ddof=1)
        if self.spread == "inflate":
            return mean + math.sqrt(m / (m - 1)) * (y - mean)
        # shrunk smoothed bootstrap: kernel noise with Silverman's bandwidth, then scaled so the variance is the
        # pilot's unbiased one: E var(y_i - mean + h e) = (m - 1)/m sd^2 + h^2 over the resampling
        iqr = float(np.subtract(*np.percentile(pool, [75, 25])))
        width = min(sd, iqr / 1.349) if iqr > 0 else sd
        h = 0.9 * width * m ** (-0.2)
        noisy = y - mean + h * rng.standard_normal(shape)
        return mean + noisy * math.sqrt(sd * sd / ((m - 1) / m * sd * sd + h * h)) if sd > 0 else y

    def draw_batch(self, rng, size):
        pools = self._pools()
        n0, n1 = self.n0, self.n1
        y0 = self._resample(rng, pools["control"], (size, n0))
        y1 = self._resample(rng, pools["treatment"], (size, n1))
        if self.effect_type == "shift":
            y1 = y1 + self.effect
        elif self.effect_type == "ratio":
            y1 = y1 * self.effect
        else:
            p = float(pools["treatment"].mean())
            p1 = self.effect * p / (1 - p + self.effect * p)
            u = rng.random((size, n1))
            if p1 >= p:
                flip = (y1 == 0) & (u < ((p1 - p) / (1 - p) if p < 1 else 0.0))
                y1 = np.where(flip, 1.0, y1)
            else:
                flip = (y1 == 1) & (u < ((p - p1) / p if p > 0 else 0.0))
                y1 = np.where(flip, 0.0, y1)
        y = np.concatenate([y0, y1], axis=1)
        arm, per_rep, info = self.arm_labels(), {"y": y}, self.arm_info()
        apply_missing(self.missing, rng, y, {"arm": arm}, per_rep, info)
        return Batch(size, per_rep, {"arm": arm}, info=info)

    # -- what it simulates ----------------------------------------------------------
    def true_effect(self):
        pools = self._pools()
        return planned_difference(self, float(pools["control"].mean()), float(pools["treatment"].mean()))

    def null_value(self):
        return 1.0 if self.effect_type in ("ratio", "odds_ratio") else 0.0

    def estimand_aliases(self):
        return set()

    def pilot_summary(self) -> dict:
        """Units per arm, mean, SD, Browne's (1995) upper 80% confidence limit of the SD, and the small-pilot flag."""
        pools = self._pools()
        y = np.asarray(self.values, float)
        a = None if self.arm_values is None else np.asarray(self.arm_values)
        per_arm = [int(y.size)] if a is None else [int(np.sum(a == 0)), int(np.sum(a == 1))]
        pool = pools["control"]
        m = pool.size
        sd = float(pool.std(ddof=1))
        ucl = sd * math.sqrt((m - 1) / stats.chi2.ppf(0.2, m - 1))
        return {"units": int(y.size), "units_per_arm": per_arm, "mean": float(pool.mean()), "sd": sd,
                "sd_upper_80": ucl, "small": min(per_arm) < SMALL_PILOT}

    def power_at_upper_sd(self, alpha: float = 0.05) -> tuple[float, float] | None:
        """Normal-theory t-test power at the pilot SD and at Browne's upper 80% limit of it (shift effects only)."""
        if self.effect_type != "shift":
            return None
        from ..analytic import t_power

        s = self.pilot_summary()
        kw = dict(n=self.n0, alpha=alpha, design="two-sample", ratio=self.n1 / self.n0)
        return (float(t_power(self.true_effect(), sd=s["sd"], **kw)),
                float(t_power(self.true_effect(), sd=s["sd_upper_80"], **kw)))

    def describe(self):
        s = self.pilot_summary()
        src = f"pilot data {self.data}" if self.data else "pilot values"
        how = {"pool": "arms centred on the pooled mean (the pilot's own difference is not carried in)",
               "control": "the pilot's control rows", "separate": "each arm from its own pilot rows (the pilot's "
                                                                   "difference is carried in)"}[self.arms]
        text = (f"{self.arms_text()}, outcomes resampled with replacement from {src} ({s['units']} values, "
                f"mean {s['mean']:.4g}, SD {s['sd']:.4g}"
                + (f"; {how}" if self.arm_values is not None else "") + ")"
                + {"none": "", "inflate": ", deviations inflated by sqrt(m/(m-1))",
                   "smooth": ", smoothed bootstrap"}[self.spread]
                + f"; planned effect {self.effect:g} ({self.effect_type})")
        if s["small"]:
            text += (f"; CAUTION: {min(s['units_per_arm'])} pilot units per arm is fewer than {SMALL_PILOT} "
                     f"(Teare et al. 2014); the SD's upper 80% limit is {s['sd_upper_80']:.4g} (Browne 1995)")
        return text

    @classmethod
    def from_frame(cls, frame, outcome: str = "y", arm: str | None = None, **params) -> "PilotResample":
        """The process from a pandas DataFrame of pilot rows (``outcome`` column; ``arm`` column optional)."""
        if outcome not in frame.columns:
            raise ParameterError(f"`outcome` column {outcome!r} is not in the frame (columns: "
                                 f"{', '.join(map(str, frame.columns))}).")
        keep = frame[outcome].notna()
        values = [float(v) for v in frame.loc[keep, outcome]]
        arms = None if arm is None else [int(v) for v in frame.loc[keep, arm]]
        return cls(values=values, arm_values=arms, **params)
