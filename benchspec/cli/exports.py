"""``benchspec report``, ``benchspec convert`` and ``benchspec session``: results people keep.

* ``report SPEC... --out REPORT.pdf``: the one-page PDF lab report.
* ``convert IN OUT``: any spectrum file benchspec reads -> .csv/.json/.jdx/.dx/.png/.svg/.pdf.
* ``session new|add|list|show|export``: the capture log.
"""

from __future__ import annotations

import json
from pathlib import Path

from ..errors import FileFormatError, InputError
from ..io import SPECTRUM_EXTENSIONS, read_json_file, read_spectrum, write_spectrum
from ..safety import SOURCE_TYPES, format_cautions


def register(subparsers) -> None:
    _register_report(subparsers)
    _register_convert(subparsers)
    _register_session(subparsers)


# --------------------------------------------------------------------------- report


def _register_report(subparsers) -> None:
    parser = subparsers.add_parser(
        "report",
        help="write a one-page PDF report: spectrum, residuals, result, cautions, provenance",
        description="Write a one-page PDF lab report for a student to hand in or a technician to file: "
        "the spectrum with labelled lines, the wavelength-calibration residuals, the identification or "
        "practical result, the safety cautions for the source and the provenance of every spectrum.",
    )
    parser.add_argument("spectra", nargs="+", metavar="SPEC", help="spectrum files (.csv, .json, .jdx, or plain text); several are overlaid")
    parser.add_argument("--out", required=True, metavar="REPORT.pdf", help="the PDF to write")
    parser.add_argument("--calibration", metavar="CAL.json", help="calibration file whose residuals to show "
                        "(default: the one named in the first spectrum's provenance, if it is still there)")
    parser.add_argument("--source-type", choices=SOURCE_TYPES, help="the kind of light source, for the cautions "
                        "(default: from the spectrum's provenance)")
    parser.add_argument("--identify", action="store_true", help="identify the species in the first spectrum and report it")
    parser.add_argument("--results", metavar="RESULT.json", help="a practical's result (JSON object) to show")
    parser.add_argument("--title", help="report title")
    parser.add_argument("--label", action="append", default=None, metavar="NAME", help="name of each spectrum (repeat; default: file names)")
    parser.add_argument("--force", action="store_true", help="overwrite an existing report")
    parser.set_defaults(handler=_run_report)


def _load_calibration(path) -> dict:
    from ..calfile import calibration_from_dict

    data = read_json_file(path, what="calibration file")
    if not isinstance(data, dict):
        raise FileFormatError(f"{path}: a calibration file must hold a JSON object")
    calibration_from_dict(data, origin=str(path))  # checked against its schema before use
    return data


def _run_report(args) -> int:
    from ..report import write_report

    out = Path(args.out)
    if out.exists() and not args.force:  # say so before any work
        from ..errors import ExportError

        raise ExportError(f"{out} already exists; pass --force to overwrite it, or choose another name")
    spectra = [read_spectrum(path) for path in args.spectra]
    labels = args.label or [Path(p).name for p in args.spectra]
    if len(labels) != len(spectra):
        raise InputError(f"--label given {len(labels)} time(s) for {len(spectra)} spectra; give one per spectrum or none")
    calibration = None
    if args.calibration:
        calibration = _load_calibration(args.calibration)
    else:
        recorded = spectra[0].provenance.get("calibration")
        if isinstance(recorded, dict) and recorded.get("path") and Path(recorded["path"]).is_file():
            try:
                calibration = _load_calibration(recorded["path"])
            except FileFormatError:
                calibration = None
    results = None
    if args.results:
        results = read_json_file(args.results, what="result file")
        if not isinstance(results, dict):
            raise FileFormatError(f"{args.results}: a result file must hold a JSON object")
    if args.identify:
        if results is not None:
            raise InputError("give --identify or --results, not both")
        from ..identify import identify

        identification = identify(spectra[0])
        results = identification.to_dict()
        print(f"identification: {identification.verdict}"
              + (f" ({', '.join(identification.symbols)})" if identification.symbols else ""))
    source_type = args.source_type or spectra[0].provenance.get("source_type")
    write_report(out, spectra, force=args.force, calibration=calibration, results=results,
                 source_type=source_type, title=args.title, labels=labels)
    print(f"wrote {out}")
    if source_type:
        print(format_cautions(source_type))
    return 0


# --------------------------------------------------------------------------- convert


def _register_convert(subparsers) -> None:
    parser = subparsers.add_parser(
        "convert",
        help="convert a spectrum file to another format (.csv, .json, .jdx/.dx, .png/.svg/.pdf)",
        description="Read a spectrum (benchspec CSV/JSON/JCAMP-DX, or plain two-column text from another "
        "instrument) and write it in the format given by the extension of OUT. The provenance is kept.",
    )
    parser.add_argument("input", metavar="IN", help="spectrum file to read")
    parser.add_argument("output", metavar="OUT", help=f"file to write ({', '.join(SPECTRUM_EXTENSIONS)})")
    parser.add_argument("--title", help="plot title or JCAMP-DX ##TITLE")
    parser.add_argument("--force", action="store_true", help="overwrite an existing OUT")
    parser.set_defaults(handler=_run_convert)


def _run_convert(args) -> int:
    spectrum = read_spectrum(args.input)
    path = write_spectrum(spectrum, args.output, force=args.force, title=args.title)
    print(f"wrote {path} ({spectrum.size} samples)")
    return 0


# --------------------------------------------------------------------------- session


def _register_session(subparsers) -> None:
    parser = subparsers.add_parser(
        "session",
        help="the capture log: new, add, list, show, export",
        description="A session folder keeps every capture (raw frames, spectrum, calibration, metadata) "
        "under a name that never collides; nothing in it is ever overwritten.",
    )
    actions = parser.add_subparsers(dest="session_action", metavar="ACTION")
    actions.required = True

    new = actions.add_parser("new", help="create a session folder")
    new.add_argument("folder", metavar="FOLDER")
    new.add_argument("--title", help="session title (default: the folder name)")
    new.set_defaults(handler=_run_session_new)

    add = actions.add_parser("add", help="log a capture (frames, spectrum, calibration, notes) in a session")
    add.add_argument("folder", metavar="FOLDER", help="session folder (created if missing)")
    add.add_argument("--spectrum", metavar="SPEC", help="spectrum file to keep with the capture")
    add.add_argument("--frame", action="append", default=[], metavar="FRAME", help="raw frame file (repeat)")
    add.add_argument("--dark", action="append", default=[], metavar="FRAME", help="dark frame file (repeat)")
    add.add_argument("--calibration", metavar="CAL.json", help="the calibration used")
    add.add_argument("--label", help="short name of the capture")
    add.add_argument("--source-type", choices=SOURCE_TYPES, help="kind of light source")
    add.add_argument("--note", help="operator's note")
    add.add_argument("--meta", action="append", default=[], metavar="KEY=VALUE", help="extra metadata (repeat; VALUE may be JSON)")
    add.set_defaults(handler=_run_session_add)

    listing = actions.add_parser("list", help="list the captures of a session (and any problems)")
    listing.add_argument("folder", metavar="FOLDER")
    listing.set_defaults(handler=_run_session_list)

    show = actions.add_parser("show", help="show one capture (default: the latest), checking its files")
    show.add_argument("folder", metavar="FOLDER")
    show.add_argument("capture", nargs="?", default="latest", metavar="CAPTURE", help="capture number (as session list shows it), id, unique prefix, or latest (the default)")
    show.add_argument("--json", action="store_true", help="print the capture manifest as JSON")
    show.set_defaults(handler=_run_session_show)

    export = actions.add_parser("export", help="write a capture's spectrum in any format")
    export.add_argument("folder", metavar="FOLDER")
    export.add_argument("capture", metavar="CAPTURE", help="capture number (as session list shows it), id, unique prefix, or latest")
    export.add_argument("--out", required=True, metavar="PATH", help=f"file to write ({', '.join(SPECTRUM_EXTENSIONS)})")
    export.add_argument("--force", action="store_true", help="overwrite an existing file")
    export.set_defaults(handler=_run_session_export)


def _run_session_new(args) -> int:
    from ..session import Session

    session = Session.create(args.folder, title=args.title)
    print(f"created session {session.path} ({session.title!r})")
    return 0


def _parse_meta(items) -> dict:
    meta = {}
    for item in items:
        key, sep, value = item.partition("=")
        if not sep or not key.strip():
            raise InputError(f"--meta {item!r}: write KEY=VALUE, e.g. exposure_ms=33")
        try:
            meta[key.strip()] = json.loads(value)
        except ValueError:
            meta[key.strip()] = value
    return meta


def _run_session_add(args) -> int:
    from ..session import log_capture

    spectrum = read_spectrum(args.spectrum) if args.spectrum else None
    if args.calibration:
        _load_calibration(args.calibration)  # refuse a file that is not a valid calibration before logging anything
    if spectrum is None and not args.frame:
        raise InputError("nothing to log: give --spectrum and/or --frame")
    metadata = _parse_meta(args.meta)
    if args.note:
        metadata["note"] = args.note
    if args.spectrum:
        metadata.setdefault("spectrum_file", str(args.spectrum))
    source_type = args.source_type or (spectrum.provenance.get("source_type") if spectrum is not None else None)
    record = log_capture(
        args.folder, spectrum=spectrum, frames=args.frame, dark_frames=args.dark, calibration=args.calibration,
        metadata=metadata, label=args.label or (Path(args.spectrum).stem if args.spectrum else "capture"),
        source_type=source_type,
    )
    print(f"logged capture {record.id} in {args.folder} ({len(record.files)} file(s))")
    return 0


def _run_session_list(args) -> int:
    from ..session import Session

    session = Session.open(args.folder)
    print("\n".join(session.summary_lines()))
    return 0


def _run_session_show(args) -> int:
    from ..session import Session

    session = Session.open(args.folder)
    capture = session.load_capture(args.capture, frames=False)
    record = capture.record
    if args.json:
        print(json.dumps({"id": record.id, "created_utc": record.created_utc, "label": record.label,
                          "source_type": record.source_type, "files": record.files, "metadata": record.metadata,
                          "view": record.view}, indent=1, ensure_ascii=False))
        return 0
    print(f"capture {record.id}: {record.label}, {record.created_utc}" + (f", source {record.source_type}" if record.source_type else ""))
    for name, info in record.files.items():
        print(f"  {name:<28} {info['role']:<12} sha256 {info['sha256']}  (checked)")
    if capture.spectrum is not None:
        s = capture.spectrum
        span = f"{s.wavelength_nm[0]:.2f}-{s.wavelength_nm[-1]:.2f} nm" if s.is_calibrated else f"pixels {s.pixel[0]:g}-{s.pixel[-1]:g}"
        print(f"  spectrum: {s.size} samples, {span}, {int(s.saturated.sum())} saturated")
    for key, value in record.metadata.items():
        print(f"  {key}: {value}")
    for problem in session.problems:
        print(f"  problem: {problem}")
    return 0


def _run_session_export(args) -> int:
    from ..session import Session

    session = Session.open(args.folder)
    capture = session.load_capture(args.capture, frames=False)
    if capture.spectrum is None:
        raise InputError(f"capture {capture.record.id} holds no spectrum (frames only); extract one from its frames first")
    path = write_spectrum(capture.spectrum, args.out, force=args.force, title=capture.record.label)
    print(f"wrote {path}")
    return 0
