"""``simpower report SCENARIO --out DIR``: run what the scenario file plans and write the report.

Runs the ``[search]`` block (required size or minimal detectable effect), the
``[sweep]`` block, the type I error check (``[null_check]``, on unless
``enabled = false``) and, when there is neither a search nor a sweep, the
scenario as given (to a target MCSE if ``[sequential]`` asks): the file's
study plan, run by :func:`simpower.execute`. Writes report.md, a
self-contained report.html, manifest.json, the tables (CSV) and the figures
(PNG and SVG) into DIR. The manifest's command reproduces every number
exactly.
"""

from __future__ import annotations

from pathlib import Path

from .common import add_run_options, check_output_folder, execution_of, load_scenario
from .steps import start, stores_of, write_outputs


def register(sub) -> None:
    p = sub.add_parser("report", help="run the file's search, sweep and type I check and write a Markdown + HTML "
                                      "report with a reproducibility manifest", description=__doc__)
    add_run_options(p)
    p.add_argument("--out", metavar="DIR", help="output folder (default: the file's [report] out, else 'report')")
    p.add_argument("--formats", help="comma-separated: md,html (default both)")
    p.add_argument("--null-reps", type=int, help="replicates of the type I error check (default 10000)")
    p.set_defaults(func=main, build=build, check=check, show=show, echo=True)


def build(sf, args):
    """The file's study plan with the command line's overrides (checked before anything runs)."""
    from ..study import plan_from_file

    plan = plan_from_file(sf, execution=execution_of(sf, args))
    if plan.null_check is not None and args.null_reps:
        plan = plan.replace(null_check={**plan.null_check, "reps": args.null_reps})
    if plan.sweep is not None and args.reps:
        plan = plan.replace(sweep={**plan.sweep, "reps": args.reps})  # --reps wins over [sweep] reps
    return plan


def check(plan, args):
    """The report's folder, checked before anything runs: --out, else the file's [report] out (relative to the
    file), else 'report'; resuming, --out only (None: no report)."""
    block = plan.report
    if getattr(args, "resumed_from", None) is not None:
        return Path(args.out) if args.out else None  # resuming writes only where its own command line says
    outdir = Path(args.out or block.get("out", "report"))
    if plan.path is not None and not outdir.is_absolute() and not args.out and "out" in block:
        outdir = plan.path.parent / outdir
    check_output_folder("--out" if args.out else "report.out", outdir)
    return outdir


def main(args) -> int:
    from ..study import execute
    from .steps import stored_parts

    sf = load_scenario(args)
    plan = build(sf, args)
    check(plan, args)
    plan = start(plan, "report", args, stores_of(sf, args, stored_parts("report", plan)))
    return show(plan, execute(plan, echo=print), args)


def show(plan, out, args) -> int:
    """Say the seed and write the report (the parts printed their lines as they finished)."""
    outdir = check(plan, args)
    print(f"seed: {out.seed}")
    if outdir is None:
        print("report not written: give --out DIR to write it")
        return 0
    paths = write_outputs(plan, args, out.seed, outdir, sweep=out.sweep, search=out.search,
                          null=out.null, run=out.run, x=out.x, formats=args.formats,
                          assurance=out.assurance,
                          settings={"set": list(args.set), **out.settings})
    for k, p in paths.items():
        print(f"wrote {k}: {p}")
    return 0
