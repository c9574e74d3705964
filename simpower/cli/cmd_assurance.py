"""``simpower assurance SCENARIO``: the probability of success over a prior on the assumptions.

The prior comes from the file's ``[assurance]`` block (``[assurance.prior]``:
parameter = {dist = "norm", loc = ..., scale = ...}, or = [a sample]); the options
below override its settings:

    simpower assurance trial.toml
    simpower assurance trial.toml --draws 2000 --reps-per-draw 20
    simpower assurance trial.toml --target 0.7 --range 40:400

The answer is the assurance with its Monte Carlo error, its ceiling (the
probability that the effect is favourable at all), the assurance given a
favourable effect and the spread of the conditional power over the prior; with
``--target``, the size whose assurance reaches it.
"""

from __future__ import annotations

from ..errors import ParameterError
from .common import add_run_options, execution_of, load_scenario, store_of


def register(sub) -> None:
    p = sub.add_parser("assurance", help="probability of success over a prior on the effect, SD, ICC...; or the "
                                         "size for a target assurance (--target)",
                       description=__doc__, formatter_class=__import__("argparse").RawDescriptionHelpFormatter)
    add_run_options(p)
    p.add_argument("--draws", type=int, help="parameter sets drawn from the prior (default: [assurance] draws, "
                                             "else 1000)")
    p.add_argument("--reps-per-draw", type=int, help="simulated trials per draw (default 20)")
    p.add_argument("--analysis", help="whose success counts (default: the primary analysis)")
    p.add_argument("--target", type=float, help="find the size whose assurance reaches this")
    p.add_argument("--range", metavar="LOW:HIGH", help="the size range for --target")
    p.add_argument("--csv", metavar="PATH", help="write the draws (or the evaluated sizes) as CSV")
    p.set_defaults(func=main, build=build, show=show)


def block_of(sf, args) -> dict:
    """The [assurance] block with the command line's overrides, checked against the scenario."""
    from ..planning.assurance import check_block

    block = dict(sf.blocks.get("assurance", {}))
    if "prior" not in block:
        raise ParameterError(f"{sf.path.name if sf.path else 'the scenario'} has no [assurance.prior] block: add "
                             f'one, e.g. [assurance.prior] effect = {{dist = "norm", loc = 0.3, scale = 0.1}}.')
    for key, attr in (("draws", "draws"), ("reps_per_draw", "reps_per_draw"), ("analysis", "analysis"),
                      ("target", "target")):
        v = getattr(args, attr, None)
        if v is not None:
            block[key] = v
    if args.range:
        from .steps import _range

        block["low"], block["high"] = _range(args.range)
    return check_block(sf.scenario, block)


def build(sf, args):
    """The assurance's study plan: the [assurance] block with the options above."""
    from ..study import StudyPlan

    if args.reps is not None:
        raise ParameterError("`--reps` does not apply to assurance: give --draws (prior draws) and --reps-per-draw "
                             "(simulated trials at each).")
    return StudyPlan(scenario=sf.scenario, execution=execution_of(sf, args), assurance=block_of(sf, args),
                     report=dict(sf.blocks.get("report", {})), path=sf.path)


def main(args) -> int:
    from ..components import fingerprint
    from ..study import execute
    from .steps import start

    if args.reps is not None:
        build(None, args)  # refused before the file is read
    sf = load_scenario(args)
    plan = build(sf, args)
    store = store_of(args, fingerprint([sf.scenario.fingerprint(), "assurance"]), sf)
    plan = start(plan, "assurance", args, {"assurance": store})
    return show(plan, execute(plan), args)


def show(plan, out, args) -> int:
    """Print the assurance (and write --csv, --json)."""
    from ..textout import CAUTION

    res = out.assurance
    store = plan.stores.get("assurance")
    print(res.summary())
    if store:
        print(f"\nRun store: {store} (run the same command again to reuse its finished trials)")
    if args.csv:
        (res.table if hasattr(res, "table") else res.draws).to_csv(args.csv, index=False)
        print(f"CSV written to {args.csv}")
    if args.json:
        import json

        data = res.to_dict() if hasattr(res, "to_dict") else {"summary": res.summary()}
        with open(args.json, "w", encoding="utf-8") as fh:
            json.dump(data, fh, indent=2, default=str)
        print(f"JSON written to {args.json}")
    print("\nCaution: " + CAUTION)
    return 0
