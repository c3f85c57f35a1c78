"""The viewer's Practicals page: response, absorbance, Rydberg, LED/laser figures, daylight lines.

Layout (our own)::

    +-----------------------------------------+
    | ( ) Response  ( ) Absorbance ( ) Rydberg |  which practical
    | ( ) LED/laser ( ) Daylight   ( ) Planner |
    | cautions of the light source involved    |
    | (the planner involves none)              |
    | controls of the chosen practical         |
    | result text (numbers with uncertainties) |
    | figure (benchspec.analysis.plots)        |
    | one-line message                         |
    +-----------------------------------------+

:class:`PracticalsPanel` knows nothing of the window around it. It is given a
callable that returns the current calibrated spectrum (or None), a callable
that reports messages to the window and its log, and optionally a way to run
jobs on the window's processing thread. Every number comes from one core call
in :mod:`benchspec.analysis`; every figure from :mod:`benchspec.analysis.plots`.
The Tk thread only draws: spectra are extracted, results computed and figures
built in the job; figures are rendered by :class:`~benchspec.gui.canvas.ThreadedCanvas`.

:func:`attach_to_viewer` adds the page to the bench viewer's notebook.
"""

from __future__ import annotations

import itertools
import logging
import traceback
import tkinter as tk
import warnings
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from tkinter import ttk
from typing import Any, Callable

import numpy as np

from matplotlib.backend_bases import FigureCanvasBase

from ..errors import AnalysisError, BenchspecError, InputError
from ..safety import GENERAL_CAUTION, cautions_for
from ..spectrum import Spectrum
from .canvas import ThreadedCanvas
from .colours import PALETTE

__all__ = [
    "PRACTICALS",
    "PracticalOutcome",
    "PracticalsPanel",
    "attach_to_viewer",
    "absorbance_peak",
    "parse_temperature_k",
    "parse_number",
]

log = logging.getLogger("benchspec.viewer")

#: key -> (short name on the chooser, title, light-source type whose cautions apply)
PRACTICALS: dict[str, tuple[str, str, str]] = {
    "response": ("Response", "Instrument response from a halogen lamp", "halogen"),
    "absorbance": ("Absorbance", "Absorbance of a sample against a blank", "halogen"),
    "rydberg": ("Rydberg", "Rydberg constant from a hydrogen tube", "discharge"),
    "source": ("LED / laser", "Figures of an LED, lamp or laser", "led"),
    "daylight": ("Daylight", "Dark lines of daylight", "daylight"),
    "planner": ("Planner", "Setup planner: grating and camera", ""),
}

_NOT_A_LASER = "(not a laser)"
_NO_SPECTRUM = ("no calibrated spectrum yet: point the camera at the source, calibrate (c) or load a "
                "calibration, then try again")


@dataclass(frozen=True)
class PracticalOutcome:
    """What one practical job hands back to the Tk thread."""

    request: int
    practical: str
    action: str
    ok: bool
    text: str                          # the result, or the one-line error
    figure: Any = None                 # matplotlib Figure, built off the Tk thread
    value: Any = None                  # the core's own result
    warnings: tuple[str, ...] = ()
    keep: dict = field(default_factory=dict)   # state to keep: "response", "blank", ...
    figure_factory: Callable[[], Any] | None = None   # builds the figure again (the larger window)


# --------------------------------------------------------------------------- plain helpers (no Tk)


def parse_temperature_k(text: str) -> float:
    """The lamp colour temperature typed in the entry, in kelvin; InputError naming the value otherwise."""
    try:
        value = float(str(text).strip().replace(",", "."))
    except ValueError:
        raise InputError(f"the lamp temperature must be a number in kelvin (e.g. 2900), got {text!r}") from None
    if not np.isfinite(value):
        raise InputError(f"the lamp temperature must be a finite number of kelvin, got {text!r}")
    return value


def parse_number(name: str, text: str, *, blank_ok: bool = False) -> float | None:
    """A number typed in an entry; None for a blank entry when ``blank_ok``; InputError naming the entry otherwise."""
    text = str(text).strip().replace(",", ".")
    if not text and blank_ok:
        return None
    try:
        value = float(text)
    except ValueError:
        raise InputError(f"{name} must be a number, got {text!r}" + (" (or leave it blank)" if blank_ok else "")) from None
    if not np.isfinite(value):
        raise InputError(f"{name} must be a finite number, got {text!r}")
    return value


def absorbance_peak(result) -> tuple[float, float, float, float] | None:
    """(wavelength_nm, absorbance, uncertainty, largest measurable) at the highest measurable absorbance.

    Only valid samples below the setup's measurable limit count; None when
    there is none.
    """
    usable = result.valid & np.isfinite(result.absorbance) & ~result.beyond_measurable
    if not np.any(usable):
        return None
    index = np.flatnonzero(usable)[int(np.argmax(result.absorbance[usable]))]
    return (float(result.wavelength_nm[index]), float(result.absorbance[index]),
            float(result.absorbance_uncertainty[index]), float(result.max_measurable_absorbance[index]))


def _range_text(spectrum: Spectrum) -> str:
    wl = spectrum.wavelength_nm
    return f"{spectrum.size} samples, {wl[0]:.0f}-{wl[-1]:.0f} nm"


def _or_na(value, fmt: str, unc=None, unit: str = "") -> str:
    if value is None:
        return "n/a"
    text = format(value, fmt)
    if unc is not None:
        text += " ± " + format(unc, fmt)
    return text + unit


def describe_response(response) -> str:
    low, high = response.valid_range_nm
    ref = (f"Planck at {response.temperature_k:.0f} K" if response.reference == "planck"
           else "daylight (CIE D65)")
    valid = int(np.count_nonzero(response.valid))
    return (f"Response from {ref}: valid {low:.0f}-{high:.0f} nm ({valid} samples), "
            f"smoothed over {response.smoothing_nm:g} nm.\n"
            "Apply it to spectra taken with the same camera settings.")


def describe_corrected(corrected: Spectrum) -> str:
    y = corrected.intensity
    peak = int(np.nanargmax(y))
    return (f"Corrected spectrum: {_range_text(corrected)}; relative spectral power peaks at "
            f"{corrected.wavelength_nm[peak]:.1f} nm.")


def describe_blank(blank: Spectrum) -> str:
    y = blank.intensity
    peak = int(np.nanargmax(y))
    return (f"Blank kept: {_range_text(blank)}, brightest at {blank.wavelength_nm[peak]:.0f} nm.\n"
            "Now put the sample in the same place and press Measure sample.")


def describe_absorbance(result) -> str:
    lines = []
    peak = absorbance_peak(result)
    if peak is None:
        lines.append("No measurable absorbance: every valid sample is beyond what this setup can measure.")
    else:
        wl, a, da, limit = peak
        lines.append(f"Absorbance peak A = {a:.3f} ± {da:.3f} at {wl:.1f} nm "
                     f"(T = {10 ** -a:.3f}; this setup measures up to A ≈ {limit:.1f} there).")
    lines.append(f"Stray light {100 * result.stray_light_fraction:.3g}% of the blank's peak "
                 f"({result.stray_light_source}).")
    beyond = result.beyond_measurable
    if np.any(beyond):
        wl = result.wavelength_nm[beyond]
        lines.append(f"STRAY-LIGHT WARNING: at {int(np.count_nonzero(beyond))} samples ({wl.min():.0f}-{wl.max():.0f} nm) "
                     "the absorbance is beyond what this setup can measure; dilute the sample or use a shorter path.")
    return "\n".join(lines)


def describe_fit(fit, *, wavelength_nm: float | None = None) -> str:
    unit = f" {fit.concentration_unit}" if fit.concentration_unit else ""
    where = f" at {wavelength_nm:g} nm" if wavelength_nm is not None else ""
    return (f"Beer-Lambert{where}, {fit.concentrations.size} standards: A = ({fit.slope_per_concentration:.4g} ± "
            f"{fit.slope_uncertainty:.2g}) c + ({fit.intercept:.4f} ± {fit.intercept_uncertainty:.4f})\n"
            f"R^2 = {fit.r_squared:.4f}; limit of detection {fit.limit_of_detection:.3g}{unit}, "
            f"of quantitation {fit.limit_of_quantitation:.3g}{unit}\n"
            "Now measure an unknown against the same blank and press Read unknown.")


def describe_estimate(estimate, *, wavelength_nm: float | None = None) -> str:
    unit = f" {estimate.concentration_unit}" if estimate.concentration_unit else ""
    lines = [f"Unknown: c = {estimate.concentration:.4g} ± {estimate.concentration_uncertainty:.2g}{unit} "
             f"(A = {estimate.absorbance:.4f} ± {estimate.absorbance_uncertainty:.4f}"
             + (f" at {wavelength_nm:g} nm)" if wavelength_nm is not None else ")")]
    if estimate.below_limit_of_detection:
        lines.append("Below the limit of detection: report it as 'not detected'.")
    if estimate.outside_calibration_range:
        lines.append("Outside the standards' range: dilute it or add a standard.")
    return "\n".join(lines)


def describe_rydberg(result) -> str:
    lines = [f"R_H = {result.rydberg_per_m:.6e} ± {result.uncertainty_per_m:.1e} /m"
             + (" (scaled by the Birge ratio)" if result.scaled else ""),
             f"CODATA R_inf/(1+m_e/m_p) = {result.codata_rydberg_per_m:.6e} /m: "
             f"{result.difference_sigma:+.1f} sigma ({100 * result.relative_difference:+.3f}%)",
             f"{len(result.lines)} Balmer lines (air -> vacuum by {result.air_to_vacuum}):"]
    for line in result.lines:
        lines.append(f"  {line.name:8s} {line.upper_level}->2  {line.air_wavelength_nm:.2f} air  "
                     f"{line.vacuum_wavelength_nm:.2f} vac  {line.residual_nm:+.2f} nm")
    for line in getattr(result, "left_out", ()):
        if line.residual_nm is not None:
            where = f"{line.residual_nm:+.2f} nm from the fitted series"
        else:
            where = f"{line.air_wavelength_nm - line.expected_air_wavelength_nm:+.2f} nm from its Balmer wavelength"
        lines.append(f"  {line.name:8s} left out: {line.air_wavelength_nm:.2f} air is {where} (not taken as that line)")
    return "\n".join(lines)


def describe_metrics(m) -> str:
    lines = [f"Peak {m.peak_nm:.2f} ± {m.peak_uncertainty_nm:.2f} nm; centroid {m.centroid_nm:.2f} ± "
             f"{m.centroid_uncertainty_nm:.2f} nm",
             "FWHM " + _or_na(m.fwhm_nm, ".2f", m.fwhm_uncertainty_nm, " nm")
             + (" (resolution-limited)" if m.fwhm_resolution_limited else "")
             + "; dominant wavelength " + _or_na(m.dominant_wavelength_nm, ".1f", None, " nm")
             + (" (complementary)" if m.complementary_wavelength else "") + " (white E)",
             f"CIE 1931 x = {m.cie_x:.4f} ± {m.cie_x_uncertainty:.4f}, y = {m.cie_y:.4f} ± {m.cie_y_uncertainty:.4f}",
             ("CCT " + _or_na(m.cct_k, ".0f", m.cct_uncertainty_k, " K") + ", Duv " + _or_na(m.duv, "+.4f", m.duv_uncertainty)
              + (f" ({m.cct_method})" if m.cct_method else "")) if m.is_white else "CCT, Duv: n/a (not a white source)"]
    if m.laser is not None:
        check = m.laser
        verdict = "within" if check.within_tolerance else "OUTSIDE"
        lines.append(f"Laser: {check.measured_nm:.2f} ± {check.measured_uncertainty_nm:.2f} nm, "
                     f"{check.offset_nm:+.2f} nm from nominal {check.nominal_nm:g} nm ({verdict} ±{check.tolerance_nm:g} nm)")
    return "\n".join(lines)


def describe_daylight(result) -> str:
    found = result.identified
    lines = [f"{len(found)} dark lines labelled, {len(result.lines) - len(found)} dips unlabelled:"]
    for line in found:
        where = "our atmosphere" if line.atmospheric else "the Sun"
        lines.append(f"  {line.label:6s} {line.wavelength_nm:7.2f} ± {line.uncertainty_nm:.2f} nm  "
                     f"{line.species} ({where})")
    if result.missing_labels:
        lines.append("Not found: " + ", ".join(result.missing_labels))
    return "\n".join(lines)


def describe_plan(plan) -> str:
    def column(value):
        return "off the sensor" if value is None else f"column {value:.0f}"

    (low, high), (c_low, c_high) = plan.range_nm, plan.range_columns_px
    lines = [f"{low:.0f} nm at {column(c_low)}, {high:.0f} nm at {column(c_high)} of {plan.image_width_px} px "
             f"(tilt {plan.tilt_deg:.1f} deg)"]
    if plan.visible_range_nm is not None:
        lines.append(f"On the sensor: {plan.visible_range_nm[0]:.0f}-{plan.visible_range_nm[1]:.0f} nm")
    if plan.dispersion_range_nm_per_px is not None:
        lines.append(f"Dispersion {plan.dispersion_range_nm_per_px[0]:.3f}-{plan.dispersion_range_nm_per_px[1]:.3f} nm/px")
    slit = "n/a" if plan.slit_resolution_nm is None else f"{plan.slit_resolution_nm:.2f}"
    lines.append(f"Resolution at {plan.reference_nm:g} nm: {plan.resolution_nm:.2f} nm, limited by {plan.limited_by} "
                 f"(slit {slit}, pixels {plan.pixel_resolution_nm:.2f}, grooves {plan.groove_resolution_nm:.2f} nm)")
    overlap = f"Second order overlaps first from {plan.second_order_overlap_from_nm:.0f} nm"
    if plan.second_order_on_sensor and plan.second_order_start_column_px is not None:
        overlap += f" (column {plan.second_order_start_column_px:.0f})"
    lines.append(overlap + ("" if plan.second_order_on_sensor else " (off the sensor)"))
    lines.append(f"Tilt that centres {low:.0f}-{high:.0f} nm: {plan.centring_tilt_deg:.1f} deg"
                 + ("" if plan.centred_range_fits else " (the range is wider than the sensor)"))
    return "\n".join(lines)


# --------------------------------------------------------------------------- the panel


class PracticalsPanel(ttk.Frame):
    """A Tk page with the lab practicals on the current calibrated spectrum.

    Parameters
    ----------
    parent : tk widget
    current_spectrum : callable
        ``current_spectrum() -> Spectrum or None``: the calibrated spectrum on
        screen. It is called inside the job, off the Tk thread (it may
        extract a spectrum from frames), and must not touch Tk widgets.
    report : callable, optional
        ``report(text, level="info"|"warning"|"error")``, called on the Tk
        thread: the window's message strip and log.
    submit : callable, optional
        ``submit(job) -> bool`` runs ``job()`` on the window's processing
        thread and, when it returns True, the window later passes the job's
        return value to :meth:`deliver` on the Tk thread. Without it (or when
        it returns False) the panel runs the job on a thread of its own.
    ask_save_path, ask_open_path : callable, optional
        File dialogs for saving and loading a response, replaceable in tests:
        ``ask_save_path(parent, title, default_name, filetypes)`` and
        ``ask_open_path(parent, title, filetypes, folder=False)``, each
        returning a path or None.
    lasers : sequence of benchspec.refdata.Laser, optional
        The lasers offered for the laser check (default
        :func:`benchspec.refdata.load_lasers`).

    Notes
    -----
    Whoever destroys the page should run ``gc.collect()`` on the Tk thread
    afterwards (the viewer does when it closes): Tk variables and images
    left in reference cycles would otherwise be freed by whichever thread
    the collector next runs on, and Tk cannot answer there.
    """

    def __init__(self, parent, *, current_spectrum: Callable[[], Spectrum | None],
                 report: Callable[..., None] | None = None, submit: Callable[[Callable[[], Any]], bool] | None = None,
                 ask_save_path: Callable | None = None, ask_open_path: Callable | None = None,
                 lasers=None, poll_ms: int = 40):
        super().__init__(parent, padding=4)
        self.current_spectrum = current_spectrum
        self._report = report
        self._submit = submit
        self.ask_save_path = ask_save_path or _ask_save_path
        self.ask_open_path = ask_open_path or _ask_open_path
        if lasers is None:
            from ..refdata import load_lasers

            lasers = load_lasers()
        self.lasers = {f"{l.name} ({l.nominal_nm:g} ± {l.tolerance_nm:g} nm)": l for l in lasers}
        self.poll_ms = int(poll_ms)
        self._executor = ThreadPoolExecutor(max_workers=1, thread_name_prefix="benchspec-practicals")
        self._render_executor = ThreadPoolExecutor(max_workers=1, thread_name_prefix="benchspec-practicals-plot")
        self._own_jobs: list[Future] = []
        self._requests = itertools.count(1)
        self._latest: dict[str, int] = {}       # practical -> newest request id (older answers are dropped)
        self.pending: set[int] = set()
        self.response = None                     # SpectralResponse in use
        self.blank: Spectrum | None = None
        self.standards: list[tuple[float, float, float, float]] = []   # c, A, sigma_A, wavelength_nm
        self.fit = None                          # BeerLambertFit of the standards
        self.results: dict[str, Any] = {}        # practical -> the core result shown
        self.last_outcome: PracticalOutcome | None = None
        self.messages: list[str] = []
        self.canvas: ThreadedCanvas | None = None
        self.large_canvas: ThreadedCanvas | None = None
        self.large_window: tk.Toplevel | None = None
        self._figure_factory = None
        self._after = None
        self._closed = False
        self.buttons: dict[str, ttk.Button] = {}
        self._build()
        self.choose("response", announce=False)
        self.bind("<Destroy>", self._on_destroy, add="+")
        self._after = self.after(self.poll_ms, self._poll)

    # ------------------------------------------------------------------ building
    def _build(self) -> None:
        p = PALETTE
        style = ttk.Style(self)
        style.configure("PracticalCaution.TLabel", background=p["warning_light"], foreground=p["ink"],
                        font=("TkDefaultFont", 8), padding=(5, 3))
        style.configure("PracticalNote.TLabel", foreground=p["muted"], font=("TkDefaultFont", 9))
        style.configure("PracticalHint.TLabel", font=("TkDefaultFont", 9))
        style.configure("PracticalRadio.TRadiobutton", font=("TkDefaultFont", 9))
        self.columnconfigure(0, weight=1)
        self.rowconfigure(4, weight=1)

        chooser = ttk.Frame(self)
        chooser.grid(row=0, column=0, sticky="ew")
        self.practical = tk.StringVar(value="response")
        self.radios: dict[str, ttk.Radiobutton] = {}
        for index, (key, (short, _title, _light)) in enumerate(PRACTICALS.items()):
            radio = ttk.Radiobutton(chooser, text=short, value=key, variable=self.practical,
                                    style="PracticalRadio.TRadiobutton", command=lambda k=key: self.choose(k))
            radio.grid(row=index // 3, column=index % 3, sticky="w", padx=(0, 6))
            self.radios[key] = radio

        self._wrapped: list[ttk.Label] = []
        self.caution = ttk.Label(self, text="", style="PracticalCaution.TLabel", wraplength=285, justify="left")
        self._wrapped.append(self.caution)
        self.caution.grid(row=1, column=0, sticky="ew", pady=(3, 3))

        self.controls = ttk.Frame(self)
        self.controls.grid(row=2, column=0, sticky="ew")
        self.controls.columnconfigure(0, weight=1)
        self.pages = {key: builder(self.controls) for key, builder in (
            ("response", self._build_response), ("absorbance", self._build_absorbance),
            ("rydberg", self._build_rydberg), ("source", self._build_source), ("daylight", self._build_daylight),
            ("planner", self._build_planner))}

        self.result_text = tk.Text(self, height=7, wrap="word", background="#fbfaf6", foreground=p["ink"],
                                   relief="flat", font=("TkDefaultFont", 9), width=36)
        self.result_text.grid(row=3, column=0, sticky="ew", pady=(3, 2))
        self.result_text.configure(state="disabled")

        self.figure_box = ttk.Frame(self)
        self.figure_box.grid(row=4, column=0, sticky="nsew")
        self.figure_box.columnconfigure(0, weight=1)
        self.figure_box.rowconfigure(0, weight=1)
        self.figure_note = ttk.Label(self.figure_box, text="the figure of a result appears here",
                                     style="PracticalNote.TLabel")
        self.figure_note.grid(row=0, column=0)

        self.figure_buttons = ttk.Frame(self)
        self.figure_buttons.grid(row=5, column=0, sticky="ew")
        self.message = ttk.Label(self.figure_buttons, text="", style="PracticalNote.TLabel", wraplength=200,
                                 justify="left")
        self.message.grid(row=0, column=0, sticky="w")
        self.figure_buttons.columnconfigure(0, weight=1)
        self.buttons["larger"] = ttk.Button(self.figure_buttons, text="Larger figure", command=self.show_larger_figure,
                                            state="disabled")
        self.buttons["larger"].grid(row=0, column=1, sticky="e")
        self.bind("<Configure>", self._on_resize, add="+")

    def _page(self, parent, hint: str) -> ttk.Frame:
        page = ttk.Frame(parent)
        page.columnconfigure(3, weight=1)
        label = ttk.Label(page, text=hint, style="PracticalHint.TLabel", wraplength=285, justify="left")
        label.grid(row=0, column=0, columnspan=4, sticky="w", pady=(0, 2))
        self._wrapped.append(label)
        return page

    def _button(self, page, name: str, text: str, command, row: int, column: int) -> ttk.Button:
        button = ttk.Button(page, text=text, command=command)
        button.grid(row=row, column=column, sticky="w", padx=(0, 3), pady=1)
        self.buttons[name] = button
        return button

    def _build_response(self, parent) -> ttk.Frame:
        page = self._page(parent, "Point the camera at a halogen or filament lamp of known colour temperature.")
        ttk.Label(page, text="Lamp (K)").grid(row=1, column=0, sticky="w")
        self.temperature = tk.StringVar(value="2900")
        self.temperature_entry = ttk.Entry(page, textvariable=self.temperature, width=6)
        self.temperature_entry.grid(row=1, column=1, sticky="w", padx=(2, 4))
        self._button(page, "response", "Response from this frame", self.measure_response, 1, 2)
        row = ttk.Frame(page)
        row.grid(row=2, column=0, columnspan=4, sticky="w")
        self._button(row, "apply_response", "Apply response", self.apply_response, 0, 0)
        self._button(row, "save_response", "Save…", self.save_response, 0, 1)
        self._button(row, "load_response", "Load…", self.load_response, 0, 2)
        self.correct_sources = tk.BooleanVar(value=True)
        ttk.Checkbutton(page, text="use it for LED/laser and daylight", variable=self.correct_sources).grid(
            row=3, column=0, columnspan=4, sticky="w")
        return page

    def _build_absorbance(self, parent) -> ttk.Frame:
        page = self._page(parent, "Blank (solvent) first, then the sample in the same cuvette and place, same exposure. "
                                  "Take a dark (Dark) before both.")
        self._button(page, "blank", "Take as blank", self.take_blank, 1, 0)
        self._button(page, "sample", "Measure sample", self.measure_sample, 1, 1)
        # Beer-Lambert: each measured sample can be a standard of known concentration, or an unknown
        beer = ttk.Frame(page)
        beer.grid(row=2, column=0, columnspan=4, sticky="w", pady=(2, 0))
        ttk.Label(beer, text="at nm").grid(row=0, column=0, sticky="w")
        self.standard_wavelength = tk.StringVar(value="")
        ttk.Entry(beer, textvariable=self.standard_wavelength, width=5).grid(row=0, column=1, padx=(2, 4))
        ttk.Label(beer, text="c").grid(row=0, column=2, sticky="w")
        self.standard_concentration = tk.StringVar(value="")
        ttk.Entry(beer, textvariable=self.standard_concentration, width=5).grid(row=0, column=3, padx=(2, 2))
        self.concentration_unit = tk.StringVar(value="mg/L")
        ttk.Entry(beer, textvariable=self.concentration_unit, width=5).grid(row=0, column=4, padx=(0, 4))
        self._button(beer, "clear_standards", "Clear", self.clear_standards, 0, 5)
        buttons = ttk.Frame(beer)
        buttons.grid(row=1, column=0, columnspan=6, sticky="w")
        self._button(buttons, "add_standard", "Add standard", self.add_standard, 0, 0)
        self._button(buttons, "fit_standards", "Fit standards", self.fit_standards, 0, 1)
        self._button(buttons, "unknown", "Read unknown", self.read_unknown, 0, 2)
        return page

    def _build_rydberg(self, parent) -> ttk.Frame:
        page = self._page(parent, "A hydrogen discharge tube in view: the Balmer lines give the Rydberg constant.")
        self._button(page, "rydberg", "Fit the Rydberg constant", self.measure_rydberg, 1, 0)
        return page

    def _build_source(self, parent) -> ttk.Frame:
        page = self._page(parent, "An LED, white lamp or a laser spot on a matte card.")
        ttk.Label(page, text="Laser").grid(row=1, column=0, sticky="w")
        self.laser = tk.StringVar(value=_NOT_A_LASER)
        self.laser_box = ttk.Combobox(page, textvariable=self.laser, state="readonly", width=27,
                                      values=[_NOT_A_LASER, *self.lasers])
        self.laser_box.grid(row=1, column=1, columnspan=3, sticky="w", padx=(2, 0))
        self.laser_box.bind("<<ComboboxSelected>>", lambda event: self._show_cautions(), add="+")
        self._button(page, "source", "Measure the source", self.measure_source, 2, 0).grid(columnspan=2)
        return page

    def _build_daylight(self, parent) -> ttk.Frame:
        page = self._page(parent, "Daylight scattered from a white card or the sky.")
        self._button(page, "daylight", "Find the dark lines", self.measure_daylight, 1, 0)
        return page

    def _build_planner(self, parent) -> ttk.Frame:
        page = self._page(parent, "Predict where 380-750 nm land on the sensor before building the setup. "
                                  "Blank tilt: the tilt that centres the range.")
        self.plan_entries: dict[str, tk.StringVar] = {}
        fields = (("lines_per_mm", "lines/mm", "1000"), ("image_width_px", "width (px)", "1280"),
                  ("horizontal_fov_deg", "HFOV (deg)", "60"), ("tilt_deg", "tilt (deg)", ""),
                  ("slit_width_mm", "slit (mm)", "0.1"), ("slit_distance_mm", "slit dist. (mm)", "100"))
        for index, (key, label, default) in enumerate(fields):
            row, col = 1 + index // 2, (index % 2) * 2
            ttk.Label(page, text=label).grid(row=row, column=col, sticky="w", padx=(0 if col == 0 else 6, 2))
            variable = tk.StringVar(value=default)
            ttk.Entry(page, textvariable=variable, width=6).grid(row=row, column=col + 1, sticky="w")
            self.plan_entries[key] = variable
        self._button(page, "planner", "Predict", self.plan, 4, 0)
        return page

    # ------------------------------------------------------------------ choosing and cautions
    def choose(self, key: str, *, announce: bool = True) -> None:
        """Show the controls of practical ``key`` and the cautions of its light source."""
        if key not in PRACTICALS:
            raise InputError(f"unknown practical {key!r}; choose one of: {', '.join(PRACTICALS)}")
        self.practical.set(key)
        for name, page in self.pages.items():
            if name == key:
                page.grid(row=0, column=0, sticky="ew")
            else:
                page.grid_remove()
        title = self._show_cautions()
        if announce:
            what = f"cautions for {title.lower()} shown" if self.light_source() else "no light source involved"
            self.tell(f"practical: {PRACTICALS[key][1]}; {what}")

    def light_source(self) -> str:
        """The light-source type (benchspec.safety) of the chosen practical; "" when none is involved."""
        key = self.practical.get()
        if key == "source" and self.laser.get() in self.lasers:
            return "laser"
        return PRACTICALS[key][2]

    def _show_cautions(self) -> str:
        if not self.light_source():
            self.caution.configure(text="No light source is involved: the planner works from the numbers below.")
            return "no light source"
        title, items = cautions_for(self.light_source())
        self.caution.configure(text=f"Cautions: {title}\n" + "\n".join(f"•  {item}" for item in items)
                               + "\n" + GENERAL_CAUTION)
        return title

    def cautions_shown(self) -> str:
        return self.caution.cget("text")

    # ------------------------------------------------------------------ messages
    def tell(self, text: str, *, level: str = "info") -> None:
        """A one-line message in the panel and in the window's log."""
        self.messages.append(f"{level}: {text}")
        # Results are in the text above and the log: the strip keeps them to one short line;
        # warnings and errors are shown whole (they say what to do).
        shown = text if level != "info" or len(text) <= 60 else text[:58].rstrip() + "…"
        self.message.configure(text=shown, foreground=PALETTE["warning"] if level != "info" else PALETTE["muted"])
        if self._report is not None:
            self._report(text, level=level)
        else:
            getattr(log, "info" if level == "info" else level)(text)

    # ------------------------------------------------------------------ actions (Tk thread)
    def measure_response(self) -> None:
        try:
            temperature = parse_temperature_k(self.temperature.get())
        except InputError as exc:
            self.tell(f"response: {exc}", level="error")
            return

        def compute(spectrum):
            from ..analysis.plots import response_figure
            from ..analysis.response import compute_response

            response = compute_response(spectrum, temperature_k=temperature)
            return describe_response(response), lambda: response_figure(response), response, {"response": response}

        self._start("response", "response", compute, f"computing the response (Planck, {temperature:g} K)…")

    def apply_response(self) -> None:
        response = self.response
        if response is None:
            self.tell("apply response: no response yet; measure one from a halogen lamp or load a file", level="error")
            return

        def compute(spectrum):
            from ..analysis.response import apply_response
            from ..plots import spectrum_figure

            corrected = apply_response(spectrum, response)
            return (describe_corrected(corrected), lambda: spectrum_figure(corrected, title="response-corrected"),
                    corrected, {})

        self._start("response", "apply", compute, "applying the response to the current spectrum…")

    def save_response(self) -> None:
        response = self.response
        if response is None:
            self.tell("save response: no response yet; measure one first", level="error")
            return
        path = self.ask_save_path(self.winfo_toplevel(), "Save the response", "response.json", [("Response", "*.json")])
        if not path:
            return

        def job():
            from ..analysis.response import save_response

            written = save_response(response, path, force=True)
            return f"response saved to {written}"

        self._start_plain("response", "save", job, f"saving the response to {path}…")

    def load_response(self) -> None:
        path = self.ask_open_path(self.winfo_toplevel(), "Load a response", [("Response", "*.json"), ("All", "*")])
        if not path:
            return

        def job():
            from ..analysis.plots import response_figure
            from ..analysis.response import load_response

            response = load_response(path)
            return describe_response(response), lambda: response_figure(response), response, {"response": response}

        self._start_plain("response", "load", job, f"loading the response {path}…", with_result=True)

    def take_blank(self) -> None:
        def compute(spectrum):
            from ..plots import spectrum_figure

            return describe_blank(spectrum), lambda: spectrum_figure(spectrum, title="blank"), spectrum, {"blank": spectrum}

        self._start("absorbance", "blank", compute, "taking the current spectrum as the blank…")

    def measure_sample(self) -> None:
        blank = self.blank
        if blank is None:
            self.tell("absorbance: take a blank first (solvent in the cuvette, then Take as blank)", level="error")
            return

        def compute(sample):
            from ..analysis.absorbance import absorbance_spectrum
            from ..analysis.plots import absorbance_figure

            result = absorbance_spectrum(sample, blank=blank)
            return describe_absorbance(result), lambda: absorbance_figure(result), result, {}

        self._start("absorbance", "sample", compute, "measuring the sample against the blank…")

    def _last_absorbance(self, what: str):
        result = self.results.get("absorbance")
        if result is None:
            self.tell(f"{what}: measure a sample against the blank first", level="error")
        return result

    def _standard_wavelength(self, result) -> float:
        """The wavelength of the Beer-Lambert reading: the entry, else the measured sample's peak (then kept)."""
        value = parse_number("the wavelength", self.standard_wavelength.get(), blank_ok=True)
        if value is None:
            peak = absorbance_peak(result)
            if peak is None:
                raise AnalysisError("no measurable absorbance peak to read at: type a wavelength in 'at nm'")
            value = round(peak[0], 1)
            self.standard_wavelength.set(f"{value:g}")
        return value

    def add_standard(self) -> None:
        """Keep the last measured sample as a standard of the concentration typed in 'c'."""
        from ..analysis.absorbance import band_absorbance

        result = self._last_absorbance("add standard")
        if result is None:
            return
        try:
            concentration = parse_number("the concentration", self.standard_concentration.get())
            wavelength = self._standard_wavelength(result)
            reading = band_absorbance(result, wavelength_nm=wavelength)
        except BenchspecError as exc:
            self.tell(f"add standard: {exc}", level="error")
            return
        self.standards.append((concentration, reading.absorbance, reading.absorbance_uncertainty, wavelength))
        self.tell(f"standard {len(self.standards)}: c = {concentration:g} {self.concentration_unit.get()}, "
                  f"A = {reading.absorbance:.4f} ± {reading.absorbance_uncertainty:.4f} at {wavelength:g} nm")

    def clear_standards(self) -> None:
        self.standards.clear()
        self.fit = None
        self.tell("standards cleared")

    def fit_standards(self) -> None:
        standards = list(self.standards)
        if len({s[3] for s in standards}) > 1:
            self.tell("fit standards: the standards were read at different wavelengths; Clear and add them again",
                      level="error")
            return
        unit = self.concentration_unit.get().strip()

        def job():
            from ..analysis.absorbance import fit_beer_lambert
            from ..analysis.plots import beer_lambert_figure

            c, a, sa = (np.array([s[k] for s in standards], dtype=float) for k in range(3))
            fit = fit_beer_lambert(c, a, absorbance_uncertainties=sa, concentration_unit=unit)
            text = describe_fit(fit, wavelength_nm=standards[0][3] if standards else None)
            return text, lambda: beer_lambert_figure(fit, absorbance_uncertainties=sa), fit, {"fit": fit}

        self._start_plain("absorbance", "fit", job, f"fitting Beer-Lambert to {len(standards)} standard(s)…",
                          with_result=True)

    def read_unknown(self) -> None:
        """The concentration of the last measured sample, read off the Beer-Lambert fit."""
        from ..analysis.absorbance import band_absorbance

        fit = self.fit
        if fit is None:
            self.tell("read unknown: fit the standards first (at least 2)", level="error")
            return
        result = self._last_absorbance("read unknown")
        if result is None:
            return
        wavelength = self.standards[0][3] if self.standards else None
        try:
            if wavelength is None:
                wavelength = self._standard_wavelength(result)
            reading = band_absorbance(result, wavelength_nm=wavelength)
        except BenchspecError as exc:
            self.tell(f"read unknown: {exc}", level="error")
            return
        uncertainties = np.array([s[2] for s in self.standards], dtype=float) if self.standards else None

        def job():
            from ..analysis.absorbance import predict_concentration
            from ..analysis.plots import beer_lambert_figure

            estimate = predict_concentration(fit, reading.absorbance, absorbance_uncertainty=reading.absorbance_uncertainty,
                                             label="unknown")
            def figure():
                return beer_lambert_figure(fit, unknowns=[estimate], absorbance_uncertainties=uncertainties)

            return describe_estimate(estimate, wavelength_nm=wavelength), figure, estimate, {}

        self._start_plain("absorbance", "unknown", job, "reading the unknown off the fit…", with_result=True)

    def measure_rydberg(self) -> None:
        def compute(spectrum):
            from ..analysis.plots import rydberg_figure
            from ..analysis.rydberg import rydberg_from_spectrum

            result = rydberg_from_spectrum(spectrum)
            return describe_rydberg(result), lambda: rydberg_figure(result), result, {}

        self._start("rydberg", "rydberg", compute, "finding the Balmer lines…")

    def _correction(self):
        return self.response if (self.response is not None and self.correct_sources.get()) else None

    def measure_source(self) -> None:
        laser = self.lasers.get(self.laser.get())
        response = self._correction()

        def compute(spectrum):
            from ..analysis.metrics import source_metrics
            from ..analysis.plots import metrics_figure

            if response is not None:
                from ..analysis.response import apply_response

                spectrum = apply_response(spectrum, response)
            options = {}
            if laser is not None:
                options = dict(laser_nominal_nm=laser.nominal_nm, laser_tolerance_nm=laser.tolerance_nm,
                               laser_label=laser.name)
            metrics = source_metrics(spectrum, **options)
            text = describe_metrics(metrics)
            text += "\n(response-corrected)" if response is not None else "\n(not response-corrected: colour figures are approximate)"
            return text, lambda: metrics_figure(metrics, spectrum), metrics, {}

        self._start("source", "source", compute, "measuring the source…")

    def measure_daylight(self) -> None:
        response = self._correction()

        def compute(spectrum):
            from ..analysis.daylight import identify_daylight_lines
            from ..analysis.plots import daylight_figure

            if response is not None:
                from ..analysis.response import apply_response

                spectrum = apply_response(spectrum, response)
            result = identify_daylight_lines(spectrum)
            return describe_daylight(result), lambda: daylight_figure(result), result, {}

        self._start("daylight", "daylight", compute, "finding the dark lines of daylight…")

    def plan_options(self) -> dict:
        """The planner's entries as keyword arguments of ``plan_setup``; InputError naming a bad entry."""
        names = {"lines_per_mm": "lines/mm", "image_width_px": "the image width", "horizontal_fov_deg": "the HFOV",
                 "tilt_deg": "the tilt", "slit_width_mm": "the slit width", "slit_distance_mm": "the slit distance"}
        options = {}
        for key, variable in self.plan_entries.items():
            value = parse_number(names[key], variable.get(), blank_ok=key in ("tilt_deg", "slit_width_mm", "slit_distance_mm"))
            if value is not None:
                options[key] = int(value) if key == "image_width_px" and value == int(value) else value
        return options

    def plan(self) -> None:
        try:
            options = self.plan_options()
        except InputError as exc:
            self.tell(f"planner: {exc}", level="error")
            return

        def job():
            from ..analysis.planner import plan_setup
            from ..analysis.plots import plan_figure

            result = plan_setup(**options)
            return describe_plan(result), lambda: plan_figure(result), result, {}

        self._start_plain("planner", "planner", job, "predicting the setup…", with_result=True)

    # ------------------------------------------------------------------ jobs
    def _start(self, practical: str, action: str, compute, message: str) -> None:
        """Run ``compute(current spectrum) -> (text, figure, value, keep)`` off the Tk thread."""
        spectrum_of = self.current_spectrum

        def job():
            spectrum = spectrum_of()
            if spectrum is None:
                raise AnalysisError(_NO_SPECTRUM)
            if not isinstance(spectrum, Spectrum) or not spectrum.is_calibrated:
                raise AnalysisError("the spectrum on screen has no wavelength axis: calibrate first (c)")
            return compute(spectrum)

        self._start_plain(practical, action, job, message, with_result=True)

    def _start_plain(self, practical: str, action: str, work, message: str, *, with_result: bool = False) -> None:
        request = next(self._requests)
        self.pending.discard(self._latest.get(practical))  # superseded (or lost with a closed source)
        self._latest[practical] = request
        self.pending.add(request)

        def job() -> PracticalOutcome:
            return _run(request, practical, action, work, with_result)

        self.tell(message)
        if self._submit is not None and self._submit(job):
            return
        self._own_jobs.append(self._executor.submit(job))

    def deliver(self, outcome: PracticalOutcome) -> None:
        """Show a finished job's outcome (Tk thread)."""
        if self._closed or not isinstance(outcome, PracticalOutcome):
            return
        self.pending.discard(outcome.request)
        for text in outcome.warnings:
            self.tell(f"{PRACTICALS[outcome.practical][0].lower()}: {text}", level="warning")
        if not outcome.ok:
            self.tell(f"{PRACTICALS[outcome.practical][0].lower()}: {outcome.text}", level="error")
            return
        if self._latest.get(outcome.practical) != outcome.request:
            return  # a newer request of the same practical supersedes this one
        if "response" in outcome.keep:
            self.response = outcome.keep["response"]
        if "blank" in outcome.keep:
            self.blank = outcome.keep["blank"]
        if "fit" in outcome.keep:
            self.fit = outcome.keep["fit"]
        self.last_outcome = outcome
        if outcome.value is None:  # a plain job (saving): its text is the message
            self.tell(outcome.text)
            return
        keyed_by_action = ("apply", "blank", "fit", "unknown")
        self.results[outcome.action if outcome.action in keyed_by_action else outcome.practical] = outcome.value
        self._show_text(outcome.text)
        if outcome.figure is not None:
            self._show_figure(outcome.figure)
            self._figure_factory = outcome.figure_factory
            self.buttons["larger"].configure(state="normal" if outcome.figure_factory else "disabled")
        self.tell(outcome.text.splitlines()[0])

    def _show_text(self, text: str) -> None:
        self.result_text.configure(state="normal")
        self.result_text.delete("1.0", "end")
        self.result_text.insert("end", text)
        self.result_text.configure(state="disabled")

    def shown_text(self) -> str:
        return self.result_text.get("1.0", "end").strip()

    def _show_figure(self, figure) -> None:
        """Put ``figure`` on the page; rendered off the Tk thread.

        One canvas serves every figure (its Tk photo image lives as long as
        the page): a canvas thrown away could be collected on a worker thread,
        where Tk cannot free its image.
        """
        figure.set_dpi(62)  # the page is narrow: smaller type keeps the labels apart
        figure._original_dpi = figure.dpi
        figure.set_facecolor(PALETTE["paper"])
        canvas = self.canvas
        if canvas is None:
            self.figure_note.grid_remove()
            canvas = ThreadedCanvas(figure, self.figure_box, self._render_executor)
            widget = canvas.get_tk_widget()
            widget.configure(width=280, height=200, highlightthickness=0, background=PALETTE["paper"])
            widget.grid(row=0, column=0, sticky="nsew")
            self.canvas = canvas
        else:
            _swap_figure(canvas, figure)
        canvas.render_async()

    def _on_resize(self, event) -> None:
        if event.widget is self:
            for label in self._wrapped:
                label.configure(wraplength=max(200, event.width - 18))
            self.message.configure(wraplength=max(150, event.width - 120))

    def show_larger_figure(self) -> None:
        """The figure of the last result in a window of its own (for a projector); one window, reused."""
        factory = self._figure_factory
        if factory is None:
            self.tell("no figure yet: run a practical first", level="warning")
            return
        figure = factory()
        figure.set_facecolor(PALETTE["paper"])
        if self.large_window is None:
            window = tk.Toplevel(self)
            window.title("benchspec practical figure")
            window.geometry("820x560")
            window.protocol("WM_DELETE_WINDOW", window.withdraw)  # kept for the next figure
            window.columnconfigure(0, weight=1)
            window.rowconfigure(0, weight=1)
            canvas = ThreadedCanvas(figure, window, self._render_executor)
            canvas.get_tk_widget().grid(row=0, column=0, sticky="nsew")
            self.large_window, self.large_canvas = window, canvas
        else:
            canvas = self.large_canvas
            _swap_figure(canvas, figure)
            self.large_window.deiconify()
            self.large_window.lift()
        canvas.render_async()

    def _poll(self) -> None:
        if self._closed:
            return
        try:
            for canvas in (self.canvas, self.large_canvas):
                if canvas is not None:
                    canvas.poll()
            done = [f for f in self._own_jobs if f.done()]
            for future in done:
                self._own_jobs.remove(future)
                self.deliver(future.result())
        finally:
            if not self._closed:
                self._after = self.after(self.poll_ms, self._poll)

    @property
    def busy(self) -> bool:
        """True while a job or a figure render is still running."""
        return bool(self.pending) or (self.canvas is not None and self.canvas.rendering)

    def _on_destroy(self, event) -> None:
        if event.widget is not self or self._closed:
            return
        self._closed = True
        if self._after is not None:
            try:
                self.after_cancel(self._after)
            except tk.TclError:
                pass
        self._executor.shutdown(wait=True)
        self._render_executor.shutdown(wait=True)


def _swap_figure(canvas: ThreadedCanvas, figure) -> None:
    """Show ``figure`` on ``canvas`` in place of its figure, at the canvas's size (Tk thread)."""
    canvas.wait()
    width, height = canvas.get_width_height(physical=True)
    FigureCanvasBase(canvas.figure)  # the old figure lets go of the canvas
    figure.set_canvas(canvas)
    canvas.figure = figure
    figure.set_size_inches(width / figure.dpi, height / figure.dpi, forward=False)


def _run(request: int, practical: str, action: str, work, with_result: bool) -> PracticalOutcome:
    """Run one job; every failure becomes an outcome with a one-line message (the window stays usable)."""
    from ..errors import DegradedResultWarning

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", DegradedResultWarning)
        try:
            if with_result:
                text, factory, value, keep = work()
                figure = factory() if factory is not None else None
            else:
                text, factory, figure, value, keep = work(), None, None, None, {}
        except BenchspecError as exc:
            return PracticalOutcome(request, practical, action, False, str(exc))
        except Exception as exc:  # a fault in the code, not in the input: say so, keep the window alive
            log.debug(traceback.format_exc())
            return PracticalOutcome(request, practical, action, False, f"failed unexpectedly ({type(exc).__name__}: {exc})")
    notes = tuple(dict.fromkeys(str(w.message) for w in caught if issubclass(w.category, DegradedResultWarning)))
    return PracticalOutcome(request, practical, action, True, text, figure, value, notes, dict(keep), factory)


def _ask_save_path(parent, title: str, default: str, types) -> str | None:
    from tkinter import filedialog

    return filedialog.asksaveasfilename(parent=parent, title=title, initialfile=default, filetypes=types) or None


def _ask_open_path(parent, title: str, types, *, folder: bool = False) -> str | None:
    from tkinter import filedialog

    return filedialog.askopenfilename(parent=parent, title=title, filetypes=types) or None


# --------------------------------------------------------------------------- the viewer's page


def attach_to_viewer(viewer, notebook) -> PracticalsPanel:
    """Add the Practicals page to the bench viewer's ``notebook``; returns the panel.

    The current spectrum is that of the frames on screen (the held stack, else
    the newest frame) through the viewer's calibration, cut to the viewer's
    300-1100 nm; jobs run on the viewer's processing thread, in turn with
    live frames, and come back as its "practical" job events.
    """
    from .processing import _within

    processor = viewer.processor

    def current_spectrum() -> Spectrum | None:
        frames = viewer._frames_now()  # plain attributes, safe to read here
        if not frames or processor.calibration_file is None:
            return None
        return _within(processor.spectrum_of(frames), 300.0, 1100.0)

    def submit(job) -> bool:
        worker = viewer.worker
        if worker is None:
            return False
        worker.submit("practical", job)
        return True

    panel = PracticalsPanel(notebook, current_spectrum=current_spectrum, report=viewer.report, submit=submit,
                            ask_save_path=viewer.ask_save_path, ask_open_path=viewer.ask_open_path)
    viewer._done_practical = panel.deliver  # the viewer hands each finished "practical" job to _done_<name>
    notebook.add(panel, text="Practicals")
    return panel
