"""``benchspec benchmark``: the speed and accuracy benchmarks the project ships.

``benchspec benchmark [speed]`` times every stage against the machine's
floors (:mod:`benchspec.benchmarks.speed`); ``benchspec benchmark accuracy``
and ``benchspec benchmark identification`` run the accuracy benchmarks of
the wavelength calibration and of species identification. Each prints a
table, or with ``--json`` one JSON object on stdout.
"""

from __future__ import annotations

import argparse
import importlib
import json
import math
import sys

import numpy as np

from ..errors import InputError

#: Benchmark name -> module of benchspec.benchmarks; each has ``run(quick: bool) -> dict``.
BENCHMARKS = {
    "speed": "speed",
    "accuracy": "accuracy",
    "identification": "identification",
    "practicals": "practicals",
}


def register(subparsers) -> None:
    parser = subparsers.add_parser(
        "benchmark",
        help="measure speed (per stage, against the machine's floors) and accuracy",
        description="Run a benchmark on virtual-bench frames and print its figures. "
        "speed (default): every stage at 640x480, 1280x720 and 1920x1080 with its ratio to one memory pass "
        "over the frame and to decoding it, a live-path figure, and batch throughput on a 300-frame video. "
        "accuracy: automatic wavelength calibration on many virtual benches. "
        "identification: species identification on rendered lamp spectra. "
        "practicals: Rydberg pulls, response flatness, CCT, daylight lines and concentration coverage.",
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog="Timings depend on the machine and its load; the speed figures record the CPU count and the load "
        "average. --quick runs in seconds (one size, few repeats) and is what CI runs.",
    )
    parser.add_argument("benchmark", nargs="?", default="speed", choices=sorted(BENCHMARKS),
                        help="which benchmark (default: speed)")
    parser.add_argument("--quick", action="store_true", help="short run: fewer sizes, repeats and trials (for CI)")
    parser.add_argument("--mosaic", choices=("none", "rggb"), default=None,
                        help="accuracy only: render the benches through an RGGB colour-filter mosaic and bilinear "
                             "demosaicing, as a webcam does (default none)")
    parser.add_argument("--json", action="store_true", help="print the figures as one JSON object")
    parser.add_argument("--sizes", metavar="WxH[,WxH...]",
                        help="speed only: frame sizes to time (default 640x480,1280x720,1920x1080)")
    parser.add_argument("--repeats", type=int, metavar="N", help="speed only: timed calls per stage (default 30)")
    parser.add_argument("--out", metavar="FILE.json", help="also write the figures as JSON to this file")
    parser.add_argument("--force", action="store_true", help="overwrite --out if it exists")
    parser.set_defaults(handler=_run)


def parse_sizes(text: str) -> tuple[tuple[int, int], ...]:
    """``"640x480,1280x720"`` -> ((640, 480), (1280, 720))."""
    sizes = []
    for item in text.split(","):
        width, sep, height = item.strip().lower().partition("x")
        try:
            size = (int(width), int(height))
        except ValueError:
            size = None
        if not sep or size is None or not (64 <= size[0] <= 8192 and 48 <= size[1] <= 8192):
            raise InputError(f"--sizes: {item.strip()!r} is not a frame size; write WIDTHxHEIGHT, e.g. 1280x720")
        sizes.append(size)
    return tuple(sizes)


def plain(value):
    """Figures as plain JSON values: numpy numbers become Python numbers, NaN and inf become null."""
    if isinstance(value, dict):
        return {str(key): plain(item) for key, item in value.items()}
    if isinstance(value, (list, tuple)):
        return [plain(item) for item in value]
    if isinstance(value, np.ndarray):
        return [plain(item) for item in value.tolist()]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value) if math.isfinite(value) else None
    if value is None or isinstance(value, str):
        return value
    return str(value)


def _load(name: str):
    module_name = BENCHMARKS[name]
    try:
        return importlib.import_module(f"benchspec.benchmarks.{module_name}")
    except ModuleNotFoundError as exc:
        if exc.name == f"benchspec.benchmarks.{module_name}":
            raise InputError(
                f"the {name} benchmark is not in this version of benchspec (no benchspec.benchmarks.{module_name}); "
                "choose another: " + ", ".join(n for n in sorted(BENCHMARKS) if n != name)
            ) from None
        raise


def _run(args) -> int:
    if args.repeats is not None and args.repeats < 1:
        raise InputError(f"--repeats must be at least 1, was {args.repeats}")
    if args.mosaic is not None and args.benchmark != "accuracy":
        raise InputError("--mosaic applies to the accuracy benchmark only; drop it or run `benchspec benchmark accuracy`")
    if args.benchmark != "speed" and (args.sizes or args.repeats):
        raise InputError("--sizes and --repeats apply to the speed benchmark only")
    if args.out and not args.force:
        from pathlib import Path

        if Path(args.out).exists():
            raise InputError(f"{args.out} already exists; pass --force to overwrite it, or choose another name")
    module = _load(args.benchmark)
    if not callable(getattr(module, "run", None)):
        raise InputError(f"benchspec.benchmarks.{BENCHMARKS[args.benchmark]} has no run(quick) function yet; "
                         "choose another benchmark")
    if args.benchmark == "speed":
        progress = None if args.json else (lambda message: print(f"  timing {message}", file=sys.stderr, flush=True))
        figures = module.run(quick=args.quick, sizes=parse_sizes(args.sizes) if args.sizes else None,
                             repeats=args.repeats, progress=progress)
    elif args.benchmark == "accuracy" and args.mosaic is not None:
        figures = module.run(quick=args.quick, mosaic=args.mosaic)
    else:
        figures = module.run(quick=args.quick)
    from ..io import atomic_write_text

    text = json.dumps(plain(figures), indent=2, allow_nan=False)
    if args.out:
        atomic_write_text(args.out, text + "\n", force=args.force)
    if args.json:
        print(text)
    else:
        formatter = getattr(module, "format_report", None)
        print(formatter(figures) if formatter else text)
    return 0
