"""``benchspec calibrate``, ``benchspec extract`` and ``benchspec lines``.

* ``calibrate FRAME... --lamp NAME [--dark FRAME...] [--hint-lines-per-mm N] [--pair PIXEL=NM ...]
  [--with LAMP=FRAME[,FRAME...] ...] --out CAL.json [--force]`` prints the matched-line table, the
  RMS and the verdict, and writes the calibration file.
* ``extract FRAME... --calibration CAL.json [--dark FRAME...] [--each] --out SPEC.csv [--force]``
  writes the calibrated spectrum (CSV: ``#`` provenance lines, then
  ``wavelength_nm,intensity,uncertainty,saturated,...``, one row per column,
  wavelength increasing); ``--each`` writes one file per frame
  (``SPEC_0000.csv``, ``SPEC_0001.csv``, ...), a time series, or with
  ``--out RUN.nc`` the whole series in one NetCDF file (:mod:`benchspec.series`).
  The extension of ``--out`` picks the format (.csv, .json, .jdx).
* ``lines SPEC.csv [--absorption] [--json]`` prints the line table; lines of a calibrated spectrum
  outside 300-1100 nm (``identify.WAVELENGTH_RANGE_NM``, which a webcam cannot record) are counted,
  not listed (``--json``: under ``outside_recordable_range``).

Errors print one line and exit with code 2; nothing is written then.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

from ..errors import ExportError, InputError


def register(subparsers) -> None:
    cal = subparsers.add_parser(
        "calibrate",
        help="find the band and calibrate wavelengths automatically from frames of a lamp",
        description="Stack the frames of a lamp, find the band, its rotation and curvature, extract the spectrum "
        "and match its lines to the lamp's reference lines with no first guess.",
    )
    cal.add_argument("frames", nargs="+", metavar="FRAME", help="image files, a folder, a glob or a video of the lamp")
    cal.add_argument("--lamp", default="cfl", help="lamp in the frames: cfl (default), hg, ne, he, h, ar, kr, xe, na; or daylight (skylight or a white "
                     "card in sunlight, calibrated from its dark lines; never point the optics at the Sun)")
    cal.add_argument("--dark", nargs="+", metavar="FRAME", help="dark frames (same exposure, lamp off)")
    cal.add_argument("--hint-lines-per-mm", type=float, metavar="N", help="grating groove density, narrows the search")
    cal.add_argument("--hint-nm-per-px", type=float, nargs=2, metavar=("LOW", "HIGH"),
                     help="dispersion range to search (nm/px), e.g. from `benchspec plan`")
    cal.add_argument("--hint-plan", metavar="PLAN.json",
                     help="the output of `benchspec plan ... --json`: search the dispersion it predicts")
    cal.add_argument("--pair", action="append", default=[], metavar="PIXEL=NM",
                     help="a known line at a rectified column, e.g. 812.4=532.0 (or 812.4=532.0+-0.3); repeatable")
    cal.add_argument("--with", dest="more", action="append", default=[], metavar="LAMP=FRAME[,FRAME]",
                     help="frames of another lamp from the same setup, combined into one solution; repeatable")
    cal.add_argument("--gamma", default="auto", choices=("auto", "2.2", "srgb", "1"),
                     help="transfer curve of the frames (auto: sRGB for 8-bit, 1 for 16-bit)")
    cal.add_argument("--channel", default="mean", choices=("mean", "r", "g", "b", "luma"), help="colour channel combination")
    cal.add_argument("--stack", default="mean", choices=("mean", "median"), help="how frames are stacked")
    cal.add_argument("--extraction", default="optimal", choices=("optimal", "box"), help="extraction method")
    cal.add_argument("--out", required=True, metavar="CAL.json", help="calibration file to write")
    cal.add_argument("--force", action="store_true", help="overwrite --out if it exists")
    cal.set_defaults(handler=_calibrate)

    ext = subparsers.add_parser(
        "extract",
        help="apply a calibration file to frames and write the calibrated spectrum",
        description="Rectify and extract frames with a stored calibration; warns when the band has moved.",
    )
    ext.add_argument("frames", nargs="+", metavar="FRAME", help="image files, a folder, a glob or a video")
    ext.add_argument("--calibration", required=True, metavar="CAL.json", help="file written by `benchspec calibrate`")
    ext.add_argument("--dark", nargs="+", metavar="FRAME", help="dark frames")
    ext.add_argument("--each", action="store_true", help="one spectrum per frame (time series) instead of stacking")
    ext.add_argument("--extraction", choices=("optimal", "box"), help="override the calibration's extraction method")
    ext.add_argument("--response", metavar="RESP.json",
                     help="divide by the instrument response (from `benchspec response`): relative spectral power")
    ext.add_argument("--out", required=True, metavar="SPEC.csv",
                     help="output spectrum (.csv, .json or .jdx); with --each SPEC.csv gives SPEC_0000.csv, "
                          "SPEC_0001.csv, ... and RUN.nc one NetCDF file holding the whole series")
    ext.add_argument("--force", action="store_true", help="overwrite existing output files")
    ext.set_defaults(handler=_extract)

    lines = subparsers.add_parser(
        "lines", help="find and measure the lines of a spectrum file",
        description="Find the emission lines (or, with --absorption, the dips against a fitted continuum) of a "
                    "spectrum file and print each line's centre with its 1-sigma, FWHM, peak, area and SNR, "
                    "flagging blended, saturated and extrapolated lines.")
    lines.add_argument("spectrum", metavar="SPEC.csv", help="a spectrum file (benchspec CSV, JSON or JCAMP-DX)")
    lines.add_argument("--absorption", action="store_true", help="find dips against a fitted continuum")
    lines.add_argument("--min-snr", type=float, default=5.0, help="detection threshold (default 5)")
    lines.add_argument("--json", action="store_true", help="print JSON instead of a table")
    lines.set_defaults(handler=_lines)


# --------------------------------------------------------------------------- calibrate


def _parse_more(items):
    out = []
    for item in items:
        lamp, sep, frames = item.partition("=")
        if not sep or not lamp.strip() or not frames.strip():
            raise InputError(f"--with {item!r} must look like LAMP=FRAME[,FRAME...], e.g. ne=neon_1.png,neon_2.png")
        out.append(([f for f in frames.split(",") if f], lamp.strip()))
    return out


def _dispersion_hint(args):
    """(low, high) nm/px from --hint-nm-per-px or --hint-plan, or None."""
    if args.hint_plan and args.hint_nm_per_px:
        raise InputError("give --hint-plan or --hint-nm-per-px, not both")
    if args.hint_nm_per_px:
        return tuple(args.hint_nm_per_px)
    if not args.hint_plan:
        return None
    from ..io import read_json_file

    plan = read_json_file(args.hint_plan, what="setup plan")
    hint = plan.get("calibration_hint_nm_per_px") if isinstance(plan, dict) else None
    if (not isinstance(hint, list) or len(hint) != 2
            or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in hint)):
        raise InputError(f"{args.hint_plan} has no `calibration_hint_nm_per_px` pair; write it with "
                         "`benchspec plan ... --json > PLAN.json` (a plan whose range misses the sensor has none)")
    return (float(hint[0]), float(hint[1]))


def _calibrate(args) -> int:
    from ..calfile import write_calibration
    from ..pipeline import calibrate_frames
    from ..refdata import load_lamp
    from ..wavecal import parse_pair

    out = Path(args.out)
    if out.suffix.lower() != ".json":
        raise ExportError(f"--out must name a .json file, got {out.name!r}")
    if out.exists() and not args.force:
        raise ExportError(f"{out} already exists; pass --force to overwrite it, or choose another name")
    lamp = load_lamp(args.lamp)
    if lamp.kind == "absorption":  # daylight: the Sun's cautions before any work
        from ..safety import cautions_for

        title, items = cautions_for(lamp.source_type)
        print(f"caution ({title.lower()}): {' '.join(items)} See `benchspec cautions {lamp.source_type}`.", file=sys.stderr)
    pairs = [parse_pair(p) for p in args.pair]
    more = _parse_more(args.more)
    hint = _dispersion_hint(args)
    calibration = calibrate_frames(
        args.frames, lamp=args.lamp, dark=args.dark, gamma=args.gamma, channel=args.channel, stack=args.stack,
        extraction=args.extraction, hint_lines_per_mm=args.hint_lines_per_mm, hint_nm_per_px=hint, pairs=pairs,
        more_lamps=more,
    )
    geometry = calibration.geometry
    print(f"band: rotation {geometry.rotation_deg:+.2f} deg, {geometry.n_columns} columns, aperture rows "
          f"{geometry.aperture_rows[0]}-{geometry.aperture_rows[1]}, curvature "
          f"{'measured from %d lines' % geometry.n_lines_traced if geometry.curvature_known else 'unknown'}")
    print(calibration.wavelength.format_table())
    path = write_calibration(calibration, out, force=args.force)
    print(f"wrote {path}")
    return 0


# --------------------------------------------------------------------------- extract


def _write(spectrum, path: Path, *, force: bool):
    try:
        from ..io import write_spectrum
    except ImportError:  # pragma: no cover - io ships with benchspec
        raise ExportError("writing spectra needs benchspec.io") from None
    return write_spectrum(spectrum, path, force=force)


def _extract(args) -> int:
    from ..analysis.response import apply_response, load_response
    from ..io import SPECTRUM_EXTENSIONS
    from ..pipeline import extract_frames

    out = Path(args.out)
    if out.suffix.lower() == ".nc" and not args.each:
        raise ExportError(f"{out.name}: a .nc file holds a time series; add --each, or write one spectrum "
                          f"as {', '.join(SPECTRUM_EXTENSIONS)}")
    if out.suffix.lower() not in SPECTRUM_EXTENSIONS + (".nc",):
        raise ExportError(f"cannot tell the format of {out}: use one of {', '.join(SPECTRUM_EXTENSIONS)} "
                          "(or .nc with --each: the whole series in one NetCDF file)")
    if out.exists() and not args.force and (not args.each or out.suffix.lower() == ".nc"):
        raise ExportError(f"{out} already exists; pass --force to overwrite it, or choose another name")
    response = None
    if args.response:
        response = load_response(args.response)  # checked before any frame is read
    if args.each:
        return _extract_series(args, out, response)
    result = extract_frames(args.frames, args.calibration, dark=args.dark, each=False, extraction=args.extraction)
    if response is not None:
        result = apply_response(result, response)
    path = _write(result, out, force=args.force)
    span = _calibrated_span(result)
    fitted = f"; calibrated by lines at {span[0]:.1f}-{span[1]:.1f} nm, extrapolated beyond" if span else ""
    print(f"wrote {path} ({result.size} columns, {result.wavelength_nm[0]:.1f}-{result.wavelength_nm[-1]:.1f} nm{fitted})")
    return 0


def _extract_series(args, out: Path, response) -> int:
    """--each: stream one spectrum per frame to SPEC_0000.csv, SPEC_0001.csv, ... as they are made.

    The files are written by ``io.SeriesWriter``: each one atomically
    (temporary name, then rename), and the whole series flushed to disk once
    at the end instead of file by file.
    """
    import re

    from ..analysis.response import apply_response
    from ..io import SeriesWriter
    from ..pipeline import iter_extract_frames

    if out.suffix.lower() == ".nc":
        return _extract_series_file(args, out, response)

    pattern = re.compile(re.escape(out.stem) + r"_\d{4,}" + re.escape(out.suffix) + "$")
    folder = out.parent if str(out.parent) else Path(".")
    clash = sorted(p for p in folder.glob(f"{out.stem}_*{out.suffix}") if pattern.match(p.name))
    if clash and not args.force:
        raise ExportError(f"{clash[0]} already exists; pass --force to overwrite the series, or choose another name")
    count = 0
    with SeriesWriter(force=args.force) as writer:  # on this thread: a writer thread was not faster (see there)
        for spectrum in iter_extract_frames(args.frames, args.calibration, dark=args.dark, extraction=args.extraction):
            if response is not None:
                spectrum = apply_response(spectrum, response)
            writer.write(spectrum, out.with_name(f"{out.stem}_{count:04d}{out.suffix}"))
            count += 1
    if count == 0:
        raise ExportError("no frames to extract; pass image files, a folder, a glob pattern or a video")
    first, last = (out.with_name(f"{out.stem}_{k:04d}{out.suffix}") for k in (0, count - 1))
    print(f"wrote {count} spectra: {first.name} ... {last.name}")
    return 0


def _extract_series_file(args, out: Path, response) -> int:
    """--each with a .nc destination: the whole series in one NetCDF file (benchspec.series)."""
    from ..analysis.response import apply_response
    from ..pipeline import iter_extract_frames
    from ..series import SeriesFile

    series = SeriesFile(out, force=args.force)
    try:
        with series:
            for spectrum in iter_extract_frames(args.frames, args.calibration, dark=args.dark, extraction=args.extraction):
                if response is not None:
                    spectrum = apply_response(spectrum, response)
                series.write(spectrum)
    except Exception:
        if series.count and out.exists():
            print(f"note: the {series.count} spectra made before the error are in {out} (its `complete` "
                  "attribute says why the series stopped)", file=sys.stderr)
        raise
    if series.count == 0:
        raise ExportError("no frames to extract; pass image files, a folder, a glob pattern or a video")
    print(f"wrote {out} ({series.count} spectra, NetCDF; read it with benchspec.series.read_series "
          "or any NetCDF reader)")
    return 0


# --------------------------------------------------------------------------- lines


def _lines(args) -> int:
    from ..identify import WAVELENGTH_RANGE_NM
    from ..io import read_spectrum
    from ..lines import find_lines

    spectrum = read_spectrum(args.spectrum)
    table = find_lines(spectrum, absorption=args.absorption, min_snr=args.min_snr)
    calibrated = spectrum.is_calibrated
    span = _calibrated_span(spectrum) if calibrated else None
    # A calibration extrapolated to the sensor's far columns can put "lines" where no light reaches a
    # silicon webcam behind glass: they are left out of the table, as identify and the plots ignore them
    low, high = WAVELENGTH_RANGE_NM
    recordable = [not calibrated or low <= line.centre_nm <= high for line in table]
    rows = list(zip(table, table.to_dicts()))
    shown = [pair for pair, keep in zip(rows, recordable) if keep]
    left_out = [pair for pair, keep in zip(rows, recordable) if not keep]

    def beyond_span(line) -> bool:
        return span is not None and not (span[0] <= line.centre_nm <= span[1])

    if args.json:
        def listed(pairs):
            return [dict(row, extrapolated=None if span is None else beyond_span(line)) for line, row in pairs]

        json.dump({"kind": table.kind, "noise": table.noise, "min_snr": table.min_snr, "calibrated_span_nm": span,
                   "recordable_range_nm": [low, high] if calibrated else None, "lines": listed(shown),
                   "outside_recordable_range": listed(left_out)}, sys.stdout, indent=1)
        print()
        return 0
    header = "   centre_nm  +-1s_nm  fwhm_nm" if calibrated else "   centre_px  +-1s_px  fwhm_px"
    print(header + "        peak        area     snr  flags")
    for line, _ in shown:
        flags = ",".join(f for f, on in (("blend", line.blended), ("sat", line.saturated),
                                         ("extrapolated", beyond_span(line))) if on)
        if calibrated:
            position = f"{line.centre_nm:12.3f} {line.centre_uncertainty_nm:8.3f} {line.fwhm_nm:8.3f}"
        else:
            position = f"{line.centre_px:12.2f} {line.centre_uncertainty_px:8.3f} {line.fwhm_px:8.2f}"
        print(f"{position} {line.peak:11.4g} {line.area:11.4g} {line.snr:7.1f}  {flags}")
    print(f"{len(shown)} {table.kind} lines, detected at {table.min_snr:g} sigma or more on the smoothed spectrum "
          "(the snr column: the fitted peak over one sample's noise)")
    extrapolated = sum(beyond_span(line) for line, _ in shown)
    if extrapolated:
        print(f"{extrapolated} of them outside {span[0]:.1f}-{span[1]:.1f} nm, the span of the calibration's lines: "
              "their wavelengths are extrapolated (see +-1s)")
    if left_out:
        print(f"{len(left_out)} more left out, outside {low:g}-{high:g} nm: a silicon webcam behind glass optics "
              "records no light there (identify and the plots ignore it too); --json lists them under "
              "outside_recordable_range")
    return 0


def _calibrated_span(spectrum) -> list[float] | None:
    """[low, high] nm between the outermost lines of the calibration that gave ``spectrum`` its axis, if recorded."""
    record = (spectrum.provenance or {}).get("calibration") or {}
    span = record.get("lines_span_nm") if isinstance(record, dict) else None
    try:
        low, high = (float(v) for v in span)
    except (TypeError, ValueError):
        return None
    return [low, high] if low <= high else None
