"""``simpower resume STORE``: continue an interrupted run from its run store (or show its progress).

The store holds the plan the command executed, as data: the resolved study plan
(the scenario after --set, the sweep grid, the search, null check, assurance and
report settings, the seed, chunk size and failure policy), never a command
line, a folder or an output path. ``resume`` validates that plan with the
validators that check a scenario file, rebuilds the study plan from it and
executes it (``simpower.execute``), computing only what is missing, so the
result equals an uninterrupted run. It writes into STORE, and into the outputs
named on its own command line (--json, --csv, --out...), nowhere else.

A store is data: a plan naming user code (``module:function``,
``path/file.py:function``) is refused; re-run the original command with
--store STORE to continue such a run (it picks up the finished chunks too).
"""

from __future__ import annotations

import shlex
from types import SimpleNamespace

from ..errors import ParameterError, StoreError
from .plan import OUTPUTS, reproduce_argv, validate

#: every output option resume accepts (each command takes the ones in plan.OUTPUTS)
ALL_OUTPUTS = ("json", "csv", "parquet", "plot", "x", "target", "report", "out", "formats")


def register(sub) -> None:
    p = sub.add_parser("resume", help="continue an interrupted run from its run store (--status: show progress)",
                       description=__doc__, formatter_class=__import__("argparse").RawDescriptionHelpFormatter)
    p.add_argument("store", help="run store file (SQLite) written with --store")
    p.add_argument("--status", action="store_true", help="only show what the store holds and what is missing")
    p.add_argument("--jobs", type=int, help="worker processes; -1 = all cores (default)")
    p.add_argument("--quiet", "-q", action="store_true", help="no progress bar")
    g = p.add_argument_group("outputs (written only when named here; the store records none)")
    g.add_argument("--json", metavar="PATH", help="run, sweep, samplesize, assurance: the result as JSON")
    g.add_argument("--csv", metavar="PATH", help="sweep, samplesize, assurance: the table as CSV")
    g.add_argument("--parquet", metavar="PATH", help="sweep: the table as Parquet")
    g.add_argument("--plot", metavar="STEM", help="sweep, samplesize: STEM.png and STEM.svg")
    g.add_argument("--x", metavar="NAME", help="sweep: the plot's x axis")
    g.add_argument("--target", type=float, help="sweep: a target power line on the plot")
    g.add_argument("--report", metavar="DIR", help="sweep, samplesize: the Markdown + HTML report into DIR")
    g.add_argument("--out", metavar="DIR", help="report: the report's folder (without it no report is written)")
    g.add_argument("--formats", help="report: md,html (default both)")
    p.set_defaults(func=main)


def status_lines(st) -> list[str]:
    """Progress of each grid point of an open store."""
    lines = []
    done = {}
    for p, _, size in st.done_chunks():
        done[p] = done.get(p, 0) + size
    for row in st._point_rows():
        point, fp, seed, cs, reps = row[:5]
        have = done.get(point, 0)
        state = "complete" if have >= reps else f"{reps - have} to go"
        lines.append(f"point {point}: {have} of {reps} replicates ({state}); fingerprint {fp}, seed {seed}, "
                     f"chunk size {cs}")
    return lines or ["the store holds no grid point yet"]


def plan_lines(plan: dict, store: str) -> list[str]:
    """What a validated plan computes, in words (for --status)."""
    if plan["version"] == 1:
        return ["plan (version 1, as recorded by an older simpower; resume converts it): simpower "
                + shlex.join(reproduce_argv(plan, store))]
    study = plan["study"]
    what = study.scenario.name or plan["scenario_file"] or "a scenario"
    return [f"plan: {plan['command']} of {what}, seed {study.execution.seed} (resume runs it from the store; "
            f"scenario file {plan['scenario_file'] or 'not named'} is not read)"]


def command_namespace(command: str, args, scenario_file: str = ""):
    """The planned command's arguments: its defaults, the outputs of this command line, and where it resumes from."""
    from .main import build_parser

    wrong = [n for n in ALL_OUTPUTS if getattr(args, n, None) is not None and n not in OUTPUTS[command]]
    if wrong:
        valid = ", ".join("--" + n for n in OUTPUTS[command])
        raise ParameterError(f"`--{wrong[0]}` is not an output of a resumed {command}; its outputs: {valid}.")
    ns = build_parser().parse_args([command, "-"])   # the command's defaults ("-": no scenario file is read)
    for name in OUTPUTS[command]:
        setattr(ns, name, getattr(args, name, None))
    ns.scenario = scenario_file
    ns.store, ns.jobs, ns.quiet, ns.debug = args.store, args.jobs, args.quiet, args.debug
    ns.backend = ns.address = None
    ns.resumed_from = SimpleNamespace(store=args.store, scenario_file=scenario_file, scenario=None)
    return ns


def study_of_v1(plan: dict, ns, stored_seed: int | None):
    """The StudyPlan a version-1 plan (the scenario file's fields and the command's options) stands for.

    Built as the command built it: the recorded options on the command's defaults, the scenario
    data through the loader with --set applied, then the command's own plan builder. The seed is
    the recorded one, else the seed the store's points hold.
    """
    from .common import load_scenario

    for name, value in plan["options"].items():
        setattr(ns, name, value)
    if ns.seed is None and "seed" not in plan["scenario"] and stored_seed is not None:
        ns.seed = stored_seed          # the run's entropy, kept with its points
    ns.resumed_from.scenario = plan["scenario"]
    return ns.build(load_scenario(ns), ns)


def main(args) -> int:
    from ..engine import RunInterrupted
    from ..engine.store import open_store
    from ..functions import no_user_code
    from ..study import execute
    from .common import progress_of
    from .plan import again
    from .steps import start, stored_parts

    with open_store(args.store) as st:
        lines = status_lines(st)
        stored_seed = st.seed
        raw = st.plan
    try:
        plan, refusal = validate(raw, args.store), None
    except StoreError as exc:
        plan, refusal = None, exc
    if args.status:
        print(f"Run store {args.store}")
        print("\n".join(lines))
        print("\n".join(plan_lines(plan, args.store)) if plan is not None else
              f"plan: none that resume can use ({refusal})")
        return 0
    if plan is None:
        raise refusal
    if args.jobs is not None:
        from .._validation import Jobs

        Jobs(optional=False).clean("--jobs", args.jobs)
    command = plan["command"]
    ns = command_namespace(command, args, plan["scenario_file"])
    hint = f"a store is data; continue this run with the original command ({again(raw, args.store)}), which " \
           f"imports the code as its scenario file does."
    with no_user_code(hint):
        if plan["version"] == 1:
            study = study_of_v1(plan, ns, stored_seed)
            parts = stored_parts(command, study)
        else:
            study, parts = plan["study"], plan["stores"]
        study = study.replace(execution=study.execution.replace(n_jobs=args.jobs if args.jobs is not None else -1,
                                                                progress=progress_of(args)))
        check = getattr(ns, "check", None)
        if check is not None:
            check(study, ns)   # the outputs named here, before anything runs
        # a version-1 plan is replaced by the plan it stands for; a version-2 plan stays as recorded
        study = start(study, command, ns, {p: args.store for p in parts}, record_plan=plan["version"] == 1)
        try:
            out = execute(study, echo=print if getattr(ns, "echo", False) else None)
        except RunInterrupted:
            raise RunInterrupted(f"interrupted; finished chunks are in {args.store}; to go on: simpower resume "
                                 f"{args.store}.") from None
        return ns.show(study, out, ns)
