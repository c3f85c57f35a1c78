"""The ``benchspec`` command line: a thin shell over the core calls.

Each command group lives in its own module of this package and exposes
``register(subparsers)``, which adds its sub-parsers and sets ``handler`` (a
function ``handler(args) -> int``) as the parser default. To add a command,
write the module and add it to ``COMMAND_MODULES`` below.

Errors: any :class:`benchspec.BenchspecError` is printed as one line on
stderr and the exit code is 2; ``--debug`` shows the full traceback instead.
"""

from __future__ import annotations

import argparse
import importlib
import sys
import warnings

from .. import __version__
from ..errors import BenchspecError, DegradedResultWarning

# Order is the order shown in --help.
COMMAND_MODULES = [
    "simulate",
    "demo",
    "calibrate",
    "identify",
    "view",
    "practicals",
    "exports",
    "benchmark",
    "cautions",
]


class _OneLineErrors(argparse.ArgumentParser):
    """An argument parser whose usage errors are one line (what is wrong, where to look), exit code 2.

    argparse prints the whole usage block before its message; the block is what ``--help``
    shows, so the line names it instead. Sub-parsers inherit the class.
    """

    def error(self, message: str):  # noqa: D401 - argparse's hook
        self.exit(2, f"{self.prog}: error: {message}; see `{self.prog} --help`\n")


def build_parser() -> argparse.ArgumentParser:
    parser = _OneLineErrors(
        prog="benchspec",
        description="Calibrated spectra from a webcam and a diffraction grating.",
        epilog="Safety: every light source has cautions; see `benchspec cautions`. "
        "Follow your school's or lab's safety rules and local regulations.",
    )
    parser.add_argument("--version", action="version", version=f"benchspec {__version__}")
    parser.add_argument("--debug", action="store_true", help="show full tracebacks on errors")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMAND_MODULES:
        try:
            module = importlib.import_module(f"{__name__}.{name}")
        except ModuleNotFoundError as exc:
            if exc.name == f"{__name__}.{name}":
                continue  # a command group not written yet
            raise
        module.register(subparsers)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "handler", None):
        parser.print_help()
        return 0
    with warnings.catch_warnings():
        warnings.simplefilter("always", DegradedResultWarning)
        warnings.showwarning = _show_warning
        try:
            return int(args.handler(args) or 0)
        except BenchspecError as exc:
            if args.debug:
                raise
            print(f"benchspec {args.command}: error: {exc}", file=sys.stderr)
            return 2
        except KeyboardInterrupt:
            print("benchspec: interrupted", file=sys.stderr)
            return 130
        except BrokenPipeError:
            raise  # the reader of our output went away: not a bug (run() ends quietly)
        except (MemoryError, RecursionError, OSError, ValueError, TypeError, ArithmeticError, LookupError, RuntimeError) as exc:
            # Not a message we wrote: a bug of ours. Still one line, and a different exit code
            # from bad input (2), so scripts can tell them apart.
            if args.debug:
                raise
            print(
                f"benchspec {args.command}: internal error: {type(exc).__name__}: {' '.join(str(exc).split())[:300]}; "
                "this is a bug in benchspec: rerun with --debug for the traceback and report it",
                file=sys.stderr,
            )
            return 1


def _show_warning(message, category, filename, lineno, file=None, line=None):
    # Our own warnings are for the user; libraries' internal notices (resampling
    # messages and the like) are not, and would bury the ones that matter.
    if not issubclass(category, DegradedResultWarning) and "benchspec" not in str(filename):
        return
    print(f"benchspec: warning: {message}", file=sys.stderr)


def run() -> None:  # pragma: no cover - console entry point
    try:
        code = main()
        sys.stdout.flush()
    except BrokenPipeError:
        # The reader of our output went away (e.g. `benchspec identify --json | head`):
        # not an error of ours. Point stdout at devnull so the interpreter's final flush is quiet.
        import os

        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        code = 0
    sys.exit(code)
