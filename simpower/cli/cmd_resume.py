"""``simpower resume STORE``: continue an interrupted run from its run store (or show its progress).

The store holds the plan of the command that started it, as data: which
command (run, sweep, samplesize or report), the scenario's fields and the
settings that shape the numbers (reps, seed, --set, grid, search settings...),
never a command line, a folder or an output path. ``resume`` validates that
plan, rebuilds the run from it and computes only what is missing, so the
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
    p.add_argument("--jobs", type=int, help="worker processes; -1 = all cores (default: the scenario's, else -1)")
    p.add_argument("--quiet", "-q", action="store_true", help="no progress bar")
    g = p.add_argument_group("outputs (written only when named here; the store records none)")
    g.add_argument("--json", metavar="PATH", help="run, sweep, samplesize: the result as JSON")
    g.add_argument("--csv", metavar="PATH", help="sweep, samplesize: the table as CSV")
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


def command_namespace(plan: dict, args, stored_seed: int | None):
    """The arguments of the planned command: settings from the plan, outputs from this command line."""
    from .main import build_parser

    command = plan["command"]
    wrong = [n for n in ALL_OUTPUTS if getattr(args, n, None) is not None and n not in OUTPUTS[command]]
    if wrong:
        valid = ", ".join("--" + n for n in OUTPUTS[command])
        raise ParameterError(f"`--{wrong[0]}` is not an output of a resumed {command}; its outputs: {valid}.")
    ns = build_parser().parse_args([command, "-"])   # the command's defaults ("-": no scenario file is read)
    for name, value in plan["options"].items():
        setattr(ns, name, value)
    for name in OUTPUTS[command]:
        setattr(ns, name, getattr(args, name, None))
    ns.scenario = plan["scenario_file"]
    ns.store, ns.jobs, ns.quiet, ns.debug = args.store, args.jobs, args.quiet, args.debug
    ns.backend = ns.address = None
    if ns.seed is None and "seed" not in plan["scenario"] and stored_seed is not None:
        ns.seed = stored_seed          # the run's entropy, kept with its points
    argv = reproduce_argv(plan, args.store)
    if ns.seed is not None and "--seed" not in argv:
        argv[2:2] = ["--seed", str(ns.seed)]
    ns.resumed_from = SimpleNamespace(store=args.store, scenario=plan["scenario"], argv=argv)
    return ns


def main(args) -> int:
    from ..engine.store import open_store
    from ..functions import no_user_code

    with open_store(args.store) as st:
        lines = status_lines(st)
        stored_seed = st.seed
        try:
            plan, refusal = validate(st.plan, args.store), None
        except StoreError as exc:
            plan, refusal = None, exc
    if args.status:
        print(f"Run store {args.store}")
        print("\n".join(lines))
        if plan is not None:
            print("plan: simpower " + shlex.join(reproduce_argv(plan, args.store)))
        else:
            print(f"plan: none that resume can use ({refusal})")
        return 0
    if plan is None:
        raise refusal
    ns = command_namespace(plan, args, stored_seed)
    again = shlex.join(reproduce_argv({**plan, "options": {}}, args.store, prog=True))
    with no_user_code(f"a store is data; continue this run with the original command ({again}), which "
                      f"imports the code as its scenario file does."):
        return ns.func(ns)
