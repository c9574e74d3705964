"""The reproducibility manifest: versions, seed, fingerprints, command line, date, platform.

Rerunning :func:`reproduce_command` (the command with the seed actually used
written out) on the same scenario file, with the same versions, reproduces
every number of the report exactly; the file's SHA-256 tells whether the
scenario file is still the one that ran.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import importlib.metadata
import json
import platform
import shlex
import sys
from pathlib import Path
from typing import Any, Sequence

from .._provenance import source_digest

DEPENDENCIES = ("numpy", "scipy", "pandas", "joblib", "statsmodels", "matplotlib", "tqdm", "pyarrow", "dask")


def versions() -> dict[str, str | None]:
    """simpower, Python and dependency versions (None where a package is not installed)."""
    from .._version import __version__

    out: dict[str, str | None] = {"simpower": __version__, "python": platform.python_version()}
    for name in DEPENDENCIES:
        try:
            out[name] = importlib.metadata.version(name)
        except importlib.metadata.PackageNotFoundError:
            out[name] = None
    return out


def file_sha256(path) -> str | None:
    p = Path(path) if path else None
    if p is None or not p.is_file():
        return None
    return hashlib.sha256(p.read_bytes()).hexdigest()


def reproduce_command(argv: Sequence[str], seed: int, prog: str = "simpower") -> str:
    """``argv`` (without the program name) as a shell command with ``--seed`` set to ``seed``."""
    args = list(argv)
    out: list[str] = []
    skip = False
    for i, a in enumerate(args):
        if skip:
            skip = False
            continue
        if a == "--seed":
            skip = True
            continue
        if a.startswith("--seed="):
            continue
        out.append(a)
    out += ["--seed", str(seed)]
    return " ".join([prog] + [shlex.quote(a) for a in out])


def build_manifest(*, seed: int, scenario, command: str, scenario_file=None, settings: dict | None = None,
                   now: _dt.datetime | None = None) -> dict[str, Any]:
    """The manifest of one report."""
    now = now or _dt.datetime.now(_dt.timezone.utc)
    return {
        "versions": versions(),
        "simpower_source_sha256": source_digest(),
        "seed": str(seed),
        "scenario_fingerprint": scenario.fingerprint(),
        "scenario_file": None if scenario_file is None else str(scenario_file),
        "scenario_file_sha256": file_sha256(scenario_file),
        "command": command,
        "date": now.isoformat(timespec="seconds"),
        "platform": {"system": platform.system(), "release": platform.release(), "machine": platform.machine(),
                     "python_implementation": platform.python_implementation(), "executable": sys.executable},
        "settings": settings or {},
        "scenario": scenario.spec(),
    }


def manifest_rows(man: dict[str, Any]):
    """The manifest as (item, value) rows for the report table."""
    import pandas as pd

    rows = [("command", man["command"]), ("seed", man["seed"]), ("scenario fingerprint", man["scenario_fingerprint"])]
    if man.get("scenario_file"):
        rows += [("scenario file", man["scenario_file"]), ("scenario file SHA-256", man["scenario_file_sha256"])]
    rows += [("date (UTC)", man["date"])]
    p = man["platform"]
    rows += [("platform", f"{p['system']} {p['release']} {p['machine']} ({p['python_implementation']})")]
    rows += [(f"version: {k}", v or "not installed") for k, v in man["versions"].items()]
    if man.get("simpower_source_sha256"):
        rows.append(("simpower source digest", man["simpower_source_sha256"]))
    for k, v in man.get("settings", {}).items():
        rows.append((f"setting: {k}", json.dumps(v, default=str) if not isinstance(v, str) else v))
    return pd.DataFrame(rows, columns=["Item", "Value"])


def write_manifest(man: dict[str, Any], path) -> Path:
    p = Path(path)
    p.write_text(json.dumps(man, indent=2, default=str) + "\n", encoding="utf-8")
    return p
