"""Scenario files (TOML): load, validate, build a Scenario. Never evaluates strings as code.

A file names the process and its parameters, the analysis (or several), alpha,
and run settings::

    name = "Two-arm trial, normal outcome"
    alpha = 0.05
    reps = 4000
    seed = 20261201

    [process]
    type = "normal_two_arm"
    n = 64
    effect = 0.5

    [analysis]
    type = "t_test"

User code is referenced as ``type = "module:function"`` or
``type = "path/file.py:function"`` (relative to the file's folder, wherever the
reference sits, also inside ``multiple.tests``); loading such a file imports and
so runs that code, like any Python import. The blocks of the study plan
(``[sweep]``, ``[search]``, ``[sequential]``, ``[null_check]``, ``[report]``,
``[store]``, ``[execution]``) are checked at load against their declared
fields (:mod:`simpower.blocks`) and kept, cleaned, in ``blocks``. See docs/scenario-files.md for every block and field.
"""

from __future__ import annotations

import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ._validation import Choice, Int, Jobs, Real
from .blocks import BLOCK_FIELDS, read_block, with_looks
from .errors import ParameterError, ScenarioFileError, SimpowerError, nearest
from .registry import build
from .scenario import ALPHA, Scenario

#: top-level run settings and their constraints
RUN_FIELDS = {
    "reps": Int(low=1),
    "seed": Int(low=0),
    "jobs": Jobs(optional=False),
    "chunk_size": Int(low=1),
    "fit_trouble": Choice(("failure", "nonrejection")),
    "max_failure_rate": Real(0.0, 1.0, low_open=True),
}
SCENARIO_FIELDS = ("name", "description", "alpha", "true_effect", "true_effects", "process", "params", "analysis", "analyses")
#: the blocks of a study plan, checked at load against their fields (simpower.blocks)
EXTRA_BLOCKS = set(BLOCK_FIELDS)


@dataclass
class ScenarioFile:
    """A loaded scenario file: the Scenario, run settings, and extra blocks."""

    scenario: Scenario
    run: dict[str, Any]
    blocks: dict[str, Any] = field(default_factory=dict)
    path: Path | None = None
    raw: dict[str, Any] = field(default_factory=dict)


def _line_of(text: str, block: str | None, key: str) -> int | None:
    """Best-effort line number of ``key`` inside ``[block]`` (for error messages)."""
    current = None
    for i, line in enumerate(text.splitlines(), start=1):
        s = line.strip()
        m = re.match(r"^\[+\s*([^\]]+?)\s*\]+", s)
        if m:
            current = m.group(1)
            continue
        if (block is None and current is None) or current == block:
            if re.match(rf"^{re.escape(key)}\s*=", s):
                return i
    return None


def loads(text: str, path: str | Path | None = None, overrides: dict[str, Any] | None = None) -> ScenarioFile:
    """Parse scenario TOML ``text`` (``path`` only for messages and relative references)."""
    where = str(path) if path else "<scenario>"
    base_dir = Path(path).resolve().parent if path else Path.cwd()
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ScenarioFileError(f"{where}: TOML syntax error: {exc}") from None
    from .functions import reference_folder

    try:
        with reference_folder(base_dir):
            return _build(raw, text, where, base_dir, overrides or {}, path)
    except ScenarioFileError:
        raise
    except SimpowerError as exc:
        raise ScenarioFileError(f"{where}: {exc}") from None


def from_data(raw: Any, where: str, overrides: dict[str, Any] | None = None) -> ScenarioFile:
    """Validate already-parsed scenario data (e.g. the plan recorded in a run store) as :func:`loads` does.

    There is no file: ``path`` is None and nothing is relative to a folder.
    """
    if not isinstance(raw, dict):
        raise ScenarioFileError(f"{where}: the scenario must be a table of fields; got {type(raw).__name__}.")
    try:
        return _build(raw, "", where, None, overrides or {}, None)
    except ScenarioFileError:
        raise
    except SimpowerError as exc:
        raise ScenarioFileError(f"{where}: {exc}") from None


def load(path: str | Path, overrides: dict[str, Any] | None = None) -> ScenarioFile:
    """Read and validate a scenario file."""
    p = Path(path)
    if not p.is_file():
        raise ScenarioFileError(f"{path}: no such scenario file.")
    try:
        text = p.read_text(encoding="utf-8")
    except UnicodeDecodeError as exc:
        raise ScenarioFileError(f"{path}: not UTF-8 text (byte {exc.start}); save the scenario file as UTF-8.") from None
    except OSError as exc:
        raise ScenarioFileError(f"{path}: cannot read the scenario file ({exc.strerror}).") from None
    return loads(text, p, overrides)


def _build(raw, text, where, base_dir, overrides, path) -> ScenarioFile:
    known = set(SCENARIO_FIELDS) | set(RUN_FIELDS) | EXTRA_BLOCKS
    for key in raw:
        if key not in known:
            line = _line_of(text, None, key)
            at = f" (line {line})" if line else ""
            raise ScenarioFileError(f"{where}{at}: unknown field `{key}`.{nearest(key, known)}")
    if "process" not in raw or not isinstance(raw["process"], dict):
        raise ScenarioFileError(f"{where}: a [process] table is required (with `type = \"...\"`).")
    if "analysis" not in raw and "analyses" not in raw:
        raise ScenarioFileError(f"{where}: an [analysis] table (or [analyses.<label>] tables) is required.")
    if "analysis" in raw and "analyses" in raw:
        raise ScenarioFileError(f"{where}: give [analysis] or [analyses.<label>], not both.")
    process = build("process", raw["process"], where="process", base_dir=base_dir)
    if "analysis" in raw:
        if not isinstance(raw["analysis"], dict):
            raise ScenarioFileError(f"{where}: `analysis` must be a table with `type = \"...\"`.")
        spec = dict(raw["analysis"])
        label = spec.pop("label", None)
        an = build("analysis", spec, where="analysis", base_dir=base_dir)
        analyses = {str(label or getattr(an, "name", None) or "analysis"): an}
    else:
        if not isinstance(raw["analyses"], dict) or not raw["analyses"]:
            raise ScenarioFileError(f"{where}: `analyses` must hold one or more [analyses.<label>] tables.")
        analyses = {}
        for label, spec in raw["analyses"].items():
            if not isinstance(spec, dict):
                raise ScenarioFileError(f"{where}: [analyses.{label}] must be a table with `type = \"...\"`.")
            analyses[label] = build("analysis", spec, where=f"analyses.{label}", base_dir=base_dir)
    if "looks" in raw:  # a group-sequential design around the analyses (simpower.blocks.with_looks)
        analyses = with_looks(analyses, _read(raw["looks"], "looks", BLOCK_FIELDS["looks"], text, where),
                              ALPHA.clean("alpha", raw.get("alpha", 0.05)))
    scenario = Scenario(process, analyses=analyses, alpha=raw.get("alpha", 0.05),
                        true_effect=raw.get("true_effect"), true_effects=raw.get("true_effects"),
                        name=str(raw.get("name", "")),
                        description=str(raw.get("description", "")))
    run = {}
    for key, con in RUN_FIELDS.items():
        if key in raw:
            run[key] = con.clean(key, raw[key])
    for key, value in overrides.items():
        if value is None:
            continue
        if key in RUN_FIELDS:
            run[key] = RUN_FIELDS[key].clean(key, value)
    blocks = {}
    for name, fields in BLOCK_FIELDS.items():
        if name in raw:
            blocks[name] = _read(raw[name], name, fields, text, where)
    return ScenarioFile(scenario, run, blocks, Path(path) if path else None, raw)


def _read(block, name, fields, text, where) -> dict:
    """A block checked against its fields; an error names the field and, when found, its line."""
    try:
        return read_block(name, block, fields)
    except ParameterError as exc:
        bad = next((k for k in (block if isinstance(block, dict) else ())
                    if f"`{name}.{k}`" in str(exc)), None)
        line = _line_of(text, name, bad) if bad is not None and text else None
        at = f" (line {line})" if line else ""
        raise ScenarioFileError(f"{where}{at}: {exc}") from None


def parse_assignment(text: str) -> tuple[str, Any]:
    """Parse a command-line ``key=value`` (value read as a TOML value, else a string)."""
    key, sep, value = text.partition("=")
    key = key.strip()
    if not sep or not key:
        raise ParameterError(f"`--set {text}` must look like key=value (e.g. --set n=80).")
    try:
        parsed = tomllib.loads(f"v = {value.strip()}")["v"]
    except tomllib.TOMLDecodeError:
        parsed = value.strip()
    return key, parsed
