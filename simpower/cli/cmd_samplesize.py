"""``simpower samplesize SCENARIO``: the smallest n (or number of clusters) reaching a target power.

With ``--effect``, the minimal detectable effect at the scenario's size
instead. Settings come from the file's ``[search]`` block; the options below
override them:

    simpower samplesize trial.toml --power 0.9 --range 20:400
    simpower samplesize cluster.toml --parameter clusters --range 4:80
    simpower samplesize trial.toml --effect --range 0:1.5 --set n=80

When ``--effect`` switches a size search of the file to an effect search, the
block's ``low``, ``high``, ``step``, ``scale`` and ``parameter`` (which describe
the size) are dropped unless ``--range`` / ``--parameter`` are given.

The answer carries a Monte Carlo interval; a range in which the target is
never reached is an error that reports the best power seen.
"""

from __future__ import annotations

from .common import add_run_options, load_scenario
from .common import execution_of
from .steps import null_lines, null_settings, search_options, start, stores_of, write_outputs


def register(sub) -> None:
    p = sub.add_parser("samplesize", help="required sample size (or clusters) for a target power, with a Monte "
                                          "Carlo interval; or the minimal detectable effect (--effect)",
                       description=__doc__, formatter_class=__import__("argparse").RawDescriptionHelpFormatter)
    add_run_options(p)
    p.add_argument("--power", type=float, help="target power (default: [search] power, else 0.8)")
    p.add_argument("--effect", action="store_true", help="find the minimal detectable effect at the scenario's size")
    p.add_argument("--parameter", help="the parameter to search over (default: the process's size or effect)")
    p.add_argument("--range", metavar="LOW:HIGH", help="search range")
    p.add_argument("--step", type=float, help="allowed sizes are multiples of STEP (e.g. 2)")
    p.add_argument("--rel-tol", type=float, help="stop when the interval's half-width is within this share "
                                                  "(default 0.02)")
    p.add_argument("--max-reps", type=int, help="budget of replicates (default 200000)")
    p.add_argument("--analysis", help="whose power must reach the target (default: the primary analysis)")
    p.add_argument("--all-analyses", action="store_true",
                   help="fit every analysis at each size (default: only the one whose power decides)")
    p.add_argument("--csv", metavar="PATH", help="write the evaluated values as CSV")
    p.add_argument("--plot", metavar="STEM", help="write STEM.png and STEM.svg")
    p.add_argument("--null-check", action="store_true", help="also the type I error under the null")
    p.add_argument("--null-reps", type=int, help="replicates of the type I error check (default 10000)")
    p.add_argument("--report", metavar="DIR", help="also write the Markdown + HTML report into DIR")
    p.set_defaults(func=main, build=build, show=show)


def build(sf, args):
    """The search's study plan: the file's [search] with the options above, and the type I check when asked."""
    from ..study import StudyPlan

    ns = null_settings(sf, args, default_on=False) if args.null_check else None
    return StudyPlan(scenario=sf.scenario, execution=execution_of(sf, args), reps=sf.run.get("reps"),
                     search=search_options(sf, args), null_check=ns, report=dict(sf.blocks.get("report", {})),
                     path=sf.path)


def main(args) -> int:
    from ..study import execute

    sf = load_scenario(args)
    plan = build(sf, args)
    parts = ["search"] + (["null_check"] if plan.null_check is not None else [])
    plan = start(plan, "samplesize", args, stores_of(sf, args, parts))
    return show(plan, execute(plan), args)


def show(plan, out, args) -> int:
    """Print the search's answer (and write --csv, --json, --plot, --report); exit code 1 if it did not converge."""
    from ..textout import CAUTION

    res, seed = out.search, out.seed
    print(res.summary())
    print(f"  Seed: {seed}" + (f"  chunk size: {res.chunk_size}" if getattr(args, "verbose", False) else ""))
    null = out.null
    if null is not None:
        print("\n" + "\n".join(null_lines(null)))
    if args.csv:
        res.table.to_csv(args.csv, index=False)
        print(f"CSV written to {args.csv}")
    if args.json:
        import json

        with open(args.json, "w", encoding="utf-8") as fh:
            json.dump(res.to_dict(), fh, indent=2, default=str)
        print(f"JSON written to {args.json}")
    if args.plot:
        from ..report import plots

        png, svg = plots.save(plots.search_plot(res), args.plot)
        print(f"plots written to {png} and {svg}")
    if args.report:
        paths = write_outputs(plan, args, seed, args.report, search=res, null=null,
                              settings={"search": res.settings, "set": list(args.set)})
        print(f"report written to {paths.get('html') or paths.get('md')}")
    print("\nCaution: " + CAUTION)
    return 0 if res.converged else 1
