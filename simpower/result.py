"""The result of a run: per-replicate records, summaries with MCSE, the analytic cross-check."""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from .errors import RunError
from .summaries import PointStats, finalise, paired_from_counts

#: distance (in MCSE units) above which simulated and analytic power are flagged
CROSS_CHECK_FLAG = 3.0


@dataclass
class Records:
    """Per-replicate records of one analysis, in replicate order."""

    pvalue: np.ndarray
    estimate: np.ndarray
    se: np.ndarray
    ci_low: np.ndarray
    ci_high: np.ndarray
    status: np.ndarray
    causes: list[str]
    messages: dict[str, str] = field(default_factory=dict)
    pvalues: np.ndarray | None = None
    hypotheses: list[str] = field(default_factory=list)

    @property
    def failure(self) -> np.ndarray:
        """Cause of each replicate's failure ('' when clean), as an object array."""
        names = np.array([""] + list(self.causes), dtype=object)
        return names[self.status]

    def frame(self) -> pd.DataFrame:
        df = pd.DataFrame({
            "replicate": np.arange(self.pvalue.size),
            "pvalue": self.pvalue, "estimate": self.estimate, "se": self.se,
            "ci_low": self.ci_low, "ci_high": self.ci_high, "failure": self.failure,
        })
        if self.pvalues is not None:
            for j in range(self.pvalues.shape[1]):
                label = self.hypotheses[j] if j < len(self.hypotheses) else str(j)
                df[f"pvalue[{label}]"] = self.pvalues[:, j]
        return df


class MissingRecords(dict):
    """Stands for ``result.records`` when per-replicate records were not kept in memory."""

    def __init__(self, store_path=None):
        super().__init__()
        self._store_path = store_path

    def _fail(self, *a, **k):
        where = (f" They are in the run store {self._store_path}: simpower.engine.open_store(path).records(point)."
                 if self._store_path else " Give a store to keep them on disk, or keep_records=True.")
        raise RunError("per-replicate records were not kept in memory (keep_records=False)." + where)

    __getitem__ = _fail
    values = _fail
    items = _fail


class RunResult:
    """What a run produced.

    Attributes
    ----------
    scenario : Scenario
    reps : int
    seed : int
        The ``SeedSequence`` entropy the run used; pass it back as ``seed`` to
        reproduce the numbers exactly.
    records : dict of name -> Records
        Per-replicate records, held in memory or read from a spool file on
        disk; with ``keep_records=False`` an accessor that says where they are.
    paths : dict of name -> 'batch' or 'per-replicate'
    summaries : dict of name -> :class:`~simpower.summaries.AnalysisSummary`
        Power, MCSE, Wilson interval, failures and estimate measures, from the
        chunk statistics folded in chunk order (the same figures whether the
        records were kept, spooled or streamed).
    messages : dict of name -> dict of cause -> first message
    analytic : dict of name -> float or None
        Closed-form power where the analytic core covers the scenario.
    seconds : float
        Wall time of the run.
    """

    def __init__(self, scenario, reps, seed, chunk_size, records, paths, seconds, fit_trouble="failure",
                 n_jobs=None, backend=None, point=0, chunk_seconds=0.0, extra=None, stats: PointStats | None = None,
                 messages: dict[str, str] | None = None, hypotheses: dict[str, list[str]] | None = None):
        self.scenario = scenario
        self.reps = int(reps)
        self.seed = int(seed)
        self.chunk_size = int(chunk_size)
        self.records = records
        self.paths = paths
        self.seconds = float(seconds)
        self.fit_trouble = fit_trouble
        self.n_jobs = n_jobs
        self.backend = backend or "loky"
        self.point = point
        self.chunk_seconds = chunk_seconds
        self.extra = dict(extra or {})
        self.analytic = scenario.analytic_power()
        kept = not isinstance(records, MissingRecords)
        if stats is None:
            stats = PointStats.from_records(scenario, records, chunk_size)
        if messages is None:
            messages = next(iter(records.values())).messages if kept and records else {}
        if hypotheses is None:
            hypotheses = {n: r.hypotheses for n, r in records.items()} if kept else {}
        folded, self._pairs = stats.folded()
        self.summaries = {}
        for name, t in folded.items():
            truth = stats.truth[name]
            s = finalise(t, fit_trouble, truth, hypotheses.get(name))
            s["true_effect"] = truth
            self._cross_check(name, s)
            self.summaries[name] = s
        self.messages = {name: dict(messages) for name in self.summaries}

    def _cross_check(self, name: str, s: dict[str, Any]) -> None:
        """Add the path, the analytic power and the distance in MCSE units to summary ``s``."""
        s["path"] = self.paths.get(name, "")
        a = self.analytic.get(name)
        s["analytic_power"] = a
        if a is not None and s["n_ok"] > 0:
            an = self.scenario.analyses[name]
            exact = bool(an.analytic_exact_for(self.scenario.process) if hasattr(an, "analytic_exact_for")
                         else getattr(an, "analytic_exact", True))
            s["analytic_exact"] = exact
            # distance in MCSE units, with the MCSE at the analytic value (finite at p = 0 or 1)
            m = math.sqrt(max(a * (1 - a), 1e-12) / s["n_ok"])
            s["distance_mcse"] = (s["power"] - a) / m
            # only an exact closed form can disagree by mistake; an approximation's distance is information
            s["cross_check_flag"] = exact and abs(s["distance_mcse"]) > CROSS_CHECK_FLAG

    # -- headline numbers ------------------------------------------------
    @property
    def primary(self) -> str:
        return self.scenario.primary

    @property
    def power(self) -> float:
        return self.summaries[self.primary]["power"]

    @property
    def mcse(self) -> float:
        return self.summaries[self.primary]["mcse"]

    @property
    def pvalues(self) -> np.ndarray:
        return self.records[self.primary].pvalue

    # -- views -----------------------------------------------------------
    def summary(self) -> pd.DataFrame:
        """Tidy table: one row per analysis."""
        return pd.DataFrame([{"analysis": name, **s.row()} for name, s in self.summaries.items()])

    def records_frame(self, analysis: str | None = None) -> pd.DataFrame:
        """Per-replicate records; all analyses stacked when ``analysis`` is None."""
        if analysis is not None:
            return self.records[analysis].frame()
        parts = []
        for name, r in self.records.items():
            f = r.frame()
            f.insert(0, "analysis", name)
            parts.append(f)
        return pd.concat(parts, ignore_index=True)

    def compare(self, a: str, b: str) -> dict[str, float]:
        """Paired difference in power of analyses ``a`` and ``b`` on the replicates clean in both."""
        if (a, b) in self._pairs:
            only_a, only_b, n = self._pairs[(a, b)]
        elif (b, a) in self._pairs:
            only_b, only_a, n = self._pairs[(b, a)]
        else:
            raise KeyError(f"no analyses {a!r} and {b!r} in this result")
        out = paired_from_counts(only_a, only_b, n)
        out.update({"a": a, "b": b})
        return out

    def comparisons(self) -> list[dict[str, float]]:
        names = list(self.summaries)
        return [self.compare(names[0], other) for other in names[1:]]

    def to_dict(self) -> dict[str, Any]:
        from ._version import __version__
        from ._provenance import source_digest

        return _plain({
            "simpower_version": __version__,
            "simpower_source_sha256": source_digest(),
            "scenario": self.scenario.spec(),
            "fingerprint": self.scenario.fingerprint(),
            "seed": str(self.seed),
            "reps": self.reps,
            "chunk_size": self.chunk_size,
            "alpha": self.scenario.alpha,
            "true_effect": self.scenario.true_effect,
            "seconds": self.seconds,
            "n_jobs": self.n_jobs,
            "backend": self.backend,
            "fit_trouble_policy": self.fit_trouble,
            "analyses": self.summaries,
            "comparisons": self.comparisons(),
            "failure_messages": {n: m for n, m in self.messages.items() if m},
            **self.extra,
        })

    def to_json(self, path=None, indent=2) -> str:
        text = json.dumps(self.to_dict(), indent=indent)
        if path is not None:
            from pathlib import Path

            Path(path).write_text(text + "\n")
        return text

    def __str__(self) -> str:
        from .textout import format_result

        return format_result(self)

    def answer(self, analysis: str | None = None):
        """The power at the planned design first: an :class:`~simpower.answer.AnswerBlock`."""
        from .answer import run_block

        return run_block(self, analysis)

    def justification(self, null=None):
        """The sample-size justification paragraph for a protocol (give ``null``, a null-check table, to cite it)."""
        from .answer import justification

        return justification(self, null=null)

    def plot(self, stem=None, title: str = ""):
        """Each analysis's power with its 95% Wilson interval and the closed form beside it.

        ``stem`` writes ``stem.png`` and ``stem.svg``. Returns the matplotlib Figure.
        """
        from .report import plots

        fig = plots.run_plot(self, title=title)
        if stem is not None:
            plots.save(fig, stem)
        return fig

    def _repr_html_(self) -> str:
        from .answer import run_block
        from .labels import frame_html, readable

        shown = readable(self.summary(), "power", ("analysis", "power", "mcse", "ci_low", "ci_high", "reps",
                                                   "n_failed", "analytic_power"))
        return run_block(self).html() + frame_html(shown, "Every analysis")

    def __repr__(self) -> str:
        return f"<RunResult power={self.power:.4f} mcse={self.mcse:.4f} reps={self.reps}>"


def _plain(x):
    if isinstance(x, dict):
        return {str(k): _plain(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_plain(v) for v in x]
    if isinstance(x, (np.bool_,)):
        return bool(x)
    if isinstance(x, np.integer):
        return int(x)
    if isinstance(x, (float, np.floating)):
        x = float(x)
        return x if math.isfinite(x) else None
    return x
