"""Pilot data as the process, whole units at a time: ``pilot_units`` resamples clusters or participants.

:mod:`simpower.processes.pilot` resamples a pilot's *rows*. When the rows come in
groups that belong together -- the patients of one clinic, the visits of one
participant -- resampling rows would break the correlation the design is about.
``pilot_units`` resamples whole *units* (the values of the ``unit`` column) with
replacement, each with all its rows, and imposes the planned effect on every row
of the treatment arm's units:

* **clusters** (no ``visit`` column): ``clusters`` units per arm are drawn; each
  keeps its members together and gets a new cluster id, unique in the replicate
  (control clusters first). Output columns ``y``, ``arm``, ``cluster``
  (``subject``: the row number). Clusters of different sizes give replicates of
  different lengths: the batch is padded to the longest one and the padding
  marked by ``present``, as for ``cluster_trial`` with variable sizes. The size
  of the design is ``clusters`` (what the required-size search varies).
* **repeated measures** (``visit`` names the visit column): ``n`` participants
  per arm are drawn with all their visits. The pilot's visits (sorted) become
  visit 0 .. k-1; a visit a participant lacks in the pilot stays missing in every
  copy of that participant (``y`` NaN, ``observed`` 0), so the pilot's own
  missingness pattern is carried along. Output columns ``y``, ``arm``,
  ``subject``, ``visit`` and ``baseline`` (when the pilot has a baseline column,
  one value per participant). Arm, subject and visit are the same in every
  replicate (no padding), so ``mmrm``, ``mixed_model``, ``final_visit_t`` and
  ``gee`` keep their batch paths.

The effect (``effect_type``) acts on every row of a treatment-arm unit (from the
visit ``effect_from`` on, for repeated measures): ``"shift"`` adds ``effect``;
``"ratio"`` multiplies (outcome >= 0); ``"odds_ratio"`` moves the treatment
arm's probability of a 0/1 outcome from the pool's p to
p1 = OR p / (1 - p + OR p) by turning a share (p1 - p) / (1 - p) of its 0s into
1s (or a share (p - p1) / p of its 1s into 0s), so every value stays 0 or 1 (per
visit for repeated measures; a population-averaged odds ratio).

The pilot's own arms (``arms``): ``"pool"`` (default) centres each pilot arm on
the pooled mean (per visit; for ``ratio`` scales it to that mean) before
resampling, so the pilot's observed difference is not carried in;
``"control"`` resamples the pilot's control units only; ``"separate"`` each arm
from its own units (carries the pilot difference in: only when asked). Every unit
must lie in one arm.

The bootstrap's shrunken spread (``spread``): resampling m units reproduces the
between-unit spread times (m - 1) / m in expectation (the plug-in
distribution; Davison & Hinkley 1997, section 3.8, for clustered data).
``"inflate"`` scales each unit's deviation by sqrt(m / (m - 1)): for clusters the
cluster mean's deviation from the pool's mean of cluster means (members keep
their deviations from their cluster mean, which resampling whole clusters leaves
intact), for repeated measures the participant's whole vector of deviations from
the visit means (so the covariance matrix of the visits is restored in
expectation). ``"smooth"`` adds Gaussian kernel noise at the unit level and
shrinks back so that the same second moments are kept (the shrunk smoothed
bootstrap, Silverman 1986, section 6.4.1): for clusters to the cluster mean,
bandwidth 0.9 min(s, IQR/1.349) m^(-1/5) (Silverman 1986, eq. 3.31); for
repeated measures a N(0, h^2 S) vector with S the pilot's visit covariance
(pairwise complete, clipped to positive semi-definite) and
h = (4 / (k + 2))^(1/(k+4)) m^(-1/(k+4)) (Silverman 1986, eq. 4.14).

Cautions (:meth:`PilotUnits.pilot_summary`, ``describe``): fewer than 35
participants per arm estimate an SD poorly (Teare et al. 2014, Trials 15:264);
for clusters the same threshold is applied to the clusters, the units whose
spread the cluster-level variance rests on (common practice: the cluster is the
unit of a cluster trial's analysis; we know of no published pilot size in
clusters). The summary also gives the pilot's ANOVA estimate of the ICC with an
approximate standard error (equal-size formula with the average size m0,
Donner & Klar 2000, section 2.5; from memory), or the within-participant
correlation of the visits.

Data: ``data = "pilot.csv"`` (relative to the scenario file) with the columns
named by ``outcome`` (default "y"), ``unit`` (required), ``arm`` (default "arm";
optional), ``visit`` and ``baseline`` (optional); or the columns themselves as
``table = {y = [...], unit = [...], arm = [...], visit = [...], baseline = [...]}``,
which :meth:`PilotUnits.from_frame` fills from a DataFrame. The file is read
once, at construction, into ``table``, so the scenario's fingerprint (and so its
seeds) follows the data's content. Rows with a missing outcome are dropped
(a dropped visit stays missing, see above).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from .._validation import Anything, Choice, Int, Real, Text
from ..errors import ParameterError
from .base import Batch, Process
from .clusters import _layout
from .design import apply_missing
from .normal import MISSING
from .pilot import check_pilot_effect, planned_difference

#: fewer pilot units per arm than this: the spread is poorly estimated (Teare et al. 2014)
SMALL_PILOT = 35

_KEYS = ("y", "unit", "arm", "visit", "baseline")


def _resolve(path) -> Path:
    from ..registry import current_reference_folder

    p = Path(path)
    if not p.is_absolute() and current_reference_folder() is not None:
        p = Path(current_reference_folder()) / p
    return p


def _plain(v):
    """A numpy scalar as a Python one (for a data-only spec)."""
    if isinstance(v, np.generic):
        v = v.item()
    if isinstance(v, float) and v.is_integer() and abs(v) < 2**53:
        return int(v)
    return v


def table_from_frame(frame, where: str, outcome: str, unit: str | None, arm: str | None, visit: str | None,
                     baseline: str | None, arm_required: bool = False) -> dict:
    """The pilot's columns under the standard names (``y``, ``unit``, ``arm``, ``visit``, ``baseline``)."""
    import pandas as pd

    cols = ", ".join(map(str, frame.columns))
    names = {"outcome": outcome, "unit": unit, "visit": visit, "baseline": baseline}
    if unit is None:
        raise ParameterError("`unit` (the column that groups rows into clusters or participants) is required for "
                             "pilot_units; to resample single rows use type = \"pilot_resample\".")
    for field, col in names.items():
        if col is not None and col not in frame.columns:
            raise ParameterError(f"`{field}` column {col!r} is not in {where} (columns: {cols}).")
    if arm is not None and arm not in frame.columns:
        if arm_required:
            raise ParameterError(f"`arm` column {arm!r} is not in {where} (columns: {cols}).")
        arm = None
    keep = frame[outcome].notna()
    y = pd.to_numeric(frame.loc[keep, outcome], errors="coerce")
    if y.isna().any():
        raise ParameterError(f"`outcome` column {outcome!r} of {where} has values that are not numbers.")
    out = {"y": [float(v) for v in y]}
    for key, col in (("unit", unit), ("arm", arm), ("visit", visit), ("baseline", baseline)):
        if col is None:
            continue
        vals = frame.loc[keep, col]
        if vals.isna().any():
            raise ParameterError(f"the `{key}` column {col!r} of {where} has empty cells on rows with an outcome; "
                                 f"fill them or drop those rows.")
        out[key] = [_plain(v) for v in vals]
    return out


def read_pilot_table(path, **columns) -> dict:
    """:func:`table_from_frame` of a CSV file (relative to the scenario file)."""
    import pandas as pd

    p = _resolve(path)
    try:
        frame = pd.read_csv(p)
    except FileNotFoundError:
        raise ParameterError(f"`data`: no pilot file {str(p)!r}; give a CSV path relative to the scenario "
                             f"file.") from None
    except Exception as exc:  # noqa: BLE001 - pandas says what is wrong with the file
        raise ParameterError(f"`data`: cannot read {str(p)!r} as CSV ({type(exc).__name__}: {exc}).") from None
    return table_from_frame(frame, p.name, **columns)


def anova_icc(y: np.ndarray, unit: np.ndarray) -> tuple[float, float, float]:
    """(ICC, MSB, MSW) of the one-way ANOVA of ``y`` on ``unit`` (Donner & Klar 2000, section 2.5).

    ICC = (MSB - MSW) / (MSB + (m0 - 1) MSW), m0 = (N - sum m_i^2 / N) / (k - 1).
    """
    codes, inv = np.unique(unit, return_inverse=True)
    k, n = codes.size, y.size
    sizes = np.bincount(inv, minlength=k).astype(float)
    means = np.bincount(inv, weights=y, minlength=k) / sizes
    grand = y.mean()
    ssb = float(np.sum(sizes * (means - grand) ** 2))
    ssw = float(np.sum((y - means[inv]) ** 2))
    msb = ssb / (k - 1)
    msw = ssw / (n - k) if n > k else float("nan")
    m0 = (n - np.sum(sizes**2) / n) / (k - 1)
    return float((msb - msw) / (msb + (m0 - 1) * msw)), msb, msw


class PilotUnits(Process):
    """Trials resampled from pilot data a whole unit (cluster or participant) at a time.

    Parameters
    ----------
    clusters : int >= 2, optional
        Clusters per arm (cluster design: no ``visit`` column). The required-size search varies it.
    n : int >= 2, optional
        Participants per arm (repeated measures: with ``visit``). The required-n search varies it.
    ratio : float > 0
        Treatment over control units: the treatment arm has round(ratio * clusters) (or * n), at least 2.
    data : str, optional
        A CSV file of the pilot (relative to the scenario file); read at construction into ``table``.
    outcome, unit, arm, visit, baseline : str
        Column names in ``data`` (defaults "y", required, "arm" (optional column), none, none).
    table : table of lists, optional
        The pilot's columns themselves, under the names ``y``, ``unit``, ``arm``, ``visit``, ``baseline``.
    arms : {"pool", "control", "separate"}
    effect : float
    effect_type : {"shift", "ratio", "odds_ratio"}
    effect_from : number, optional
        Repeated measures: the first pilot visit (as labelled in the pilot) that gets the effect;
        default every visit.
    spread : {"none", "inflate", "smooth"}
    missing : missingness, optional
        Applied after the resampled outcomes (on top of the pilot's own missing visits).
    """

    name = "pilot_units"
    estimand_label = "mean difference"
    params = {"clusters": Int(low=2, optional=True), "n": Int(low=2, optional=True),
              "ratio": Real(0.0, low_open=True), "data": Text(optional=True), "outcome": Text(),
              "unit": Text(optional=True), "arm": Text(), "visit": Text(optional=True),
              "baseline": Text(optional=True), "table": Anything(),
              "arms": Choice(("pool", "control", "separate")), "effect": Real(),
              "effect_type": Choice(("shift", "ratio", "odds_ratio")), "effect_from": Real(optional=True),
              "spread": Choice(("none", "inflate", "smooth")), "missing": MISSING}
    defaults = {"clusters": None, "n": None, "ratio": 1.0, "data": None, "outcome": "y", "unit": None, "arm": "arm",
                "visit": None, "baseline": None, "table": None, "arms": "pool", "effect": 0.0,
                "effect_type": "shift", "effect_from": None, "spread": "none", "missing": None}

    # -- construction -------------------------------------------------------------
    def _check(self):
        p = dict(self._p)
        if p["table"] is None:
            if p["data"] is None:
                raise ParameterError("`data` (a pilot CSV file) or `table` (the pilot's columns) is required for "
                                     "pilot_units.")
            p["table"] = read_pilot_table(p["data"], outcome=p["outcome"], unit=p["unit"], arm=p["arm"],
                                          visit=p["visit"], baseline=p["baseline"])
        p["table"] = self._clean_table(p["table"])
        self._set_params(p)
        visits = "visit" in self.table
        size_field, other = ("n", "clusters") if visits else ("clusters", "n")
        if self._p[other] is not None:
            what = "participants per arm with a `visit` column" if visits else "clusters per arm without a `visit` column"
            raise ParameterError(f"`{other}` does not apply here: give `{size_field}` ({what}).")
        if self._p[size_field] is None:
            raise ParameterError(f"`{size_field}` is required: the number of "
                                 f"{'participants' if visits else 'clusters'} per arm of the planned trial.")
        if not visits and self.effect_from is not None:
            raise ParameterError("`effect_from` needs a `visit` column (repeated measures); leave it out for clusters.")
        if not visits and "baseline" in self.table:
            raise ParameterError("`baseline` needs a `visit` column (repeated measures); leave it out for clusters.")
        self._prepare()

    def _clean_table(self, table) -> dict:
        if not isinstance(table, dict):
            raise ParameterError(f"`table` must be a table of columns (y = [...], unit = [...], ...); got {table!r}.")
        unknown = sorted(set(table) - set(_KEYS))
        if unknown:
            raise ParameterError(f"`table` has unknown column(s) {', '.join(unknown)}; the columns are "
                                 f"{', '.join(_KEYS)}.")
        if "y" not in table or "unit" not in table:
            raise ParameterError("`table` needs the columns `y` (outcomes) and `unit` (the unit of each row).")
        out = {}
        n = None
        for key in _KEYS:
            if key not in table:
                continue
            col = table[key]
            if not isinstance(col, (list, tuple, np.ndarray)) or len(col) == 0:
                raise ParameterError(f"`table.{key}` must be a non-empty list.")
            if n is None:
                n = len(col)
            elif len(col) != n:
                raise ParameterError(f"`table.{key}` has {len(col)} values; `table.y` has {n}: give one per row.")
            if key == "unit":
                out[key] = [_plain(v) for v in col]
                continue
            try:
                arr = np.asarray(col, dtype=float)
            except (TypeError, ValueError):
                raise ParameterError(f"`table.{key}` must be a list of numbers.") from None
            if not np.all(np.isfinite(arr)):
                raise ParameterError(f"`table.{key}` must hold finite numbers (drop rows with a missing outcome).")
            if key == "arm":
                if not np.all((arr == 0) | (arr == 1)):
                    raise ParameterError("`table.arm` (the pilot's arm column) must hold 0 (control) and 1 "
                                         "(treatment).")
                out[key] = [int(v) for v in arr]
            else:
                out[key] = [_plain(float(v)) if key == "visit" else float(v) for v in arr]
        return out

    def _prepare(self):
        """Validate the units and build the arm pools (kept in the instance, derived from the parameters)."""
        self.__dict__["_pilot_state"] = {}
        t = self.table
        y = np.asarray(t["y"], float)
        labels, unit = np.unique(np.asarray([str(u) for u in t["unit"]]), return_inverse=True)
        units = labels.size
        sizes = np.bincount(unit, minlength=units)
        if units < 2:
            raise ParameterError("the pilot has one unit; `unit` must name a column that groups the rows into at "
                                 "least 2 clusters or participants.")
        visits = "visit" in t
        if not visits and np.all(sizes == 1):
            raise ParameterError(f"every unit of `unit` column {self.unit or 'unit'!r} has one row: it does not group "
                                 f"rows into clusters; give the cluster column, or use type = \"pilot_resample\".")
        if "arm" in t:
            a = np.asarray(t["arm"])
            lo, hi = np.full(units, 2), np.full(units, -1)
            np.minimum.at(lo, unit, a)
            np.maximum.at(hi, unit, a)
            mixed = np.flatnonzero(lo != hi)
            if mixed.size:
                raise ParameterError(f"unit {str(labels[mixed[0]])!r} of the `unit` column has rows in both arms "
                                     f"({mixed.size} unit(s) mixed); every cluster or participant must lie in one arm.")
            unit_arm = hi
        else:
            unit_arm = None
        self.__dict__["_pilot_state"]["unit_arm"] = unit_arm
        self.__dict__["_pilot_state"]["labels"] = labels
        if visits:
            self._prepare_visits(y, unit, units, unit_arm)
        else:
            self._prepare_clusters(y, unit, units, sizes, unit_arm)
        self._check_effect(y)

    def _check_effect(self, y):
        check_pilot_effect(self, y)

    def _arm_units(self, unit_arm, units) -> dict[str, np.ndarray]:
        """Unit indices each trial arm resamples from."""
        every = np.arange(units)
        if unit_arm is None:
            return {"control": every, "treatment": every}
        u0, u1 = every[unit_arm == 0], every[unit_arm == 1]
        if self.arms == "control":
            return {"control": u0, "treatment": u0}
        if self.arms == "separate":
            return {"control": u0, "treatment": u1}
        return {"control": every, "treatment": every}

    def _check_pools(self, pools, what):
        for label, idx in pools.items():
            if idx.size < 2:
                raise ParameterError(f"the pilot has {idx.size} {what} for the {label} arm (`arms` = "
                                     f"{self.arms!r}); at least 2 are needed to resample.")

    # -- clusters -----------------------------------------------------------------
    def _centre(self, y, groups, unit_arm_rows, n_groups):
        """Rows centred (or scaled, for ratio) per arm on the pooled mean within each group (visit)."""
        if unit_arm_rows is None or self.arms != "pool" or self.effect_type == "odds_ratio":
            return y
        ok = np.isfinite(y)
        out = y.copy()
        for g in range(n_groups):
            rows = ok & (groups == g)
            if not rows.any():
                continue
            grand = y[rows].mean()
            for a in (0, 1):
                sel = rows & (unit_arm_rows == a)
                if not sel.any():
                    continue
                am = y[sel].mean()
                if self.effect_type == "ratio":
                    out[sel] = y[sel] * (grand / am) if am > 0 else y[sel]
                else:
                    out[sel] = y[sel] - am + grand
        return out

    def _prepare_clusters(self, y, unit, units, sizes, unit_arm):
        order = np.argsort(unit, kind="stable")
        arm_rows = None if unit_arm is None else unit_arm[unit]
        yc = self._centre(y, np.zeros(y.size, int), arm_rows, 1)[order]
        start = np.concatenate([[0], np.cumsum(sizes)[:-1]])
        pools = self._arm_units(unit_arm, units)
        self._check_pools(pools, "cluster(s)")
        built = {}
        for label, idx in pools.items():
            # one flat array of the pool's rows, by unit; unit means and the pool's mean of cluster means
            rows = np.concatenate([np.arange(start[u], start[u] + sizes[u]) for u in idx])
            vals = yc[rows]
            sz = sizes[idx]
            st = np.concatenate([[0], np.cumsum(sz)[:-1]])
            means = np.add.reduceat(vals, st) / sz
            g = float(means.mean())
            m = idx.size
            within = vals - np.repeat(means, sz)
            comp = means - g
            if self.spread == "inflate":
                comp = comp * math.sqrt(m / (m - 1))
            entry = {"within": within, "comp": comp, "g": g, "sizes": sz, "start": st, "m": m}
            shrink = 1.0
            if self.spread == "smooth":
                sd = float(np.std(means, ddof=1))
                iqr = float(np.subtract(*np.percentile(means, [75, 25])))
                width = min(sd, iqr / 1.349) if iqr > 0 else sd
                h = 0.9 * width * m ** (-0.2)
                entry["h"] = h
                entry["scale"] = shrink = math.sqrt(sd * sd / ((m - 1) / m * sd * sd + h * h)) if sd > 0 else 1.0
            # the mean of an individual outcome: E(sum of a cluster's rows) / E(its size), cluster drawn at random
            entry["row_mean"] = float(np.sum(sz * (g + shrink * comp)) / sz.sum())
            built[label] = entry
        self.__dict__["_pilot_state"]["pools"] = built
        self.__dict__["_pilot_state"]["pilot_rows"] = (yc, unit[order], None if arm_rows is None else arm_rows[order])

    def _draw_clusters(self, rng, size):
        c0, c1 = self.clusters, self.n_treated
        pc, pt = self._S["pools"]["control"], self._S["pools"]["treatment"]
        i0 = rng.integers(0, pc["m"], size=(size, c0))
        i1 = rng.integers(0, pt["m"], size=(size, c1))
        comp0, comp1 = pc["comp"][i0], pt["comp"][i1]
        if self.spread == "smooth":
            comp0 = (comp0 + pc["h"] * rng.standard_normal(comp0.shape)) * pc["scale"]
            comp1 = (comp1 + pt["h"] * rng.standard_normal(comp1.shape)) * pt["scale"]
        # one flat row array for both pools: control rows, then treatment rows
        offset = pc["within"].size
        sizes = np.concatenate([pc["sizes"][i0], pt["sizes"][i1]], axis=1)
        first = np.concatenate([pc["start"][i0], pt["start"][i1] + offset], axis=1)
        comp = np.concatenate([comp0 + pc["g"], comp1 + pt["g"]], axis=1)
        within = np.concatenate([pc["within"], pt["within"]])
        n_cl = c0 + c1
        if np.all(sizes == sizes.flat[0]):
            m = int(sizes.flat[0])
            cluster = np.repeat(np.arange(n_cl, dtype=np.int32), m)
            pos = np.tile(np.arange(m), n_cl)
            rows = first[:, cluster] + pos[None, :]
            y = within[rows] + comp[:, cluster]
            present = None
            arm = (cluster >= c0).astype(np.int8)
        else:
            cluster, present, start = _layout(sizes)
            width = cluster.shape[1]
            pos = np.arange(width)[None, :] - np.take_along_axis(start, cluster, axis=1)
            rows = np.take_along_axis(first, cluster, axis=1) + pos
            rows = np.where(present, rows, 0)
            y = within[rows] + np.take_along_axis(comp, cluster, axis=1)
            arm = (cluster >= c0).astype(np.int8)
        treated = np.broadcast_to(arm == 1, y.shape)
        y = self._impose(rng, y, treated, self._S["pools"]["treatment"]["row_mean"])
        if present is not None:
            y = np.where(present, y, 0.0)
        per_rep: dict = {}
        shared: dict = {"subject": np.arange(cluster.shape[-1], dtype=np.int64)}
        (shared if arm.ndim == 1 else per_rep)["arm"] = arm
        (shared if cluster.ndim == 1 else per_rep)["cluster"] = cluster
        if present is not None:
            per_rep["present"] = present
        info = {"clusters_per_arm": c0, "n_clusters": n_cl, "randomise": "cluster", "equal_sizes": present is None}
        apply_missing(self.missing, rng, y, {"arm": arm, "cluster": cluster}, per_rep, info, present=present)
        per_rep["y"] = y
        return Batch(size, per_rep, shared, info)

    def _impose(self, rng, y, treated, p):
        """The planned effect on the treated rows (``p``: the pool's probability of a 1, for odds ratios)."""
        if self.effect_type == "shift":
            return np.where(treated, y + self.effect, y)
        if self.effect_type == "ratio":
            return np.where(treated, y * self.effect, y)
        p = np.asarray(p, float)
        p1 = self.effect * p / (1 - p + self.effect * p)
        u = rng.random(y.shape)
        with np.errstate(invalid="ignore", divide="ignore"):
            up = np.where(p < 1, (p1 - p) / (1 - p), 0.0)
            down = np.where(p > 0, (p - p1) / p, 0.0)
        to_one = treated & (p1 >= p) & (y == 0) & (u < up)
        to_zero = treated & (p1 < p) & (y == 1) & (u < down)
        return np.where(to_one, 1.0, np.where(to_zero, 0.0, y))

    # -- repeated measures ----------------------------------------------------------
    def _prepare_visits(self, y, unit, units, unit_arm):
        t = self.table
        labels = self.__dict__["_pilot_state"]["labels"]
        vlabels, vis = np.unique(np.asarray(t["visit"], float), return_inverse=True)
        k = vlabels.size
        if k < 2:
            raise ParameterError("the `visit` column has one visit; repeated measures need at least 2 (or leave "
                                 "`visit` out to resample clusters).")
        flat = unit * k + vis
        if np.unique(flat).size != flat.size:
            dup = np.flatnonzero(np.bincount(flat, minlength=units * k) > 1)[0]
            raise ParameterError(f"participant {str(labels[dup // k])!r} has two rows at visit "
                                 f"{_plain(vlabels[dup % k])!r}; give one row per participant and visit.")
        grid = np.full((units, k), np.nan)
        grid[unit, vis] = y
        base = None
        if "baseline" in t:
            b = np.asarray(t["baseline"], float)
            lo, hi = np.full(units, np.inf), np.full(units, -np.inf)
            np.minimum.at(lo, unit, b)
            np.maximum.at(hi, unit, b)
            bad = np.flatnonzero(lo != hi)
            if bad.size:
                raise ParameterError(f"the `baseline` column differs between the rows of participant "
                                     f"{str(labels[bad[0]])!r}; give one baseline value per participant.")
            base = lo
        if self.effect_from is not None:
            if not np.any(vlabels == self.effect_from):
                raise ParameterError(f"`effect_from` = {self.effect_from:g} is not a visit of the pilot (visits: "
                                     f"{', '.join(f'{v:g}' for v in vlabels)}).")
            from_index = int(np.flatnonzero(vlabels == self.effect_from)[0])
        else:
            from_index = 0
        arm_grid = None if unit_arm is None else np.repeat(unit_arm[:, None], k, axis=1)
        vis_grid = np.broadcast_to(np.arange(k), (units, k))
        centred = self._centre(grid.ravel(), vis_grid.ravel(), None if arm_grid is None else arm_grid.ravel(), k)
        centred = centred.reshape(units, k)
        pools = self._arm_units(unit_arm, units)
        self._check_pools(pools, "participant(s)")
        built = {}
        for label, idx in pools.items():
            g = centred[idx]
            m = idx.size
            seen = np.isfinite(g)
            count = seen.sum(axis=0)
            if np.any(count == 0):
                gap = _plain(vlabels[np.flatnonzero(count == 0)[0]])
                raise ParameterError(f"no {label}-arm participant of the pilot has an outcome at visit {gap!r}; "
                                     f"drop that visit from the pilot or use `arms` = 'pool'.")
            mean = np.where(seen, g, 0.0).sum(axis=0) / count
            dev = g - mean
            if self.spread == "inflate":
                dev = dev * math.sqrt(m / (m - 1))
            entry = {"dev": dev, "mean": mean, "m": m, "base": None if base is None else base[idx]}
            if self.spread == "smooth":
                import pandas as pd

                S = pd.DataFrame(g).cov().to_numpy()
                S = np.where(np.isfinite(S), S, 0.0)
                lam, vec = np.linalg.eigh((S + S.T) / 2)
                entry["L"] = vec * np.sqrt(np.clip(lam, 0.0, None))
                h = (4.0 / (k + 2)) ** (1.0 / (k + 4)) * m ** (-1.0 / (k + 4))
                entry["h"] = h
                entry["scale"] = 1.0 / math.sqrt((m - 1) / m + h * h)
            built[label] = entry
        self.__dict__["_pilot_state"]["pools"] = built
        self.__dict__["_pilot_state"]["visit_labels"] = vlabels
        self.__dict__["_pilot_state"]["from_index"] = from_index
        self.__dict__["_pilot_state"]["pilot_grid"] = (centred, unit_arm)

    def _draw_visits(self, rng, size):
        n0, n1 = self.n, self.n_treated
        k = self._S["visit_labels"].size
        pc, pt = self._S["pools"]["control"], self._S["pools"]["treatment"]
        i0 = rng.integers(0, pc["m"], size=(size, n0))
        i1 = rng.integers(0, pt["m"], size=(size, n1))
        d0, d1 = pc["dev"][i0], pt["dev"][i1]          # (R, n, k)
        if self.spread == "smooth":
            d0 = (d0 + pc["h"] * rng.standard_normal(d0.shape) @ pc["L"].T) * pc["scale"]
            d1 = (d1 + pt["h"] * rng.standard_normal(d1.shape) @ pt["L"].T) * pt["scale"]
        y = np.concatenate([d0 + pc["mean"], d1 + pt["mean"]], axis=1)
        n_sub = n0 + n1
        arm_sub = np.repeat(np.array([0, 1], np.int8), [n0, n1])
        treated = (arm_sub[:, None] == 1) & (np.arange(k)[None, :] >= self._S["from_index"])
        y = self._impose(rng, y, np.broadcast_to(treated, y.shape), pt["mean"])
        shared = {"arm": np.repeat(arm_sub, k), "subject": np.repeat(np.arange(n_sub), k),
                  "visit": np.tile(np.arange(k), n_sub)}
        y = y.reshape(size, n_sub * k)
        per_rep: dict = {}
        if pc["base"] is not None:
            base = np.concatenate([pc["base"][i0], pt["base"][i1]], axis=1)
            per_rep["baseline"] = np.repeat(base, k, axis=1)
        seen = np.isfinite(y)
        observed = None if seen.all() and not self._pilot_missing else seen
        info = {"n0": n0, "n1": n1, "visits": k}
        covariates = {**shared, **({"baseline": per_rep["baseline"]} if "baseline" in per_rep else {})}
        apply_missing(self.missing, rng, y, covariates, per_rep, info, observed=observed)
        per_rep["y"] = y
        return Batch(size, per_rep, shared, info)

    @property
    def _pilot_missing(self) -> bool:
        return bool(np.any(~np.isfinite(self._S["pilot_grid"][0])))

    # -- the process contract ---------------------------------------------------------
    @property
    def _S(self) -> dict:
        """What the pilot gives (pools, labels...): built by the checks, again after unpickling (which keeps only
        the parameters)."""
        state = self.__dict__.get("_pilot_state")
        if state is None or "pools" not in state:
            self._prepare()
            state = self.__dict__["_pilot_state"]
        return state

    @property
    def repeated(self) -> bool:
        """Whether the pilot has visits (repeated measures) rather than clusters."""
        return "visit" in self.table

    @property
    def size_param(self) -> str:  # type: ignore[override]
        return "n" if self.repeated else "clusters"

    @property
    def n_treated(self) -> int:
        size = self.n if self.repeated else self.clusters
        return max(2, int(round(self.ratio * size)))

    def draw_batch(self, rng, size):
        return self._draw_visits(rng, size) if self.repeated else self._draw_clusters(rng, size)

    def true_effect(self):
        """Treatment minus control mean of an individual outcome (at the final visit) in the resampled population.

        For clusters, drawn with equal probability, the mean of an individual outcome is the ratio of the
        expected sum to the expected number of rows: the pool's size-weighted mean of (adjusted) cluster means.
        """
        pc, pt = self._S["pools"]["control"], self._S["pools"]["treatment"]
        if self.repeated:
            m0, m1 = float(pc["mean"][-1]), float(pt["mean"][-1])
        else:
            m0, m1 = pc["row_mean"], pt["row_mean"]
        return planned_difference(self, m0, m1)

    def null_value(self):
        return 1.0 if self.effect_type in ("ratio", "odds_ratio") else 0.0

    def pilot_summary(self) -> dict:
        """Units per arm, the small-pilot flag, and the ICC (clusters) or the visits' correlation (repeated measures)."""
        ua = self._S["unit_arm"]
        units = int(self._S["labels"].size)
        per_arm = [units] if ua is None else [int(np.sum(ua == 0)), int(np.sum(ua == 1))]
        out = {"units": units, "units_per_arm": per_arm, "small": min(per_arm) < SMALL_PILOT,
               "rows": len(self.table["y"])}
        if self.repeated:
            grid = self._S["pilot_grid"][0]
            import pandas as pd

            corr = pd.DataFrame(grid).corr().to_numpy()
            k = grid.shape[1]
            off = corr[~np.eye(k, dtype=bool)]
            out.update(visits=[_plain(v) for v in self._S["visit_labels"]], correlation=corr,
                       mean_correlation=float(np.nanmean(off)),
                       missing_share=float(np.mean(~np.isfinite(grid))), sd=float(np.nanstd(grid, ddof=1)))
        else:
            y, unit, _ = self._S["pilot_rows"]
            icc, msb, msw = anova_icc(y, unit)
            sizes = np.bincount(unit)
            k, n = sizes.size, y.size
            m0 = (n - np.sum(sizes**2) / n) / (k - 1)
            # approximate SE of the ANOVA ICC for equal sizes m0 (Donner & Klar 2000, section 2.5; from memory)
            se = (1 - icc) * (1 + (m0 - 1) * icc) * math.sqrt(2.0 / (m0 * (m0 - 1) * (k - 1))) if m0 > 1 else float("nan")
            out.update(icc=icc, icc_se=se, msb=msb, msw=msw, mean_size=float(sizes.mean()),
                       size_cv=float(sizes.std(ddof=0) / sizes.mean()), sd=float(np.std(y, ddof=1)))
        return out

    def describe(self):
        s = self.pilot_summary()
        src = f"pilot data {self.data}" if self.data else "pilot data"
        what = "participants" if self.repeated else "clusters"
        how = {"pool": "arms centred on the pooled mean (the pilot's own difference is not carried in)",
               "control": "the pilot's control units", "separate": "each arm from its own pilot units (the pilot's "
                                                                    "difference is carried in)"}[self.arms]
        size = self.n if self.repeated else self.clusters
        text = (f"two arms of {size} and {self.n_treated} {what}, each resampled whole with replacement from {src} "
                f"({s['units']} {what}, {s['rows']} rows")
        if self.repeated:
            text += (f"; {len(s['visits'])} visits, mean correlation between visits {s['mean_correlation']:.2f}, "
                     f"{s['missing_share']:.0%} of the visits missing and kept missing")
        else:
            text += (f"; mean size {s['mean_size']:.3g}, ANOVA ICC {s['icc']:.3f} (approximate SE "
                     f"{s['icc_se']:.3f})")
        text += ((f"; {how}" if self._S["unit_arm"] is not None else "") + ")"
                 + {"none": "", "inflate": ", unit deviations inflated by sqrt(m/(m-1))",
                    "smooth": ", smoothed at the unit level"}[self.spread]
                 + f"; planned effect {self.effect:g} ({self.effect_type})")
        if self.missing is not None:
            text += f"; missing outcomes: {self.missing.describe()}"
        if s["small"]:
            rule = ("Teare et al. 2014" if self.repeated else
                    "Teare et al. 2014's threshold applied to clusters, common practice")
            text += (f"; CAUTION: {min(s['units_per_arm'])} pilot {what} per arm is fewer than {SMALL_PILOT} "
                     f"({rule}): the spread between {what} is poorly estimated")
        return text

    @classmethod
    def from_frame(cls, frame, unit: str, outcome: str = "y", arm: str | None = None, visit: str | None = None,
                   baseline: str | None = None, **params) -> "PilotUnits":
        """The process from a pandas DataFrame of pilot rows (``unit`` column required; the others optional)."""
        table = table_from_frame(frame, "the frame", outcome=outcome, unit=unit, arm=arm, visit=visit,
                                 baseline=baseline, arm_required=arm is not None)
        return cls(table=table, unit=unit, **params)
