"""``simpower run SCENARIO``: simulate a scenario and print power with its Monte Carlo error."""

from __future__ import annotations

from ..engine import RunInterrupted, run
from .common import add_run_options, command_line, engine_options, load_scenario, resume_hint

DEFAULT_REPS = 2000


def register(sub) -> None:
    p = sub.add_parser("run", help="simulate a scenario and print power, MCSE, interval and failures",
                       description=__doc__)
    add_run_options(p)
    p.add_argument("--fit-trouble", choices=("failure", "nonrejection"),
                   help="count replicates whose fit warned as failures (default) or as non-rejections")
    p.set_defaults(func=main)


def main(args) -> int:
    sf = load_scenario(args)
    opts = engine_options(sf, args)
    try:
        res = run(sf.scenario, reps=sf.run.get("reps", DEFAULT_REPS), seed=sf.run.get("seed"),
                  fit_trouble=args.fit_trouble or sf.run.get("fit_trouble", "failure"), **opts)
    except RunInterrupted:
        raise RunInterrupted(f"interrupted; {resume_hint(opts['store'])}.") from None
    res.extra["command"] = command_line(res.seed)
    if opts["store"]:
        res.extra["store"] = opts["store"]
    print(res)
    print(f"\nTo reproduce these numbers exactly: {res.extra['command']}")
    if opts["store"]:
        print(f"\nRun store: {opts['store']} (simpower export {opts['store']} OUT.csv)")
    if args.json:
        res.to_json(args.json)
        print(f"\nJSON written to {args.json}")
    return 0
