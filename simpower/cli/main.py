"""Entry point: finds the command modules and turns errors into one line and exit code 2.

Output paths (--json, --csv, --report, --out...) are checked before a command runs. Output cut
short by the reader (``simpower ... | head``) ends quietly with exit code 141 (128 + SIGPIPE).

Each ``simpower/cli/cmd_<name>.py`` defines ``register(subparsers)`` adding
its sub-command with ``set_defaults(func=...)``; ``func(args)`` returns the exit
code. Adding a command means adding a module; nothing here changes.
"""

from __future__ import annotations

import argparse
import importlib
import pkgutil
import sys

from .._version import __version__
from ..errors import SimpowerError

EXIT_BAD_INPUT = 2
EXIT_INTERRUPTED = 130
#: output closed early (``simpower ... | head``): 128 + SIGPIPE, what a shell reports for a killed writer
EXIT_BROKEN_PIPE = 141


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="simpower",
        description="Statistical power by Monte Carlo simulation: describe the data you expect and the "
                    "analysis you plan; read power, type I error, bias and coverage with their Monte Carlo error.",
    )
    parser.add_argument("--version", action="version", version=f"simpower {__version__}")
    parser.add_argument("--debug", action="store_true", help="show the full traceback of an unexpected error")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    from . import __path__ as cli_path

    for mod in sorted(pkgutil.iter_modules(cli_path), key=lambda m: m.name):
        if mod.name.startswith("cmd_"):
            importlib.import_module(f"{__package__}.{mod.name}").register(sub)
    from .helptext import apply

    apply(parser)  # --help as plain text: no reST markup from the docstrings
    return parser


def _one_line_warning(message, category, filename, lineno, file=None, line=None):
    """Warnings of simpower's own (e.g. resuming a store written by other code) as one line."""
    import warnings

    if category is RuntimeWarning and "simpower" in str(filename):
        print(f"simpower: warning: {message}", file=file or sys.stderr)
    else:
        sys.stderr.write(warnings.formatwarning(message, category, filename, lineno, line))


def main(argv: list[str] | None = None) -> int:
    import warnings

    previous, warnings.showwarning = warnings.showwarning, _one_line_warning
    try:
        code = _main(argv)
        sys.stdout.flush()  # a closed reader shows here, inside the handler, not at interpreter exit
        return code
    except BrokenPipeError:
        return _quiet_broken_pipe()
    finally:
        warnings.showwarning = previous


def _quiet_broken_pipe() -> int:
    """The reader of our output went away (``| head``): stop quietly, without a traceback.

    stdout is pointed at /dev/null so that Python's final flush of the
    unwritable buffer raises nothing either.
    """
    import os

    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError):  # no real stdout (captured in tests)
        pass
    return EXIT_BROKEN_PIPE


def _main(argv: list[str] | None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help(sys.stderr)
        return EXIT_BAD_INPUT
    try:
        from .common import check_outputs

        check_outputs(args)  # an unwritable output is refused before anything runs
        return int(args.func(args) or 0)
    except BrokenPipeError:
        raise
    except KeyboardInterrupt:
        print("simpower: interrupted.", file=sys.stderr)
        return EXIT_INTERRUPTED
    except SimpowerError as exc:
        from ..engine.runner import RunInterrupted

        print(f"simpower: error: {exc}", file=sys.stderr)
        return EXIT_INTERRUPTED if isinstance(exc, RunInterrupted) else EXIT_BAD_INPUT
    except OSError as exc:
        if args.debug:
            raise
        what = f"{exc.filename}: {exc.strerror}" if exc.filename and exc.strerror else f"{type(exc).__name__}: {exc}"
        print(f"simpower: error: {what}; check the path and its folder (run with --debug for the traceback)",
              file=sys.stderr)
        return EXIT_BAD_INPUT
    except (ValueError, TypeError, KeyError) as exc:
        if args.debug:
            raise
        print(f"simpower: error: {type(exc).__name__}: {exc} (run with --debug for the traceback)", file=sys.stderr)
        return EXIT_BAD_INPUT
    except Exception as exc:  # an internal error: one line unless --debug
        if args.debug:
            raise
        print(f"simpower: internal error: {type(exc).__name__}: {exc} (run with --debug for the traceback)",
              file=sys.stderr)
        return 1


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
