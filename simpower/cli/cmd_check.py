"""``simpower check``: the validation battery, simulated against analytic power over a grid."""

from __future__ import annotations

from ..planning.battery import DEFAULT_SEED, battery_passed, format_battery, run_battery


def register(sub) -> None:
    p = sub.add_parser("check", help="validate the engine: simulated vs analytic power over a grid of n, "
                                     "effect, alpha and sidedness", description=__doc__)
    p.add_argument("--reps", type=int, default=4000, help="replicates per grid point (default 4000)")
    p.add_argument("--seed", type=int, default=DEFAULT_SEED, help=f"seed (default {DEFAULT_SEED})")
    p.add_argument("--jobs", type=int, default=-1, help="worker processes; -1 = all cores")
    p.add_argument("--quick", action="store_true", help="a smaller grid")
    p.add_argument("--csv", metavar="PATH", help="also write the table as CSV")
    p.add_argument("--quiet", "-q", action="store_true", help="no progress bar")
    p.set_defaults(func=main)


def main(args) -> int:
    from ..errors import ParameterError

    if args.reps < 10:
        raise ParameterError(f"`--reps` must be an integer >= 10; got {args.reps}.")
    df = run_battery(reps=args.reps, seed=args.seed, n_jobs=args.jobs, quick=args.quick,
                     progress=False if args.quiet else None)
    print(format_battery(df))
    if args.csv:
        df.to_csv(args.csv, index=False)
    return 0 if battery_passed(df) else 1
