"""Steps shared by the planning commands (``sweep``, ``samplesize`` and ``report``).

How a command builds its part of the study plan from the file and its options (the run
stores, the seed, the search options, the type I error check), the plot axis, and the
report. They live here, not in one of the commands, so that no command imports another;
every command runs its plan with :func:`simpower.execute`.
"""

from __future__ import annotations


from ..errors import ParameterError

#: replicates per grid point of a sweep when neither the command line nor the file says
DEFAULT_NULL_REPS = 10_000
#: [search] settings that describe the file's own search target, dropped when --effect overrides it
SIZE_ONLY = ("low", "high", "step", "scale", "parameter")


def stores_of(sf, args, parts) -> dict:
    """A run store per part that will run (None without --store or [store]).

    A --store folder gets one file per scenario and part (sweeps, searches and null checks use
    different chunk sizes, which one store file cannot mix).
    """
    from ..components import fingerprint
    from .common import store_of

    return {kind: store_of(args, fingerprint([sf.scenario.fingerprint(), kind]), sf) for kind in parts}


def seed_of(sf, args) -> int:
    """The seed to use: the command line's, the file's, else fresh entropy (printed, and kept in the manifest)."""
    from ..engine.runner import normalize_seed

    return normalize_seed(sf.run.get("seed"))


def null_settings(sf, args, default_on: bool) -> dict | None:
    """The type I check's part of the plan (None when off): the file's [null_check] with --null-check / --null-reps."""
    from ..study import null_settings as settings

    return settings(sf.blocks.get("null_check", {}), default_on, on=getattr(args, "null_check", False),
                    reps=getattr(args, "null_reps", None))


def null_lines(table, grid_cols=()) -> list[str]:
    """The type I check in words: per row, where the effect was put, the rate, the closed form, Bradley's verdict."""
    lines = [f"Type I error under the null, with the effect on the boundary of each analysis's H0 and everything "
             f"else kept ({int(table['reps'].max())} replicates):"]
    for _, r in table.iterrows():
        point = ", ".join(f"{c} = {r[c]}" for c in grid_cols)
        exact = r.get("analytic_type1")
        closed = f"; closed form {exact:.4f}" if exact is not None and exact == exact else ""
        verdict = "meets" if r["meets_bradley"] else "FAILS"
        lines.append(f"  [{r['analysis']}]{' (' + point + ')' if point else ''} at {r['null_at']}: "
                     f"{r['type1_error']:.4f} (MCSE {r['mcse']:.4f}; 95% interval [{r['ci_low']:.4f}, "
                     f"{r['ci_high']:.4f}]{closed}); {verdict} Bradley's (1978) liberal criterion "
                     f"[{r['bradley_low']:.4g}, {r['bradley_high']:.4g}]")
    return lines


def write_outputs(sf, args, seed, outdir, *, sweep=None, search=None, null=None, run=None, x=None, formats=None,
                  settings=None, assurance=None) -> dict:
    from ..report import make_report
    from ..report.manifest import reproduce_command

    block = sf.blocks.get("report", {})
    fm = formats or block.get("formats") or ("md", "html")
    if isinstance(fm, str):
        fm = [f.strip() for f in fm.split(",") if f.strip()]
    from .common import argv_of

    return make_report(sf.scenario, outdir, seed=seed, command=reproduce_command(argv_of(args), seed), sweep=sweep,
                       search=search, null=null, run=run, title=str(block.get("title", "")), x=x,
                       scenario_file=sf.path, settings=settings, formats=tuple(fm), labels=block.get("labels"),
                       assurance=assurance)


def plot_axis(sf, args, block, grid, plot: bool) -> str:
    """The plot's x axis, checked before anything runs: a swept parameter (with numbers, for ``--plot``).

    Taken from ``--x``, else ``[sweep] x``, else the first swept parameter; an
    error names where the value came from. A grid given by ``--vary`` /
    ``--together`` replaces the file's, so the file's ``x`` then counts only
    if it is swept. The report leaves out the power curve of a non-numeric
    axis, so only ``--plot`` needs numbers.
    """
    from ..planning.sweep import check_names

    check_names(sf.scenario, grid.names)
    from_file = block.get("x")
    if (args.vary or args.together) and from_file not in grid.names:
        from_file = None
    if args.x:
        x, source = args.x, "`--x`"
    elif from_file is not None:
        x, source = from_file, "`[sweep] x`"
    else:
        x, source = grid.names[0], "the default x axis (the first swept parameter)"
    if not isinstance(x, str) or x not in grid.names:
        raise ParameterError(f"{source} {x!r} is not a swept parameter; swept: {', '.join(grid.names)}.")
    if plot:
        points = grid.settings(sf.scenario)
        numeric = [n for n in grid.names
                   if all(isinstance(p[n], (int, float)) and not isinstance(p[n], bool) for p in points)]
        if x not in numeric:
            hint = f"give `--x` one of {', '.join(numeric)}" if numeric else "no swept parameter is numeric"
            raise ParameterError(f"{source} {x!r} takes non-numeric values; --plot needs a numeric x axis: "
                                 f"{hint}.")
    return x


def _range(text: str):
    lo, sep, hi = text.partition(":")
    try:
        if not sep:
            raise ValueError
        return float(lo), float(hi)
    except ValueError:
        raise ParameterError(f"`--range` must look like LOW:HIGH (e.g. 10:400); got {text!r}.") from None


def search_options(sf, args) -> dict:
    """The search part of the plan: the file's [search] block with the command line's overrides, ``find`` included."""
    opts = dict(sf.blocks.get("search", {}))
    file_find = opts.pop("find", None) or "size"
    find = "effect" if getattr(args, "effect", False) else file_find
    if find != file_find:
        # the file's range, step, scale and parameter describe its size search; the effect search
        # takes its own defaults unless --range / --parameter say otherwise
        for key in SIZE_ONLY:
            opts.pop(key, None)
    for key, attr in (("power", "power"), ("parameter", "parameter"), ("step", "step"), ("rel_tol", "rel_tol"),
                      ("max_reps", "max_reps"), ("analysis", "analysis")):
        v = getattr(args, attr, None)
        if v is not None:
            opts[key] = v
    if getattr(args, "range", None):
        opts["low"], opts["high"] = _range(args.range)
    if getattr(args, "all_analyses", False):
        opts["all_analyses"] = True
    return {"find": find, **opts}


def announce(plan, command: str, args=None) -> None:
    """Say, before the work starts, what is about to run (the result follows at the end); not with --quiet."""
    if getattr(args, "quiet", False):
        return
    sc = plan.scenario
    what = sc.name or (plan.path.name if plan.path is not None else "scenario")
    if plan.assurance is not None:
        a = plan.assurance
        part = (f"assurance over {a.get('draws', 1000)} prior draws x {a.get('reps_per_draw', 20)} trials"
                + (f", the size for assurance {a['target']:g}" if "target" in a else ""))
    elif plan.search is not None:
        s = plan.search
        target = s.get("power", 0.8)
        kind = "the minimal detectable effect" if s.get("find") == "effect" else "the required size"
        part = f"searching {kind} for power {target:g} ({s.get('analysis') or sc.primary})"
    elif plan.sweep is not None:
        grid = plan.sweep["grid"]
        try:
            count = f"{len(grid.settings(sc))} points"
        except Exception:  # the sweep itself reports a grid that does not fit the scenario
            count = "a grid"
        part = f"sweeping {count} ({'; '.join(grid.describe())})"
    else:
        part = f"{plan.reps or 'the default number of'} replicates"
    ex = plan.execution
    jobs = "all cores" if ex.n_jobs in (None, -1) else f"{ex.n_jobs} job{'s' if ex.n_jobs != 1 else ''}"
    seed = f", seed {ex.seed}" if ex.seed is not None else ""
    print(f"simpower {command}: {what}: {part}; {jobs}{seed}", flush=True)
