"""Figures of the practicals' results (matplotlib, imported only when a figure is asked for).

Each ``*_figure`` function takes a result from :mod:`benchspec.analysis`
(and the spectrum it came from, where useful) and returns a
:class:`matplotlib.figure.Figure`; save it with :func:`save_analysis_figure`
(atomic, PNG/SVG/PDF). The look is the project's (:data:`benchspec.plots.STYLE`).
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "response_figure",
    "absorbance_figure",
    "beer_lambert_figure",
    "rydberg_figure",
    "metrics_figure",
    "daylight_figure",
    "plan_figure",
    "save_analysis_figure",
]


def _figure(rows: int = 1, *, height: float = 3.4):
    from matplotlib import rc_context
    from matplotlib.figure import Figure

    from ..plots import STYLE

    with rc_context(STYLE):
        figure = Figure(figsize=(7.0, height * rows), layout="constrained")
        axes = figure.subplots(rows, 1, squeeze=False)[:, 0]
    return figure, axes


def _style():
    from matplotlib import rc_context

    from ..plots import STYLE

    return rc_context(STYLE)


def _colours(wavelength_nm):
    from .colour import wavelength_to_srgb

    return wavelength_to_srgb(np.asarray(wavelength_nm, dtype=np.float64))


def response_figure(response, *, lamp=None, title: str | None = None):
    """The relative response with its 1-sigma band, valid range shaded; the lamp spectrum below if given."""
    with _style():
        figure, axes = _figure(2 if lamp is not None else 1, height=3.0)
        ax = axes[0]
        wl = response.wavelength_nm
        r, s = response.relative_response, response.uncertainty
        ax.fill_between(wl, r - s, r + s, color="0.75", linewidth=0)
        ax.plot(wl, r, color="0.1", linewidth=1.0, label="relative response")
        low, high = response.valid_range_nm
        ax.axvspan(wl[0], low, color="0.93", zorder=0)
        ax.axvspan(high, wl[-1], color="0.93", zorder=0)
        ax.set_xlim(wl[0], wl[-1])
        ax.set_ylim(0, 1.1)
        ax.set_xlabel("wavelength in air (nm)")
        ax.set_ylabel("relative response")
        ref = f"Planck {response.temperature_k:.0f} K" if response.reference == "planck" else "daylight (CIE D65)"
        ax.set_title(title or f"instrument response from {ref}; valid {low:.0f}-{high:.0f} nm")
        ax.grid(True)
        if lamp is not None:
            from ..plots import plot_spectrum

            plot_spectrum(axes[1], lamp)
            axes[1].set_title("lamp spectrum")
    return figure


def absorbance_figure(result, *, title: str | None = None):
    """Absorbance with its uncertainty band; samples beyond the measurable limit in red, the limit dashed."""
    with _style():
        figure, axes = _figure(1)
        ax = axes[0]
        wl, a, s = result.wavelength_nm, result.absorbance, result.absorbance_uncertainty
        ax.fill_between(wl, a - s, a + s, color="0.75", linewidth=0)
        ax.plot(wl, a, color="0.1", linewidth=1.0, label="absorbance")
        ax.plot(wl, result.max_measurable_absorbance, color="#8c2d04", linewidth=0.8, linestyle="--",
                label="largest measurable (stray light, noise)")
        if np.any(result.beyond_measurable):
            ax.plot(wl[result.beyond_measurable], a[result.beyond_measurable], linestyle="none", marker="o",
                    markersize=1.8, color="#b2182b", label="beyond measurable")
        finite = a[np.isfinite(a)]
        top = max(float(np.nanmax(finite)) if finite.size else 1.0, 0.1)
        ax.set_ylim(min(-0.05, float(np.nanmin(finite)) if finite.size else 0.0), 1.15 * top + 0.05)
        ax.set_xlim(wl[0], wl[-1])
        ax.set_xlabel("wavelength in air (nm)")
        ax.set_ylabel("absorbance")
        ax.set_title(title or "absorbance against the blank")
        ax.legend(loc="upper right", fontsize=7)
        ax.grid(True)
    return figure


def beer_lambert_figure(fit, *, unknowns=(), absorbance_uncertainties=None, title: str | None = None):
    """Standards with error bars, the fitted line, and unknowns read off it."""
    with _style():
        figure, axes = _figure(1)
        ax = axes[0]
        c, a = fit.concentrations, fit.absorbances
        ax.errorbar(c, a, yerr=absorbance_uncertainties, fmt="o", color="0.1", markersize=4, capsize=2, label="standards")
        high = max(float(c.max()), max((u.concentration for u in unknowns), default=0.0)) * 1.1
        grid = np.linspace(0, high, 50)
        ax.plot(grid, fit.intercept + fit.slope_per_concentration * grid, color="#1f4e79", linewidth=1.0,
                label=f"A = {fit.intercept:.4f} + {fit.slope_per_concentration:.4g} c  (R$^2$ = {fit.r_squared:.4f})")
        for u in unknowns:
            ax.errorbar([u.concentration], [u.absorbance], xerr=[u.concentration_uncertainty], fmt="s", color="#8c2d04",
                        markersize=4, capsize=2)
            ax.annotate(u.label or "unknown", (u.concentration, u.absorbance), textcoords="offset points", xytext=(4, -10),
                        fontsize=7, color="#8c2d04")
        ax.axvline(fit.limit_of_detection, color="0.5", linewidth=0.7, linestyle=":", label="limit of detection (3.3 s/slope)")
        unit = f" ({fit.concentration_unit})" if fit.concentration_unit else ""
        ax.set_xlabel(f"concentration{unit}")
        ax.set_ylabel("absorbance")
        ax.set_xlim(0, high)
        ax.set_title(title or "Beer-Lambert calibration")
        ax.legend(loc="upper left", fontsize=7)
        ax.grid(True)
    return figure


def rydberg_figure(result, *, spectrum=None, title: str | None = None):
    """1/lambda against 1/4 - 1/n^2 with the fitted slope; residuals; the spectrum with the lines if given."""
    with _style():
        rows = 3 if spectrum is not None else 2
        figure, axes = _figure(rows, height=2.6)
        n = np.array([l.upper_level for l in result.lines], dtype=float)
        x = 0.25 - 1.0 / n**2
        y = 1e9 / np.array([l.vacuum_wavelength_nm for l in result.lines])
        yerr = 1e9 * np.array([l.wavelength_uncertainty_nm for l in result.lines]) / np.array([l.vacuum_wavelength_nm for l in result.lines]) ** 2
        ax = axes[0]
        ax.errorbar(x, y / 1e6, yerr=yerr / 1e6, fmt="o", color="0.1", markersize=4, capsize=2)
        grid = np.linspace(0, 0.26, 20)
        ax.plot(grid, result.rydberg_per_m * grid / 1e6, color="#1f4e79", linewidth=1.0,
                label=f"R_H = {result.rydberg_per_m:.6e} +- {result.uncertainty_per_m:.1e} /m")
        for xi, yi, line in zip(x, y, result.lines):
            ax.annotate(line.name, (xi, yi / 1e6), textcoords="offset points", xytext=(4, -10), fontsize=7)
        ax.set_xlabel("1/4 - 1/n$^2$")
        ax.set_ylabel("1/$\\lambda_{vac}$ (1/$\\mu$m)")
        ax.set_title(title or f"Balmer series: R_H vs CODATA {result.codata_rydberg_per_m:.6e} /m ({result.difference_sigma:+.1f} sigma)")
        ax.legend(loc="upper left", fontsize=7)
        ax.grid(True)
        ax = axes[1]
        residual = np.array([l.residual_nm for l in result.lines])
        ax.errorbar([l.air_wavelength_nm for l in result.lines], residual,
                    yerr=[l.wavelength_uncertainty_nm for l in result.lines], fmt="o", color="0.1", markersize=4, capsize=2)
        ax.axhline(0, color="0.5", linewidth=0.7)
        ax.set_xlabel("wavelength in air (nm)")
        ax.set_ylabel("residual (nm)")
        ax.grid(True)
        if spectrum is not None:
            from ..plots import plot_spectrum

            plot_spectrum(axes[2], spectrum, lines=[(l.air_wavelength_nm, l.name) for l in result.lines])
    return figure


def metrics_figure(metrics, spectrum, *, title: str | None = None):
    """The source spectrum with peak/centroid/FWHM marked and a thin strip of wavelength colours below it."""
    with _style():
        figure, axes = _figure(1)
        ax = axes[0]
        wl, y = spectrum.wavelength_nm, spectrum.intensity
        # A thin strip of each wavelength's CIE colour under the axis, nothing filled under the curve.
        grid = np.linspace(wl[0], wl[-1], 800)
        top = float(np.nanmax(y)) * 1.05
        ax.imshow(_colours(grid)[None, :, :], aspect="auto", extent=(wl[0], wl[-1], -0.04 * top, -0.01 * top),
                  origin="lower", interpolation="bilinear", zorder=1)
        ax.plot(wl, y, color="0.1", linewidth=0.9, zorder=3)
        ax.axvline(metrics.peak_nm, color="0.2", linewidth=0.7, linestyle="--", label=f"peak {metrics.peak_nm:.2f} nm")
        ax.axvline(metrics.centroid_nm, color="0.5", linewidth=0.7, linestyle=":", label=f"centroid {metrics.centroid_nm:.2f} nm")
        if metrics.fwhm_nm is not None:
            half = 0.5 * float(np.nanmax(y))
            left = metrics.peak_nm - metrics.fwhm_nm / 2
            ax.annotate("", xy=(left, half), xytext=(left + metrics.fwhm_nm, half),
                        arrowprops=dict(arrowstyle="<->", color="0.2", linewidth=0.7))
            ax.plot([], [], color="0.2", linewidth=0.7, label=f"FWHM {metrics.fwhm_nm:.2f} nm")
        parts = [f"x = {metrics.cie_x:.4f}, y = {metrics.cie_y:.4f}"]
        if metrics.cct_k is not None:
            parts.append(f"CCT {metrics.cct_k:.0f} K, Duv {metrics.duv:+.4f}")
        if metrics.dominant_wavelength_nm is not None:
            parts.append(f"dominant {metrics.dominant_wavelength_nm:.1f} nm")
        ax.set_title(title or "; ".join(parts))
        ax.set_xlim(wl[0], wl[-1])
        ax.set_ylim(-0.05 * top, top)
        ax.set_xlabel("wavelength in air (nm)")
        ax.set_ylabel("relative spectral power")
        ax.legend(loc="upper right", fontsize=7)
        ax.grid(True)
    return figure


def daylight_figure(result, *, title: str | None = None):
    """The continuum-normalised daylight spectrum, identified dips labelled (telluric in blue)."""
    with _style():
        figure, axes = _figure(1, height=3.8)
        ax = axes[0]
        s = result.normalised
        ax.plot(s.wavelength_nm, s.intensity, color="0.1", linewidth=0.8)
        ax.set_ylim(0, 1.35)
        for line in result.identified:
            colour = "#1f4e79" if line.atmospheric else "#8c2d04"
            ax.axvline(line.wavelength_nm, ymin=0.0, ymax=0.76, color=colour, linewidth=0.6, alpha=0.7)
            ax.text(line.wavelength_nm, 1.05, f"{line.label} {line.species}", rotation=90, fontsize=6.5,
                    ha="center", va="bottom", color=colour)
        ax.set_xlim(s.wavelength_nm[0], s.wavelength_nm[-1])
        ax.set_xlabel("wavelength in air (nm)")
        ax.set_ylabel("relative to continuum")
        ax.set_title(title or "dark lines of daylight (red: solar, blue: our atmosphere)")
        ax.grid(True)
    return figure


def plan_figure(plan, *, title: str | None = None):
    """The sensor with the predicted first-order colours, the range ends, second-order onset; nm/px below."""
    with _style():
        figure, axes = _figure(2, height=2.4)
        ax = axes[0]
        columns, lam = plan.column_px, plan.wavelength_nm
        colours = _colours(np.nan_to_num(lam, nan=0.0))
        image = np.where(np.isfinite(lam)[:, None], colours, 0.08)[None, :, :]
        ax.imshow(np.repeat(image, 20, axis=0), aspect="auto", extent=(0, plan.image_width_px, 0, 1))
        for nm, col in zip(plan.range_nm, plan.range_columns_px):
            if col is not None:
                ax.axvline(col, color="white", linewidth=0.8)
                ax.text(col, 0.85, f" {nm:.0f} nm ", ha="center", va="center", fontsize=7, color="white",
                        bbox=dict(facecolor="0.15", edgecolor="none", pad=1.0))
        if plan.second_order_start_column_px is not None:
            ax.axvline(plan.second_order_start_column_px, color="#ff6b6b", linewidth=0.9, linestyle="--")
            ax.text(plan.second_order_start_column_px, 0.15, f" 2nd order from {plan.second_order_overlap_from_nm:.0f} nm ",
                    ha="left", va="center", fontsize=7, color="white", bbox=dict(facecolor="#b2182b", edgecolor="none", pad=1.0))
        ax.set_yticks([])
        ax.set_xlim(0, plan.image_width_px)
        ax.set_title(title or f"{plan.lines_per_mm:g} lines/mm, tilt {plan.tilt_deg:.1f} deg, "
                     f"HFOV {plan.horizontal_fov_deg:g} deg: resolution {plan.resolution_nm:.2f} nm ({plan.limited_by})")
        ax = axes[1]
        ax.plot(columns, plan.dispersion_nm_per_px, color="0.1", linewidth=1.0)
        ax.set_xlim(0, plan.image_width_px)
        ax.set_xlabel("sensor column (px)")
        ax.set_ylabel("nm per px")
        ax.grid(True)
    return figure


def save_analysis_figure(figure, path, *, force: bool = False, title: str | None = None, provenance=None):
    """Save a figure atomically as PNG, SVG or PDF (see :func:`benchspec.plots.save_figure`)."""
    from ..plots import save_figure

    return save_figure(figure, path, force=force, title=title, provenance=provenance)
