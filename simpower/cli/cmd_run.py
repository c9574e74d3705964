"""``simpower run SCENARIO``: simulate a scenario and print power with its Monte Carlo error."""

from __future__ import annotations

from ..engine import run
from .common import add_run_options, command_line, jobs_of, load_scenario, progress_of

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
    res = run(sf.scenario, reps=sf.run.get("reps", DEFAULT_REPS), seed=sf.run.get("seed"),
              n_jobs=jobs_of(sf, args), chunk_size=sf.run.get("chunk_size"), progress=progress_of(args),
              fit_trouble=args.fit_trouble or sf.run.get("fit_trouble", "failure"),
              max_failure_rate=sf.run.get("max_failure_rate", 0.5))
    res.extra["command"] = command_line()
    print(res)
    if args.json:
        res.to_json(args.json)
        print(f"\nJSON written to {args.json}")
    return 0
