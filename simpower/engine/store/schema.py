"""The run store's schema and the checks of what a grid point's row holds.

Tables: ``meta(key, value)`` (format, version, provenance, the sync setting
and, for a command-line run, the data-only plan ``simpower resume`` rebuilds
the run from); ``points(point, fingerprint, seed, chunk_size, reps, analyses,
scenario, updated_at)``; ``chunks(point, chunk, size, seconds, started_at,
finished_at, worker, timeout_enforced)``; ``arrays(point, chunk, analysis,
path, hypotheses, layout, crc32, data)``; ``causes(point, chunk, code, cause,
message)``.
"""

from __future__ import annotations

import json
from typing import Any

from ...errors import StoreError

FORMAT = "simpower-run-store"
VERSION = "2"

SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS points (
    point INTEGER PRIMARY KEY, fingerprint TEXT NOT NULL, seed TEXT NOT NULL, chunk_size INTEGER NOT NULL,
    reps INTEGER NOT NULL, analyses TEXT NOT NULL, scenario TEXT NOT NULL, updated_at REAL);
CREATE TABLE IF NOT EXISTS chunks (
    point INTEGER NOT NULL, chunk INTEGER NOT NULL, size INTEGER NOT NULL, seconds REAL NOT NULL,
    started_at REAL, finished_at REAL, worker TEXT, timeout_enforced INTEGER, PRIMARY KEY (point, chunk));
CREATE TABLE IF NOT EXISTS arrays (
    point INTEGER NOT NULL, chunk INTEGER NOT NULL, analysis TEXT NOT NULL, path TEXT, hypotheses TEXT,
    layout TEXT NOT NULL, crc32 INTEGER NOT NULL, data BLOB NOT NULL, PRIMARY KEY (point, chunk, analysis));
CREATE TABLE IF NOT EXISTS causes (
    point INTEGER NOT NULL, chunk INTEGER NOT NULL, code INTEGER NOT NULL, cause TEXT NOT NULL, message TEXT,
    PRIMARY KEY (point, chunk, code));
"""
TABLES = ("meta", "points", "chunks", "arrays", "causes")


def _spec_diff(old: Any, new: Any, prefix: str = "") -> list[str]:
    """Dotted names whose values differ between two specs, with old -> new."""
    if isinstance(old, dict) and isinstance(new, dict):
        out = []
        for k in sorted(set(old) | set(new), key=str):
            out += _spec_diff(old.get(k, "<absent>"), new.get(k, "<absent>"), f"{prefix}{k}.")
        return out
    if old != new:
        return [f"{prefix[:-1] or 'scenario'}: {old!r} -> {new!r}"]
    return []


def _check_plan(where: str, row: tuple) -> None:
    """Refuse a grid point whose stored plan (fingerprint, seed, chunk size, reps, scenario) is unreadable.

    Its chunks cannot be checked against the run without it, so unlike a
    damaged chunk this refuses the store.
    """
    fp, seed, cs, reps, spec = row
    bad = [name for name, ok in (("fingerprint", isinstance(fp, str) and fp.strip() != ""),
                                 ("seed", _is_int(seed)), ("chunk_size", _is_int(cs)), ("reps", _is_int(reps)),
                                 ("scenario", _is_json_object(spec))) if not ok]
    if bad:
        raise StoreError(f"{where}: its stored plan is damaged (unreadable {', '.join(bad)} in table points), so "
                         f"its chunks cannot be checked against this run; restore the store from a copy, or move "
                         f"it away and start afresh.")


def _is_int(v: Any) -> bool:
    try:
        return not isinstance(v, (float, bytes)) and int(v) >= 0
    except (TypeError, ValueError):
        return False


def _is_json_object(text: Any) -> bool:
    try:
        return isinstance(json.loads(text), dict)
    except (TypeError, ValueError):
        return False


def _analyses_info(scenario) -> dict[str, dict[str, Any]]:
    """Per analysis: the true value of its estimand (for bias and coverage read back from the store)."""
    from ...summaries import true_effect_of

    return {name: {"true_effect": true_effect_of(scenario, name)} for name in scenario.analyses}


def _truths(analyses_text: str) -> dict[str, float | None]:
    info = json.loads(analyses_text)
    if isinstance(info, list):
        return {name: None for name in info}
    out = {}
    for name, v in info.items():
        te = v.get("true_effect") if isinstance(v, dict) else None
        out[name] = float(te) if isinstance(te, (int, float)) and not isinstance(te, bool) else None
    return out


def _flatten(spec: dict, prefix: str = "") -> dict[str, Any]:
    out = {}
    for k, v in spec.items():
        if isinstance(v, dict):
            out.update(_flatten(v, f"{prefix}{k}."))
        elif k != "type" and not k.startswith("_") and (v is None or isinstance(v, (int, float, str, bool))):
            out[f"{prefix}{k}"] = v
    return out
