"""The lab practicals on the command line: response, absorbance, concentration,
rydberg, metrics, daylight and plan.

Every command reads spectra (benchspec CSV/JSON/JCAMP-DX or plain two-column
text) or, where the frame pipeline is installed, camera frames with
``--calibration``; prints a short report (or ``--json``); writes results
atomically (``--out``, refusing to overwrite without ``--force``); and draws
its figure with ``--plot FILE.png|svg|pdf``.
"""

from __future__ import annotations

import dataclasses
import json
import math
import sys
from pathlib import Path

import numpy as np

from ..errors import AnalysisError, FileFormatError, InputError
from ..safety import SOURCE_TYPES, cautions_for

_FRAME_EXTENSIONS = (".png", ".jpg", ".jpeg", ".tif", ".tiff", ".bmp", ".webp", ".avi", ".mp4", ".mov", ".mkv")


# --------------------------------------------------------------------------- helpers



def _value_pm(value: float, sigma: float) -> str:
    """``value +- sigma`` with sigma to 2 significant digits and the value to the same decimal place."""
    import math

    if not (math.isfinite(value) and math.isfinite(sigma) and sigma > 0):
        return f"{value:.4g} +- {sigma:.2g}"
    decimals = 1 - math.floor(math.log10(sigma))
    if decimals > 12 or decimals < -6:
        return f"{value:.4g} +- {sigma:.2g}"
    if decimals <= 0:
        step = 10.0 ** (-decimals)
        return f"{round(value / step) * step:.0f} +- {round(sigma / step) * step:.0f}"
    return f"{value:.{decimals}f} +- {sigma:.{decimals}f}"

def _caution(source_type: str, *, because: str | None = None) -> None:
    """The first caution for the source, on stderr (stdout stays clean for --json).

    ``because`` says why this source's caution shows when the command was not told the source.
    """
    title, items = cautions_for(source_type)
    label = title if title[:2].isupper() else title[0].lower() + title[1:]  # "LED or UV LED" keeps its capitals
    label = label if because is None else f"{label}, {because}"
    print(f"caution ({label}): {items[0]} See `benchspec cautions {source_type}`.", file=sys.stderr)


def _told_source_type(spectrum) -> str | None:
    """The source type the spectrum was recorded with (provenance ``source_type``), if a known one."""
    told = (getattr(spectrum, "provenance", None) or {}).get("source_type")
    told = told.strip().lower() if isinstance(told, str) else None
    return told if told in SOURCE_TYPES else None


#: A line narrower than this is laser-like: the narrowest visible and UV LEDs are about 10 nm
#: wide (FWHM, from memory of LED data sheets), a laser's line is as narrow as the spectrometer
#: shows it (about 1-3 nm on a webcam bench). A coarser bench shows a laser under 3 samples wide,
#: which ``SourceMetrics.fwhm_resolution_limited`` flags.
_LASER_LIKE_FWHM_NM = 5.0


def _laser_like(metrics, spectrum) -> str | None:
    """Why the spectrum looks like a laser's (one narrow line holding most of the light), or None."""
    if metrics.is_white or metrics.fwhm_nm is None:
        return None
    narrow = metrics.fwhm_resolution_limited or metrics.fwhm_nm < _LASER_LIKE_FWHM_NM
    if not narrow:
        return None
    # most of the light in that one line: of the samples above 2% of the peak (the centroid's),
    # those within 2 FWHM of the peak hold the majority of the signal
    wl = spectrum.wavelength_nm
    y = np.where(np.isfinite(spectrum.intensity), spectrum.intensity, 0.0)
    above = y > 0.02 * float(np.max(y))
    near = above & (np.abs(wl - metrics.peak_nm) <= 2 * max(metrics.fwhm_nm, float(np.median(np.abs(np.diff(wl))))))
    if float(y[near].sum()) <= 0.5 * float(y[above].sum()):
        return None
    return f"inferred: the spectrum is one line {metrics.fwhm_nm:.1f} nm wide"


def _read_spectrum_file(path: str):
    from ..io import read_spectrum

    return read_spectrum(path)


def _is_frames(paths) -> bool:
    paths = [paths] if isinstance(paths, str) else list(paths or [])
    return any(Path(p).suffix.lower() in _FRAME_EXTENSIONS for p in paths)


def _load_inputs(paths, *, calibration: str | None, what: str, dark_frames=None):
    """One calibrated spectrum from spectrum files (one path) or frames (with --calibration).

    ``dark_frames`` (frame paths) are subtracted from the frames before extraction.
    """
    paths = [paths] if isinstance(paths, str) else list(paths)
    frames = [p for p in paths if Path(p).suffix.lower() in _FRAME_EXTENSIONS]
    if frames:
        if calibration is None:
            raise InputError(f"{what}: {frames[0]} is a camera frame; pass --calibration CAL.json to turn it into a spectrum")
        try:
            from ..pipeline import extract_frames
        except ImportError:
            raise InputError(
                f"{what}: reading camera frames needs benchspec.pipeline, which this installation lacks; "
                "extract the spectrum first and pass its .csv"
            ) from None
        if len(frames) != len(paths):
            raise InputError(f"{what}: give either frames or one spectrum file, not both")
        return extract_frames(frames, calibration, dark=list(dark_frames) if dark_frames else None)
    if len(paths) != 1:
        raise InputError(f"{what}: give one spectrum file (got {len(paths)}); stack frames with --calibration instead")
    spectrum = _read_spectrum_file(paths[0])
    if not spectrum.is_calibrated:
        raise InputError(f"{what}: {paths[0]} has no wavelength axis; calibrate it first (benchspec calibrate)")
    return spectrum


def _clean(value):
    """JSON-ready copy: dataclasses to dicts, arrays to lists, NaN/inf to null."""
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        from ..spectrum import Spectrum

        if isinstance(value, Spectrum):
            return None  # spectra are not repeated in reports
        return {f.name: _clean(getattr(value, f.name)) for f in dataclasses.fields(value)}
    if isinstance(value, dict):
        return {str(k): _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    if isinstance(value, np.ndarray):
        return [_clean(v) for v in value.tolist()]
    if isinstance(value, (np.bool_, bool)):
        return bool(value)
    if isinstance(value, (np.integer, int)):
        return int(value)
    if isinstance(value, (np.floating, float)):
        return float(value) if math.isfinite(value) else None
    return value


def _print_json(obj) -> None:
    print(json.dumps(_clean(obj), indent=1, allow_nan=False))


def _save_plot(figure, path, args, *, title=None, provenance=None) -> None:
    from ..analysis.plots import save_analysis_figure

    save_analysis_figure(figure, path, force=args.force, title=title, provenance=provenance)
    print(f"wrote {path}", file=sys.stderr)


def _add_common(parser, *, out_help: str | None = None) -> None:
    parser.add_argument("--json", action="store_true", help="print the result as JSON on stdout")
    parser.add_argument("--plot", metavar="FILE", help="draw the result (.png, .svg or .pdf)")
    if out_help:
        parser.add_argument("--out", metavar="FILE", help=out_help)
    parser.add_argument("--force", action="store_true", help="overwrite existing output files")


def _check_outputs(args) -> None:
    """Refuse existing output files before any work, so nothing is half-written (without --force)."""
    if getattr(args, "force", False):
        return
    for name in ("out", "plot"):
        path = getattr(args, name, None)
        if path and Path(path).exists():
            raise InputError(f"{path} already exists; pass --force to overwrite it, or choose another name")


def _fmt(value, spec=".2f", unit=""):
    if value is None:
        return "n/a"
    return f"{value:{spec}}{unit}"


# --------------------------------------------------------------------------- register


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "response",
        help="instrument's relative spectral response from a halogen lamp (Planck) or daylight",
        description="Compute the relative spectral response from a lamp of known colour temperature "
        "(Planck) or from daylight (rough), and save it as RESP.json.",
    )
    p.add_argument("lamp", nargs="+", metavar="LAMP", help="lamp spectrum (.csv/.json/.jdx) or frames (with --calibration)")
    source = p.add_mutually_exclusive_group(required=True)
    source.add_argument("--temperature", type=float, metavar="K", help="lamp colour temperature in kelvin (halogen ~2800-3200)")
    source.add_argument("--daylight", action="store_true", help="the lamp is daylight from a white card (rough; CIE D65 reference)")
    p.add_argument("--calibration", metavar="CAL.json", help="wavelength calibration for frames")
    p.add_argument("--dark", nargs="+", metavar="DARK", help="dark frames, subtracted before extraction (with frames)")
    p.add_argument("--smoothing", type=float, metavar="NM", help="smoothing window in nm (default 10, daylight 30)")
    p.add_argument("--min-signal", type=float, default=0.05, metavar="FRACTION",
                   help="samples below this fraction of the peak are invalid (default 0.05)")
    _add_common(p, out_help="response file to write (RESP.json)")
    p.set_defaults(handler=_run_response)

    p = subparsers.add_parser(
        "absorbance",
        help="transmittance and absorbance of a sample against a blank",
        description="A = -log10((S - D) / (R - D)) with propagated uncertainty; warns where stray light or "
        "noise limit the reading.",
    )
    p.add_argument("sample", nargs="+", metavar="SAMPLE", help="sample spectrum or frames")
    p.add_argument("--blank", nargs="+", required=True, metavar="BLANK", help="blank (solvent) spectrum or frames")
    p.add_argument("--dark", nargs="+", metavar="DARK", help="dark spectrum or frames (omit if already subtracted)")
    p.add_argument("--calibration", metavar="CAL.json", help="wavelength calibration for frames")
    p.add_argument("--stray-light", type=float, metavar="FRACTION",
                   help="stray light as a fraction of the blank's peak (default: measured, else 0.002)")
    _add_common(p, out_help="CSV to write: wavelength_nm,absorbance,uncertainty,transmittance,...")
    p.set_defaults(handler=_run_absorbance)

    p = subparsers.add_parser(
        "concentration",
        help="Beer-Lambert calibration from standards and the concentration of unknowns",
        description="Fit A = a + b c to standards at one wavelength or band, then read unknowns off the line. "
        "Standards and unknowns are spectra measured against --blank, or absorbance values from --table.",
        epilog="Example: benchspec concentration --blank water.csv --standard s1.csv=0.02 --standard s2.csv=0.04 "
        "--standard s3.csv=0.06 --unknown tea=u1.csv --band 500 540 --unit g/L",
    )
    p.add_argument("--standard", action="append", default=[], metavar="FILE=CONC",
                   help="a standard's spectrum and its concentration (repeat, at least 2)")
    p.add_argument("--table", metavar="CSV", help="standards as a table: concentration,absorbance[,uncertainty]")
    p.add_argument("--unknown", action="append", default=[], metavar="[LABEL=]FILE",
                   help="an unknown's spectrum (repeat)")
    p.add_argument("--unknown-absorbance", action="append", default=[], type=float, metavar="A",
                   help="an unknown's absorbance, measured elsewhere (repeat)")
    p.add_argument("--blank", metavar="BLANK", help="blank spectrum or frame (needed with spectra)")
    p.add_argument("--dark", metavar="DARK", help="dark spectrum or frame (omit if already subtracted)")
    p.add_argument("--calibration", metavar="CAL.json", help="wavelength calibration, when standards are frames")
    where = p.add_mutually_exclusive_group()
    where.add_argument("--wavelength", type=float, metavar="NM", help="read absorbance at this wavelength")
    where.add_argument("--band", type=float, nargs=2, metavar=("LOW", "HIGH"), help="average absorbance over this band (nm)")
    p.add_argument("--unit", default="", metavar="UNIT", help="concentration unit label, e.g. mol/L or mg/L")
    p.add_argument("--path-length", type=float, metavar="CM", help="cuvette path length in cm: also report epsilon")
    p.add_argument("--through-origin", action="store_true", help="fit A = b c without an intercept")
    p.add_argument("--replicates", type=int, default=1, metavar="N", help="unknowns are the mean of N readings (default 1)")
    _add_common(p)
    p.set_defaults(handler=_run_concentration)

    p = subparsers.add_parser(
        "rydberg",
        help="Balmer lines of hydrogen to the Rydberg constant, compared with CODATA",
        description="Find the Balmer lines, convert to vacuum (Edlén 1966), fit 1/lambda = R_H (1/4 - 1/n^2).",
    )
    p.add_argument("spectrum", nargs="+", metavar="SPEC", help="hydrogen spectrum (or frames with --calibration)")
    p.add_argument("--calibration", metavar="CAL.json", help="wavelength calibration for frames")
    p.add_argument("--min-snr", type=float, default=5.0, help="smallest line SNR that counts (default 5)")
    _add_common(p)
    p.set_defaults(handler=_run_rydberg)

    p = subparsers.add_parser(
        "metrics",
        help="peak, centroid, FWHM, dominant wavelength, chromaticity, CCT/Duv of LEDs, lasers and lamps",
        description="Source figures. Dominant wavelength is against the equal-energy white E. Correct the "
        "spectrum with --response first for meaningful colour figures.",
    )
    p.add_argument("spectrum", nargs="+", metavar="SPEC", help="source spectrum (or frames with --calibration)")
    p.add_argument("--calibration", metavar="CAL.json", help="wavelength calibration for frames")
    p.add_argument("--response", metavar="RESP.json", help="apply this response before measuring")
    kind = p.add_mutually_exclusive_group()
    kind.add_argument("--white", action="store_true", help="the source is white: CCT and Duv are required")
    kind.add_argument("--coloured", action="store_true", help="the source is coloured: no CCT")
    p.add_argument("--laser", metavar="KEY", help="compare with a known laser (see calibration/lasers.csv), e.g. dpss-green")
    p.add_argument("--nominal", type=float, metavar="NM", help="laser's nominal wavelength (with --tolerance)")
    p.add_argument("--tolerance", type=float, metavar="NM", help="laser's tolerance in nm")
    p.add_argument("--cct-method", choices=("Ohno 2013", "Robertson 1968"), default="Ohno 2013")
    _add_common(p)
    p.set_defaults(handler=_run_metrics)

    p = subparsers.add_parser(
        "daylight",
        help="dark lines of daylight: Fraunhofer lines and telluric O2/H2O bands, labelled",
        description="Continuum-normalise a daylight spectrum, find its absorption lines and label them. "
        "Never point optics at the Sun: use light scattered from a white card or the sky.",
    )
    p.add_argument("spectrum", nargs="+", metavar="SPEC", help="daylight spectrum (or frames with --calibration)")
    p.add_argument("--calibration", metavar="CAL.json", help="wavelength calibration for frames")
    p.add_argument("--tolerance", type=float, metavar="NM", help="matching tolerance (default max(1.5 nm, 2 samples))")
    p.add_argument("--min-depth", type=float, default=0.03, help="smallest depth below the continuum (default 0.03)")
    p.add_argument("--all", action="store_true", help="also list dips that match no reference line")
    _add_common(p)
    p.set_defaults(handler=_run_daylight)

    p = subparsers.add_parser(
        "plan",
        help="predict where the spectrum lands on the sensor, nm/px, resolution and order overlap",
        description="Pinhole camera behind a transmission grating: x = cx + f tan(beta - tilt).",
    )
    p.add_argument("--lines-per-mm", type=float, required=True, help="grating groove density")
    p.add_argument("--width-px", type=int, required=True, help="sensor width along the dispersion (px)")
    p.add_argument("--hfov", type=float, required=True, metavar="DEG", help="camera's horizontal field of view (deg)")
    p.add_argument("--tilt", type=float, metavar="DEG", help="camera tilt from the grating normal (default: centre the range)")
    p.add_argument("--slit-width", type=float, metavar="MM", help="slit width (mm)")
    p.add_argument("--slit-distance", type=float, metavar="MM", help="slit-to-grating distance (mm)")
    p.add_argument("--illuminated-width", type=float, default=3.0, metavar="MM",
                   help="width of grating used, about the lens aperture (default 3 mm)")
    p.add_argument("--range", type=float, nargs=2, default=(380.0, 750.0), metavar=("LOW", "HIGH"),
                   help="wavelength range to place (default 380 750)")
    p.add_argument("--order", type=int, default=1, help="diffraction order (default 1)")
    p.add_argument("--shortest", type=float, default=380.0, metavar="NM",
                   help="shortest wavelength reaching the sensor, for the 2nd-order overlap (default 380)")
    _add_common(p)
    p.set_defaults(handler=_run_plan)


# --------------------------------------------------------------------------- handlers


def _run_response(args) -> int:
    _check_outputs(args)
    from ..analysis.response import compute_response, save_response

    _caution("daylight" if args.daylight else "halogen")
    lamp = _load_inputs(args.lamp, calibration=args.calibration, what="lamp", dark_frames=args.dark)
    response = compute_response(
        lamp,
        reference="daylight" if args.daylight else "planck",
        temperature_k=args.temperature,
        smoothing_nm=args.smoothing,
        min_signal_fraction=args.min_signal,
    )
    if args.out:
        save_response(response, args.out, force=args.force)
        print(f"wrote {args.out}", file=sys.stderr)
    if args.plot:
        from ..analysis.plots import response_figure

        _save_plot(response_figure(response, lamp=lamp), args.plot, args)
    valid = response.valid
    rel = response.uncertainty[valid] / response.relative_response[valid]
    summary = {
        "reference": response.reference,
        "temperature_k": response.temperature_k,
        "valid_range_nm": response.valid_range_nm,
        "valid_samples": int(np.count_nonzero(valid)),
        "median_relative_uncertainty": float(np.median(rel)),
        "peak_response_nm": float(response.wavelength_nm[valid][np.argmax(response.relative_response[valid])]),
        "out": args.out,
    }
    if args.json:
        _print_json(summary)
    else:
        print(
            f"response ({response.reference}{'' if response.temperature_k is None else f' {response.temperature_k:.0f} K'}): "
            f"valid {summary['valid_range_nm'][0]:.1f}-{summary['valid_range_nm'][1]:.1f} nm, "
            f"peak at {summary['peak_response_nm']:.1f} nm, median uncertainty {100 * summary['median_relative_uncertainty']:.2f}%"
        )
    return 0


def _run_absorbance(args) -> int:
    _check_outputs(args)
    from ..analysis.absorbance import absorbance_spectrum
    from ..io import build_provenance, write_table

    # Dark frames are subtracted from frames before extraction; a dark spectrum is subtracted here.
    dark_frames = args.dark if args.dark and _is_frames(args.dark) else None
    sample = _load_inputs(args.sample, calibration=args.calibration, what="sample", dark_frames=dark_frames)
    blank = _load_inputs(args.blank, calibration=args.calibration, what="blank", dark_frames=dark_frames)
    dark = _load_inputs(args.dark, calibration=None, what="dark") if args.dark and not dark_frames else None
    result = absorbance_spectrum(sample, blank=blank, dark=dark, stray_light_fraction=args.stray_light)
    rows = np.isfinite(result.absorbance) & np.isfinite(result.absorbance_uncertainty)
    if args.out:
        provenance = build_provenance(
            quantity="absorbance",
            intensity_unit="absorbance",
            calibration=args.calibration,
            source_type="halogen",
            extra={
                "absorbance": {
                    "sample": [str(p) for p in args.sample],
                    "blank": [str(p) for p in args.blank],
                    "dark": None if not args.dark else [str(p) for p in args.dark],
                    "stray_light_fraction": result.stray_light_fraction,
                    "stray_light_source": result.stray_light_source,
                }
            },
        )
        write_table(
            args.out,
            {
                "wavelength_nm": result.wavelength_nm[rows],
                "absorbance": result.absorbance[rows],
                "uncertainty": result.absorbance_uncertainty[rows],
                "transmittance": result.transmittance[rows],
                "transmittance_uncertainty": result.transmittance_uncertainty[rows],
                "max_measurable_absorbance": result.max_measurable_absorbance[rows],
                "beyond_measurable": result.beyond_measurable[rows],
            },
            comments=("absorbance A = -log10((S - D) / (R - D)); uncertainty is 1 sigma",),
            provenance=provenance,
            force=args.force,
        )
        print(f"wrote {args.out}", file=sys.stderr)
    if args.plot:
        from ..analysis.plots import absorbance_figure

        _save_plot(absorbance_figure(result), args.plot, args)
    a = result.absorbance[rows]
    peak_index = int(np.argmax(a)) if a.size else None
    summary = {
        "valid_samples": int(np.count_nonzero(rows)),
        "samples_beyond_measurable": int(np.count_nonzero(result.beyond_measurable)),
        "max_measurable_absorbance": result.peak_max_measurable_absorbance,
        "stray_light_fraction": result.stray_light_fraction,
        "stray_light_source": result.stray_light_source,
        "peak_absorbance": None if peak_index is None else float(a[peak_index]),
        "peak_wavelength_nm": None if peak_index is None else float(result.wavelength_nm[rows][peak_index]),
        "out": args.out,
    }
    if args.json:
        summary["wavelength_nm"] = result.wavelength_nm[rows]
        summary["absorbance"] = a
        summary["uncertainty"] = result.absorbance_uncertainty[rows]
        _print_json(summary)
    else:
        print(
            f"absorbance: {summary['valid_samples']} valid samples; peak A = {_fmt(summary['peak_absorbance'], '.3f')} "
            f"at {_fmt(summary['peak_wavelength_nm'], '.1f', ' nm')}; this setup measures up to A = "
            f"{summary['max_measurable_absorbance']:.2f} (stray light {100 * result.stray_light_fraction:.2f}%, "
            f"{result.stray_light_source})"
        )
    return 0


def _band_absorbance(result, args):
    from ..analysis.absorbance import band_absorbance

    if args.wavelength is not None:
        return band_absorbance(result, wavelength_nm=args.wavelength)
    if args.band is not None:
        return band_absorbance(result, band_nm=tuple(args.band))
    raise InputError("give --wavelength NM or --band LOW HIGH: where to read the absorbance")


def _run_concentration(args) -> int:
    _check_outputs(args)
    from ..analysis.absorbance import absorbance_spectrum, fit_beer_lambert, molar_absorptivity, predict_concentration

    concentrations, absorbances, sigmas, labels = [], [], [], []
    if args.table:
        from ..io import read_table

        table = read_table(args.table, required=("concentration", "absorbance"))
        for name in ("concentration", "absorbance", "uncertainty"):
            if name in table.columns and table[name].dtype.kind != "f":
                raise FileFormatError(f"{args.table}: column `{name}` holds text; it must hold numbers only")
        concentrations += [float(v) for v in table["concentration"]]
        absorbances += [float(v) for v in table["absorbance"]]
        if "uncertainty" in table.columns:
            sigmas += [float(v) for v in table["uncertainty"]]
        else:
            sigmas += [None] * len(table["concentration"])
        labels += [f"table row {i + 1}" for i in range(len(table["concentration"]))]
    needs_spectra = bool(args.standard or args.unknown)
    blank = dark = dark_frames = None
    if needs_spectra:
        if not args.blank:
            raise InputError("spectra of standards or unknowns need --blank BLANK (the solvent in the same cuvette)")
        dark_frames = [args.dark] if args.dark and _is_frames(args.dark) else None
        blank = _load_inputs(args.blank, calibration=args.calibration, what="blank", dark_frames=dark_frames)
        dark = _load_inputs(args.dark, calibration=None, what="dark") if args.dark and not dark_frames else None
    for item in args.standard:
        path, sep, conc_text = item.rpartition("=")
        if not sep or not path:
            raise InputError(f"--standard {item!r}: write FILE=CONCENTRATION, e.g. std1.csv=0.02")
        try:
            conc = float(conc_text)
        except ValueError:
            raise InputError(f"--standard {item!r}: concentration {conc_text!r} is not a number") from None
        standard = _load_inputs(path, calibration=args.calibration, what=f"standard {path}", dark_frames=dark_frames)
        result = absorbance_spectrum(standard, blank=blank, dark=dark)
        reading = _band_absorbance(result, args)
        concentrations.append(conc)
        absorbances.append(reading.absorbance)
        sigmas.append(reading.absorbance_uncertainty)
        labels.append(path)
    if len(concentrations) < 2:
        raise AnalysisError(
            f"a Beer-Lambert calibration needs at least 2 standards, got {len(concentrations)}; "
            "add --standard FILE=CONC (or --table) for each"
        )
    known = [s for s in sigmas if s is not None]
    fit = fit_beer_lambert(
        concentrations,
        absorbances,
        absorbance_uncertainties=known if len(known) == len(sigmas) else None,
        through_origin=args.through_origin,
        concentration_unit=args.unit,
    )
    unknowns = []
    for item in args.unknown:
        label, sep, path = item.partition("=")
        if not sep:
            label, path = Path(item).stem, item
        unknown = _load_inputs(path, calibration=args.calibration, what=f"unknown {path}", dark_frames=dark_frames)
        result = absorbance_spectrum(unknown, blank=blank, dark=dark)
        reading = _band_absorbance(result, args)
        unknowns.append(
            predict_concentration(fit, reading.absorbance, absorbance_uncertainty=reading.absorbance_uncertainty,
                                  replicates=args.replicates, label=label)
        )
    for i, value in enumerate(args.unknown_absorbance):
        unknowns.append(predict_concentration(fit, value, replicates=args.replicates, label=f"absorbance {value:g}"))
    epsilon = None
    if args.path_length is not None:
        value, err = molar_absorptivity(fit, path_length_cm=args.path_length)
        epsilon = {"epsilon_per_concentration_per_cm": value, "uncertainty": err, "path_length_cm": args.path_length}
    if args.plot:
        from ..analysis.plots import beer_lambert_figure

        have = all(s is not None for s in sigmas)
        _save_plot(beer_lambert_figure(fit, unknowns=unknowns, absorbance_uncertainties=sigmas if have else None), args.plot, args)
    report = {
        "where": {"wavelength_nm": args.wavelength, "band_nm": args.band},
        "standards": [{"label": l, "concentration": c, "absorbance": a, "uncertainty": s}
                      for l, c, a, s in zip(labels, concentrations, absorbances, sigmas)],
        "fit": fit,
        "limit_of_detection_method": "ICH Q2(R1): 3.3 sigma / slope, sigma = residual standard deviation",
        "epsilon": epsilon,
        "unknowns": unknowns,
    }
    if args.json:
        _print_json(report)
        return 0
    unit = f" {args.unit}" if args.unit else ""
    print(
        f"Beer-Lambert: A = ({fit.intercept:.4f} +- {fit.intercept_uncertainty:.4f}) + "
        f"({_value_pm(fit.slope_per_concentration, fit.slope_uncertainty)}) c; R^2 = {fit.r_squared:.5f}; "
        f"{len(concentrations)} standards"
    )
    print(f"limit of detection (ICH, 3.3 s/slope): {fit.limit_of_detection:.3g}{unit}; "
          f"limit of quantitation (10 s/slope): {fit.limit_of_quantitation:.3g}{unit}")
    if epsilon:
        print(f"epsilon = {_value_pm(epsilon['epsilon_per_concentration_per_cm'], epsilon['uncertainty'])} per{unit} per cm")
    for u in unknowns:
        flags = []
        if u.below_limit_of_detection:
            flags.append("below the limit of detection")
        if u.outside_calibration_range:
            flags.append("outside the standards' range")
        print(f"{u.label}: c = {_value_pm(u.concentration, u.concentration_uncertainty)}{unit} (A = {u.absorbance:.4f})"
              + (f" [{'; '.join(flags)}]" if flags else ""))
    return 0


def _run_rydberg(args) -> int:
    _check_outputs(args)
    from ..analysis.rydberg import rydberg_from_spectrum

    spectrum = _load_inputs(args.spectrum, calibration=args.calibration, what="spectrum")
    told = _told_source_type(spectrum)
    # The practical uses a hydrogen tube; the caution says so rather than that this spectrum is one.
    if told:
        _caution(told, because="as recorded with the spectrum")
    else:
        _caution("discharge", because="the hydrogen source of this practical")
    # The lines are fitted as independent even when the calibration is at hand: generalised least
    # squares on the calibration's covariance (with its model-averaging term) gives R_H values as close
    # to CODATA as the independent fit (RMS 980 against 973 /m over 47 redrawn virtual-bench setups,
    # benchmark practicals; 2.6x further before that term), so it has not earned the switch yet. The
    # API offers it (rydberg_from_spectrum(calibration=...)).
    result = rydberg_from_spectrum(spectrum, min_snr=args.min_snr)
    if args.plot:
        from ..analysis.plots import rydberg_figure

        _save_plot(rydberg_figure(result, spectrum=spectrum), args.plot, args)
    if args.json:
        _print_json(result)
        return 0
    print(f"R_H = {result.rydberg_per_m:.1f} +- {result.uncertainty_per_m:.1f} /m from {len(result.lines)} Balmer lines "
          f"(vacuum wavelengths by {result.air_to_vacuum})")
    print(f"CODATA R_inf/(1 + m_e/m_p) = {result.codata_rydberg_per_m:.3f} /m; difference {result.difference_per_m:+.1f} /m "
          f"= {result.difference_sigma:+.2f} sigma ({1e6 * result.relative_difference:+.0f} ppm); "
          f"chi^2 = {result.chi2:.2f} for {result.degrees_of_freedom} dof")
    for line in result.lines:
        print(f"  {line.name:10s} n={line.upper_level}->2  air {line.air_wavelength_nm:.3f} +- {line.wavelength_uncertainty_nm:.3f} nm  "
              f"vacuum {line.vacuum_wavelength_nm:.3f} nm  residual {line.residual_nm:+.3f} nm")
    for line in result.left_out:
        print(f"  {line.name:10s} left out: air {line.air_wavelength_nm:.3f} +- {line.wavelength_uncertainty_nm:.3f} nm, "
              f"{line.residual_nm:+.3f} nm from the fitted series (not taken as {line.name})")
    return 0


def _find_laser(key: str):
    from ..refdata import load_lasers

    lasers = load_lasers()
    for laser in lasers:
        if laser.key == key:
            return laser
    raise InputError(f"unknown laser {key!r}; choose one of: {', '.join(l.key for l in lasers)}")


def _small(sigma: float) -> str:
    """A chromaticity's 1-sigma to 4 decimals, and "<0.0001" rather than a misleading 0.0000."""
    return "<0.0001" if 0 <= sigma < 0.00005 else f"{sigma:.4f}"


def _run_metrics(args) -> int:
    _check_outputs(args)
    from ..analysis.metrics import source_metrics
    from ..analysis.response import apply_response, load_response

    nominal, tolerance, label = args.nominal, args.tolerance, ""
    if args.laser:
        if nominal is not None:
            raise InputError("give --laser KEY or --nominal NM --tolerance NM, not both")
        laser = _find_laser(args.laser)
        nominal, tolerance, label = laser.nominal_nm, laser.tolerance_nm, laser.name
    if (nominal is None) != (tolerance is None):
        raise InputError("--nominal and --tolerance go together: give the laser's nominal wavelength and its tolerance")
    spectrum = _load_inputs(args.spectrum, calibration=args.calibration, what="spectrum")
    # The caution follows what the command is told (--laser/--nominal, the spectrum's recorded
    # source type), else what the spectrum shows: one narrow line is a laser's, anything else gets the LED one.
    told = "laser" if nominal is not None else _told_source_type(spectrum)
    if told:
        _caution(told, because=None if nominal is not None else "as recorded with the spectrum")
    if args.response:
        spectrum = apply_response(spectrum, load_response(args.response))
    white = True if args.white else (False if args.coloured else None)
    try:
        metrics = source_metrics(spectrum, white=white, cct_method=args.cct_method, laser_nominal_nm=nominal,
                                 laser_tolerance_nm=tolerance, laser_label=label)
    except AnalysisError:
        if not told:
            print("caution: lasers and bright LEDs can harm the eyes; see `benchspec cautions laser` and "
                  "`benchspec cautions led`.", file=sys.stderr)
        raise
    if not told:
        laser_like = _laser_like(metrics, spectrum)
        if laser_like:
            _caution("laser", because=laser_like)
        else:
            _caution("led", because="the default: no single narrow line, as a laser would give")
    if args.plot:
        from ..analysis.plots import metrics_figure

        _save_plot(metrics_figure(metrics, spectrum), args.plot, args)
    if args.json:
        report = _clean(metrics)
        report["response_applied"] = bool(args.response)
        _print_json(report)
        return 0
    print(f"peak {metrics.peak_nm:.2f} +- {metrics.peak_uncertainty_nm:.2f} nm; centroid {metrics.centroid_nm:.2f} +- "
          f"{metrics.centroid_uncertainty_nm:.2f} nm; FWHM {_fmt(metrics.fwhm_nm, '.2f', ' nm')}"
          + (" (resolution-limited)" if metrics.fwhm_resolution_limited else ""))
    print(f"CIE 1931 x = {metrics.cie_x:.4f} +- {_small(metrics.cie_x_uncertainty)}, "
          f"y = {metrics.cie_y:.4f} +- {_small(metrics.cie_y_uncertainty)}")
    if metrics.is_white:
        print(f"white source: CCT {metrics.cct_k:.0f} +- {metrics.cct_uncertainty_k:.0f} K, Duv {metrics.duv:+.4f} ({metrics.cct_method})")
    elif metrics.dominant_wavelength_nm is not None:
        kind = "complementary" if metrics.complementary_wavelength else "dominant"
        print(f"{kind} wavelength (vs E) {metrics.dominant_wavelength_nm:.1f} nm, purity {100 * metrics.excitation_purity:.0f}%")
    if not args.response:
        print("note: no --response applied; colour figures include the camera's spectral response", file=sys.stderr)
    if metrics.laser is not None:
        laser = metrics.laser
        verdict = "within" if laser.within_tolerance else "OUTSIDE"
        print(f"laser {laser.label or ''}: {laser.measured_nm:.2f} +- {laser.measured_uncertainty_nm:.2f} nm vs nominal "
              f"{laser.nominal_nm:.2f} +- {laser.tolerance_nm:g} nm: offset {laser.offset_nm:+.2f} nm, {verdict} tolerance")
    return 0


def _run_daylight(args) -> int:
    _check_outputs(args)
    from ..analysis.daylight import identify_daylight_lines

    _caution("daylight")
    spectrum = _load_inputs(args.spectrum, calibration=args.calibration, what="spectrum")
    result = identify_daylight_lines(spectrum, tolerance_nm=args.tolerance, min_depth=args.min_depth)
    lines = result.lines if args.all else result.identified
    if args.plot:
        from ..analysis.plots import daylight_figure

        _save_plot(daylight_figure(result), args.plot, args)
    if args.json:
        _print_json({"lines": lines, "tolerance_nm": result.tolerance_nm, "missing_labels": result.missing_labels,
                     "dips_found": len(result.lines)})
        return 0
    print(f"{len(result.identified)} labelled lines of {len(result.lines)} dips found (tolerance {result.tolerance_nm:.2f} nm)")
    for line in lines:
        where = "our atmosphere" if line.atmospheric else ("Sun" if line.label else "")
        print(f"  {line.wavelength_nm:8.2f} +- {line.uncertainty_nm:.2f} nm  depth {line.depth:.2f}  "
              f"{line.label or '?':7s} {line.species or 'unidentified':22s} {where}")
    if result.missing_labels:
        print(f"not found: {', '.join(result.missing_labels)}")
    return 0


def _run_plan(args) -> int:
    _check_outputs(args)
    from ..analysis.planner import dispersion_hint, plan_setup

    plan = plan_setup(
        lines_per_mm=args.lines_per_mm,
        image_width_px=args.width_px,
        horizontal_fov_deg=args.hfov,
        tilt_deg=args.tilt,
        slit_width_mm=args.slit_width,
        slit_distance_mm=args.slit_distance,
        illuminated_width_mm=args.illuminated_width,
        range_nm=tuple(args.range),
        order=args.order,
        shortest_detected_nm=args.shortest,
    )
    if args.plot:
        from ..analysis.plots import plan_figure

        _save_plot(plan_figure(plan), args.plot, args)
    report = {k: v for k, v in _clean(plan).items() if k not in ("column_px", "wavelength_nm", "dispersion_nm_per_px")}
    try:
        report["calibration_hint_nm_per_px"] = list(dispersion_hint(plan))
    except InputError:
        report["calibration_hint_nm_per_px"] = None
    if args.json:
        _print_json(report)
        return 0
    low, high = plan.range_nm
    cols = plan.range_columns_px
    print(f"grating {plan.lines_per_mm:g} lines/mm, order {plan.order}; camera {plan.image_width_px} px, HFOV {plan.horizontal_fov_deg:g} deg, "
          f"f = {plan.focal_length_px:.0f} px, tilt {plan.tilt_deg:.2f} deg (centring tilt {plan.centring_tilt_deg:.2f} deg)")
    print(f"{low:.0f} nm at column {_fmt(cols[0], '.0f')}, {high:.0f} nm at column {_fmt(cols[1], '.0f')}"
          + ("" if plan.range_on_sensor else "  [range does not fit on the sensor at this tilt]"))
    if plan.visible_range_nm:
        print(f"visible light on the sensor: {plan.visible_range_nm[0]:.0f}-{plan.visible_range_nm[1]:.0f} nm")
    if plan.dispersion_range_nm_per_px:
        print(f"dispersion {plan.dispersion_range_nm_per_px[0]:.3f}-{plan.dispersion_range_nm_per_px[1]:.3f} nm/px over the range")
    slit = _fmt(plan.slit_resolution_nm, ".2f", " nm")
    print(f"resolution at {plan.reference_nm:.0f} nm: slit {slit}, pixels {plan.pixel_resolution_nm:.2f} nm, grooves "
          f"{plan.groove_resolution_nm:.3f} nm (R = mN = {plan.resolving_power:.0f}); overall {plan.resolution_nm:.2f} nm, "
          f"limited by {plan.limited_by}")
    overlap = (f"on the sensor from column {plan.second_order_start_column_px:.0f}" if plan.second_order_on_sensor
               else "not on the sensor")
    print(f"second order of {plan.shortest_detected_nm:.0f} nm overlaps first order from {plan.second_order_overlap_from_nm:.0f} nm: {overlap}")
    return 0
