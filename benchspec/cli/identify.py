"""``benchspec identify``: which gas (or mixture) made this spectrum.

Input: a calibrated spectrum file. The CSV that ``benchspec`` writes (optional
``#`` comment lines, then a header with at least ``wavelength_nm,intensity``;
``uncertainty``, ``saturated`` and ``wavelength_uncertainty_nm`` are used when
present), or another instrument's plain two-column CSV/text of wavelength
(nm, air) and intensity, at any sampling. JSON and JCAMP-DX exports are read
too (see :func:`benchspec.io.read_spectrum`).
"""

from __future__ import annotations

import argparse
import json
import sys

# identify (and scipy.signal behind it, ~1 s) is imported when the command runs: building the parser
# for any command must not pay for it

_NAMES = {
    "H": "hydrogen",
    "He": "helium",
    "Ne": "neon",
    "Ar": "argon",
    "Kr": "krypton",
    "Xe": "xenon",
    "Hg": "mercury",
    "Na": "sodium",
    "CFL-phosphor": "fluorescent-lamp phosphors (Tb3+/Eu3+)",
}


def register(subparsers) -> None:
    parser = subparsers.add_parser(
        "identify",
        help="identify the gas or mixture in a calibrated emission spectrum",
        description="Identify the species (and mixtures) that made a calibrated emission spectrum, against the "
        "packaged NIST ASD line library. Prints a table; --json prints one JSON object.",
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog="Input columns: wavelength_nm (air, nm, strictly increasing; samples outside 300-1100 nm are ignored) and intensity; optional "
        "uncertainty, saturated, wavelength_uncertainty_nm. A plain two-column wavelength,intensity file from "
        "another instrument works too, at any sampling.\n"
        "Verdicts: identified, mixture, uncertain, unknown (nothing in the library fits; never a guess).",
    )
    parser.add_argument("spectrum", metavar="SPEC.csv", help="calibrated spectrum (CSV, JSON, JCAMP-DX or plain text)")
    parser.add_argument("--json", action="store_true", help="print the result as JSON on stdout")
    parser.add_argument(
        "--species",
        metavar="H,He,...",
        help="candidate species, comma-separated (default: H,He,Ne,Ar,Kr,Xe,Hg,Na,CFL-phosphor)",
    )
    parser.add_argument("--fwhm", type=float, metavar="NM", dest="fwhm_nm", help="line width (FWHM, nm) if known; default: measured from the spectrum")
    parser.add_argument(
        "--max-shift", type=float, metavar="NM", dest="max_shift_nm",
        help="largest wavelength shift allowed (nm); default 3x the spectrum's calibration uncertainty, or 0.9 nm",
    )
    parser.set_defaults(handler=_run)


def _run(args) -> int:
    from ..identify import identify
    from ..io import read_spectrum

    spectrum = read_spectrum(args.spectrum)
    species = None
    if args.species is not None:
        species = [s.strip() for s in args.species.split(",") if s.strip()]
    result = identify(spectrum, species=species, fwhm_nm=args.fwhm_nm, max_shift_nm=args.max_shift_nm)
    if args.json:
        json.dump(result.to_dict(), sys.stdout)
        sys.stdout.write("\n")
    else:
        sys.stdout.write(format_result(result, title=str(args.spectrum)))
    return 0


def format_result(result: "IdentificationResult", *, title: str = "") -> str:
    """The result as a table for people."""
    out = []
    if title:
        out.append(f"spectrum: {title}")
    headline = result.verdict
    if result.verdict in ("identified", "mixture", "uncertain") and result.matches:
        names = " + ".join(f"{m.symbol} ({_NAMES.get(m.symbol, m.symbol)})" for m in _headline_matches(result))
        headline += f": {names}"
    out.append(f"verdict: {headline}")
    if result.fwhm_nm is not None:
        out.append(f"line width (FWHM) used: {result.fwhm_nm:.2f} nm; shift allowed: +-{result.max_shift_nm:.2f} nm; "
                   f"line flux explained: {result.explained_fraction:.0%}")
    if result.matches:
        out.append("")
        out.append(f"  {'species':<14}{'score':>7}{'flux':>7}{'present':>9}{'lines':>7}{'shift nm':>10}")
        for m in result.matches:
            out.append(f"  {m.symbol:<14}{m.score:>7.2f}{m.fraction:>7.0%}{m.presence:>9.0%}{len(m.lines):>7d}{m.shift_nm:>+10.2f}")
        for m in result.matches:
            out.append("")
            out.append(f"  {m.symbol}: observed nm -> NIST nm (residual nm)")
            for line in m.lines:
                blend = f"  blend of {line.blend}" if line.blend > 1 else ""
                out.append(f"    {line.observed_nm:9.2f} -> {line.reference_nm:9.3f} ({line.residual_nm:+.2f})  SNR {line.snr:.0f}{blend}")
            if m.weaker_nm:
                out.append("    seen, but far weaker than the NIST ratios predict: " + ", ".join(f"{w:.2f}" for w in m.weaker_nm))
            if m.missing_nm:
                out.append("    expected but missing: " + ", ".join(f"{w:.2f}" for w in m.missing_nm))
    if result.unexplained:
        out.append("")
        # every one of them (the note below counts them all), a few to a line
        items = [f"{l.wavelength_nm:.2f} nm (SNR {l.snr:.0f})" for l in result.unexplained]
        out.extend(_wrapped(items, first="  lines nothing explains: ", indent="    "))
    for note in result.notes:
        out.append(f"note: {note}")
    return "\n".join(out) + "\n"


def _wrapped(items, *, first: str, indent: str, width: int = 100) -> list[str]:
    """``items`` joined by commas on lines of at most ``width`` characters, never breaking inside an item."""
    rows, row = [], []
    for k, item in enumerate(items):
        piece = item + ("," if k < len(items) - 1 else "")
        start = indent if rows else first
        if row and len(start) + len(" ".join(row + [piece])) > width:
            rows.append(start + " ".join(row))
            row = []
        row.append(piece)
    rows.append((indent if rows else first) + " ".join(row))
    return rows


def _headline_matches(result: "IdentificationResult"):
    if result.verdict == "identified":
        return result.matches[:1]
    strong = [m for m in result.matches if m.score >= 0.6]
    return strong or result.matches[:1]
