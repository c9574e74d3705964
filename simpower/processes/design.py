"""The design layer shared by processes: two arms (their sizes) and the one missingness step.

A process is a design (who is measured, in which arm, how often, in which
cluster) times an outcome (what is measured) times, optionally, a missingness
mechanism (which outcomes are then hidden). This module holds the parts of the
design and of the missingness step that the built-in processes share, so that
each is written once:

* :class:`TwoArms`, a mixin that gives a process the two-arm sizes: ``n`` (the
  control arm), and either ``ratio`` (treatment / control) or ``n1`` (the
  treatment arm directly); the lists ``sizes = [n0, n1]`` and
  ``allocation = [a0, a1]`` are accepted at construction and stored as
  ``n`` and ``n1``, or as ``ratio``.
* :class:`Vocabulary`, a mixin through which a process accepts another name
  for one of its parameters (``corr`` for ``rho``...), keeping the stored name.
* :func:`apply_missing`, which applies a :class:`~simpower.processes.base.Missingness`
  component once, after the complete outcomes are drawn, for every design:
  it sets hidden outcomes to NaN, adds the ``observed`` column (1/0) and sets
  ``info["missing"]``. A design with a missingness of its own (period-2
  dropout in ``crossover``) hands its ``observed`` mask in, and the two are
  combined; monotone dropout over visits is a mechanism of its own
  (:mod:`simpower.processes.dropout`).

The names used across processes are listed in DEVELOPERS.md ("Design
vocabulary").
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .._validation import Int, Real
from ..errors import ParameterError

#: the two-arm size parameters every two-arm process declares (``params``) and their defaults
ARM_PARAMS = {"n": Int(low=2), "ratio": Real(0.0, low_open=True), "n1": Int(low=2, optional=True)}
ARM_DEFAULTS = {"ratio": 1.0, "n1": None}


def arm_params(params: dict) -> dict:
    """A process's ``params`` table with the arm-size constraints (:data:`ARM_PARAMS`).

    Entries the table already has keep their position (so reprs and specs
    read as before) and take the shared constraint; the others are appended.
    """
    return _merged(params, ARM_PARAMS)


def arm_defaults(defaults: dict) -> dict:
    """A process's ``defaults`` with the arm-size defaults (:data:`ARM_DEFAULTS`), as :func:`arm_params`."""
    return _merged(defaults, ARM_DEFAULTS)


def _merged(table: dict, shared: dict) -> dict:
    out = dict(table)
    for key, value in shared.items():
        out[key] = value
    return out


class Vocabulary:
    """Mixin: other names a process accepts for its parameters, at construction and in ``replace``.

    ``aliases`` maps an accepted name to the stored one (``{"corr": "rho"}``);
    the object stores, shows and fingerprints the stored name only, so specs,
    seeds and records do not depend on which name the user wrote. Giving
    both names is an error.
    """

    aliases: dict[str, str] = {}

    def __init__(self, **kwargs: Any):
        used = {stored: alias for alias, stored in self.aliases.items() if alias in kwargs}
        try:
            super().__init__(**self.canonical(kwargs))
        except ParameterError as exc:  # name the parameter as the user wrote it
            msg = str(exc)
            for stored, alias in used.items():
                if msg.startswith(f"`{stored}`"):
                    raise ParameterError(f"`{alias}`" + msg[len(stored) + 2:]) from None
            raise

    def replace(self, **changes: Any):
        return super().replace(**self.canonical(changes))

    @classmethod
    def canonical(cls, values: dict[str, Any]) -> dict[str, Any]:
        """``values`` with accepted names turned into stored names."""
        if not any(k in values for k in cls.aliases):
            return values
        out = dict(values)
        for alias, stored in cls.aliases.items():
            if alias in out:
                if stored in out:
                    raise ParameterError(f"`{alias}` and `{stored}` name the same parameter of {cls.name}: give one.")
                out[stored] = out.pop(alias)
        return out


class TwoArms(Vocabulary):
    """Mixin for processes with a control arm (arm 0) and a treatment arm (arm 1).

    Parameters
    ----------
    n : int >= 2
        Size of the control arm. The required-n search varies it.
    ratio : float > 0, default 1
        Allocation ratio n_treatment / n_control: the treatment arm has
        ``round(ratio * n)`` participants (at least 2).
    n1 : int >= 2, optional
        The treatment arm's size, given directly (then ``ratio`` must stay 1).
        A search over ``n`` then keeps ``n1`` fixed; give ``ratio`` instead to
        keep the allocation.
    sizes : [n0, n1], construction only
        Both arm sizes at once; stored as ``n`` and ``n1``.
    allocation : [a0, a1], construction only
        Relative arm sizes, as for ``multi_arm``; stored as ``ratio = a1 / a0``.

    Subclasses declare the parameters with :func:`arm_params` and
    :func:`arm_defaults` and call :meth:`_check_arms` in their ``_check``.
    ``sizes`` and ``allocation`` in ``replace`` override the stored form
    (``replace(sizes=[40, 60])`` on a process with ``ratio = 2`` sets ratio 1).
    """

    #: the ``n1`` property stands for the ``n1`` parameter (the size given, else from ``ratio``)
    shadows = ("n1",)

    @classmethod
    def canonical(cls, values: dict[str, Any]) -> dict[str, Any]:
        return _arm_forms(super().canonical(values))

    def _check_arms(self) -> None:
        """One validation of the arm sizes: one form of allocation, and at least 2 per arm."""
        if self._p.get("n1") is not None:
            if self.ratio != 1:
                raise ParameterError("`ratio`, `n1`: give the allocation ratio or the treatment-arm size, not both.")
            return  # n1 >= 2 is checked by its constraint
        if self.n1 < 2:
            raise ParameterError(f"`ratio` gives a treatment arm of {self.n1} (< 2) with n = {self.n}; "
                                 "raise n or ratio.")

    @property
    def n0(self) -> int:
        """Size of the control arm (= ``n``)."""
        return self._p["n"]

    @property
    def n1(self) -> int:
        """Size of the treatment arm: ``n1`` when given, else ``round(ratio * n)``."""
        given = self._p.get("n1")
        return given if given is not None else int(round(self.ratio * self.n))

    @property
    def sizes(self) -> tuple[int, int]:
        """(control, treatment) arm sizes."""
        return self.n0, self.n1

    @property
    def total(self) -> int:
        """Participants in both arms."""
        return self.n0 + self.n1

    def arm_labels(self) -> np.ndarray:
        """Arm of each row (int8: control rows 0 first, then treatment rows 1)."""
        return np.repeat(np.array([0, 1], dtype=np.int8), [self.n0, self.n1])

    def arm_info(self) -> dict[str, int]:
        """The ``Batch.info`` entries of the arm sizes."""
        return {"n0": self.n0, "n1": self.n1}

    def arms_text(self, unit: str = "") -> str:
        """'two arms of 50 (control) and 100 (treatment)[ unit]' for ``describe``."""
        unit = f" {unit}" if unit else ""
        return f"two arms of {self.n0} (control) and {self.n1} (treatment){unit}"


def _arm_forms(kwargs: dict[str, Any]) -> dict[str, Any]:
    """Turn ``sizes = [n0, n1]`` into ``n``, ``n1`` and ``allocation = [a0, a1]`` into ``ratio = a1 / a0``.

    Refuses a second form of the same thing (e.g. ``sizes`` with ``n``).
    """
    if "sizes" not in kwargs and "allocation" not in kwargs:
        return kwargs
    kwargs = dict(kwargs)
    given = [k for k in ("sizes", "n", "allocation", "ratio", "n1")
             if kwargs.get(k) is not None and not (k == "ratio" and kwargs[k] == 1)]
    clash = [k for k in given if k != "n"] if "sizes" not in given else given
    if len(clash) > 1:
        raise ParameterError(f"{', '.join(f'`{k}`' for k in clash)}: give the arm sizes in one form (`sizes`; or "
                             "`n` with one of `ratio`, `allocation`, `n1`).")
    if "sizes" in kwargs:
        n0, n1 = _pair(kwargs.pop("sizes"), "sizes", "[control, treatment] (two integers >= 2)", Int(low=2))
        kwargs["n"], kwargs["n1"], kwargs["ratio"] = n0, n1, 1.0
    if "allocation" in kwargs:
        a0, a1 = _pair(kwargs.pop("allocation"), "allocation", "[control, treatment] (two numbers > 0)",
                       Real(0.0, low_open=True))
        kwargs["ratio"], kwargs["n1"] = a1 / a0, None
    return kwargs


def _pair(value, field: str, what: str, constraint):
    if isinstance(value, (str, bytes)) or not hasattr(value, "__len__") or len(value) != 2:
        raise ParameterError(f"`{field}` must be {what}; got {value!r}.")
    return tuple(constraint.clean(f"{field}[{j}]", v) for j, v in enumerate(value))


# -- the missingness layer ----------------------------------------------------------------------

def missing_mask(missing, rng: np.random.Generator, y: np.ndarray, covariates: dict[str, np.ndarray], *,
                 rows: np.ndarray | None = None, present: np.ndarray | None = None) -> np.ndarray:
    """Where ``missing`` hides outcomes: a boolean array shaped like ``y`` (replicates, rows).

    ``covariates`` are the observed columns a MAR mechanism may depend on,
    each shared (1-D over rows) or per replicate (2-D like ``y``).

    rows : boolean array over the columns of ``y``, optional
        Only these rows can go missing (e.g. the post-baseline visits); the
        mechanism sees only them, in one call.
    present : boolean array like ``y``, optional
        Rows that exist (variable-size designs pad replicates): the mechanism
        is called once per replicate on its present rows, so a calibrated
        mechanism never sees padding.
    """
    if present is not None:
        if rows is not None:
            raise ValueError("missing_mask: give `rows` or `present`, not both")
        miss = np.zeros(y.shape, bool)
        for i in range(y.shape[0]):
            keep = present[i]
            cov = {k: (v[i] if v.ndim == 2 else v)[keep] for k, v in covariates.items()}
            miss[i, keep] = np.asarray(missing.mask(rng, y[i, keep], cov), bool).reshape(-1)
        return miss
    if rows is None:
        cov = {k: np.broadcast_to(v, y.shape) for k, v in covariates.items()}
        return np.asarray(missing.mask(rng, y, cov), bool)
    sub = (y.shape[0], int(rows.sum()))
    cov = {k: np.broadcast_to(v[rows], sub) if v.ndim == 1 else v[:, rows] for k, v in covariates.items()}
    miss = np.zeros(y.shape, bool)
    miss[:, rows] = np.asarray(missing.mask(rng, y[:, rows], cov), bool).reshape(y.shape[0], -1)
    return miss


def apply_missing(missing, rng: np.random.Generator, y: np.ndarray, covariates: dict[str, np.ndarray],
                  per_rep: dict[str, np.ndarray], info: dict[str, Any], *, rows: np.ndarray | None = None,
                  present: np.ndarray | None = None, observed: np.ndarray | None = None) -> None:
    """Apply a missingness component once, after the complete outcomes ``y`` are drawn (in place).

    Draws the mask (:func:`missing_mask`; no random numbers when ``missing`` is
    None), combines it with a design's own ``observed`` mask (e.g. dropout),
    sets the hidden outcomes of ``y`` to NaN, and adds ``per_rep["observed"]``
    (int8 1/0) and ``info["missing"] = True``. Nothing happens when there is
    neither a mechanism nor an ``observed`` mask.
    """
    if missing is not None:
        hidden = missing_mask(missing, rng, y, covariates, rows=rows, present=present)
        observed = ~hidden if observed is None else observed & ~hidden
    if observed is None:
        return
    y[~observed] = np.nan
    per_rep["observed"] = observed.astype(np.int8)
    info["missing"] = True
