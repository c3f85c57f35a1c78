"""``benchspec demo``: run the pipeline on the bundled demo frames."""

from __future__ import annotations

from pathlib import Path


def register(subparsers) -> None:
    parser = subparsers.add_parser(
        "demo",
        help="run the pipeline on the bundled demo frames (an invented school bench)",
        description="Calibrate on the demo fluorescent-lamp frames, extract every demo frame, "
        "identify the mystery tubes and run the practicals; writes CSV spectra and PNG plots.",
    )
    parser.add_argument("--out", metavar="DIR", default="benchspec-demo", help="output folder (default: benchspec-demo)")
    parser.add_argument("--regenerate", metavar="DIR", help="instead: render the demo frames again into DIR, from the recipe")
    parser.add_argument("--force", action="store_true", help="overwrite existing files")
    parser.set_defaults(handler=_run)


def _run(args) -> int:
    if args.regenerate:
        from .. import demo  # imported when the command runs, not for every command's parser

        written = demo.regenerate(args.regenerate, force=args.force)
        print(f"rendered {len(written)} demo frames into {args.regenerate}")
        return 0
    from ..demo_run import run_demo

    return run_demo(Path(args.out), force=args.force)
