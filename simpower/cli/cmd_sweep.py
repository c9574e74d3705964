"""``simpower sweep SCENARIO``: power over a grid of assumptions, one tidy row per grid point and analysis.

The grid comes from the file's ``[sweep]`` block, or from ``--vary`` (crossed)
and ``--together`` (zipped sets) on the command line, which replace it:

    simpower sweep trial.toml --vary n=40,60,80 --vary effect=0.2:0.5:0.1 --csv power.csv
    simpower sweep trial.toml --vary n=10:400//8 --together "sd=8,10,12;mean0=50,55,60"

Values: ``a,b,c`` (a list), ``from:to:step``, ``from:to/count`` (evenly
spaced), ``from:to//count`` (log-spaced; rounded for integer parameters).
"""

from __future__ import annotations

from ..errors import ParameterError
from .common import add_run_options, execution_of, load_scenario
from .steps import null_lines, null_settings, plot_axis, start, stores_of, write_outputs

SHOWN = ("analysis", "power", "mcse", "ci_low", "ci_high", "reps", "failures", "analytic_power", "path")


def register(sub) -> None:
    p = sub.add_parser("sweep", help="power over a grid of parameters (lists, ranges, crossed or zipped); "
                                     "CSV / Parquet table and plots", description=__doc__,
                       formatter_class=__import__("argparse").RawDescriptionHelpFormatter)
    add_run_options(p)
    p.add_argument("--vary", action="append", default=[], metavar="NAME=VALUES",
                   help="a parameter and its values, crossed with the others (repeatable)")
    p.add_argument("--together", action="append", default=[], metavar="A=VALUES;B=VALUES",
                   help="parameters whose values change together (equal lengths; repeatable)")
    p.add_argument("--target-mcse", type=float, help="run each point until its power's MCSE is at most this")
    p.add_argument("--max-reps", type=int, help="ceiling of replicates per point with --target-mcse")
    p.add_argument("--csv", metavar="PATH", help="write the table as CSV")
    p.add_argument("--parquet", metavar="PATH", help="write the table as Parquet")
    p.add_argument("--plot", metavar="STEM", help="write STEM.png and STEM.svg (power against --x)")
    p.add_argument("--x", metavar="NAME", help="parameter on the plot's x axis (default: the first swept)")
    p.add_argument("--target", type=float, help="draw a target power line on the plot")
    p.add_argument("--null-check", action="store_true", help="also the type I error under the null (at the file's "
                                                             "scenario; at every point with [null_check] at_grid)")
    p.add_argument("--null-reps", type=int, help="replicates of the type I error check (default 10000)")
    p.add_argument("--report", metavar="DIR", help="also write the Markdown + HTML report into DIR")
    p.set_defaults(func=main, build=build, check=check, show=show)


def grid_of(sf, args, block):
    from ..planning.sweep import Grid, grid_from_block, parse_axis, parse_together

    if args.vary or args.together:
        g = Grid()
        if args.vary:
            g = g * Grid.cross(**dict(parse_axis(v) for v in args.vary))
        for t in args.together:
            g = g * parse_together(t)
        return g
    g = grid_from_block(block)
    if g is None:
        raise ParameterError("the grid is empty: give --vary NAME=VALUES, or a [sweep] block with [sweep.vary] "
                             "or [[sweep.together]].")
    return g


def format_table(table, verbose: bool = False) -> str:
    """The sweep table as terminal text; missing values (None or NaN) show as ``-``, as in the report.

    The execution path (an implementation detail) shows with ``verbose`` only.
    """
    grid = [c for c in table.attrs.get("grid", []) if c in table.columns]
    cols = grid + [c for c in SHOWN if c in table.columns and (verbose or c != "path")]
    shown = table[cols].copy()
    for c in shown.columns:
        if shown[c].dtype == object:   # pandas' na_rep skips None in an all-None column
            shown[c] = shown[c].where(shown[c].notna(), "-")
    return shown.to_string(index=False, float_format=lambda v: f"{v:.4f}", na_rep="-")


def build(sf, args):
    """The sweep's study plan: the grid (from --vary/--together, which replace the file's, or the file's), its
    replicates or target MCSE, the plot axis of [sweep] x, and the type I check when asked."""
    from ..study import StudyPlan, sweep_part

    block = sf.blocks.get("sweep", {})
    grid = grid_of(sf, args, block)
    part = sweep_part(block, grid)
    if (args.vary or args.together) and part.get("x") not in grid.names:
        part.pop("x", None)  # the file's axis counts only if the command line's grid sweeps it
    for key, value in (("reps", args.reps), ("target_mcse", args.target_mcse), ("max_reps", args.max_reps)):
        if value:
            part[key] = value  # the command line wins over [sweep]
    ex = execution_of(sf, args)
    ns = null_settings(sf, args, default_on=False) if (args.null_check or block.get("null_check")) else None
    return StudyPlan(scenario=sf.scenario, execution=ex, reps=sf.run.get("reps"), sweep=part, null_check=ns,
                     report=dict(sf.blocks.get("report", {})), path=sf.path)


def check(plan, args):
    """The plot axis (for --plot and --report), checked before anything runs; None without either."""
    return plot_axis(plan, args, bool(args.plot)) if (args.plot or args.report) else None


def main(args) -> int:
    from ..study import execute

    sf = load_scenario(args)
    plan = build(sf, args)
    check(plan, args)
    parts = ["sweep"] + (["null_check"] if plan.null_check is not None else [])
    plan = start(plan, "sweep", args, stores_of(sf, args, parts))
    return show(plan, execute(plan), args)


def show(plan, out, args) -> int:
    """Print the sweep table (and write --csv, --parquet, --json, --plot, --report)."""
    from ..textout import CAUTION

    x = check(plan, args)
    table, null, ns, seed = out.sweep, out.null, plan.null_check, out.seed
    print(format_table(table, verbose=getattr(args, "verbose", False)))
    chunk = f"  chunk size: {table.attrs['chunk_size']}" if getattr(args, "verbose", False) else ""
    print(f"\nseed: {seed}{chunk}  points: {len(table) // len(plan.scenario.analyses)}")
    if ns is not None:
        cols = [c for c in table.attrs.get("grid", []) if c in null.columns and ns["at_grid"]]
        print("\n" + "\n".join(null_lines(null, cols)))
    if args.csv:
        table.to_csv(args.csv, index=False)
        print(f"CSV written to {args.csv}")
    if args.parquet:
        table.to_parquet(args.parquet, index=False)
        print(f"Parquet written to {args.parquet}")
    if args.json:
        table.to_json(args.json, orient="records", indent=1)
        print(f"JSON written to {args.json}")
    if args.plot:
        from ..report import plots

        png, svg = plots.save(table.plot(x, target=args.target, labels=plan.report.get("labels")), args.plot)
        print(f"plots written to {png} and {svg}")
    if args.report:
        paths = write_outputs(plan, args, seed, args.report, sweep=table, null=null, x=x,
                              settings={"sweep": {"grid": plan.sweep["grid"].describe()}, "set": list(args.set)})
        print(f"report written to {paths.get('html') or paths.get('md')}")
    print("\nCaution: " + CAUTION)
    return 0
