"""The data-only plan a command records in its run store, and its validation for ``simpower resume``.

A run store is data, never a program: it records *what* to compute, not a
command line or a folder to run it in. The plan (version 2) is JSON::

    {"version": 2, "command": "run" | "sweep" | "samplesize" | "report" | "assurance",
     "scenario_file": "trial.toml",          # shown in messages only, never opened
     "stores": ["run"],                      # the parts of the plan that ran into a store
     "study": {... the resolved StudyPlan as data: simpower.StudyPlan.to_data() ...}}

``study`` is the plan the command executed: the scenario after ``--set`` and
the blocks (sweep grid, search, sequential, null check, assurance, looks,
report title/formats/labels) with the command line's overrides applied, and
the execution settings that shape the numbers (seed, chunk size, fit-trouble
policy, failure limit, time limit, record keeping). Never recorded: output
paths (``--json``, ``--csv``, ``--out``, ``[report] out``...), run store
paths, ``--jobs``, the executor and scheduler address, the working folder.
``command`` only says how ``resume`` prints the result and which outputs it
takes from its own command line.

:func:`validate` checks a plan read back from a store: the envelope against
allow-lists, no reference to user code anywhere, then the study through
:meth:`simpower.StudyPlan.from_data` (the validators :func:`simpower.load_plan`
uses); ``simpower resume`` runs it with :func:`simpower.execute`.

Stores written before (version 1) recorded the scenario file's fields and the
command's options instead; :func:`validate_v1` checks those against the
allow-lists below, and ``resume`` builds the StudyPlan from them with the
command's own plan builder, so they resume to the same numbers.
"""

from __future__ import annotations

import json
import shlex
from typing import Any

from ..errors import StoreError

VERSION = 2
#: the commands whose plan a store records (version 2)
COMMANDS = ("run", "sweep", "samplesize", "report", "assurance")
#: the commands a version-1 plan could name
COMMANDS_V1 = ("run", "sweep", "samplesize", "report")
#: the parts of a study that may run into a store
PARTS = ("search", "sweep", "run", "null_check", "assurance")
#: what each command's plan computes first (``StudyPlan.kind``; a report computes whatever its file plans)
KINDS = {"run": "run", "sweep": "sweep", "samplesize": "search", "assurance": "assurance"}

# kinds of option values
INT, FLOAT, BOOL, TEXT, TEXTS = "int", "float", "bool", "text", "texts"
_COMMON = {"reps": INT, "seed": INT, "set": TEXTS, "max_failure_rate": FLOAT, "timeout": FLOAT,
           "summaries_only": BOOL}
_NULL = {"null_check": BOOL, "null_reps": INT}
#: per command, the options that shape what is computed (argparse names), and their kinds
OPTIONS: dict[str, dict[str, str]] = {
    "run": {**_COMMON, **_NULL, "fit_trouble": TEXT, "target_mcse": FLOAT, "max_reps": INT},
    "sweep": {**_COMMON, **_NULL, "vary": TEXTS, "together": TEXTS, "target_mcse": FLOAT, "max_reps": INT},
    "samplesize": {**_COMMON, **_NULL, "power": FLOAT, "effect": BOOL, "parameter": TEXT, "range": TEXT,
                   "step": FLOAT, "rel_tol": FLOAT, "max_reps": INT, "analysis": TEXT},
    "report": {**_COMMON, "null_reps": INT},
}
#: per command, the output options ``resume`` takes from its own command line
OUTPUTS: dict[str, tuple[str, ...]] = {
    "run": ("json",),
    "sweep": ("csv", "parquet", "json", "plot", "x", "target", "report"),
    "samplesize": ("csv", "json", "plot", "report"),
    "report": ("out", "formats"),
    "assurance": ("csv", "json"),
}
#: the fields a plan keeps of the scenario's blocks that say where and how to run (the rest name
#: places to write to or connect to -- ``[store]``, ``[report] out``, ``[execution] address`` -- or
#: the executor, which never changes the numbers)
BLOCK_FIELDS = {"store": (), "report": ("title", "formats"), "execution": ("timeout", "summaries_only")}


def _is(kind: str, v: Any) -> bool:
    if kind == INT:
        return isinstance(v, int) and not isinstance(v, bool)
    if kind == FLOAT:
        return isinstance(v, (int, float)) and not isinstance(v, bool)
    if kind == BOOL:
        return isinstance(v, bool)
    if kind == TEXT:
        return isinstance(v, str)
    return isinstance(v, list) and all(isinstance(x, str) for x in v)


def _without_places(raw: dict) -> dict:
    data = json.loads(json.dumps(raw, default=str))  # a deep copy, as JSON data (TOML dates become text)
    for block, keep in BLOCK_FIELDS.items():
        if block in data:
            kept = {k: v for k, v in data[block].items() if k in keep} if isinstance(data[block], dict) else {}
            if kept:
                data[block] = kept
            else:
                del data[block]
    return data


def plan_v1(args, sf) -> dict | None:
    """The version-1 plan of this command line (what stores recorded before version 2; kept to test compatibility)."""
    command = getattr(args, "command", None)
    if command not in COMMANDS_V1:
        return None
    options = {}
    for name in OPTIONS[command]:
        v = getattr(args, name, None)
        if v is None or v is False or v == []:
            continue
        options[name] = list(v) if isinstance(v, (list, tuple)) else v
    return {"version": 1, "command": command, "scenario": _without_places(sf.raw),
            "scenario_file": str(getattr(args, "scenario", "") or ""), "options": options}


def plan_of(command: str, study, scenario_file: str = "") -> dict:
    """The plan a store records for ``command`` executing ``study`` (a StudyPlan with its stores)."""
    return {"version": VERSION, "command": command, "scenario_file": str(scenario_file or ""),
            "stores": [p for p in PARTS if study.stores.get(p)], "study": study.to_data()}


def record(command: str, study, scenario_file: str = "") -> None:
    """Record the plan in every run store of ``study`` (each file once)."""
    from ..engine.store import RunStore

    plan = plan_of(command, study, scenario_file)
    for path in dict.fromkeys(str(s) for s in study.stores.values() if s):
        with RunStore(path, background=False) as st:
            st.record_plan(plan)


def again(plan: Any, where: str) -> str:
    """The original command, as far as a plan says it, for messages: ``simpower run trial.toml --store STORE``."""
    if isinstance(plan, dict) and plan.get("command") in COMMANDS and isinstance(plan.get("scenario_file"), str):
        return shlex.join(["simpower", plan["command"], plan["scenario_file"] or "SCENARIO.toml", "--store", where])
    return ""


def refuse(plan: Any, where: str, what: str):
    cmd = again(plan, where)
    raise StoreError(f"{where}: the recorded plan is refused: {what}. A store is data: re-run the original command"
                     f"{f' ({cmd})' if cmd else ''} to continue it.")


def _envelope(plan: Any, where: str, bad, fields: set, version: int) -> None:
    """The plan's outer table: present, a table, only ``fields``, of ``version``; else one line (``bad``)."""
    if plan is None:
        raise StoreError(f"{where}: the store holds no plan (written from Python, or by an older simpower that "
                         f"recorded a command line): re-run the original command or run(...) call with this store "
                         f"to continue it.")
    if not isinstance(plan, dict):
        bad("not a table")
    extra = sorted(set(plan) - fields)
    if extra:
        bad(f"unknown field {extra[0]!r}")
    if plan.get("version") != version:
        bad(f"plan version {plan.get('version')!r}, this simpower reads versions 1 and {VERSION}")


def validate(plan: Any, where: str) -> dict:
    """``plan`` checked (envelope, user code, the study's validators), or StoreError (one line) saying what is wrong.

    Returns ``{"version", "command", "scenario_file", "stores", "study"}`` with ``study`` a
    :class:`~simpower.StudyPlan` (its ``stores`` empty: the caller gives them); a
    version-1 plan is returned as :func:`validate_v1` returns it.
    """
    from ..errors import ParameterError, SimpowerError
    from ..functions import no_user_code
    from ..study import StudyPlan

    if isinstance(plan, dict) and plan.get("version") == 1:
        return validate_v1(plan, where)

    def bad(what: str):
        refuse(plan, where, what)

    _envelope(plan, where, bad, {"version", "command", "scenario_file", "stores", "study"}, VERSION)
    command = plan.get("command")
    if command not in COMMANDS:
        bad(f"command {command!r} is not one of {', '.join(COMMANDS)}")
    if not isinstance(plan.get("scenario_file", ""), str):
        bad("`scenario_file` is not text")
    stores = plan.get("stores")
    if not isinstance(stores, list) or not stores or any(p not in PARTS for p in stores):
        bad(f"`stores` must list parts of {', '.join(PARTS)}; got {stores!r}")
    code = names_user_code(plan.get("study"))
    if code is not None:
        bad(f"the scenario names user code {code!r}, and resume never runs code named by a store")
    path = names_data_file(plan.get("study"))
    if path is not None:
        bad(f"the scenario would read the data file {path!r} (a pilot without its values), and resume never reads "
            f"files named by a store")
    try:
        with no_user_code("a store is data."):
            study = StudyPlan.from_data(plan.get("study"), where)
    except (ParameterError, SimpowerError) as exc:
        bad(str(exc).removeprefix(f"{where}: ").rstrip("."))
    kind = KINDS.get(command)
    if kind is not None and study.kind != kind:
        bad(f"a {command} plan computes a {kind}, this one a {study.kind}")
    return {"version": VERSION, "command": command, "scenario_file": plan.get("scenario_file", ""),
            "stores": list(stores), "study": study}


def validate_v1(plan: Any, where: str) -> dict:
    """A version-1 ``plan`` checked against the allow-lists, or StoreError (one line) saying what is wrong."""
    def bad(what: str):
        again = "the original command"
        if isinstance(plan, dict) and plan.get("command") in COMMANDS_V1 and isinstance(plan.get("scenario_file"), str):
            again += f" ({shlex.join(reproduce_argv({**plan, 'options': {}}, where, prog=True))})"
        raise StoreError(f"{where}: the recorded plan is refused: {what}. A store is data: re-run {again} to "
                         f"continue it.")

    _envelope(plan, where, bad, {"version", "command", "scenario", "scenario_file", "options"}, 1)
    command = plan.get("command")
    if command not in COMMANDS_V1:
        bad(f"command {command!r} is not one of {', '.join(COMMANDS_V1)}")
    scenario = plan.get("scenario")
    if not isinstance(scenario, dict):
        bad("the scenario is not a table")
    for block, keep in BLOCK_FIELDS.items():
        if block not in scenario:
            continue
        if not keep:
            bad(f"the scenario holds a `[{block}]` block, which a plan never records")
        if not isinstance(scenario[block], dict):
            bad(f"`{block}` is not a table")
        extra = [k for k in scenario[block] if k not in keep]
        if extra:
            bad(f"the scenario holds `{block}.{extra[0]}`, which a plan never records (it keeps "
                f"{', '.join(f'`{block}.{k}`' for k in keep)})")
    code = names_user_code(scenario)
    if code is not None:
        bad(f"the scenario names user code {code!r}, and resume never runs code named by a store")
    if not isinstance(plan.get("scenario_file", ""), str):
        bad("`scenario_file` is not text")
    options = plan.get("options", {})
    if not isinstance(options, dict):
        bad("`options` is not a table")
    allowed = OPTIONS[command]
    for name, value in options.items():
        if name not in allowed:
            bad(f"option {name!r} is not one a {command} records (allowed: {', '.join(sorted(allowed))})")
        if not _is(allowed[name], value):
            bad(f"option {name!r} must be {allowed[name]}; got {value!r}")
    for text in options.get("set", []):
        code = names_user_code([_assigned(text)])
        if code is not None:
            bad(f"`set {text}` names user code {code!r}, and resume never runs code named by a store")
    return {"version": 1, "command": command, "scenario": scenario,
            "scenario_file": plan.get("scenario_file", ""), "options": dict(options)}


def _assigned(text: str) -> Any:
    from ..errors import ParameterError
    from ..scenario_files import parse_assignment

    try:
        return parse_assignment(text)[1]
    except ParameterError:
        return None


def _first(data: Any, found) -> str | None:
    """The first non-None ``found(table)`` over every table nested in ``data`` (tables and lists), else None."""
    if isinstance(data, dict):
        hit = found(data)
        if hit is not None:
            return hit
        items = data.values()
    elif isinstance(data, list):
        items = data
    else:
        return None
    for v in items:
        hit = _first(v, found)
        if hit is not None:
            return hit
    return None


def names_user_code(data: Any) -> str | None:
    """The first ``type = "module:function"`` (or file) reference anywhere in ``data``, else None."""
    from ..registry import is_reference

    return _first(data, lambda t: t["type"] if is_reference(t.get("type")) else None)


def names_data_file(data: Any) -> str | None:
    """The first ``data = "file.csv"`` of a component that does not carry the file's content
    (``values`` / ``table``: what a recorded pilot process holds), else None."""
    def reads(t):
        path = t.get("data")
        return path if isinstance(path, str) and t.get("values") is None and t.get("table") is None else None

    return _first(data, reads)


def reproduce_argv(plan: dict, store: str, prog: bool = False) -> list[str]:
    """A command line (without the program name unless ``prog``) computing what the plan says, into ``store``.

    For messages and the manifest only: nothing runs it.
    """
    argv = (["simpower"] if prog else []) + [plan["command"], plan["scenario_file"] or "SCENARIO.toml"]
    for name, value in plan["options"].items():
        flag = "--" + name.replace("_", "-")
        if value is True:
            argv.append(flag)
        elif isinstance(value, list):
            for v in value:
                argv += [flag, v]
        else:
            argv += [flag, str(value)]
    return argv + ["--store", store]
