"""``simpower run SCENARIO``: simulate a scenario and print power with its Monte Carlo error."""

from __future__ import annotations

from ..engine.runner import RunInterrupted
from ..errors import ParameterError
from .common import add_run_options, command_line, execution_of, load_scenario, resume_hint, store_of

DEFAULT_REPS = 2000


def register(sub) -> None:
    p = sub.add_parser("run", help="simulate a scenario and print power, MCSE, interval and failures",
                       description=__doc__)
    add_run_options(p)
    p.add_argument("--fit-trouble", choices=("failure", "nonrejection"),
                   help="count replicates whose fit warned as failures (default) or as non-rejections")
    p.add_argument("--target-mcse", type=float, metavar="MCSE",
                   help="keep simulating until the power's Monte Carlo SE is at most MCSE (e.g. 0.005); "
                        "overrides [sequential] target_mcse")
    p.add_argument("--max-reps", type=int, help="with --target-mcse: never more replicates than this")
    p.add_argument("--null-check", action="store_true",
                   help="also run the scenario on the boundary of each analysis's H0 (no effect; an equivalence "
                        "or non-inferiority margin) and report the type I error with Bradley's (1978) liberal "
                        "criterion; also [null_check] enabled = true")
    p.add_argument("--null-reps", type=int, help="replicates of the null check (default 10000)")
    p.set_defaults(func=main, build=build, show=show)


def _sequential(sf, args) -> dict:
    from ..planning.sequential import check_target_mcse

    block = dict(sf.blocks.get("sequential", {}))
    if args.target_mcse is not None:
        block["target_mcse"] = check_target_mcse(args.target_mcse)
    if args.max_reps is not None:
        if args.max_reps < 1:
            raise ParameterError(f"`--max-reps` must be an integer >= 1; got {args.max_reps}.")
        block["max_reps"] = args.max_reps
    return block


def _null_reps(sf, args) -> int | None:
    """Replicates of the type I check, or None when it is off; its boundaries are checked now, before
    anything runs, so a boundary that cannot be placed costs no simulation."""
    from ..planning.nullpoints import null_points

    block = sf.blocks.get("null_check", {})
    if not (args.null_check or block.get("enabled", False)):
        return None
    reps = args.null_reps if args.null_reps is not None else block.get("reps", 10_000)
    if reps < 1:
        raise ParameterError(f"`--null-reps` must be an integer >= 1; got {reps}.")
    null_points(sf.scenario)
    return reps


def build(sf, args):
    """The run's study plan: the scenario as given (to a target MCSE with --target-mcse / [sequential]),
    and the type I check when asked (without run stores: :func:`main` adds them)."""
    from ..study import StudyPlan

    ex = execution_of(sf, args)
    if args.fit_trouble:
        ex = ex.replace(fit_trouble=args.fit_trouble)
    null_reps = _null_reps(sf, args)
    return StudyPlan(scenario=sf.scenario, execution=ex, reps=sf.run.get("reps", DEFAULT_REPS),
                     sequential=_sequential(sf, args),
                     null_check=None if null_reps is None else {"reps": null_reps, "at_grid": False}, path=sf.path)


def main(args) -> int:
    from ..study import execute
    from .steps import start

    sf = load_scenario(args)
    plan = build(sf, args)
    store = store_of(args, sf.scenario.fingerprint(), sf)
    plan = start(plan, "run", args, {"run": store})
    try:
        out = execute(plan)
    except RunInterrupted:
        raise RunInterrupted(f"interrupted; {resume_hint(store, sf)}.") from None
    return show(plan, out, args)


def show(plan, out, args) -> int:
    """Print the run's result (and write --json)."""
    from ..textout import format_result
    from .steps import null_lines

    res = out.run
    store = plan.stores.get("run")
    null_text = "\n".join(null_lines(out.null)) if out.null is not None else None
    res.extra["command"] = command_line(res.seed, args)
    if store:
        res.extra["store"] = store
    print(format_result(res, verbose=getattr(args, "verbose", False)))
    seq = res.extra.get("sequential")
    if seq:
        state = "reached" if seq.get("reached") else "NOT reached (max_reps hit)"
        print(f"\nSequential stopping: target MCSE {seq.get('target_mcse', '')} {state} after {res.reps} replicates.")
    if null_text:
        print("\n" + null_text)
    print(f"\nTo reproduce these numbers exactly: {res.extra['command']}")
    if store:
        print(f"\nRun store: {store} (simpower export {store} OUT.csv)")
    if args.json:
        res.to_json(args.json)
        print(f"\nJSON written to {args.json}")
    return 0
