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
    p.add_argument("--jobs", type=int, help="worker processes: -1 = all cores (default), or a count >= 1")
    p.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                   help="change a scenario parameter, e.g. --set n=80 --set outcome.cv=1.5 (repeatable)")
    p.add_argument("--json", metavar="PATH", help="also write the result as JSON to PATH")
    p.add_argument("--quiet", "-q", action="store_true", help="no progress bar or log lines, no opening line")
    p.add_argument("--verbose", "-v", action="store_true",
                   help="also print implementation details that do not change the numbers (execution path, chunk "
                        "size, time)")
    add_engine_options(p)


#: where ``--store`` without a path puts the run store
DEFAULT_STORE_DIR = "simpower-runs"


def add_engine_options(p: argparse.ArgumentParser) -> None:
    """--store, --backend, --address, --max-failure-rate, --timeout, --summaries-only (part of add_run_options)."""
    g = p.add_argument_group("run store and execution")
    g.add_argument("--store", nargs="?", const=DEFAULT_STORE_DIR + "/", metavar="PATH",
                   help="commit every finished chunk to this SQLite run store and resume from it when the same "
                        "command runs again; a folder (or no PATH: ./simpower-runs/) gets a file named by the "
                        "scenario's fingerprint")
    g.add_argument("--backend", choices=("loky", "threading", "serial", "dask"),
                   help="executor: loky worker processes (default), threads, this process, or a dask.distributed "
                        "cluster")
    g.add_argument("--address", metavar="ADDR",
                   help="dask scheduler address, e.g. tcp://10.0.0.5:8786 (implies --backend dask)")
    g.add_argument("--max-failure-rate", type=float, metavar="RATE",
                   help="stop once more than this share of an analysis' replicates fail hard (exceptions, "
                        "non-finite p-values, timeouts); in (0, 1], default 0.5")
    g.add_argument("--timeout", type=float, metavar="SECONDS",
                   help="per-replicate time limit of per-replicate analyses; a replicate past it counts as failure "
                        "'timeout' (enforced in this process and loky workers, not on dask)")
    g.add_argument("--summaries-only", action="store_true",
                   help="keep only running summaries in memory, not per-replicate records (those stay in the "
                        "store); automatic above 1,000,000 replicates")


def _block(sf: ScenarioFile, name: str) -> dict:
    """A block of the file, as the loader checked and cleaned it (empty when absent)."""
    return sf.blocks.get(name) or {}


def store_of(args, fingerprint: str, sf: ScenarioFile | None = None) -> str | None:
    """The run store path for this command (None without --store or a [store] block).

    ``--store`` is relative to the working folder, ``[store] path`` to the scenario file's.

    A folder (a path ending in '/' or an existing directory) gets the file
    ``run-<fingerprint>.sqlite``; give the fingerprint of what the command
    runs (a sweep: of the whole grid). The store is created if absent; the
    command's data-only plan (:mod:`simpower.cli.plan`: the resolved study
    plan, never a command line, folder or output path) is recorded in it by
    :func:`simpower.cli.steps.start` for ``simpower resume``.
    """
    from pathlib import Path

    from ..engine.store import RunStore

    block = _block(sf, "store") if sf is not None else {}
    raw = getattr(args, "store", None)
    path = Path(str(raw)) if raw else None
    if not raw and block.get("path"):
        raw = str(block["path"])
        path = Path(raw)
        if not path.is_absolute() and sf is not None and sf.path is not None:
            path = sf.path.resolve().parent / path  # [store] path is relative to the scenario file
    if not raw:
        return None
    if raw.endswith(("/", "\\")) or path.is_dir():
        path = path / f"run-{fingerprint}.sqlite"
    with RunStore(path, sync=block.get("sync"), background=False):
        pass  # created now, so an unwritable place is refused before anything runs
    return str(path)


def execution_of(sf: ScenarioFile, args):
    """The command's :class:`~simpower.execution.Execution` (without a store: see :func:`store_of`).

    From the file (seed, jobs, chunk_size, fit_trouble, max_failure_rate, [execution]) and the command
    line (--backend, --address, --timeout, --max-failure-rate, --summaries-only, --quiet); an address
    implies dask and is checked here, so the error names the option the user wrote.
    """
    from ..execution import Execution

    ex = _block(sf, "execution")
    address = getattr(args, "address", None) or ex.get("address")
    backend = getattr(args, "backend", None) or ex.get("backend") or ("dask" if address else None)
    if address and backend != "dask":
        raise ParameterError(f"`--address` is for the dask backend; got --backend {backend}.")
    if address:
        from ..execution import check_address

        check_address(address, "--address" if getattr(args, "address", None) else "execution.address")
    rate = getattr(args, "max_failure_rate", None)
    timeout = getattr(args, "timeout", None)
    timeout = timeout if timeout is not None else ex.get("timeout")
    lean = getattr(args, "summaries_only", False) or bool(ex.get("summaries_only", False))
    return Execution(seed=sf.run.get("seed"), n_jobs=jobs_of(sf, args), chunk_size=sf.run.get("chunk_size"),
                     progress=progress_of(args), backend=backend, address=address,
                     max_failure_rate=rate if rate is not None else sf.run.get("max_failure_rate", 0.5),
                     timeout=timeout, keep_records=False if lean else None,
                     fit_trouble=sf.run.get("fit_trouble", "failure"))


def resume_hint(store: str | None, sf: ScenarioFile | None = None) -> str:
    """How to resume, for messages after an interruption (``simpower resume`` only without user code)."""
    if not store:
        return "nothing was kept: add --store to make a run resumable"
    from .plan import names_user_code

    if sf is not None and names_user_code(sf.raw):
        return f"finished chunks are in {store}; to resume, run the same command again"
    return f"finished chunks are in {store}; to resume, run the same command again or: simpower resume {store}"


def load_scenario(args) -> ScenarioFile:
    """Load the scenario file (or, resuming, the plan's scenario data) and apply --reps/--seed/--jobs/--set.

    References to user code in ``--set`` values resolve against the scenario file's folder, as in the file.
    """
    from ..functions import reference_folder
    from ..scenario_files import from_data

    if args.jobs is not None:
        from .._validation import Jobs

        Jobs(optional=False).clean("--jobs", args.jobs)
    overrides = {"reps": args.reps, "seed": args.seed, "jobs": args.jobs}
    resumed = getattr(args, "resumed_from", None)
    if resumed is not None:
        sf = from_data(resumed.scenario, f"{resumed.store}: recorded plan", overrides)
    else:
        sf = load(args.scenario, overrides=overrides)
    changes = dict(parse_assignment(s) for s in args.set)
    if changes:
        with reference_folder(sf.path.resolve().parent if sf.path is not None else None):
            sf.scenario = sf.scenario.with_params(**changes)
    return sf


def argv_of(args=None) -> list[str]:
    """This command's arguments as typed (without the program name); resuming, ``resume STORE``."""
    resumed = getattr(args, "resumed_from", None) if args is not None else None
    return ["resume", str(resumed.store)] if resumed is not None else list(sys.argv[1:])


def jobs_of(sf: ScenarioFile, args) -> int:
    return sf.run.get("jobs", -1)  # checked by the loader (-1 or >= 1)


def progress_of(args) -> bool | None:
    return False if args.quiet else None


def command_line(seed: int | None = None, args=None) -> str:
    """This command as typed; with ``seed``, pinned to that seed (added when no --seed was given).

    A resumed command is ``simpower resume STORE``: the store's plan names the seed.
    """
    import shlex

    argv = argv_of(args)
    if getattr(args, "resumed_from", None) is not None:
        return "simpower " + shlex.join(argv)
    if seed is not None and not any(a == "--seed" or a.startswith("--seed=") for a in argv):
        argv += ["--seed", str(seed)]
    return "simpower " + " ".join(shlex.quote(a) for a in argv)


#: output options by kind: files need an existing folder; stems and folders are created (with parents)
OUTPUT_FILES = {"json": "--json", "csv": "--csv", "parquet": "--parquet"}
OUTPUT_STEMS = {"plot": "--plot"}
OUTPUT_FOLDERS = {"report": "--report"}


def _first_existing(path):
    p = path
    while not p.exists() and p != p.parent:
        p = p.parent
    return p


def check_output_file(option: str, value) -> None:
    """Refuse, before anything runs, an output file that cannot be written: its folder is missing or a file,
    or the path is a folder."""
    from pathlib import Path

    path = Path(str(value))
    if path.is_dir():
        raise ParameterError(f"`{option}` {value}: is a folder; give a file path (e.g. {path / 'result'}).")
    folder = path.parent
    if not folder.is_dir():
        what = "is a file" if folder.exists() else "does not exist"
        raise ParameterError(f"`{option}` {value}: the folder {folder} {what}; create the folder first or give "
                             f"another path.")


def check_output_folder(option: str, value, stem: bool = False) -> None:
    """Refuse a folder output (or the folder of a file stem) that is, or sits under, an existing file."""
    from pathlib import Path

    path = Path(str(value))
    folder = path.parent if stem else path
    if stem and path.is_dir():
        raise ParameterError(f"`{option}` {value}: is a folder; give a file name stem (e.g. {path / 'power'}).")
    hit = _first_existing(folder)
    if hit.exists() and not hit.is_dir():
        where = "is a file" if hit == folder else f"lies under the file {hit}"
        raise ParameterError(f"`{option}` {value}: {where}, not a folder; give a folder path.")


def check_outputs(args) -> None:
    """Check every output option of the command line before it runs (see :data:`OUTPUT_FILES`)."""
    for attr, option in OUTPUT_FILES.items():
        if getattr(args, attr, None):
            check_output_file(option, getattr(args, attr))
    for attr, option in OUTPUT_STEMS.items():
        if getattr(args, attr, None):
            check_output_folder(option, getattr(args, attr), stem=True)
    for attr, option in OUTPUT_FOLDERS.items():
        if getattr(args, attr, None):
            check_output_folder(option, getattr(args, attr))
