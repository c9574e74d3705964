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
from .steps import announce, stores_of, write_outputs


def register(sub) -> None:
    p = sub.add_parser("report", help="run the file's search, sweep and type I check and write a Markdown + HTML "
                                      "report with a reproducibility manifest", description=__doc__)
    add_run_options(p)
    p.add_argument("--out", metavar="DIR", help="output folder (default: the file's [report] out, else 'report')")
    p.add_argument("--formats", help="comma-separated: md,html (default both)")
    p.add_argument("--null-reps", type=int, help="replicates of the type I error check (default 10000)")
    p.set_defaults(func=main)


def plan_of(sf, args):
    """The file's study plan with the command line's overrides (checked before anything runs)."""
    from ..study import plan_from_file

    plan = plan_from_file(sf, execution=execution_of(sf, args))
    if plan.null_check is not None and args.null_reps:
        plan = plan.replace(null_check={**plan.null_check, "reps": args.null_reps})
    if plan.sweep is not None and args.reps:
        plan = plan.replace(sweep={**plan.sweep, "reps": args.reps})  # --reps wins over [sweep] reps
    parts = [p for p, on in (("search", plan.search is not None), ("sweep", plan.sweep is not None),
                             ("run", plan.kind == "run"), ("null_check", plan.null_check is not None)) if on]
    return plan.replace(stores=stores_of(sf, args, parts))


def main(args) -> int:
    from ..study import execute

    sf = load_scenario(args)
    block = sf.blocks.get("report", {})
    if getattr(args, "resumed_from", None) is not None:
        outdir = Path(args.out) if args.out else None  # resuming writes only where its own command line says
    else:
        outdir = Path(args.out or block.get("out", "report"))
        if sf.path is not None and not Path(outdir).is_absolute() and not args.out and "out" in block:
            outdir = sf.path.parent / outdir
        check_output_folder("--out" if args.out else "report.out", outdir)
    plan = plan_of(sf, args)
    announce(plan, 'report', args)
    result = execute(plan, echo=print)
    print(f"seed: {result.seed}")
    if outdir is None:
        print("report not written: give --out DIR to write it")
        return 0
    paths = write_outputs(sf, args, result.seed, outdir, sweep=result.sweep, search=result.search,
                          null=result.null, run=result.run, x=result.x, formats=args.formats,
                          assurance=result.assurance,
                          settings={"set": list(args.set), **result.settings})
    for k, p in paths.items():
        print(f"wrote {k}: {p}")
    return 0
