"""Publication-quality plots of spectra and calibration residuals (matplotlib, no pyplot).

Figures are built on :class:`matplotlib.figure.Figure` objects and rendered
by the Agg/PDF/SVG canvases, never through pyplot's global state, so they
are safe to make from the command line, tests and the viewer's worker
thread alike.

The look: a dark grey trace, a pale uncertainty band, no fill under the
curve, light grid, open top and right spines; each labelled line gets a
short tick coloured by its wavelength (CIE 1931 2-degree colour-matching
functions through sRGB) and a vertical label in dark grey; a thin strip
under the axis shows the visible colour at each wavelength. Saturated samples
are marked in red on the trace.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np
from matplotlib import rc_context
from matplotlib import patheffects
from matplotlib.figure import Figure

from . import __version__
from .errors import InputError
from .spectrum import Spectrum

__all__ = [
    "STYLE",
    "wavelength_colour",
    "normalise_line_labels",
    "normalise_residuals",
    "plot_spectrum",
    "plot_residuals",
    "spectrum_figure",
    "residuals_figure",
    "save_figure",
    "save_spectrum_plot",
]

#: rcParams every benchspec figure uses (searchable text in PDF and SVG).
STYLE = {
    "font.family": "DejaVu Sans",
    "font.size": 8.5,
    "axes.titlesize": 9.5,
    "axes.labelsize": 8.5,
    "axes.linewidth": 0.7,
    "axes.edgecolor": "0.25",
    "axes.labelcolor": "0.1",
    "axes.spines.top": False,
    "axes.spines.right": False,
    "xtick.color": "0.25",
    "ytick.color": "0.25",
    "xtick.direction": "out",
    "ytick.direction": "out",
    "xtick.major.width": 0.7,
    "ytick.major.width": 0.7,
    "grid.color": "0.88",
    "grid.linewidth": 0.5,
    "legend.frameon": False,
    "pdf.fonttype": 42,  # TrueType: the PDF's text can be searched and extracted
    "ps.fonttype": 42,
    "svg.fonttype": "none",
    "savefig.dpi": 300,
}

_TRACE = "0.12"
_BAND = "0.72"
_OVERLAY = ("0.12", "#1f4e79", "#8c2d04", "#276419", "#5e3c99", "#7f6000")
_SATURATED = "#b2182b"
#: Marker shapes of the species in a residual plot, in order of first appearance (the last one
#: stands for all further species when there are more).
_RESIDUAL_MARKERS = ("o", "s", "^", "v", "D", "P")
#: How far under the residual axes its legend starts (pt): below the tick labels and the x label.
_RESIDUAL_LEGEND_DROP_PT = 30.0


def _cie_srgb(wavelength_nm: np.ndarray) -> np.ndarray:
    """sRGB of monochromatic light from the CIE 1931 2-degree CMFs (fallback when
    :mod:`benchspec.analysis.colour` is not installed)."""
    import colour

    cmfs = colour.MSDS_CMFS["CIE 1931 2 Degree Standard Observer"]
    table_wl = np.asarray(cmfs.wavelengths, dtype=float)
    table = np.asarray(cmfs.values, dtype=float)
    xyz = np.stack([np.interp(wavelength_nm, table_wl, table[:, i], left=0.0, right=0.0) for i in range(3)], axis=-1)
    matrix = np.asarray(colour.models.RGB_COLOURSPACE_sRGB.matrix_XYZ_to_RGB)
    rgb = np.clip(xyz @ matrix.T, 0.0, None)
    peak = rgb.max(axis=-1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        rgb = np.where(peak > 0, rgb / peak, 0.0)
    fade = np.clip(xyz.sum(axis=-1) / (0.1 * table.sum(axis=1).max()), 0.0, 1.0)
    rgb = np.clip(rgb * fade[..., None], 0.0, 1.0)
    return np.clip(np.asarray(colour.models.eotf_inverse_sRGB(rgb)), 0.0, 1.0)


def wavelength_colour(wavelength_nm) -> np.ndarray:
    """Display colour (sRGB 0-1, shape (..., 3)) of light of the given wavelength(s).

    Uses :func:`benchspec.analysis.colour.wavelength_to_srgb` (CIE 1931
    colour-matching functions); black outside the visible range.
    """
    wavelength = np.asarray(wavelength_nm, dtype=np.float64)
    try:
        from .analysis.colour import wavelength_to_srgb
    except ImportError:  # pragma: no cover - the colour module ships with benchspec
        return _cie_srgb(wavelength)
    return np.asarray(wavelength_to_srgb(wavelength), dtype=np.float64)


def normalise_line_labels(lines) -> list[dict]:
    """Lines to label as ``[{"wavelength_nm": float, "label": str}]``.

    Accepts ``(wavelength_nm, label)`` pairs, bare wavelengths, or mappings
    with ``wavelength_nm`` (or ``centre_nm``/``reference_nm``) and an optional
    ``label``, ``species`` and ``reference_nm``.
    """
    out = []
    for item in lines or ():
        if isinstance(item, Mapping):
            wavelength = None
            for key in ("wavelength_nm", "centre_nm", "center_nm", "observed_nm", "measured_nm", "reference_nm"):
                if item.get(key) is not None:
                    wavelength = item[key]
                    break
            if wavelength is None:
                raise InputError(f"a line to label needs `wavelength_nm`, got keys {sorted(item)}")
            label = item.get("label")
            if label is None:
                species = item.get("species")
                label = f"{species} {float(wavelength):.1f}" if species else f"{float(wavelength):.1f}"
        elif isinstance(item, (tuple, list)) and len(item) == 2:
            wavelength, label = item
        else:
            wavelength, label = item, None
        try:
            wavelength = float(wavelength)
        except (TypeError, ValueError):
            raise InputError(f"line wavelength must be a number, got {wavelength!r}") from None
        if not np.isfinite(wavelength):
            raise InputError("line wavelengths must be finite")
        out.append({"wavelength_nm": wavelength, "label": str(label) if label is not None else f"{wavelength:.1f}"})
    return sorted(out, key=lambda d: d["wavelength_nm"])


def normalise_residuals(residuals) -> dict | None:
    """Calibration residuals as arrays: ``wavelength_nm``, ``residual_nm``, ``used`` and ``label``.

    Accepts a mapping of arrays (keys ``wavelength_nm``/``reference_nm`` and
    ``residual_nm``, optional ``used``, ``label``/``species``, ``rms_nm``), a
    list of per-line mappings, or a whole calibration record in which such a
    list is found (e.g. ``matched_lines``). Returns None when there are none.
    """
    if residuals is None:
        return None
    rms = None
    rows = None
    if isinstance(residuals, Mapping):
        rms = residuals.get("rms_nm")
        if "residual_nm" in residuals and not isinstance(residuals["residual_nm"], (int, float)):
            wavelength = residuals.get("wavelength_nm", residuals.get("reference_nm"))
            if wavelength is None:
                raise InputError("residuals need `wavelength_nm` (or `reference_nm`) beside `residual_nm`")
            count = len(residuals["residual_nm"])
            labels = residuals.get("label", residuals.get("species", [""] * count))
            used = residuals.get("used", [True] * count)
            rows = [
                {"wavelength_nm": w, "residual_nm": r, "used": u, "label": l}
                for w, r, u, l in zip(wavelength, residuals["residual_nm"], used, labels)
            ]
        else:
            rows = _find_residual_rows(residuals)
            if rms is None:
                rms = _find_scalar(residuals, "rms_nm")
    elif isinstance(residuals, Sequence):
        rows = list(residuals)
    if not rows:
        return None
    wavelength, residual, used, labels = [], [], [], []
    for row in rows:
        if not isinstance(row, Mapping):
            raise InputError("each residual must be a mapping with `wavelength_nm` and `residual_nm`")
        w = row.get("reference_nm", row.get("wavelength_nm"))
        r = row.get("residual_nm")
        if w is None or r is None:
            continue
        wavelength.append(float(w))
        residual.append(float(r))
        used.append(bool(row.get("used", row.get("used_in_fit", not row.get("rejected", False)))))
        labels.append(str(row.get("label") or row.get("species") or ""))
    if not wavelength:
        return None
    result = {
        "wavelength_nm": np.array(wavelength),
        "residual_nm": np.array(residual),
        "used": np.array(used, dtype=bool),
        "label": labels,
    }
    if rms is None and result["used"].any():
        rms = float(np.sqrt(np.mean(result["residual_nm"][result["used"]] ** 2)))
    result["rms_nm"] = None if rms is None else float(rms)
    return result


def _find_residual_rows(obj: Any) -> list | None:
    queue = [obj]
    while queue:
        current = queue.pop(0)
        if isinstance(current, list) and current and all(isinstance(r, Mapping) and "residual_nm" in r for r in current):
            return current
        if isinstance(current, Mapping):
            queue.extend(v for v in current.values() if isinstance(v, (Mapping, list)))
        elif isinstance(current, list):
            queue.extend(v for v in current if isinstance(v, (Mapping, list)))
    return None


def _find_scalar(obj: Any, key: str):
    queue = [obj]
    while queue:
        current = queue.pop(0)
        if isinstance(current, Mapping):
            if isinstance(current.get(key), (int, float)):
                return current[key]
            queue.extend(v for v in current.values() if isinstance(v, Mapping))
    return None


def _y_label(spectrum: Spectrum) -> str:
    provenance = spectrum.provenance
    quantity = str(provenance.get("quantity") or "intensity")
    unit = provenance.get("intensity_unit") or "counts"
    if unit == quantity:
        return quantity
    return f"{quantity} ({unit})"


def _x_of(spectrum: Spectrum) -> tuple[np.ndarray, str]:
    if spectrum.is_calibrated:
        return spectrum.wavelength_nm, "wavelength in air (nm)"
    return spectrum.pixel, "pixel (column of the rectified band)"


#: Wavelengths a plot of a calibrated spectrum shows (nm): a silicon camera behind glass optics records
#: about 350-1050 nm (common practice, no source); columns whose calibration is extrapolated beyond
#: this are left out of the plot (not of the data). The viewer uses the same range.
VIEW_RANGE_NM = (300.0, 1100.0)


def plot_spectrum(ax, spectrum: Spectrum, *, lines=None, label: str | None = None, colour: str = _TRACE,
                  show_uncertainty: bool = True, colour_strip: bool = True, saturation_legend: bool = True) -> None:
    """Draw one spectrum on ``ax`` (a matplotlib Axes).

    Parameters
    ----------
    ax : matplotlib.axes.Axes
    spectrum : Spectrum
    lines : sequence, optional
        Lines to label (see :func:`normalise_line_labels`); only for calibrated spectra.
    label : str, optional
        Legend label.
    colour : str
        Trace colour.
    show_uncertainty : bool
        Draw the +-1 sigma band.
    colour_strip : bool
        Draw the visible-colour strip under a wavelength axis.
    saturation_legend : bool
        Name the saturated-sample markers in the legend.
    """
    x, x_label = _x_of(spectrum)
    y, sigma, saturated = spectrum.intensity, spectrum.uncertainty, spectrum.saturated
    if spectrum.is_calibrated:  # columns extrapolated far past what a camera records are not drawn
        shown = (x >= VIEW_RANGE_NM[0]) & (x <= VIEW_RANGE_NM[1])
        if np.count_nonzero(shown) > 8:
            x, y, sigma, saturated = x[shown], y[shown], sigma[shown], saturated[shown]
    ax.grid(True, which="major")
    ax.set_axisbelow(True)
    if show_uncertainty:
        ax.fill_between(x, y - sigma, y + sigma, color=_BAND, alpha=0.55, linewidth=0, zorder=1)
    ax.plot(x, y, color=colour, linewidth=0.9, zorder=3, label=label)
    ax.set_xlabel(x_label)
    ax.set_ylabel(_y_label(spectrum))
    ax.set_xlim(float(x.min()), float(x.max()))
    top = float(np.max(y + sigma)) if y.size else 1.0
    bottom = float(np.min(y - sigma)) if y.size else 0.0
    span = top - bottom if top > bottom else 1.0
    labelled = normalise_line_labels(lines) if (lines and spectrum.is_calibrated) else []
    headroom = 0.42 if labelled else 0.06
    ax.set_ylim(bottom - 0.07 * span, top + headroom * span)
    if saturated.any():
        ax.plot(x[saturated], y[saturated], linestyle="none", marker="o", markersize=1.8,
                color=_SATURATED, zorder=4, label="saturated samples" if saturation_legend else None)
        ax.legend(loc="upper right", fontsize=6.5, handletextpad=0.3, borderaxespad=0.2)
    if labelled:
        _label_lines(ax, x, y, labelled, top=top, span=span)
    if colour_strip and spectrum.is_calibrated:
        _colour_strip(ax, x)


def _isotonic(values: np.ndarray) -> np.ndarray:
    """Least-squares non-decreasing fit to ``values`` (pool adjacent violators)."""
    means: list[float] = []
    counts: list[int] = []
    for value in values.astype(float):
        means.append(value)
        counts.append(1)
        while len(means) > 1 and means[-2] > means[-1]:
            total = means[-2] * counts[-2] + means[-1] * counts[-1]
            counts[-2] += counts[-1]
            means[-2] = total / counts[-2]
            means.pop()
            counts.pop()
    return np.repeat(means, counts)


def _spread(positions: np.ndarray, *, gap: float, low: float, high: float) -> np.ndarray | None:
    """Label positions at least ``gap`` apart, in the order given, within [low, high], moved as
    little as possible (least squares); None when they cannot all fit.

    With q_i = p_i - i * gap the spacing rule is q non-decreasing, so the answer is the isotonic
    regression of ``positions - i * gap``, clipped to the range (exact for bounds common to all).
    """
    positions = np.asarray(positions, dtype=float)
    count = positions.size
    if count == 0:
        return positions.copy()
    shift = gap * np.arange(count)
    upper = high - shift[-1]
    if upper < low - 1e-12:
        return None
    return np.clip(_isotonic(positions - shift), low, max(low, upper)) + shift


#: Size (pt) of the line labels on a spectrum, and their spacing across the axis (in label heights).
_LINE_LABEL_PT = 6.5
_LINE_LABEL_PITCH = 1.35
#: How far (in label spacings) a label may stand beside its line: a longer leader is hard to follow.
_LABEL_MAX_SHIFT = 3.0


def _label_gap(ax, width: float) -> float:
    """The spacing of vertical labels in data units: ``_LINE_LABEL_PITCH`` text heights.

    Measured on the axes as placed now; a constrained layout only widens the default subplot,
    so the spacing in data units can only fall short of what was reserved, never overlap.
    """
    axes_width_in = ax.get_position().width * ax.figure.get_size_inches()[0]
    return _LINE_LABEL_PITCH * _LINE_LABEL_PT / 72.0 / max(axes_width_in, 0.5) * width


def _choose_labels(wavelengths: np.ndarray, strength: np.ndarray, *, gap: float, low: float, high: float,
                   max_shift: float) -> tuple[np.ndarray, np.ndarray]:
    """Which lines get a label, and where. Strongest first, a line's label is taken when all the labels
    taken so far still fit ``gap`` apart with none further than ``max_shift`` from its line (a long
    leader cannot be followed). Returns (indices in wavelength order, label x)."""
    chosen = np.zeros(0, dtype=int)
    placed = np.zeros(0)
    for index in np.argsort(-strength, kind="stable"):
        trial = np.sort(np.append(chosen, index))
        spread = _spread(wavelengths[trial], gap=gap, low=low, high=high)
        if spread is not None and np.max(np.abs(spread - wavelengths[trial])) <= max_shift:
            chosen, placed = trial, spread
    return chosen, placed


def _label_lines(ax, x, y, labelled, *, top, span) -> None:
    """A tick over every line and, for as many as fit without overlapping, a vertical label above the
    trace joined to its tick by a thin leader. The strongest lines are labelled first; labels that do
    not fit are left out (their ticks stay)."""
    x_min, x_max = float(x.min()), float(x.max())
    inside = [d for d in labelled if x_min <= d["wavelength_nm"] <= x_max]
    if not inside:
        return
    wavelengths = np.array([d["wavelength_nm"] for d in inside])
    colours = wavelength_colour(wavelengths)
    width = x_max - x_min
    # the trace's top near each line: a line's peak, or a dip's shoulders (the tick must clear the trace)
    near = 0.004 * width
    local_top = np.array([float(np.max(y[(x >= w - near) & (x <= w + near)], initial=np.interp(w, x, y)))
                          for w in wavelengths])
    gap = _label_gap(ax, width)
    chosen, label_x = _choose_labels(wavelengths, local_top, gap=gap, low=x_min + 0.5 * gap,
                                     high=x_max - 0.5 * gap, max_shift=_LABEL_MAX_SHIFT * gap)
    base = top + 0.10 * span
    edge = [patheffects.Stroke(linewidth=2.8, foreground="0.3"), patheffects.Normal()]
    for w, peak, rgb in zip(wavelengths, local_top, colours):
        tick_low = peak + 0.02 * span
        ax.plot([w, w], [tick_low, tick_low + 0.045 * span], color=tuple(rgb), linewidth=1.8, solid_capstyle="butt",
                path_effects=edge, zorder=5)
    for index, lx in zip(chosen, label_x):
        w, tick_high = wavelengths[index], local_top[index] + 0.065 * span
        ax.plot([w, w, lx], [tick_high, max(tick_high, base - 0.035 * span), base - 0.005 * span], color="0.55",
                linewidth=0.5, zorder=4)
        ax.text(lx, base, inside[index]["label"], rotation=90, ha="center", va="bottom", fontsize=_LINE_LABEL_PT,
                color="0.15", zorder=6, clip_on=False, gid=_LINE_LABEL_GID)


#: gid of the line labels' Text artists (found again by :func:`_fit_line_labels`).
_LINE_LABEL_GID = "benchspec-line-label"


def _fit_line_labels(figure: Figure, *, margin_pt: float = 3.0) -> None:
    """Raise the top of every axes whose line labels run past it, now that the figure is laid out.

    A label stands at a fixed data height with a fixed length in points; raising the axis top
    brings its foot down until its head is ``margin_pt`` inside the axes.
    """
    figure.draw_without_rendering()
    for ax in figure.axes:
        labels = [t for t in ax.texts if t.get_gid() == _LINE_LABEL_GID and t.get_visible()]
        if not labels:
            continue
        box = ax.get_window_extent()
        margin = margin_pt * figure.dpi / 72.0
        heights = [t.get_window_extent().height for t in labels]
        if max(t.get_window_extent().y1 for t in labels) <= box.y1 - margin:
            continue
        low, high = ax.get_ylim()
        base = labels[0].get_position()[1]
        room = (box.height - margin - max(heights)) / box.height  # axes fraction the labels' feet may reach
        room = max(room, 0.35)  # labels longer than the axes is tall: keep the trace readable
        ax.set_ylim(low, low + (base - low) / room)


def _colour_strip(ax, x) -> None:
    from matplotlib.transforms import blended_transform_factory

    grid = np.linspace(float(x.min()), float(x.max()), 400)
    rgb = wavelength_colour(grid)
    if not np.any(rgb > 0.02):
        return
    transform = blended_transform_factory(ax.transData, ax.transAxes)
    ax.imshow(rgb[None, :, :], extent=(grid[0], grid[-1], 0.0, 0.022), transform=transform, aspect="auto",
              interpolation="bilinear", zorder=2, clip_on=True)
    ax.set_xlim(float(x.min()), float(x.max()))


def plot_residuals(ax, residuals, *, title: str | None = None) -> bool:
    """Draw wavelength-calibration residuals on ``ax``; False (and a note) when there are none."""
    data = normalise_residuals(residuals)
    ax.grid(True, which="major")
    ax.set_axisbelow(True)
    ax.set_xlabel("reference wavelength (nm)")
    ax.set_ylabel("residual (nm)")
    if data is None:
        ax.text(0.5, 0.5, "no calibration residuals available", transform=ax.transAxes, ha="center", va="center",
                color="0.4")
        ax.set_xticks([])
        ax.set_yticks([])
        return False
    w, r, used = data["wavelength_nm"], data["residual_nm"], data["used"]
    ax.axhline(0.0, color="0.35", linewidth=0.7, zorder=2)
    if data["rms_nm"] is not None:
        ax.axhspan(-data["rms_nm"], data["rms_nm"], color="0.9", zorder=1, linewidth=0)
    colours = wavelength_colour(w)
    # Each species (or label) gets a marker shape named once in a legend under the axes: a text
    # beside every point overprints its neighbours (542.4 and 546.1 nm in a CFL) and runs off the ends.
    names = [name for name in dict.fromkeys(data["label"]) if name]
    unnamed = bool(names) and not all(data["label"])
    slots = len(_RESIDUAL_MARKERS) - unnamed
    shown = names[: slots - 1] if len(names) > slots else names
    marker_of = {name: _RESIDUAL_MARKERS[k] for k, name in enumerate(shown)}
    spare = iter(_RESIDUAL_MARKERS[len(shown):])
    others = next(spare) if len(shown) < len(names) else None     # the species beyond the legend's room
    blank = next(spare) if unnamed else "o"                        # points without a species
    markers = np.array([marker_of.get(name, others) if name else blank for name in data["label"]])
    for marker in dict.fromkeys(markers):
        mine = markers == marker
        if (mine & used).any():
            ax.scatter(w[mine & used], r[mine & used], s=22, c=colours[mine & used], marker=marker, edgecolors="0.15",
                       linewidths=0.6, zorder=4)
        if (mine & ~used).any():
            ax.scatter(w[mine & ~used], r[mine & ~used], s=22, facecolors="none", edgecolors=_SATURATED, marker=marker,
                       linewidths=0.8, zorder=4)
    from matplotlib.lines import Line2D
    from matplotlib.transforms import ScaledTranslation

    def key(marker, label, **style):
        style = {"markerfacecolor": "0.72", "markeredgecolor": "0.15", "markeredgewidth": 0.6, **style}
        return Line2D([], [], linestyle="none", marker=marker, markersize=4.5, label=label, **style)

    handles = [key(marker_of[name], name) for name in shown]
    if others is not None:
        handles.append(key(others, f"{len(names) - len(shown)} more species"))
    if unnamed:
        handles.append(key(blank, "no species given"))
    if (~used).any():
        handles.append(key("o", "rejected (open, red)", markerfacecolor="none", markeredgecolor=_SATURATED,
                           markeredgewidth=0.8))
    limit = float(np.max(np.abs(r))) if r.size else 1.0
    ax.set_ylim(-1.35 * limit - 1e-6, 1.35 * limit + 1e-6)
    span = float(w.max() - w.min()) or 10.0
    ax.set_xlim(float(w.min()) - 0.05 * span, float(w.max()) + 0.05 * span)
    text = f"weighted RMS {data['rms_nm']:.3f} nm" if data["rms_nm"] is not None else ""
    text += f", {int(used.sum())} of {used.size} lines used"
    # below the axes, right-aligned on the x label's line: inside, it could cover a point or its label
    ax.annotate(text.strip(", "), xy=(1.0, 0.0), xycoords="axes fraction", xytext=(0, -15), textcoords="offset points",
                ha="right", va="top", fontsize=7, color="0.2")
    if handles:
        # one line under the x label, from the left (the RMS note ends the x label's own line)
        below = ax.transAxes + ScaledTranslation(0.0, -_RESIDUAL_LEGEND_DROP_PT / 72.0, ax.figure.dpi_scale_trans)
        ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(0.0, 0.0), bbox_transform=below, ncol=len(handles),
                  fontsize=6.5, handletextpad=0.2, columnspacing=1.0, borderaxespad=0.0, borderpad=0.0)
    if title:
        ax.set_title(title, loc="left")
    return True


def spectrum_figure(spectra, *, lines=None, title: str | None = None, labels: Sequence[str] | None = None,
                    size_in: tuple[float, float] = (7.0, 3.8)) -> Figure:
    """A figure of one spectrum or several overlaid (same x kind).

    Parameters
    ----------
    spectra : Spectrum or sequence of Spectrum
    lines : sequence, optional
        Lines to label (see :func:`normalise_line_labels`).
    title : str, optional
    labels : sequence of str, optional
        Legend labels when several spectra are overlaid.
    size_in : (width, height) in inches
    """
    with rc_context(STYLE):
        figure = Figure(figsize=size_in, layout="constrained")
        ax = figure.add_subplot()
        _draw_spectra(ax, spectra, lines=lines, labels=labels)
        if title:
            ax.set_title(title, loc="left")
        if lines:
            _fit_line_labels(figure)
    return figure


def _draw_spectra(ax, spectra, *, lines=None, labels=None) -> None:
    items = [spectra] if isinstance(spectra, Spectrum) else list(spectra)
    if not items:
        raise InputError("nothing to plot: give at least one spectrum")
    if len({s.is_calibrated for s in items}) > 1:
        raise InputError("cannot overlay calibrated and uncalibrated spectra on one axis; calibrate them all first")
    for i, spectrum in enumerate(items):
        name = labels[i] if labels and i < len(labels) else None
        plot_spectrum(ax, spectrum, lines=lines if i == 0 else None, label=name, colour=_OVERLAY[i % len(_OVERLAY)],
                      show_uncertainty=len(items) == 1 or i == 0, colour_strip=(i == 0), saturation_legend=(i == 0))
    if len(items) > 1:
        low = min(float(_x_of(s)[0].min()) for s in items)
        high = max(float(_x_of(s)[0].max()) for s in items)
        ax.set_xlim(low, high)
        ymax = max(float(np.max(s.intensity + s.uncertainty)) for s in items)
        ymin = min(float(np.min(s.intensity - s.uncertainty)) for s in items)
        span = (ymax - ymin) or 1.0
        ax.set_ylim(ymin - 0.07 * span, ymax + (0.42 if lines else 0.08) * span)
        if labels:
            ax.legend(loc="upper right", fontsize=7)


def residuals_figure(residuals, *, title: str | None = "wavelength calibration residuals",
                     size_in: tuple[float, float] = (7.0, 2.6)) -> Figure:
    """A figure of calibration residuals (see :func:`normalise_residuals` for the input)."""
    with rc_context(STYLE):
        figure = Figure(figsize=size_in, layout="constrained")
        plot_residuals(figure.add_subplot(), residuals, title=title)
    return figure


def _metadata(fmt: str, *, title: str | None, provenance: Mapping[str, Any] | None) -> dict:
    blob = json.dumps(provenance or {}, ensure_ascii=True, separators=(",", ":"), default=str)
    software = f"benchspec {__version__}"
    if fmt == "png":
        return {"Title": title or "benchspec spectrum", "Software": software, "Description": blob}
    if fmt == "pdf":
        return {"Title": title or "benchspec spectrum", "Creator": software, "Subject": blob}
    if fmt == "svg":
        return {"Title": title or "benchspec spectrum", "Creator": software, "Description": blob}
    return {}


def save_figure(figure: Figure, path, *, force: bool = False, title: str | None = None,
                provenance: Mapping[str, Any] | None = None, dpi: int = 300) -> Path:
    """Save ``figure`` atomically as PNG, SVG or PDF (by extension), provenance in the metadata."""
    from .errors import ExportError
    from .io import atomic_output

    path = Path(path)
    fmt = path.suffix.lower().lstrip(".")
    if fmt not in ("png", "svg", "pdf"):
        raise ExportError(f"cannot save a figure as {path}: use .png, .svg or .pdf")
    with rc_context(STYLE):
        with atomic_output(path, force=force, binary=True) as handle:
            figure.savefig(handle, format=fmt, dpi=dpi, metadata=_metadata(fmt, title=title, provenance=provenance))
    return path


def save_spectrum_plot(spectrum: Spectrum, path, *, force: bool = False, title: str | None = None, lines=None,
                       dpi: int = 300) -> Path:
    """Plot ``spectrum`` and save it as PNG, SVG or PDF (atomic; the provenance goes in the metadata)."""
    figure = spectrum_figure(spectrum, lines=lines, title=title)
    return save_figure(figure, path, force=force, title=title, provenance=spectrum.provenance, dpi=dpi)
