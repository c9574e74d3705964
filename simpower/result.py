"""The result of a run: per-replicate records, summaries with MCSE, the analytic cross-check."""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from .summaries import paired_difference, summarize_records

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
    paths : dict of name -> 'batch' or 'per-replicate'
    summaries : dict of name -> dict
        Power, MCSE, Wilson interval, failures and estimate measures.
    analytic : dict of name -> float or None
        Closed-form power where the analytic core covers the scenario.
    seconds : float
        Wall time of the run.
    """

    def __init__(self, scenario, reps, seed, chunk_size, records, paths, seconds, fit_trouble="failure",
                 n_jobs=None, backend=None, point=0, chunk_seconds=0.0, extra=None):
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
        self.summaries = {
            name: summarize_records(r.pvalue, r.status, r.causes, scenario.alpha, fit_trouble,
                                    r.estimate, r.se, r.ci_low, r.ci_high, scenario.true_effect_for(name))
            for name, r in records.items()
        }
        for name, s in self.summaries.items():
            s["true_effect"] = scenario.true_effect_for(name)
        for name, s in self.summaries.items():
            self._cross_check(name, s)
            r = records[name]
            if r.pvalues is not None:
                s["per_hypothesis"] = self._hypotheses(r)

    def _cross_check(self, name: str, s: dict[str, Any]) -> None:
        """Add the path, the analytic power and the distance in MCSE units to summary ``s``."""
        s["path"] = self.paths.get(name, "")
        a = self.analytic.get(name)
        s["analytic_power"] = a
        if a is not None and s["n_ok"] > 0:
            exact = bool(getattr(self.scenario.analyses[name], "analytic_exact", True))
            s["analytic_exact"] = exact
            # distance in MCSE units, with the MCSE at the analytic value (finite at p = 0 or 1)
            m = math.sqrt(max(a * (1 - a), 1e-12) / s["n_ok"])
            s["distance_mcse"] = (s["power"] - a) / m
            # only an exact closed form can disagree by mistake; an approximation's distance is information
            s["cross_check_flag"] = exact and abs(s["distance_mcse"]) > CROSS_CHECK_FLAG

    def _hypotheses(self, r: Records) -> dict[str, Any]:
        ok = r.status == 0
        rej = (r.pvalues[ok] <= self.scenario.alpha)
        n = max(int(ok.sum()), 1)
        out = {}
        for j in range(rej.shape[1]):
            p = float(rej[:, j].mean())
            label = r.hypotheses[j] if j < len(r.hypotheses) else str(j)
            out[label] = {"power": p, "mcse": math.sqrt(p * (1 - p) / n)}
        for label, hit in (("any", rej.any(axis=1)), ("all", rej.all(axis=1))):
            p = float(hit.mean())
            out[label] = {"power": p, "mcse": math.sqrt(p * (1 - p) / n)}
        return out

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
        rows = []
        for name, s in self.summaries.items():
            row = {"analysis": name}
            for k, v in s.items():
                if k == "failures":
                    row["failures"] = "; ".join(f"{c} x{n}" for c, n in v.items())
                elif k != "per_hypothesis":
                    row[k] = v
            rows.append(row)
        return pd.DataFrame(rows)

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
        """Paired difference in power of analyses ``a`` and ``b`` on the same replicates."""
        ra, rb = self.records[a], self.records[b]
        both = (ra.status == 0) & (rb.status == 0)
        alpha = self.scenario.alpha
        out = paired_difference(ra.pvalue[both] <= alpha, rb.pvalue[both] <= alpha)
        out.update({"a": a, "b": b})
        return out

    def comparisons(self) -> list[dict[str, float]]:
        names = list(self.records)
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
            "failure_messages": {n: r.messages for n, r in self.records.items() if r.messages},
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
