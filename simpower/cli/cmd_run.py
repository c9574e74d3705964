"""``simpower run SCENARIO``: simulate a scenario and print power with its Monte Carlo error."""

from __future__ import annotations

from ..engine import RunInterrupted, run
from ..errors import ParameterError
from .common import add_run_options, command_line, engine_options, load_scenario, resume_hint

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
    p.set_defaults(func=main)


def _sequential(sf, args) -> dict:
    from ..planning.sequential import SEQUENTIAL_FIELDS, check_target_mcse, read_block

    block = read_block("sequential", sf.blocks.get("sequential"), SEQUENTIAL_FIELDS)
    if args.target_mcse is not None:
        block["target_mcse"] = check_target_mcse(args.target_mcse)
    if args.max_reps is not None:
        if args.max_reps < 1:
            raise ParameterError(f"`--max-reps` must be an integer >= 1; got {args.max_reps}.")
        block["max_reps"] = args.max_reps
    return block


def _simulate(sf, args, opts, fit_trouble):
    seq = _sequential(sf, args)
    if seq.get("target_mcse") is None:
        return run(sf.scenario, reps=sf.run.get("reps", DEFAULT_REPS), seed=sf.run.get("seed"),
                   fit_trouble=fit_trouble, **opts)
    from ..planning.sequential import run_to_mcse

    engine = {k: opts[k] for k in ("backend", "address", "timeout", "keep_records")}
    kw = {k: seq[k] for k in ("min_reps", "max_reps", "which") if k in seq}
    return run_to_mcse(sf.scenario, seq["target_mcse"], seed=sf.run.get("seed"), n_jobs=opts["n_jobs"],
                       chunk_size=seq.get("chunk_size", opts["chunk_size"]), store=opts["store"],
                       progress=opts["progress"], fit_trouble=fit_trouble,
                       max_failure_rate=opts["max_failure_rate"], engine=engine, **kw)


def _null_reps(sf, args) -> int | None:
    """Replicates of the type I check, or None when it is off; its boundaries are checked now, before
    anything runs, so a boundary that cannot be placed costs no simulation."""
    from ..planning.nullpoints import null_points
    from ..planning.sequential import read_block
    from ..planning.sweep import NULL_CHECK_FIELDS

    block = read_block("null_check", sf.blocks.get("null_check"), NULL_CHECK_FIELDS)
    if not (args.null_check or block.get("enabled", False)):
        return None
    reps = args.null_reps if args.null_reps is not None else block.get("reps", 10_000)
    if reps < 1:
        raise ParameterError(f"`--null-reps` must be an integer >= 1; got {reps}.")
    null_points(sf.scenario)
    return reps


def _null_check(sf, reps, opts, fit_trouble, seed) -> str | None:
    from ..planning.sweep import null_check
    from .steps import null_lines

    if reps is None:
        return None
    engine = {k: opts[k] for k in ("backend", "address", "timeout", "keep_records")}
    table = null_check(sf.scenario, reps=reps, seed=seed, n_jobs=opts["n_jobs"], chunk_size=opts["chunk_size"],
                       progress=opts["progress"], fit_trouble=fit_trouble,
                       max_failure_rate=opts["max_failure_rate"], engine=engine)
    return "\n".join(null_lines(table))


def main(args) -> int:
    sf = load_scenario(args)
    opts = engine_options(sf, args)
    fit_trouble = args.fit_trouble or sf.run.get("fit_trouble", "failure")
    null_reps = _null_reps(sf, args)
    try:
        res = _simulate(sf, args, opts, fit_trouble)
        null_text = _null_check(sf, null_reps, opts, fit_trouble, res.seed)
    except RunInterrupted:
        raise RunInterrupted(f"interrupted; {resume_hint(opts['store'], sf)}.") from None
    res.extra["command"] = command_line(res.seed, args)
    if opts["store"]:
        res.extra["store"] = opts["store"]
    from ..textout import format_result

    print(format_result(res, verbose=getattr(args, "verbose", False)))
    seq = res.extra.get("sequential")
    if seq:
        state = "reached" if seq.get("reached") else "NOT reached (max_reps hit)"
        print(f"\nSequential stopping: target MCSE {seq.get('target_mcse', '')} {state} after {res.reps} replicates.")
    if null_text:
        print("\n" + null_text)
    print(f"\nTo reproduce these numbers exactly: {res.extra['command']}")
    if opts["store"]:
        print(f"\nRun store: {opts['store']} (simpower export {opts['store']} OUT.csv)")
    if args.json:
        res.to_json(args.json)
        print(f"\nJSON written to {args.json}")
    return 0
