"""``benchspec cautions [SOURCE_TYPE]``: print the safety cautions."""

from __future__ import annotations

from ..safety import SOURCE_TYPES, format_cautions


def register(subparsers) -> None:
    parser = subparsers.add_parser("cautions", help="print the safety cautions for each light source")
    parser.add_argument("source_type", nargs="?", choices=SOURCE_TYPES, help="one source type (default: all)")
    parser.set_defaults(handler=_run)


def _run(args) -> int:
    print(format_cautions(args.source_type))
    return 0
