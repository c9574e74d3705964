"""``simpower resume STORE``: continue an interrupted run from its run store (or show its progress).

The store remembers the command line that started it and the folder it ran
in; ``resume`` runs that command again there. The run finds its finished
chunks in the store, checks the scenario fingerprint, seed and chunk size,
and computes only what is missing, so the result equals an uninterrupted run.
"""

from __future__ import annotations

import os
import sys

from ..errors import StoreError


def register(sub) -> None:
    p = sub.add_parser("resume", help="continue an interrupted run from its run store (--status: show progress)",
                       description=__doc__)
    p.add_argument("store", help="run store file (SQLite) written with --store")
    p.add_argument("--status", action="store_true", help="only show what the store holds and what is missing")
    p.set_defaults(func=main)


def status_lines(st) -> list[str]:
    """Progress of each grid point of an open store."""
    lines = []
    done = {}
    for p, _, size in st.done_chunks():
        done[p] = done.get(p, 0) + size
    for row in st._point_rows():
        point, fp, seed, cs, reps = row[:5]
        have = done.get(point, 0)
        state = "complete" if have >= reps else f"{reps - have} to go"
        lines.append(f"point {point}: {have} of {reps} replicates ({state}); fingerprint {fp}, seed {seed}, "
                     f"chunk size {cs}")
    return lines or ["the store holds no grid point yet"]


def main(args) -> int:
    from ..engine.store import open_store

    with open_store(args.store) as st:
        command = st.command
        cwd = st.meta().get("cwd")
        lines = status_lines(st)
    if args.status:
        print(f"Run store {args.store}")
        print("\n".join(lines))
        if command:
            print("command: simpower " + " ".join(command))
        return 0
    if not command:
        raise StoreError(f"{args.store}: written from Python, not the command line; resume by calling the same "
                         f"run(...) again with store={args.store!r}.")
    if command[:1] == ["resume"]:
        raise StoreError(f"{args.store}: the recorded command is itself a resume; rerun the original command.")
    print("resuming: simpower " + " ".join(command) + (f"  (in {cwd})" if cwd else ""), file=sys.stderr)
    from .main import main as cli_main

    here, argv = os.getcwd(), sys.argv
    if cwd and os.path.isdir(cwd):
        os.chdir(cwd)
    # the resumed command sees its own command line, so the command it records and prints to
    # reproduce the numbers is the original one, not "resume STORE"
    sys.argv = [argv[0] if argv else "simpower", *command]
    try:
        return cli_main(list(command))
    finally:
        sys.argv = argv
        os.chdir(here)
