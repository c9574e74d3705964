"""A study plan and its execution: what a scenario file plans, as one value, and the one function that runs it.

:func:`load_plan` reads a scenario file into a validated :class:`StudyPlan`:
the Scenario, the blocks that say what to compute (``[search]``, ``[sweep]``,
``[sequential]``, ``[null_check]``, ``[report]``; ``[looks]``, a group-sequential
design, is applied to the scenario's analyses when the file is read) and how to run it (one
:class:`~simpower.execution.Execution`, with run stores per part).
:func:`execute` runs it and returns a :class:`PlanResult`:

* the search (required size or minimal detectable effect) when the plan has one;
* the sweep when it has one;
* otherwise the scenario as given, ``reps`` replicates (or to a target MCSE
  when ``[sequential]`` sets one);
* and the type I error check at each analysis's H0 boundary when it is on
  (on unless ``[null_check] enabled = false``).

All parts share one seed (the plan's, else the one its run stores already
hold, else fresh entropy; recorded in the result), so ``execute(load_plan("trial.toml"))`` gives the numbers
``simpower report trial.toml`` gives. The command line only parses, builds or
overrides a plan, executes it and prints.

A plan is also data: :meth:`StudyPlan.to_data` gives the resolved plan as
JSON-able tables (the scenario's specs, the blocks, the settings that shape the
numbers; never a folder, a store or an output path), and
:meth:`StudyPlan.from_data` checks such data with the validators of
:func:`load_plan` and rebuilds the plan. A command-line run records it in its
run store, and ``simpower resume`` executes it again from there.

Examples
--------
>>> import simpower as sp, tempfile, pathlib
>>> text = '''
... seed = 1
... reps = 500
... [process]
... type = "normal_two_arm"
... n = 64
... effect = 0.5
... [analysis]
... type = "t_test"
... [null_check]
... enabled = false
... [execution]
... backend = "serial"
... '''
>>> path = pathlib.Path(tempfile.mkdtemp()) / "trial.toml"
>>> _ = path.write_text(text)
>>> out = sp.execute(sp.load_plan(path))
>>> abs(out.run.power - 0.80) < 4 * out.run.mcse   # Cohen (1988): n = 64 per arm, d = 0.5 -> 80%
True
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

from .errors import ParameterError
from .execution import Execution

#: replicates of a plain run or a sweep point when neither the call nor the file gives ``reps``
DEFAULT_REPS = 2000
#: replicates of the type I error check by default
DEFAULT_NULL_REPS = 10_000
#: the parts of a plan that run, in the order they run (each may have its own run store)
PARTS = ("search", "sweep", "run", "null_check", "assurance")


@dataclass(frozen=True)
class StudyPlan:
    """What to compute and how: a Scenario, its planning blocks, and one Execution.

    Attributes
    ----------
    scenario : Scenario
    execution : Execution
        Seed, workers, executor, failure policy, limits, records and the run
        level chunk size (``store`` is left None: see ``stores``).
    reps : int or None
        Replicates of a plain run (and of each sweep point unless the sweep
        gives its own); None: :data:`DEFAULT_REPS`.
    search : mapping or None
        Options of :func:`simpower.planning.search.search`, ``find`` included.
    sweep : mapping or None
        ``grid`` (a :class:`~simpower.planning.sweep.Grid`), and optionally
        ``reps``, ``target_mcse``, ``max_reps``, ``min_reps``, ``chunk_size``, ``x``.
    sequential : mapping
        The ``[sequential]`` block (a plain run to a target MCSE when it has
        ``target_mcse``).
    null_check : mapping or None
        ``reps`` and ``at_grid`` of the type I error check; None when it is off.
    report : mapping
        The ``[report]`` block (title, out, formats), for whoever renders.
    assurance : mapping or None
        The ``[assurance]`` block (prior, draws, reps_per_draw, favourable,
        analysis; with ``target``, ``low`` and ``high`` the size whose
        assurance reaches the target), prior checked at load.
    stores : mapping
        A run store (path) per part (:data:`PARTS`); a part not named has none.
    looks : mapping
        The ``[looks]`` block as loaded (a group-sequential design): the loader has already wrapped the
        analyses it names in ``group_sequential`` (:func:`simpower.blocks.with_looks`), so every part
        runs the design; kept here for whoever reports it.
    path : Path or None
        The scenario file (for messages and the report).
    """

    scenario: Any
    execution: Execution = field(default_factory=Execution)
    reps: int | None = None
    search: Mapping[str, Any] | None = None
    sweep: Mapping[str, Any] | None = None
    sequential: Mapping[str, Any] = field(default_factory=dict)
    null_check: Mapping[str, Any] | None = None
    report: Mapping[str, Any] = field(default_factory=dict)
    stores: Mapping[str, Any] = field(default_factory=dict)
    path: Path | None = None
    assurance: Mapping[str, Any] | None = None
    looks: Mapping[str, Any] = field(default_factory=dict)

    def replace(self, **changes) -> "StudyPlan":
        """A copy with ``changes`` applied (e.g. ``plan.replace(null_check=None)``)."""
        return dataclasses.replace(self, **changes)

    def to_data(self) -> dict[str, Any]:
        """The plan as data (JSON-able): what :meth:`from_data` rebuilds into the same computation.

        Holds the scenario as resolved (every parameter, after overrides; the analyses a
        ``[looks]`` block names already wrapped), the blocks, and the execution settings that
        shape the numbers (:data:`RECORDED_EXECUTION`: seed, chunk size, fit-trouble policy,
        failure limit, time limit, record keeping). Never the run stores, the file's folder,
        the report's output folder, workers, executor or scheduler address.
        """
        return plan_to_data(self)

    @classmethod
    def from_data(cls, data: Any, where: str = "the plan") -> "StudyPlan":
        """A plan rebuilt from :meth:`to_data`'s data, checked by the validators of :func:`load_plan`."""
        return plan_from_data(data, where)

    @property
    def kind(self) -> str:
        """What the plan computes first: 'search', 'sweep', 'assurance' or 'run'."""
        if self.search is not None:
            return "search"
        return "sweep" if self.sweep is not None else "assurance" if self.assurance is not None else "run"


@dataclass
class PlanResult:
    """The results of :func:`execute`: one per part that ran, the seed they share, and the settings used."""

    seed: int
    search: Any = None
    sweep: Any = None
    run: Any = None
    null: Any = None
    assurance: Any = None
    x: str | None = None
    settings: dict = field(default_factory=dict)


def execution_from_file(sf) -> Execution:
    """The Execution a loaded scenario file asks for (top-level run settings and ``[execution]``)."""
    ex = sf.blocks.get("execution", {})
    return Execution(seed=sf.run.get("seed"), n_jobs=sf.run.get("jobs", -1), chunk_size=sf.run.get("chunk_size"),
                     fit_trouble=sf.run.get("fit_trouble", "failure"),
                     max_failure_rate=sf.run.get("max_failure_rate", 0.5), backend=ex.get("backend"),
                     address=ex.get("address"), timeout=ex.get("timeout"),
                     keep_records=False if ex.get("summaries_only") else None)


def null_settings(block: Mapping[str, Any], default_on: bool, on: bool = False,
                  reps: int | None = None) -> dict | None:
    """The type I check's settings from its block (``on``/``reps`` from a command line win), or None when off."""
    if not (on or block.get("enabled", default_on)):
        return None
    reps = reps or block.get("reps", DEFAULT_NULL_REPS)
    if reps < 1:
        raise ParameterError(f"`--null-reps` must be an integer >= 1; got {reps}.")
    return {"reps": reps, "at_grid": block.get("at_grid", False)}


def sweep_part(block: Mapping[str, Any], grid=None) -> dict:
    """The sweep part of a plan from a ``[sweep]`` block (``grid`` replaces the block's)."""
    from .planning.sweep import grid_from_block

    grid = grid if grid is not None else grid_from_block(block)
    if grid is None:
        raise ParameterError("the grid is empty: give --vary NAME=VALUES, or a [sweep] block with [sweep.vary] "
                             "or [[sweep.together]].")
    part = {k: block[k] for k in ("reps", "target_mcse", "max_reps", "min_reps", "chunk_size", "x") if k in block}
    part["grid"] = grid
    return part


def plan_from_file(sf, *, execution: Execution | None = None, stores: Mapping[str, Any] | None = None) -> StudyPlan:
    """The StudyPlan of a loaded :class:`~simpower.scenario_files.ScenarioFile` (what ``simpower report`` runs).

    The grid and the plot axis are checked here, before anything runs, and so
    is every null-check boundary.
    """
    from .planning.nullpoints import null_points
    from .planning.sweep import check_names

    blocks = sf.blocks
    sweep = None
    if "sweep" in blocks:
        sweep = sweep_part(blocks["sweep"])
        names = sweep["grid"].names
        check_names(sf.scenario, names)
        x = sweep.get("x", names[0])
        if x not in names:
            src = "`[sweep] x`" if "x" in sweep else "the default x axis (the first swept parameter)"
            raise ParameterError(f"{src} {x!r} is not a swept parameter; swept: {', '.join(names)}.")
        sweep["x"] = x
    null = null_settings(blocks.get("null_check", {}), default_on=True)
    if null is not None:
        null_points(sf.scenario)  # a boundary that cannot be placed is refused before anything runs
    search = None
    if "search" in blocks:
        search = dict(blocks["search"])
        search.setdefault("find", "size")
    assurance = None
    if "assurance" in blocks:
        from .planning.assurance import check_block

        assurance = check_block(sf.scenario, blocks["assurance"])
    return StudyPlan(scenario=sf.scenario, execution=execution or execution_from_file(sf), reps=sf.run.get("reps"),
                     search=search, sweep=sweep, sequential=dict(blocks.get("sequential", {})), null_check=null,
                     report=dict(blocks.get("report", {})), stores=dict(stores or {}), path=sf.path,
                     assurance=assurance, looks=dict(blocks.get("looks", {})))


def load_plan(path: str | Path, overrides: Mapping[str, Any] | None = None,
              changes: Mapping[str, Any] | None = None) -> StudyPlan:
    """Read and validate a scenario file into a :class:`StudyPlan`.

    ``overrides`` replace top-level run settings (``reps``, ``seed``,
    ``jobs``...); ``changes`` are scenario parameters, as for
    :meth:`Scenario.with_params` (``{"n": 80}``), resolved against the file's
    folder.
    """
    from .functions import reference_folder
    from .scenario_files import load

    sf = load(path, overrides=dict(overrides or {}))
    if changes:
        with reference_folder(Path(path).resolve().parent):
            sf.scenario = sf.scenario.with_params(**dict(changes))
    return plan_from_file(sf)


#: the execution settings a plan's data keeps (the ones that shape the numbers, and record keeping)
RECORDED_EXECUTION = ("seed", "chunk_size", "fit_trouble", "max_failure_rate", "timeout", "keep_records")
#: the fields of a scenario in a plan's data (a scenario file's fields, blocks and run settings excluded)
SCENARIO_DATA = ("name", "description", "alpha", "true_effect", "true_effects", "process", "analyses")
#: the fields of a plan's data
PLAN_DATA = ("scenario", "execution", "reps", "search", "sweep", "sequential", "null_check", "report", "assurance",
             "looks")
#: the [report] fields a plan's data keeps (``out`` names a place to write to)
REPORT_DATA = ("title", "formats", "labels")
#: the sweep part's settings besides its grid
SWEEP_DATA = ("reps", "target_mcse", "max_reps", "min_reps", "chunk_size", "x")


def _plain(value: Any) -> Any:
    import json

    from .components import to_plain

    return json.loads(json.dumps(to_plain(value), default=str))


def scenario_to_data(scenario) -> dict[str, Any]:
    """A Scenario as a scenario file's fields: name, description, alpha, the process and analyses as their specs."""
    spec = scenario.spec()
    out: dict[str, Any] = {"name": scenario.name, "description": scenario.description, "alpha": spec["alpha"],
                           "process": spec["process"], "analyses": spec["analyses"]}
    if spec.get("true_effect") is not None:
        out["true_effect"] = spec["true_effect"]
    if spec.get("true_effects"):
        out["true_effects"] = spec["true_effects"]
    return _plain(out)


def plan_to_data(plan: StudyPlan) -> dict[str, Any]:
    """See :meth:`StudyPlan.to_data`."""
    from .engine.runner import normalize_seed
    from .planning.sweep import grid_to_data

    ex = plan.execution
    execution = {k: getattr(ex, k) for k in RECORDED_EXECUTION if getattr(ex, k) is not None}
    if "seed" in execution:
        execution["seed"] = normalize_seed(execution["seed"])
    out: dict[str, Any] = {"scenario": scenario_to_data(plan.scenario), "execution": execution}
    if plan.reps is not None:
        out["reps"] = plan.reps
    if plan.search is not None:
        out["search"] = _plain(plan.search)
    if plan.sweep is not None:
        out["sweep"] = {**_plain({k: v for k, v in plan.sweep.items() if k in SWEEP_DATA}),
                        "grid": grid_to_data(plan.sweep["grid"])}
    if plan.sequential:
        out["sequential"] = _plain(plan.sequential)
    if plan.null_check is not None:
        out["null_check"] = _plain(plan.null_check)
    report = {k: v for k, v in plan.report.items() if k in REPORT_DATA}
    if report:
        out["report"] = _plain(report)
    if plan.assurance is not None:
        a = dict(plan.assurance)
        a["prior"] = {k: (v.to_data() if hasattr(v, "to_data") else v) for k, v in a["prior"].items()}
        out["assurance"] = _plain(a)
    if plan.looks:
        out["looks"] = _plain(plan.looks)
    return out


def _table(data: Any, where: str) -> dict:
    if not isinstance(data, dict):
        raise ParameterError(f"`{where}` must be a table; got {type(data).__name__}.")
    return data


def _only(data: dict, allowed, where: str) -> None:
    from .errors import nearest

    for key in data:
        if key not in allowed:
            raise ParameterError(f"`{where}.{key}` is not a field of a recorded plan's {where}.{nearest(key, allowed)}")


def plan_from_data(data: Any, where: str = "the plan") -> StudyPlan:
    """See :meth:`StudyPlan.from_data`: every field checked by the validators of :func:`load_plan`.

    The scenario goes through the scenario-file loader (its process and analyses through the
    registry, every parameter against its constraints), each block through its declared
    fields (:func:`simpower.blocks.read_block`), the execution settings through
    :class:`~simpower.execution.Execution`; the grid's names, the null-check boundaries and
    the assurance prior are checked against the scenario, as when a file is loaded. Unknown
    fields are refused. References to user code resolve as in a file without a folder (the
    current one); ``simpower resume`` refuses them before this is called.
    """
    from ._validation import Int
    from .blocks import BLOCK_FIELDS, read_block
    from .scenario_files import from_data

    data = _table(data, "plan")
    _only(data, PLAN_DATA, "plan")
    if "scenario" not in data or "execution" not in data:
        raise ParameterError("a recorded plan needs `scenario` and `execution`.")
    scen = _table(data["scenario"], "scenario")
    _only(scen, SCENARIO_DATA, "scenario")
    sf = from_data(scen, f"{where}: scenario")
    ex = _table(data["execution"], "execution")
    _only(ex, RECORDED_EXECUTION, "execution")
    if "seed" not in ex:
        raise ParameterError("`execution.seed` is missing: a recorded plan names its seed.")
    execution = Execution(**{k: v for k, v in ex.items()})
    reps = Int(low=1, optional=True).clean("reps", data.get("reps"))
    search = None
    if data.get("search") is not None:
        search = read_block("search", data["search"])
        search.setdefault("find", "size")
    sweep = None
    if data.get("sweep") is not None:
        from .planning.sweep import check_names, grid_from_data

        block = dict(_table(data["sweep"], "sweep"))
        grid = grid_from_data(block.pop("grid", None))
        sweep = read_block("sweep", block, {k: BLOCK_FIELDS["sweep"][k] for k in SWEEP_DATA})
        check_names(sf.scenario, grid.names)
        sweep["grid"] = grid
    null = None
    if data.get("null_check") is not None:
        from .planning.nullpoints import null_points

        null = read_block("null_check", data["null_check"], {k: BLOCK_FIELDS["null_check"][k]
                                                             for k in ("reps", "at_grid")})
        null = {"reps": null.get("reps", DEFAULT_NULL_REPS), "at_grid": null.get("at_grid", False)}
        null_points(sf.scenario)
    report = read_block("report", data.get("report") or {}, {k: BLOCK_FIELDS["report"][k] for k in REPORT_DATA})
    assurance = None
    if data.get("assurance") is not None:
        from .planning.assurance import check_block

        assurance = check_block(sf.scenario, read_block("assurance", data["assurance"]))
    return StudyPlan(scenario=sf.scenario, execution=execution, reps=reps, search=search, sweep=sweep,
                     sequential=read_block("sequential", data.get("sequential") or {}), null_check=null,
                     report=report, assurance=assurance, looks=read_block("looks", data.get("looks") or {}))


def resolve_seed(plan: StudyPlan) -> int:
    """The plan's seed; without one, the seed its run stores already hold (a rerun continues them), else fresh
    entropy."""
    from .engine.runner import normalize_seed

    if plan.execution.seed is not None:
        return normalize_seed(plan.execution.seed)
    for store in plan.stores.values():
        if store is None:
            continue
        if isinstance(store, (str, Path)) or hasattr(store, "__fspath__"):
            if not Path(store).is_file():
                continue
            from .engine.store import open_store

            with open_store(store) as st:
                seed = st.seed
        else:
            seed = getattr(store, "seed", None)
        if seed is not None:
            return int(seed)
    return normalize_seed(None)


def _search(plan: StudyPlan, ex: Execution):
    from .planning.search import SEARCH_CHUNK, search

    opts = dict(plan.search)
    find = opts.pop("find", "size")
    if opts.get("chunk_size") is None and ex.chunk_size:
        opts["chunk_size"] = ex.chunk_size
    opts.setdefault("chunk_size", SEARCH_CHUNK)
    return search(plan.scenario, find, execution=ex.replace(chunk_size=None, store=plan.stores.get("search")),
                  **opts)


def _sweep(plan: StudyPlan, ex: Execution):
    from .planning.sweep import sweep

    part = plan.sweep
    kw = {}
    if part.get("target_mcse") is not None:
        kw = {"target_mcse": part["target_mcse"], "max_reps": part.get("max_reps", 100_000),
              "min_reps": part.get("min_reps", 1000)}
    reps = part.get("reps") or plan.reps or DEFAULT_REPS
    chunk = part.get("chunk_size", ex.chunk_size)
    return sweep(plan.scenario, part["grid"], reps=reps,
                 execution=ex.replace(chunk_size=chunk, store=plan.stores.get("sweep")), **kw)


def _run(plan: StudyPlan, ex: Execution):
    from .engine.runner import run
    from .planning.sequential import run_to_mcse

    seq = plan.sequential
    store = plan.stores.get("run")
    if seq.get("target_mcse") is not None:
        kw = {k: seq[k] for k in ("min_reps", "max_reps", "which") if k in seq}
        return run_to_mcse(plan.scenario, seq["target_mcse"],
                           execution=ex.replace(chunk_size=seq.get("chunk_size", ex.chunk_size), store=store), **kw)
    return run(plan.scenario, reps=plan.reps or DEFAULT_REPS, execution=ex.replace(store=store))


def _null(plan: StudyPlan, ex: Execution):
    from .planning.sweep import null_check

    grid = plan.sweep["grid"] if plan.sweep is not None and plan.null_check["at_grid"] else None
    return null_check(plan.scenario, grid, reps=plan.null_check["reps"],
                      execution=ex.replace(store=plan.stores.get("null_check")))


def execute(plan: StudyPlan, echo=None) -> PlanResult:
    """Run what ``plan`` plans: its search, its sweep, its assurance, else the scenario as given; then the type I check.

    Parameters
    ----------
    plan : StudyPlan
    echo : callable, optional
        Called with a line of text as each part finishes (the command line prints them).

    Returns
    -------
    PlanResult
        ``search``, ``sweep``, ``assurance``, ``run`` and ``null`` (None for a part that did
        not run), the ``seed`` they share, the plot axis ``x`` of a sweep, and
        the ``settings`` each part ran with (for the report's manifest).
    """
    if not isinstance(plan, StudyPlan):
        raise ParameterError(f"`plan` must be a StudyPlan (simpower.load_plan('x.toml')); got "
                             f"{type(plan).__name__}.")
    say = echo or (lambda line: None)
    seed = resolve_seed(plan)
    ex = plan.execution.replace(seed=seed)
    out = PlanResult(seed=seed)
    if plan.search is not None:
        out.search = _search(plan, ex)
        out.settings["search"] = out.search.settings
        say(out.search.summary())
    if plan.sweep is not None:
        out.sweep = _sweep(plan, ex)
        out.x = plan.sweep.get("x")
        out.settings["sweep"] = {"grid": plan.sweep["grid"].describe(), "reps": out.sweep.attrs.get("reps"),
                                 "target_mcse": out.sweep.attrs.get("target_mcse"),
                                 "chunk_size": out.sweep.attrs.get("chunk_size")}
        say(f"sweep: {len(out.sweep)} rows")
    if plan.assurance is not None:
        from .planning.assurance import run_block

        out.assurance = run_block(plan.scenario, plan.assurance, ex.replace(store=plan.stores.get("assurance")))
        out.settings["assurance"] = {k: v for k, v in plan.assurance.items() if k != "prior"}
        say(out.assurance.summary())
    if plan.search is None and plan.sweep is None and plan.assurance is None:
        out.run = _run(plan, ex)
        out.settings["run"] = {"reps": out.run.reps, "chunk_size": out.run.chunk_size}
        say(str(out.run))
    if plan.null_check is not None:
        out.null = _null(plan, ex)
        out.settings["null_check"] = dict(plan.null_check)
    return out
