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

import sys
from pathlib import Path

from ..errors import ParameterError
from .common import add_run_options, check_output_folder, load_scenario

DEFAULT_REPS = 2000
DEFAULT_NULL_REPS = 10_000
REPORT_FIELDS = ("title", "out", "formats")


def register(sub) -> None:
    p = sub.add_parser("report", help="run the file's search, sweep and type I check and write a Markdown + HTML "
                                      "report with a reproducibility manifest", description=__doc__)
    add_run_options(p)
    p.add_argument("--out", metavar="DIR", help="output folder (default: the file's [report] out, else 'report')")
    p.add_argument("--formats", help="comma-separated: md,html (default both)")
    p.add_argument("--null-reps", type=int, help="replicates of the type I error check (default 10000)")
    p.set_defaults(func=main)


def engine_of(sf, args, kind: str) -> dict:
    """Store, failure threshold, jobs, progress and the engine's extra options for a planning command.

    A ``--store`` folder gets one file per scenario and command kind (sweeps, searches and null
    checks use different chunk sizes, which one store file cannot mix).
    """
    from ..components import fingerprint
    from .common import engine_options

    eng = engine_options(sf, args, fingerprint([sf.scenario.fingerprint(), kind]))
    extra = {k: eng[k] for k in ("backend", "address", "timeout", "keep_records") if eng.get(k) is not None}
    return {"store": eng["store"], "max_failure_rate": eng["max_failure_rate"], "n_jobs": eng["n_jobs"],
            "progress": eng["progress"], "engine": extra}


def seed_of(sf, args) -> int:
    """The seed to use: the command line's, the file's, else fresh entropy (printed, and kept in the manifest)."""
    from ..engine import normalize_seed

    return normalize_seed(sf.run.get("seed"))


def null_settings(sf, args, default_on: bool) -> dict | None:
    from ..sequential import read_block
    from ..sweep import NULL_CHECK_FIELDS

    block = read_block("null_check", sf.blocks.get("null_check"), NULL_CHECK_FIELDS)
    on = getattr(args, "null_check", False) or block.get("enabled", default_on)
    if not on:
        return None
    reps = getattr(args, "null_reps", None) or block.get("reps", DEFAULT_NULL_REPS)
    if reps < 1:
        raise ParameterError(f"`--null-reps` must be an integer >= 1; got {reps}.")
    return {"reps": reps, "at_grid": block.get("at_grid", False)}


def run_null(sf, args, seed, settings, grid=None):
    from ..sweep import null_check

    return null_check(sf.scenario, grid if settings["at_grid"] else None, reps=settings["reps"], seed=seed,
                      chunk_size=sf.run.get("chunk_size"), fit_trouble=sf.run.get("fit_trouble", "failure"),
                      **engine_of(sf, args, "null_check"))


def base_run(sf, args, seed):
    from ..engine import run
    from ..sequential import SEQUENTIAL_FIELDS, read_block, run_to_mcse

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


def write_outputs(sf, args, seed, outdir, *, sweep=None, search=None, null=None, run=None, x=None, formats=None,
                  settings=None) -> dict:
    from ..report import make_report
    from ..report.manifest import reproduce_command

    from ..sequential import read_block

    block = read_block("report", sf.blocks.get("report"), {k: None for k in REPORT_FIELDS})
    fm = formats or block.get("formats") or ("md", "html")
    if isinstance(fm, str):
        fm = [f.strip() for f in fm.split(",") if f.strip()]
    return make_report(sf.scenario, outdir, seed=seed, command=reproduce_command(sys.argv[1:], seed), sweep=sweep,
                       search=search, null=null, run=run, title=str(block.get("title", "")), x=x,
                       scenario_file=sf.path, settings=settings, formats=tuple(fm))


def main(args) -> int:
    from ..sequential import read_block
    from ..sweep import SWEEP_FIELDS, grid_from_block
    from .cmd_samplesize import run_search
    from .cmd_sweep import run_sweep

    sf = load_scenario(args)
    seed = seed_of(sf, args)
    block = read_block("report", sf.blocks.get("report"), {k: None for k in REPORT_FIELDS})
    outdir = Path(args.out or block.get("out", "report"))
    if sf.path is not None and not Path(outdir).is_absolute() and not args.out and "out" in block:
        outdir = sf.path.parent / outdir
    check_output_folder("--out" if args.out else "report.out", outdir)
    results: dict = {}
    settings: dict = {"set": list(args.set)}
    grid = sblock = None
    if "sweep" in sf.blocks:  # check the grid and the plot axis before anything runs
        from types import SimpleNamespace

        from .cmd_sweep import plot_axis

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
    ns = null_settings(sf, args, default_on=True)
    if ns is not None:
        results["null"] = run_null(sf, args, seed, ns, grid)
        settings["null_check"] = ns
    paths = write_outputs(sf, args, seed, outdir, sweep=results.get("sweep"), search=results.get("search"),
                          null=results.get("null"), run=results.get("run"), x=results.get("x"),
                          formats=args.formats, settings=settings)
    print(f"seed: {seed}")
    for k, p in paths.items():
        print(f"wrote {k}: {p}")
    return 0
