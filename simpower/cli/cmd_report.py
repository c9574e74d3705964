"""``simpower report SCENARIO --out DIR``: run what the scenario file plans and write the report.

Runs the ``[search]`` block (required size or minimal detectable effect), the
``[sweep]`` block, the type I error check (``[null_check]``, on unless
``enabled = false``) and, when there is neither a search nor a sweep, the
scenario as given (to a target MCSE if ``[sequential]`` asks). Writes
report.md, a self-contained report.html, manifest.json, the tables (CSV) and
the figures (PNG and SVG) into DIR. The manifest's command reproduces every
number exactly.
"""

from __future__ import annotations

from pathlib import Path

from .common import add_run_options, check_output_folder, load_scenario
from .steps import (REPORT_FIELDS, engine_of, null_settings, plot_axis, run_null, run_search,
                       run_sweep, seed_of, write_outputs)

DEFAULT_REPS = 2000


def register(sub) -> None:
    p = sub.add_parser("report", help="run the file's search, sweep and type I check and write a Markdown + HTML "
                                      "report with a reproducibility manifest", description=__doc__)
    add_run_options(p)
    p.add_argument("--out", metavar="DIR", help="output folder (default: the file's [report] out, else 'report')")
    p.add_argument("--formats", help="comma-separated: md,html (default both)")
    p.add_argument("--null-reps", type=int, help="replicates of the type I error check (default 10000)")
    p.set_defaults(func=main)


def base_run(sf, args, seed):
    from ..engine import run
    from ..planning.sequential import SEQUENTIAL_FIELDS, read_block, run_to_mcse

    block = read_block("sequential", sf.blocks.get("sequential"), SEQUENTIAL_FIELDS)
    eng = engine_of(sf, args, "run")
    common = dict(seed=seed, n_jobs=eng["n_jobs"], progress=eng["progress"],
                  fit_trouble=sf.run.get("fit_trouble", "failure"), max_failure_rate=eng["max_failure_rate"],
                  store=eng["store"])
    if block.get("target_mcse") is not None:
        kw = {k: block[k] for k in ("min_reps", "max_reps", "which") if k in block}
        return run_to_mcse(sf.scenario, block["target_mcse"], chunk_size=block.get("chunk_size", sf.run.get("chunk_size")),
                           engine=eng["engine"], **kw, **common)
    return run(sf.scenario, reps=sf.run.get("reps", DEFAULT_REPS), chunk_size=sf.run.get("chunk_size"),
               **eng["engine"], **common)


def main(args) -> int:
    from ..planning.sequential import read_block
    from ..planning.sweep import SWEEP_FIELDS, grid_from_block

    sf = load_scenario(args)
    seed = seed_of(sf, args)
    block = read_block("report", sf.blocks.get("report"), {k: None for k in REPORT_FIELDS})
    if getattr(args, "resumed_from", None) is not None:
        outdir = Path(args.out) if args.out else None  # resuming writes only where its own command line says
    else:
        outdir = Path(args.out or block.get("out", "report"))
        if sf.path is not None and not Path(outdir).is_absolute() and not args.out and "out" in block:
            outdir = sf.path.parent / outdir
        check_output_folder("--out" if args.out else "report.out", outdir)
    ns = null_settings(sf, args, default_on=True)
    if ns is not None:  # a boundary that cannot be placed is refused before anything runs
        from ..planning.nullpoints import null_points

        null_points(sf.scenario)
    results: dict = {}
    settings: dict = {"set": list(args.set)}
    grid = sblock = None
    if "sweep" in sf.blocks:  # check the grid and the plot axis before anything runs
        from types import SimpleNamespace

        sblock = read_block("sweep", sf.blocks["sweep"], SWEEP_FIELDS)
        grid = grid_from_block(sblock)
        results["x"] = plot_axis(sf, SimpleNamespace(vary=None, together=None, x=None), sblock, grid, plot=False)
    if "search" in sf.blocks:
        results["search"] = run_search(sf, args, seed)
        settings["search"] = results["search"].settings
        print(results["search"].summary())
    if "sweep" in sf.blocks:
        results["sweep"] = run_sweep(sf, args, seed, grid, sblock)
        settings["sweep"] = {"grid": grid.describe(), "reps": results["sweep"].attrs.get("reps"),
                             "target_mcse": results["sweep"].attrs.get("target_mcse"),
                             "chunk_size": results["sweep"].attrs.get("chunk_size")}
        print(f"sweep: {len(results['sweep'])} rows")
    if "search" not in sf.blocks and "sweep" not in sf.blocks:
        results["run"] = base_run(sf, args, seed)
        settings["run"] = {"reps": results["run"].reps, "chunk_size": results["run"].chunk_size}
        print(results["run"])
    if ns is not None:
        results["null"] = run_null(sf, args, seed, ns, grid)
        settings["null_check"] = ns
    print(f"seed: {seed}")
    if outdir is None:
        print("report not written: give --out DIR to write it")
        return 0
    paths = write_outputs(sf, args, seed, outdir, sweep=results.get("sweep"), search=results.get("search"),
                          null=results.get("null"), run=results.get("run"), x=results.get("x"),
                          formats=args.formats, settings=settings)
    for k, p in paths.items():
        print(f"wrote {k}: {p}")
    return 0
