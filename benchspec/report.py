"""A one-page PDF lab report: spectrum, calibration residuals, result, cautions, provenance.

For a student to hand in or a technician to file. The page (A4 portrait) holds,
top to bottom:

* a title line and a subtitle (time, software version, source type);
* the spectrum (or several overlaid) with labelled lines;
* the wavelength-calibration residuals (when a calibration is given);
* the result: an identification (``IdentificationResult.to_dict()``) or any
  practical's result mapping, as readable lines;
* the safety cautions for the source type (:mod:`benchspec.safety`);
* the provenance of every spectrum: frames and their SHA-256, the
  calibration with its RMS and line-list source, the response correction,
  the settings, the software version and the time.

Text is embedded as TrueType (``pdf.fonttype`` 42), so the PDF can be searched
and its text extracted (e.g. with ``pdftotext``).
"""

from __future__ import annotations

import datetime as _dt
import json
import textwrap
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np
from matplotlib import rc_context
from matplotlib.figure import Figure

from . import __version__
from .errors import InputError
from .plots import STYLE, _draw_spectra, _fit_line_labels, normalise_residuals, plot_residuals
from .safety import GENERAL_CAUTION, SOURCE_TYPES, cautions_for
from .spectrum import Spectrum

__all__ = ["A4_PORTRAIT_IN", "build_report", "write_report", "result_lines", "provenance_lines", "lines_from_results"]

A4_PORTRAIT_IN = (8.27, 11.69)

_MONO = "DejaVu Sans Mono"


def _as_mapping(value, name: str) -> dict | None:
    if value is None:
        return None
    if hasattr(value, "to_dict") and not isinstance(value, Mapping):
        value = value.to_dict()
    if not isinstance(value, Mapping):
        raise InputError(f"`{name}` must be a mapping (or have to_dict()), got {type(value).__name__}")
    return dict(value)


def _number(value: Any) -> str:
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        value = float(value)
        if value == 0 or 1e-3 <= abs(value) < 1e6:
            return f"{value:.6g}"
        return f"{value:.4e}"
    return str(value)


def lines_from_results(results: Mapping[str, Any] | None) -> list[dict]:
    """Lines to label from an identification result dict (each matched line with its species)."""
    out = []
    if not results:
        return out
    for match in results.get("matches", []) or []:
        if not isinstance(match, Mapping):
            continue
        symbol = match.get("symbol", "")
        for line in match.get("lines", []) or []:
            if isinstance(line, Mapping) and line.get("observed_nm") is not None:
                reference = line.get("strongest_nm", line.get("reference_nm", line["observed_nm"]))
                out.append({"wavelength_nm": float(line["observed_nm"]), "label": f"{symbol} {float(reference):.2f}"})
    return out


def result_lines(results: Mapping[str, Any] | None, *, max_items: int = 12) -> list[str]:
    """The result as short readable lines (identification results get a table)."""
    if not results:
        return ["No result was given: the page shows the measurement only."]
    lines: list[str] = []
    if "verdict" in results and "matches" in results:
        lines.append(f"Identification: {results['verdict']}")
        matches = results.get("matches") or []
        if not matches:
            lines.append("  no species fits the observed lines")
        for match in matches[:max_items]:
            if isinstance(match, Mapping):
                count = len(match.get("lines") or [])
                lines.append(
                    f"  {match.get('symbol', '?')}: score {float(match.get('score', 0)):.2f}, "
                    f"explains {100 * float(match.get('fraction', 0)):.0f}% of the line flux, {count} line(s)"
                )
        unexplained = results.get("unexplained") or []
        if unexplained:
            shown = ", ".join(f"{float(u['wavelength_nm']):.1f}" for u in unexplained[:8] if isinstance(u, Mapping) and "wavelength_nm" in u)
            lines.append(f"  unexplained lines (nm): {shown}{' ...' if len(unexplained) > 8 else ''}")
        rest = {k: v for k, v in results.items() if k not in ("verdict", "matches", "unexplained")}
    else:
        rest = dict(results)
    title = rest.pop("title", None) or rest.pop("name", None)
    if title:
        lines.insert(0, str(title))

    def walk(prefix: str, value: Any, depth: int) -> None:
        if len(lines) > 4 * max_items:
            return
        pad = "  " * depth
        if isinstance(value, Mapping):
            if prefix:
                lines.append(f"{pad}{prefix}:")
            for key, item in value.items():
                walk(str(key), item, depth + (1 if prefix else 0))
        elif isinstance(value, (list, tuple, np.ndarray)):
            items = list(value)
            if items and all(isinstance(v, Mapping) for v in items):
                lines.append(f"{pad}{prefix}: {len(items)} item(s)")
                for item in items[:max_items]:
                    lines.append(pad + "  " + ", ".join(f"{k} {_number(v)}" for k, v in item.items() if not isinstance(v, (Mapping, list))))
                if len(items) > max_items:
                    lines.append(f"{pad}  ... {len(items) - max_items} more")
            else:
                shown = ", ".join(_number(v) for v in items[:8])
                lines.append(f"{pad}{prefix}: {shown}{' ...' if len(items) > 8 else ''}")
        else:
            lines.append(f"{pad}{prefix}: {_number(value)}")

    walk("", rest, 0)
    return lines


def provenance_lines(provenance: Mapping[str, Any], *, name: str | None = None, max_frames: int = 6) -> list[str]:
    """Provenance as report lines: every field a reader needs to redo the measurement.

    At most ``max_frames`` frames are listed (the data export holds them all).
    """
    out = []
    if name:
        out.append(f"[{name}]")
    software = provenance.get("software") or {}
    out.append(
        f"software: {software.get('name', 'benchspec')} {software.get('version', 'unknown')}"
        + (f" (Python {software['python']})" if software.get("python") else "")
        + f"   created_utc: {provenance.get('created_utc', 'not recorded')}"
    )
    frames = provenance.get("frames") or []
    if not frames:
        imported = provenance.get("imported_from")
        if isinstance(imported, Mapping):
            out.append(f"imported_from: {imported.get('path')} ({imported.get('format')})")
            out.append(f"  sha256 {imported.get('sha256')}")
        else:
            out.append("frames: not recorded")
    for frame in frames[:max_frames]:
        if isinstance(frame, Mapping):
            out.append(f"frame ({frame.get('role', 'signal')}): {frame.get('path')}")
            out.append(f"  sha256 {frame.get('sha256')}")
    if len(frames) > max_frames:
        out.append(f"  ... {len(frames) - max_frames} more frames (see the data export)")
    calibration = provenance.get("calibration")
    if isinstance(calibration, Mapping):
        out.append(
            f"calibration: {calibration.get('path')}  lamp {calibration.get('lamp')}  "
            f"rms_nm {_number(calibration.get('rms_nm'))}  rms_px {_number(calibration.get('rms_px'))}"
        )
        if calibration.get("sha256"):
            out.append(f"  sha256 {calibration.get('sha256')}")
        out.append(f"  line_list_source: {calibration.get('line_list_source')}")
    else:
        out.append("calibration: none recorded")
    response = provenance.get("response")
    if isinstance(response, Mapping) and response.get("applied"):
        detail = ", ".join(f"{k} {v}" for k, v in response.items() if k not in ("applied",) and not isinstance(v, (Mapping, list)))
        out.append(f"response correction: {detail or 'applied'}")
    else:
        out.append("response correction: none")
    settings = provenance.get("settings")
    if isinstance(settings, Mapping) and settings:
        out.append("settings: " + ", ".join(f"{k}={json.dumps(v, ensure_ascii=False)}" for k, v in settings.items()))
    if provenance.get("notes"):
        out.append(f"notes: {provenance['notes']}")
    return out


def _wrap(lines: Sequence[str], width: int) -> list[str]:
    out = []
    for line in lines:
        indent = len(line) - len(line.lstrip(" "))
        wrapped = textwrap.wrap(line, width=width, subsequent_indent=" " * (indent + 4), break_long_words=True,
                                break_on_hyphens=False, drop_whitespace=True) or [""]
        out.extend(wrapped)
    return out


def _text_block(figure: Figure, lines: Sequence[str], *, x: float, top: float, width_in: float, height_in: float,
                size: float, mono: bool = False, heading: str | None = None, shrink_to: float | None = None) -> None:
    """Write wrapped lines into a box of the page.

    With ``shrink_to`` the font shrinks (down to that size) until everything
    fits; whatever still does not fit is cut with a note.
    """
    page_w, page_h = figure.get_size_inches()
    y = top
    if heading:
        heading_size = max(size, 7.0) + 2
        figure.text(x, y, heading, fontsize=heading_size, fontweight="bold", va="top", ha="left", color="0.1")
        y -= (1.5 * heading_size / 72.0) / page_h
        height_in -= 1.5 * heading_size / 72.0
    while True:
        char_width = (0.602 if mono else 0.56) * size / 72.0
        width = max(20, int(width_in / char_width))
        line_height = 1.28 * size / 72.0
        wrapped = _wrap(lines, width)
        capacity = max(1, int(height_in / line_height))
        if len(wrapped) <= capacity or shrink_to is None or size <= shrink_to:
            break
        size = max(shrink_to, size - 0.25)
    if len(wrapped) > capacity:
        cut = len(wrapped) - capacity + 1
        wrapped = wrapped[: capacity - 1] + [f"... {cut} more line(s): see the data export (.json) for everything"]
    figure.text(x, y, "\n".join(wrapped), fontsize=size, va="top", ha="left", color="0.12", linespacing=1.28,
                family=_MONO if mono else None)


def _calibration_core(calibration: Mapping[str, Any] | None) -> Mapping[str, Any]:
    """The part of a calibration record that holds the verdict: the calibration file's
    ``wavelength_calibration``, a wrapper's ``calibration``, or the record itself."""
    if not calibration:
        return {}
    for key in ("wavelength_calibration", "calibration"):
        inner = calibration.get(key)
        if isinstance(inner, Mapping) and "verdict" in inner:
            return inner
    return calibration


def build_report(
    spectra,
    *,
    calibration=None,
    results=None,
    source_type: str | None = None,
    title: str | None = None,
    lines=None,
    labels: Sequence[str] | None = None,
    created_utc: str | None = None,
) -> Figure:
    """The one-page report as a matplotlib Figure (A4 portrait).

    Parameters
    ----------
    spectra : Spectrum or sequence of Spectrum
        One spectrum, or several overlaid (e.g. a time series or a comparison).
    calibration : mapping or object with to_dict, optional
        The wavelength calibration (e.g. the calibration file's content, or
        ``WavelengthCalibration``): its matched lines give the residual plot.
    results : mapping or object with to_dict, optional
        The identification (``IdentificationResult``) or a practical's result.
    source_type : str, optional
        One of :data:`benchspec.safety.SOURCE_TYPES`; defaults to the first
        spectrum's ``provenance["source_type"]``.
    title : str, optional
    lines : sequence, optional
        Lines to label; default: the identified lines in ``results``.
    labels : sequence of str, optional
        Names of the spectra (legend and provenance headings).
    created_utc : str, optional
        Time printed on the page; default now.
    """
    items = [spectra] if isinstance(spectra, Spectrum) else list(spectra)
    if not items or not all(isinstance(s, Spectrum) for s in items):
        raise InputError("a report needs at least one benchspec Spectrum")
    calibration = _as_mapping(calibration, "calibration")
    results = _as_mapping(results, "results")
    if source_type is None:
        source_type = items[0].provenance.get("source_type")
    if source_type is not None and source_type not in SOURCE_TYPES:
        raise InputError(f"unknown source type {source_type!r}; choose one of: {', '.join(SOURCE_TYPES)}")
    if lines is None:
        lines = lines_from_results(results) or None
    names = list(labels) if labels else [None] * len(items)
    created = created_utc or _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat().replace("+00:00", "Z")

    with rc_context(STYLE):
        figure = Figure(figsize=A4_PORTRAIT_IN)
        page_w, page_h = A4_PORTRAIT_IN
        figure.text(0.06, 0.975, title or "Spectrum report", fontsize=15, fontweight="bold", va="top", color="0.05")
        subtitle = f"made {created} with benchspec {__version__}"
        if source_type:
            subtitle += f"   source type: {cautions_for(source_type)[0]}"
        figure.text(0.06, 0.950, subtitle, fontsize=8, va="top", color="0.3")

        spectrum_ax = figure.add_axes((0.09, 0.615, 0.86, 0.30))
        _draw_spectra(spectrum_ax, items, lines=lines, labels=[n for n in names if n] or None)
        spectrum_ax.set_title("spectrum", loc="left")

        residual_ax = figure.add_axes((0.09, 0.455, 0.86, 0.095))
        residual_data = normalise_residuals(calibration) if calibration else None
        residual_title = "wavelength calibration residuals"
        core = _calibration_core(calibration)
        if core.get("verdict"):
            residual_title += f"; verdict: {core['verdict']}"
            if core.get("verdict_reason"):
                residual_title += f" ({str(core['verdict_reason'])[:200]})"
        residual_title = "\n".join(textwrap.wrap(residual_title, 110)[:2])
        plot_residuals(residual_ax, residual_data, title=residual_title)
        residual_ax.xaxis.label.set_size(7.5)
        residual_ax.yaxis.label.set_size(7.5)

        column_w = 0.43 * page_w
        block_top, block_h = 0.395, 0.165 * page_h
        _text_block(figure, result_lines(results), x=0.06, top=block_top, width_in=column_w, height_in=block_h,
                    size=7.5, heading="Result", shrink_to=6.0)
        if source_type:
            caution_title, cautions = cautions_for(source_type)
            caution_lines = [f"{caution_title}:"] + [f"- {c}" for c in cautions] + [GENERAL_CAUTION]
        else:
            caution_lines = ["Source type not given: run `benchspec cautions` for every source, "
                             "or make the report with --source-type.", GENERAL_CAUTION]
        # Cautions are never cut: the font shrinks until they all fit.
        _text_block(figure, caution_lines, x=0.52, top=block_top, width_in=column_w, height_in=block_h,
                    size=7.5, heading="Safety cautions", shrink_to=4.0)

        prov: list[str] = []
        for i, spectrum in enumerate(items):
            name = names[i] if names[i] else (f"spectrum {i + 1}" if len(items) > 1 else None)
            prov.extend(provenance_lines(spectrum.provenance, name=name, max_frames=6 if len(items) == 1 else 2))
        _text_block(figure, prov, x=0.06, top=0.215, width_in=0.88 * page_w, height_in=0.195 * page_h,
                    size=6.0, mono=True, heading="Provenance", shrink_to=4.5)
        if lines:
            _fit_line_labels(figure)  # the line labels stay inside the spectrum panel
    return figure


def write_report(path, spectra, *, force: bool = False, **options) -> Path:
    """Build the report (see :func:`build_report`) and save it atomically as a one-page PDF."""
    from .errors import ExportError
    from .plots import save_figure

    path = Path(path)
    if path.suffix.lower() != ".pdf":
        raise ExportError(f"a report is a PDF: give a name ending in .pdf, not {path.name}")
    if not force and (path.exists() or path.is_symlink()):
        raise ExportError(f"{path} already exists; pass --force to overwrite it, or choose another name")
    figure = build_report(spectra, **options)
    items = [spectra] if isinstance(spectra, Spectrum) else list(spectra)
    return save_figure(figure, path, force=force, title=options.get("title") or "Spectrum report",
                       provenance={"spectra": [dict(s.provenance) for s in items]})
