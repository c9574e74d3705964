"""Options and helpers shared by the commands."""

from __future__ import annotations

import argparse
import sys

from ..errors import ParameterError
from ..scenario_files import ScenarioFile, load, parse_assignment


def add_run_options(p: argparse.ArgumentParser) -> None:
    """--reps, --seed, --jobs, --set, --json, --quiet: the options every simulating command takes."""
    p.add_argument("scenario", help="scenario file (TOML)")
    p.add_argument("--reps", type=int, help="replicates (overrides the file's `reps`)")
    p.add_argument("--seed", type=int, help="seed, an integer >= 0 (overrides the file's `seed`)")
    p.add_argument("--jobs", type=int, help="worker processes; -1 = all cores (default)")
    p.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                   help="change a scenario parameter, e.g. --set n=80 --set outcome.cv=1.5 (repeatable)")
    p.add_argument("--json", metavar="PATH", help="also write the result as JSON to PATH")
    p.add_argument("--quiet", "-q", action="store_true", help="no progress bar")


def load_scenario(args) -> ScenarioFile:
    """Load the scenario file and apply --reps/--seed/--jobs/--set."""
    sf = load(args.scenario, overrides={"reps": args.reps, "seed": args.seed, "jobs": args.jobs})
    changes = dict(parse_assignment(s) for s in args.set)
    if changes:
        sf.scenario = sf.scenario.with_params(**changes)
    return sf


def jobs_of(sf: ScenarioFile, args) -> int:
    j = sf.run.get("jobs", -1)
    if j == 0:
        raise ParameterError("`jobs` must be -1 (all cores) or >= 1; got 0.")
    return j


def progress_of(args) -> bool | None:
    return False if args.quiet else None


def command_line() -> str:
    import shlex

    return "simpower " + " ".join(shlex.quote(a) for a in sys.argv[1:])
