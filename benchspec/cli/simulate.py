"""``benchspec simulate``: render virtual-bench frames (and videos) with a truth sidecar."""

from __future__ import annotations

import argparse
import json
from pathlib import Path

from ..errors import BenchFileError, ExportError
from ..refdata import read_data_text
from ..safety import cautions_for

_SOURCE_TYPE = {"lamp": None, "blackbody": "halogen", "led": "led", "laser": "laser", "daylight": "daylight", "sample": "halogen"}


def register(subparsers) -> None:
    parser = subparsers.add_parser(
        "simulate",
        help="render the frames a webcam-and-grating spectrometer would take, from physics",
        description="Render a virtual-bench frame (PNG/TIFF/JPEG) or video (.avi/.mp4) and a truth sidecar "
        "(<out>.truth.json) with the pixel-to-wavelength mapping, line positions and geometry.",
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog="Sources: a lamp name (cfl, hg, he, ne, h, na, ar, kr, xe), blackbody:T, halogen:T, "
        "led:PEAK[:FWHM], laser:NM, daylight, sample:A:PEAK:FWHM, flat, dark.\n"
        "`benchspec simulate --template` prints a documented bench file.",
    )
    parser.add_argument("--bench", metavar="BENCH.toml", help="bench file (TOML or JSON); default: the built-in bench")
    parser.add_argument("--source", metavar="SOURCE", help="light source (overrides the bench file's)")
    parser.add_argument(
        "--set", metavar="SECTION.FIELD=VALUE", action="append", default=[], help="override one bench field, e.g. camera.rotation_deg=5"
    )
    parser.add_argument("--seed", type=int, default=0, help="noise seed: the same seed gives the same frame (default 0)")
    parser.add_argument("--out", metavar="PATH", help="frame (.png/.tif/.jpg) or video (.avi/.mp4) to write")
    parser.add_argument("--truth", metavar="PATH", help="truth sidecar path (default: <out stem>.truth.json)")
    parser.add_argument("--no-truth", action="store_true", help="do not write the truth sidecar")
    parser.add_argument("--frames", type=int, default=1, help="number of frames; with a video --out (default 1)")
    parser.add_argument("--fps", type=float, default=30.0, help="video frame rate (default 30)")
    parser.add_argument("--drift", type=float, default=0.0, metavar="PX", help="video: band drift per frame along the dispersion (px)")
    parser.add_argument("--flicker", type=float, default=0.0, metavar="FRACTION", help="video: random lamp flicker amplitude (e.g. 0.05)")
    parser.add_argument("--force", action="store_true", help="overwrite existing files")
    parser.add_argument("--template", action="store_true", help="print a documented bench file and exit")
    parser.set_defaults(handler=_run)


def _parse_value(text: str):
    try:
        return json.loads(text)
    except ValueError:
        return text


def _build_bench(args) -> "simulate.Bench":
    from .. import simulate  # imported when the command runs (scipy behind it): not for every command's parser

    bench = simulate.load_bench(args.bench) if args.bench else simulate.Bench()
    for item in args.set:
        key, sep, value = item.partition("=")
        section, dot, name = key.strip().partition(".")
        if not sep or not dot:
            raise BenchFileError(f"--set {item!r}: write SECTION.FIELD=VALUE, e.g. camera.rotation_deg=5")
        if section == "source":
            bench = bench.with_(source={**bench.source, name: _parse_value(value)})
        elif section in simulate._SECTIONS:
            bench = bench.with_(**{section: {name: _parse_value(value)}})
        else:
            raise BenchFileError(f"--set {item!r}: unknown section {section!r}; known: {', '.join(simulate._SECTIONS)}, source")
    if args.source:
        bench = bench.with_(source=args.source)
    return bench


def _run(args) -> int:
    from .. import simulate

    if args.template:
        print(read_data_text("bench-template.toml"), end="")
        return 0
    if not args.out:
        raise ExportError("no output given; add --out FRAME.png (or --out video.avi --frames 300)")
    out = Path(args.out)
    bench = _build_bench(args)
    truth_path = None if args.no_truth else Path(args.truth) if args.truth else out.with_name(out.stem + ".truth.json")
    is_video = out.suffix.lower() in (".avi", ".mp4")
    for path in (out, truth_path):
        if path is not None and path.exists() and not args.force:
            raise ExportError(f"{str(path)!r} already exists; choose another name or pass --force to overwrite it")
    if is_video:
        truth = simulate.render_video(
            bench, out, frames=args.frames, fps=args.fps, seed=args.seed, drift_px_per_frame=args.drift, flicker=args.flicker, force=args.force
        )
        n_lines = len(truth["lines"])
    else:
        if args.frames != 1:
            raise ExportError(f"--frames {args.frames} needs a video output (.avi or .mp4), got {out.suffix or 'no extension'}")
        rendered = simulate.render(bench, seed=args.seed)
        simulate.write_frame(rendered, out, bench=bench, force=args.force)
        truth = rendered.truth
        n_lines = len(truth["lines"])
    if truth_path is not None:
        simulate.write_truth(truth, truth_path, force=args.force)
    geometry = truth["geometry"]
    mapping = truth["mapping"]["wavelength_nm"]
    # the truth maps only the wavelengths the bench renders (300-1100 nm): a calibration's own range,
    # extrapolated to every column, can reach further
    span = (f"light of {mapping[0]:.0f}-{mapping[-1]:.0f} nm on the frame (the bench renders 300-1100 nm)"
            if mapping else "no rendered wavelength reaches the frame")
    print(
        f"wrote {out}" + (f" ({args.frames} frames)" if is_video else "") + f": {bench.source.get('name', bench.source['kind'])}, "
        f"{span}, {n_lines} lines, rotation {geometry['rotation_deg']:g} deg, smile {geometry['smile_px_at_650nm']:.1f} px"
        + (", brightest lines saturated" if truth["exposure"]["saturated"] else "")
    )
    if truth_path is not None:
        print(f"wrote {truth_path}")
    source_type = bench.source.get("kind")
    if source_type == "lamp":
        from ..refdata import load_lamp

        source_type = load_lamp(bench.source["name"]).source_type
    else:
        source_type = _SOURCE_TYPE.get(source_type)
    if source_type:
        title, _ = cautions_for(source_type)
        print(f"real {title.lower()}: see `benchspec cautions {source_type}` before using one at the bench")
    return 0
