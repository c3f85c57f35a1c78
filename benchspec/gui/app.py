"""The bench viewer window: live frame, live spectrum, wavelength fit, species, log.

Layout (our own)::

    +--------------------------------------------------------------------+
    | benchspec bench viewer   source ...      light ...     27 frames/s |  header
    +-------------------------------------------+------------------------+
    | Camera frame (band, aperture, background) | Wavelength fit | Species|
    |-------------------------------------------|  | Log                 |
    | Spectrum (pixel axis, then wavelength)    |  residuals + table     |
    +-------------------------------------------+------------------------+
    | Capture | Wavelengths | Species | Camera | Save                    |  bench bar
    | message strip / clipping warning                                   |
    +--------------------------------------------------------------------+

Before live capture starts, a light-source panel covers the window: the user
picks what they are measuring and reads its cautions (benchspec.safety).

The Tk thread only draws. Frames are read and processed by
:class:`~benchspec.gui.worker.LiveWorker`; every computation goes through
:class:`~benchspec.gui.processing.BenchProcessor`.
"""

from __future__ import annotations

import logging
import queue
import sys
import threading
import time
import tkinter as tk
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from tkinter import ttk
from typing import Callable

import numpy as np
from matplotlib.collections import LineCollection
from matplotlib.figure import Figure
from PIL import Image, ImageTk

from .. import __version__
from ..errors import BenchspecError, SourceError
from ..refdata import available_lamps
from ..safety import GENERAL_CAUTION, SOURCE_TYPES, cautions_for
from ..sources import FrameSource, open_source
from .canvas import ThreadedCanvas
from .colours import PALETTE, wavelength_hex
from .processing import BenchProcessor, CalibrationSummary, IdentificationSummary, LiveResult, residual_plot_limits
from .worker import Event, LiveWorker

__all__ = ["Viewer", "SHORTCUTS", "ViewerStats"]

log = logging.getLogger("benchspec.viewer")

# key -> (action, description); the same table feeds the bindings and the help text.
SHORTCUTS: dict[str, tuple[str, str]] = {
    "<space>": ("hold", "hold the spectrum / go live again"),
    "s": ("stack", "stack N frames and hold the result"),
    "d": ("dark", "take a dark (cover the lens or switch the light off first)"),
    "b": ("band", "measure the band again on N frames (after moving the camera)"),
    "c": ("calibrate", "calibrate the wavelength axis with the chosen lamp"),
    "i": ("identify", "identify the species"),
    "<plus>": ("exposure_up", "longer exposure (cameras that allow it)"),
    "<minus>": ("exposure_down", "shorter exposure"),
    "<Control-Return>": ("capture", "capture frames, spectrum and calibration to the session log"),
    "<Control-s>": ("save_spectrum", "save the spectrum (.csv, .json, .jdx)"),
    "<Control-k>": ("save_calibration", "save the calibration (.json)"),
    "<Control-f>": ("save_frame", "save the frame (.png)"),
    "<Control-p>": ("save_plot", "save the plot (.png, .svg, .pdf)"),
    "<Control-l>": ("load_calibration", "load a calibration file"),
    "<Control-o>": ("open_video", "open a video file or image folder"),
    "<F1>": ("choose_light", "light source and its cautions"),
    "<Control-q>": ("quit", "quit"),
}

_LETTER_KEYS = {"s", "d", "b", "c", "i", "<plus>", "<minus>", "<space>"}

# Daylight calibrates from its dark lines (calibration/lamps/daylight.toml) when no lamp is at hand.
_LIGHT_TO_LAMP = {"fluorescent": "cfl", "discharge": "hg", "daylight": "daylight"}


@dataclass
class ViewerStats:
    """Counts for the status line and the performance measurement."""

    frames_shown: int = 0
    shown_times: list = field(default_factory=list)   # perf_counter of each frame shown (last 600)
    draw_time_s: float = 0.0
    full_redraws: int = 0
    spectrum_skipped: int = 0   # frames whose trace waited for a full render

    def note_shown(self, now: float) -> None:
        self.frames_shown += 1
        self.shown_times.append(now)
        if len(self.shown_times) > 600:
            del self.shown_times[:100]

    def rate_hz(self, window_s: float = 2.0) -> float:
        if len(self.shown_times) < 2:
            return 0.0
        end = self.shown_times[-1]
        recent = [t for t in self.shown_times if t >= end - window_s]
        if len(recent) < 2 or recent[-1] == recent[0]:
            return 0.0
        return (len(recent) - 1) / (recent[-1] - recent[0])


def _ask_save_path(parent, title: str, default: str, types: list[tuple[str, str]]) -> str | None:
    from tkinter import filedialog

    return filedialog.asksaveasfilename(parent=parent, title=title, initialfile=default, filetypes=types) or None


def _ask_open_path(parent, title: str, types: list[tuple[str, str]], *, folder: bool = False) -> str | None:
    from tkinter import filedialog

    if folder:
        return filedialog.askdirectory(parent=parent, title=title) or None
    return filedialog.askopenfilename(parent=parent, title=title, filetypes=types) or None


def _demo_scenes() -> list[str]:
    """Scene names of the demo frames (empty when they are not installed)."""
    from ..sources import IMAGE_SUFFIXES, _scene_name, demo_folder

    folder = demo_folder()
    if not folder.is_dir():
        return []
    names: list[str] = []
    for path in sorted(folder.iterdir()):
        if path.suffix.lower() in IMAGE_SUFFIXES and _scene_name(path) not in names:
            names.append(_scene_name(path))
    return names


def elide_middle(text: str, width_px: float, measure: Callable[[str], float]) -> str:
    """``text`` shortened in the middle with an ellipsis until ``measure(text) <= width_px``."""
    if measure(text) <= width_px:
        return text
    for keep in range(len(text) - 1, 0, -1):
        head, tail = text[: (keep + 1) // 2], text[len(text) - keep // 2:] if keep // 2 else ""
        candidate = f"{head}…{tail}"
        if measure(candidate) <= width_px:
            return candidate
    return "…"


def _model_words(summary) -> str:
    """The solution's model in a few words ("grating model", "order 2 polynomial")."""
    return summary.model or f"order {summary.order} polynomial"


def _freeze_heap() -> None:
    """Move the objects alive now out of the garbage collector's sight.

    A full collection walks every object; with matplotlib, Tk and the core
    loaded it took 100-350 ms here, long enough to freeze the window. What is
    alive after start-up (or after a calibration) lives on, so it is frozen.
    """
    import gc

    gc.freeze()  # no collection first: that alone can take 100 ms


class Viewer:
    """The bench viewer.

    Parameters
    ----------
    root : tk.Tk
        The window to build in (the viewer owns it from now on).
    source : FrameSource, optional
        The source to show once the light source is chosen.
    light : str, optional
        A light-source type (:data:`benchspec.safety.SOURCE_TYPES`) already
        chosen; its cautions are still shown and must be confirmed.
    processor : BenchProcessor, optional
    messages : sequence of str
        Messages to show at start (e.g. "no camera found: showing the demo").
    session_folder : path, optional
        The capture log (:mod:`benchspec.session`) that Ctrl+Enter saves to;
        asked for on the first capture when not given.
    ask_save_path, ask_open_path : callable, optional
        File dialogs, replaceable in tests (IDLE's habit):
        ``ask_save_path(parent, title, default_name, filetypes) -> path or None`` and
        ``ask_open_path(parent, title, filetypes, folder=False) -> path or None``.
    """

    def __init__(self, root: tk.Tk, *, source: FrameSource | None = None, light: str | None = None,
                 processor: BenchProcessor | None = None, messages=(),
                 ask_save_path: Callable | None = None, ask_open_path: Callable | None = None,
                 session_folder=None, poll_ms: int = 8):
        self.root = root
        self.processor = processor or BenchProcessor()
        self.ask_save_path = ask_save_path or _ask_save_path
        self.ask_open_path = ask_open_path or _ask_open_path
        self.poll_ms = int(poll_ms)
        self.session_folder = Path(session_folder) if session_folder else None
        self.stats = ViewerStats()
        self.worker: LiveWorker | None = None
        self.pending_source: FrameSource | None = source
        self.light: str | None = None
        self.light_confirmed = False
        self.held: LiveResult | None = None
        self.held_frames: list[np.ndarray] = []
        self.action_frames: list[np.ndarray] = []   # the frames the last calibrate/identify used
        self.last_result: LiveResult | None = None
        self.last_frame_image: np.ndarray | None = None
        self.calibration: CalibrationSummary | None = None
        self.identification: IdentificationSummary | None = None
        self.busy: set[str] = set()
        self.log_lines: list[str] = []
        self._photo: ImageTk.PhotoImage | None = None
        self._photo_size = (0, 0)
        self._overlay_key = None
        self._spec_axis_state = None
        self._spec_background = None
        self._closed = False
        self._last_note = ""
        self._opened: "queue.Queue" = queue.Queue()   # cameras opened on a helper thread
        self._after_id = None
        self._status_after = None
        self._display_size = (640, 300)
        self._display_box = [self._display_size]   # shared with the worker thread

        # OpenCV's own worker threads would compete with ours on a 2-core machine; one
        # thread each for reading, processing, plotting and Tk keeps the window responsive.
        import cv2

        cv2.setNumThreads(1)
        # Full plot redraws run here, off the Tk thread (see canvas.ThreadedCanvas).
        self._plot_executor = ThreadPoolExecutor(max_workers=1, thread_name_prefix="benchspec-plot")
        # Wavelength colours need colour-science, slow to import: load it now, off the Tk thread.
        from .colours import warm_up

        threading.Thread(target=warm_up, name="benchspec-colours", daemon=True).start()
        self._build_style()
        self._build_window()
        self._bind_keys()
        root.protocol("WM_DELETE_WINDOW", self.close)
        for text in messages:
            self.report(text, level="warning")
        self.show_light_chooser(initial=light)
        _freeze_heap()
        self._after_id = root.after(self.poll_ms, self._tick)
        self._status_after = root.after(500, self._update_status)

    # ================================================================== building
    def _build_style(self) -> None:
        p = PALETTE
        root = self.root
        root.title(f"benchspec bench viewer {__version__}")
        root.configure(background=p["paper"])
        root.minsize(800, 560)
        style = ttk.Style(root)
        try:
            style.theme_use("clam")
        except tk.TclError:  # pragma: no cover
            pass
        style.configure(".", background=p["paper"], foreground=p["ink"], fieldbackground="#ffffff",
                        font=("TkDefaultFont", 10))
        style.configure("TFrame", background=p["paper"])
        style.configure("Panel.TFrame", background=p["panel"])
        style.configure("TLabel", background=p["paper"], foreground=p["ink"])
        style.configure("Panel.TLabel", background=p["panel"])
        style.configure("Title.TLabel", font=("TkDefaultFont", 12, "bold"), foreground=p["accent"])
        style.configure("Muted.TLabel", foreground=p["muted"])
        style.configure("Heading.TLabel", font=("TkDefaultFont", 11, "bold"))
        style.configure("Gate.TFrame", background=p["paper"])
        style.configure("Gate.TLabel", background=p["paper"], font=("TkDefaultFont", 11))
        style.configure("GateTitle.TLabel", background=p["paper"], foreground=p["accent"],
                        font=("TkDefaultFont", 15, "bold"))
        style.configure("Caution.TLabel", background=p["warning_light"], foreground=p["ink"],
                        font=("TkDefaultFont", 11), padding=8)
        style.configure("Warn.TLabel", background=p["warning_light"], foreground=p["warning"],
                        font=("TkDefaultFont", 10, "bold"), padding=(8, 3))
        style.configure("Calm.TLabel", background=p["panel"], foreground=p["muted"], padding=(8, 3))
        style.configure("Level.TLabel", background=p["paper"], foreground=p["muted"],
                        font=("TkDefaultFont", 10, "bold"), padding=(8, 3))
        style.configure("TLabelframe", background=p["paper"], bordercolor=p["muted"])
        style.configure("TLabelframe.Label", background=p["paper"], foreground=p["accent"],
                        font=("TkDefaultFont", 9, "bold"))
        style.configure("TButton", padding=(3, 1))
        style.configure("Go.TButton", background=p["accent"], foreground="#ffffff",
                        font=("TkDefaultFont", 11, "bold"), padding=(14, 6))
        style.map("Go.TButton", background=[("disabled", p["panel"]), ("active", "#235559")])
        style.configure("TRadiobutton", background=p["paper"], font=("TkDefaultFont", 11))
        style.configure("TNotebook", background=p["paper"])
        style.configure("TNotebook.Tab", padding=(10, 3))
        style.map("TNotebook.Tab", background=[("selected", p["accent_light"])])
        style.configure("Treeview", rowheight=20, font=("TkDefaultFont", 9))
        style.configure("Treeview.Heading", font=("TkDefaultFont", 9, "bold"))

    def _build_window(self) -> None:
        p = PALETTE
        root = self.root
        root.columnconfigure(0, weight=1)
        root.rowconfigure(1, weight=1)
        self.buttons: dict[str, ttk.Widget] = {}

        # -- header
        header = ttk.Frame(root, style="Panel.TFrame", padding=(8, 4))
        header.grid(row=0, column=0, sticky="ew")
        header.columnconfigure(2, weight=1)
        ttk.Label(header, text="benchspec bench viewer", style="Title.TLabel",
                  background=p["panel"]).grid(row=0, column=0, padx=(0, 12))
        self.open_button = ttk.Menubutton(header, text="Source ▾", width=8)
        menu = tk.Menu(self.open_button, tearoff=False)
        menu.add_command(label="Demo bench (desk CFL)", command=lambda: self.open_spec("demo"))
        scenes = tk.Menu(menu, tearoff=False)
        for scene in _demo_scenes():
            scenes.add_command(label=scene, command=lambda name=scene: self.open_spec(f"demo:{name}"))
        menu.add_cascade(label="Demo scene", menu=scenes)
        menu.add_command(label="Camera 0", command=lambda: self.open_spec("0"))
        menu.add_command(label="Video file…   Ctrl+O", command=self.open_video)
        menu.add_command(label="Image folder…", command=self.open_folder)
        self.open_button["menu"] = menu
        self.open_menu = menu
        self.open_button.grid(row=0, column=1)
        # The label takes the room left in the header and shows as much of the name as fits
        # (shortened in the middle, so the kind and the file's ending stay); width=1 keeps a long
        # name from claiming room the buttons need.
        self.source_text = "no source"
        self.source_label = ttk.Label(header, text=self.source_text, style="Panel.TLabel", width=1)
        self.source_label.grid(row=0, column=2, sticky="ew", padx=8)
        self.source_label.bind("<Configure>", lambda event: self._fit_source_label())
        self.light_button = ttk.Button(header, text="Light: not chosen", command=self.show_light_chooser)
        self.light_button.grid(row=0, column=3, padx=6)
        self.save_button = ttk.Menubutton(header, text="Save ▾", width=7)
        save_menu = tk.Menu(self.save_button, tearoff=False)
        save_menu.add_command(label="Capture to session log   Ctrl+Enter", command=self.capture_to_session)
        save_menu.add_command(label="Spectrum…      Ctrl+S", command=self.save_spectrum)
        save_menu.add_command(label="Calibration…   Ctrl+K", command=self.save_calibration)
        save_menu.add_command(label="Frame…         Ctrl+F", command=self.save_frame)
        save_menu.add_command(label="Plot…          Ctrl+P", command=self.save_plot)
        self.save_button["menu"] = save_menu
        self.save_menu = save_menu
        self.save_button.grid(row=0, column=4, padx=(0, 6))
        self.buttons["keys"] = ttk.Button(header, text="Keys", width=5, command=self.show_keys)
        self.buttons["keys"].grid(row=0, column=5, padx=(0, 6))
        self.rate_label = ttk.Label(header, text="", style="Panel.TLabel", width=19, anchor="e")
        self.rate_label.grid(row=0, column=6, sticky="e")

        # -- body: views on the left, result pages on the right
        self.body = ttk.Frame(root)
        self.body.grid(row=1, column=0, sticky="nsew")
        self.body.columnconfigure(0, weight=1)
        self.body.rowconfigure(0, weight=1)
        panes = ttk.PanedWindow(self.body, orient="horizontal")
        panes.grid(row=0, column=0, sticky="nsew")
        views = ttk.PanedWindow(panes, orient="vertical")
        pages = ttk.Notebook(panes, width=310)
        panes.add(views, weight=3)
        panes.add(pages, weight=1)
        self.panes = panes

        frame_box = ttk.Frame(views)
        frame_box.columnconfigure(0, weight=1)
        frame_box.rowconfigure(1, weight=1)
        ttk.Label(frame_box, text="Camera frame", style="Heading.TLabel").grid(row=0, column=0, sticky="w", padx=6)
        self.frame_legend = ttk.Label(frame_box, text="", style="Muted.TLabel")
        self.frame_legend.grid(row=0, column=0, sticky="e", padx=6)
        self.frame_canvas = tk.Canvas(frame_box, background=p["frame_bg"], highlightthickness=0, height=230)
        self.frame_canvas.grid(row=1, column=0, sticky="nsew")
        self.frame_canvas.bind("<Configure>", self._on_frame_resize)
        self._frame_image_item = self.frame_canvas.create_image(0, 0, anchor="nw")
        self._frame_text = self.frame_canvas.create_text(12, 12, anchor="nw", fill="#d8d4c8",
                                                         text="waiting for the light-source check",
                                                         font=("TkDefaultFont", 11))
        views.add(frame_box, weight=2)

        spec_box = ttk.Frame(views)
        spec_box.columnconfigure(0, weight=1)
        spec_box.rowconfigure(1, weight=1)
        ttk.Label(spec_box, text="Spectrum", style="Heading.TLabel").grid(row=0, column=0, sticky="w", padx=6)
        self.spectrum_state = ttk.Label(spec_box, text="live", style="Muted.TLabel")
        self.spectrum_state.grid(row=0, column=0, sticky="e", padx=6)
        self.spec_figure = Figure(figsize=(6.4, 3.0), dpi=100, facecolor=p["paper"])
        self.spec_axes = self.spec_figure.add_subplot(1, 1, 1)
        self._style_axes(self.spec_axes)
        self.spec_figure.subplots_adjust(left=0.12, right=0.975, top=0.95, bottom=0.16)  # room for the y label and the last x tick
        self.spec_canvas = ThreadedCanvas(self.spec_figure, spec_box, self._plot_executor)
        self.spec_canvas.on_rendered = self._on_spec_rendered
        self.spec_canvas.get_tk_widget().configure(height=260, highlightthickness=0)
        self.spec_canvas.get_tk_widget().grid(row=1, column=0, sticky="nsew")
        (self._spec_line,) = self.spec_axes.plot([], [], color=p["ink"], lw=1.0, animated=True)
        # Line marks and labels are drawn into the static background and change only
        # when the lines do (text is the costly part of a redraw); the trace is blitted.
        self._spec_marks = LineCollection([], linewidths=2.2)
        self._marks_spec = None
        self._marks_time = 0.0
        self.spec_axes.add_collection(self._spec_marks)
        self._spec_labels = [self.spec_axes.text(0, 0, "", fontsize=7.5, rotation=90, ha="center", va="bottom",
                                                 color=p["ink"], visible=False) for _ in range(14)]
        views.add(spec_box, weight=3)

        # -- pages
        self.pages = pages
        pages.add(self._build_fit_page(pages), text="Wavelength fit")
        pages.add(self._build_species_page(pages), text="Species")
        pages.add(self._build_log_page(pages), text="Log")
        from .practicals import attach_to_viewer  # the lab practicals page (adds itself as the last tab)

        self.practicals = attach_to_viewer(self, pages)

        # -- bench bar
        bar = ttk.Frame(root, padding=(6, 4))
        bar.grid(row=2, column=0, sticky="ew")

        capture = ttk.LabelFrame(bar, text="Capture", padding=(4, 2))
        capture.grid(row=0, column=0, sticky="ns", padx=3)
        self.buttons["hold"] = ttk.Button(capture, text="Hold", width=5, command=self.toggle_hold)
        self.buttons["hold"].grid(row=0, column=0)
        self.stack_count = tk.IntVar(value=10)
        ttk.Label(capture, text="N").grid(row=0, column=1, padx=(6, 1))
        self.stack_spin = ttk.Spinbox(capture, from_=1, to=500, width=4, textvariable=self.stack_count)
        self.stack_spin.grid(row=0, column=2)
        self.buttons["stack"] = ttk.Button(capture, text="Stack", width=5, command=self.stack)
        self.buttons["stack"].grid(row=0, column=3, padx=(3, 0))
        self.buttons["dark"] = ttk.Button(capture, text="Dark", width=5, command=self.take_dark)
        self.buttons["dark"].grid(row=0, column=4, padx=(3, 0))
        self.buttons["clear_dark"] = ttk.Button(capture, text="No dark", width=6, command=self.clear_dark)
        self.buttons["clear_dark"].grid(row=0, column=5, padx=(3, 0))
        self.buttons["band"] = ttk.Button(capture, text="Band", width=5, command=self.find_band)
        self.buttons["band"].grid(row=0, column=6, padx=(3, 0))

        waves = ttk.LabelFrame(bar, text="Wavelengths", padding=(4, 2))
        waves.grid(row=0, column=1, sticky="ns", padx=3)
        lamps = list(available_lamps())
        self.lamp = tk.StringVar(value="cfl" if "cfl" in lamps else (lamps[0] if lamps else ""))
        self.lamp_box = ttk.Combobox(waves, textvariable=self.lamp, values=lamps, width=8, state="readonly")
        self.lamp_box.grid(row=0, column=0)
        self.buttons["calibrate"] = ttk.Button(waves, text="Calibrate", width=8, command=self.calibrate)
        self.buttons["calibrate"].grid(row=0, column=1, padx=(3, 0))
        self.buttons["load_calibration"] = ttk.Button(waves, text="Load…", width=6, command=self.load_calibration)
        self.buttons["load_calibration"].grid(row=0, column=2, padx=(3, 0))

        species = ttk.LabelFrame(bar, text="Species", padding=(4, 2))
        species.grid(row=0, column=2, sticky="ns", padx=3)
        self.buttons["identify"] = ttk.Button(species, text="Identify", width=7, command=self.identify)
        self.buttons["identify"].grid(row=0, column=0)

        camera = ttk.LabelFrame(bar, text="Camera", padding=(4, 2))
        camera.grid(row=0, column=3, sticky="ns", padx=3)
        self._bar, self._bar_groups, self._bar_layout = bar, [capture, waves, species, camera], None
        root.bind("<Configure>", self._on_root_resize, add="+")
        ttk.Label(camera, text="Exposure").grid(row=0, column=0, padx=(0, 2))
        self.exposure = tk.DoubleVar(value=100.0)
        self.exposure_spin = ttk.Spinbox(camera, from_=1, to=10000, increment=10, width=5, textvariable=self.exposure)
        self.exposure_spin.grid(row=0, column=1)
        self.buttons["exposure"] = ttk.Button(camera, text="Set", width=4, command=self.set_exposure)
        self.buttons["exposure"].grid(row=0, column=2, padx=(3, 0))

        # -- message strip
        self.message = ttk.Label(root, text="", style="Calm.TLabel", anchor="w")
        self.message.grid(row=3, column=0, sticky="ew")
        self.clip_warning = ttk.Label(root, text="Signal level: no frame yet", style="Level.TLabel", anchor="w")
        self.clip_warning.grid(row=4, column=0, sticky="ew")
        self._clip_text = ""

        self._build_light_chooser()

    def _set_source_text(self, text: str) -> None:
        self.source_text = text
        self._fit_source_label()

    def _fit_source_label(self) -> None:
        """Show the source's name in the width the header leaves it (shortened in the middle)."""
        import tkinter.font as tkfont

        label = self.source_label
        width = label.winfo_width()
        if width <= 1:  # not laid out yet: the <Configure> that follows fits it
            label.configure(text=self.source_text)
            return
        font = getattr(self, "_source_font", None)
        if font is None:
            font = self._source_font = tkfont.Font(
                root=self.root, font=ttk.Style(self.root).lookup("Panel.TLabel", "font") or "TkDefaultFont")
        label.configure(text=elide_middle(self.source_text, width - 2, font.measure))

    def _on_root_resize(self, event) -> None:
        if event.widget is self.root:
            self._reflow_bar(event.width)

    def _reflow_bar(self, width: int) -> None:
        """Lay the control groups out in as many rows as the window's width needs."""
        rows, row, used = [], 0, 0
        for group in self._bar_groups:
            need = group.winfo_reqwidth() + 8
            if used and used + need > width - 12:
                row, used = row + 1, 0
            rows.append(row)
            used += need
        if rows == self._bar_layout:
            return
        self._bar_layout = rows
        column = {}
        for group, r in zip(self._bar_groups, rows):
            c = column.get(r, 0)
            group.grid_configure(row=r, column=c)
            column[r] = c + 1

    def _style_axes(self, ax) -> None:
        p = PALETTE
        ax.set_facecolor("#fbfaf6")
        for side in ("top", "right"):
            ax.spines[side].set_visible(False)
        for side in ("left", "bottom"):
            ax.spines[side].set_color(p["muted"])
        ax.tick_params(colors=p["ink"], labelsize=8)
        ax.grid(True, color="#dcd7cb", lw=0.6)
        ax.xaxis.label.set_color(p["ink"])
        ax.yaxis.label.set_color(p["ink"])

    def _build_fit_page(self, parent) -> ttk.Frame:
        page = ttk.Frame(parent, padding=4)
        page.columnconfigure(0, weight=1)
        page.rowconfigure(2, weight=1)
        self.fit_summary = ttk.Label(page, text="Not calibrated: the spectrum is on a pixel axis.\n"
                                                 "Point the camera at a known lamp, choose it and press Calibrate (c).",
                                     wraplength=290, justify="left")
        self.fit_summary.grid(row=0, column=0, sticky="ew")
        self.fit_figure = Figure(figsize=(3.1, 1.7), dpi=100, facecolor=PALETTE["paper"])
        self.fit_axes = self.fit_figure.add_subplot(1, 1, 1)
        self._style_axes(self.fit_axes)
        self.fit_figure.subplots_adjust(left=0.22, right=0.97, top=0.92, bottom=0.26)
        self.fit_canvas = ThreadedCanvas(self.fit_figure, page, self._plot_executor)
        self.fit_canvas.get_tk_widget().configure(height=170, highlightthickness=0)
        self.fit_canvas.get_tk_widget().grid(row=1, column=0, sticky="ew", pady=2)
        self.fit_axes.set_xticks([])
        self.fit_axes.set_yticks([])
        self.fit_axes.text(0.5, 0.5, "residuals appear here\nafter a calibration", ha="center", va="center",
                           transform=self.fit_axes.transAxes, color=PALETTE["muted"], fontsize=8)
        columns = ("pixel", "nm", "species", "residual")
        self.fit_table = ttk.Treeview(page, columns=columns, show="headings", height=8)
        for name, title, width in zip(columns, ("pixel", "line nm", "species", "resid. nm"), (58, 66, 100, 66)):
            self.fit_table.heading(name, text=title)
            self.fit_table.column(name, width=width, anchor="e", stretch=True)
        self.fit_table.grid(row=2, column=0, sticky="nsew")
        return page

    def _build_species_page(self, parent) -> ttk.Frame:
        page = ttk.Frame(parent, padding=4)
        page.columnconfigure(0, weight=1)
        page.rowconfigure(1, weight=1)
        page.rowconfigure(2, weight=1)
        self.species_summary = ttk.Label(page, text="No identification yet: calibrate, then press Identify (i).",
                                         wraplength=290, justify="left")
        self.species_summary.grid(row=0, column=0, sticky="ew")
        columns = ("rank", "species", "score", "flux", "lines")
        self.species_table = ttk.Treeview(page, columns=columns, show="headings", height=6)
        for name, width in zip(columns, (34, 104, 48, 44, 40)):
            self.species_table.heading(name, text=name)
            self.species_table.column(name, width=width, anchor="e", stretch=True)
        self.species_table.grid(row=1, column=0, sticky="nsew", pady=2)
        self.species_lines = tk.Text(page, height=8, wrap="word", background="#fbfaf6", foreground=PALETTE["ink"],
                                     relief="flat", font=("TkDefaultFont", 9))
        self.species_lines.grid(row=2, column=0, sticky="nsew")
        self.species_lines.configure(state="disabled")
        return page

    def _build_log_page(self, parent) -> ttk.Frame:
        page = ttk.Frame(parent, padding=4)
        page.columnconfigure(0, weight=1)
        page.rowconfigure(0, weight=1)
        self.log_text = tk.Text(page, wrap="word", background="#fbfaf6", foreground=PALETTE["ink"], relief="flat",
                                font=("TkFixedFont", 9))
        self.log_text.grid(row=0, column=0, sticky="nsew")
        self.log_text.tag_configure("warning", foreground=PALETTE["warning"])
        self.log_text.tag_configure("error", foreground=PALETTE["warning"], font=("TkFixedFont", 9, "bold"))
        self.log_text.configure(state="disabled")
        return page

    def _build_light_chooser(self) -> None:
        p = PALETTE
        gate = ttk.Frame(self.root, style="Gate.TFrame", padding=24)
        self.gate = gate
        gate.columnconfigure(1, weight=1)
        gate.rowconfigure(2, weight=1)
        ttk.Label(gate, text="What light are you measuring?", style="GateTitle.TLabel").grid(
            row=0, column=0, columnspan=2, sticky="w")
        ttk.Label(gate, text="Read its cautions before live capture starts.", style="Gate.TLabel").grid(
            row=1, column=0, columnspan=2, sticky="w", pady=(2, 12))
        choices = ttk.Frame(gate, style="Gate.TFrame")
        choices.grid(row=2, column=0, sticky="nw", padx=(0, 24))
        self.light_choice = tk.StringVar(value="")
        self.light_radios: dict[str, ttk.Radiobutton] = {}
        for row, key in enumerate(SOURCE_TYPES):
            title, _ = cautions_for(key)
            radio = ttk.Radiobutton(choices, text=title, value=key, variable=self.light_choice,
                                    command=self._on_light_choice)
            radio.grid(row=row, column=0, sticky="w", pady=3)
            self.light_radios[key] = radio
        right = ttk.Frame(gate, style="Gate.TFrame")
        right.grid(row=2, column=1, sticky="nsew")
        right.columnconfigure(0, weight=1)
        self.caution_title = ttk.Label(right, text="", style="Heading.TLabel", background=p["paper"])
        self.caution_title.grid(row=0, column=0, sticky="w")
        self.caution_text = ttk.Label(right, text="Choose a light source on the left.", style="Caution.TLabel",
                                      wraplength=560, justify="left")
        self.caution_text.grid(row=1, column=0, sticky="ew", pady=6)
        self.caution_reminder = ttk.Label(right, text=GENERAL_CAUTION, style="Gate.TLabel", wraplength=560,
                                          justify="left", foreground=p["muted"])
        self.caution_reminder.grid(row=2, column=0, sticky="ew", pady=(4, 14))
        self.buttons["start"] = ttk.Button(right, text="I have read these cautions: start capture",
                                           style="Go.TButton", command=self.confirm_light, state="disabled")
        self.buttons["start"].grid(row=3, column=0, sticky="w")

    # ================================================================== light source & cautions
    def show_light_chooser(self, initial: str | None = None) -> None:
        """Cover the window with the light-source panel; live display pauses until confirmed."""
        self.light_confirmed = False
        if self.worker is not None:
            self.worker.pause_live(True)
        if initial:
            self.light_choice.set(initial)
            self._on_light_choice()
        self.gate.place(in_=self.root, relx=0, rely=0, relwidth=1, relheight=1)
        self.gate.lift()

    def _on_light_choice(self) -> None:
        key = self.light_choice.get()
        if not key:
            return
        title, items = cautions_for(key)
        self.caution_title.configure(text=f"Cautions: {title}")
        self.caution_text.configure(text="\n".join(f"•  {item}" for item in items))
        self.buttons["start"].configure(state="normal")

    def cautions_shown(self) -> str:
        """The caution text on screen now (title, cautions and the reminder)."""
        return "\n".join([self.caution_title.cget("text"), self.caution_text.cget("text"),
                          self.caution_reminder.cget("text")])

    def confirm_light(self) -> None:
        key = self.light_choice.get()
        if not key:
            return
        self.light = key
        self.light_confirmed = True
        title, _ = cautions_for(key)
        self.light_button.configure(text=f"Light: {key}")
        if key in _LIGHT_TO_LAMP and _LIGHT_TO_LAMP[key] in self.lamp_box.cget("values"):
            self.lamp.set(_LIGHT_TO_LAMP[key])
        self.gate.place_forget()
        self.report(f"light source: {title}; cautions shown and confirmed")
        if self.worker is None and self.pending_source is not None:
            source, self.pending_source = self.pending_source, None
            self._start(source)
        elif self.worker is not None:
            self.worker.pause_live(self.held is not None)

    # ================================================================== sources
    def _start(self, source: FrameSource) -> None:
        self._stop_worker()
        info = source.info
        short = f"{info.kind} {Path(info.name.split(' (')[0]).name}"
        self._set_source_text(short)
        self.report(f"source: {info.describe()}")
        for note in info.notes:
            self.report(note, level="warning")
        self.exposure_spin.configure(state="normal" if info.can_set_exposure else "disabled")
        self.buttons["exposure"].configure(state="normal" if info.can_set_exposure else "disabled")
        self.frame_canvas.itemconfigure(self._frame_text, text="")
        # The worker gets the processor and a size holder, never the viewer itself: threads must
        # not keep Tk objects alive (their clean-up would then run off the Tk thread).
        processor, size = self.processor, self._display_box

        def process(frame):
            return processor.live(frame.image, display_size=size[0], frame_index=frame.index,
                                  timestamp_s=frame.timestamp_s)

        self.processor.source_changed()
        if self.identification is not None:
            self.identification = None
            self.species_summary.configure(text="No identification for this source yet: press Identify (i).")
            self.species_table.delete(*self.species_table.get_children())
        if self.held is not None:  # a new source is watched live
            self.held, self.held_frames = None, []
            self.buttons["hold"].configure(text="Hold")
            self.spectrum_state.configure(text="live")
        self.worker = LiveWorker(source, process).start()
        self._notes_seen = set(info.notes)

    def open_source(self, source: FrameSource) -> None:
        """Show ``source`` (after the light-source check, if not done yet)."""
        if not self.light_confirmed:
            if self.pending_source is not None:
                self.pending_source.close()
            self.pending_source = source
            self.report(f"{source.info.describe()} opens after the light-source check")
            return
        self._start(source)

    def open_spec(self, spec: str) -> bool:
        """Open a source by name (as on the command line); False (and a message) if it fails.

        Cameras open on a helper thread (a driver can take a second or more to
        answer); the source is shown when it is ready. A camera whose device
        node is missing is refused at once.
        """
        text = str(spec).strip()
        if text.isdigit() or text.startswith("/dev/"):
            node = text if text.startswith("/dev/") else f"/dev/video{text}"
            if sys.platform.startswith("linux") and not Path(node).exists():
                self.report(f"no camera at {text} ({node} does not exist); plug the camera in, or choose "
                            "another source", level="error")
                return False
            self.report(f"opening camera {text}…")
            opened = self._opened

            def open_camera():
                try:
                    opened.put((text, open_source(text), None))
                except BenchspecError as exc:
                    opened.put((text, None, exc))

            threading.Thread(target=open_camera, name="benchspec-open", daemon=True).start()
            return True
        try:
            source = open_source(text)
        except BenchspecError as exc:
            self.report(str(exc), level="error")
            return False
        self.open_source(source)
        return True

    def _check_opened(self) -> None:
        try:
            spec, source, error = self._opened.get_nowait()
        except queue.Empty:
            return
        if error is not None:
            self.report(str(error), level="error")
        elif self._closed:
            source.close()
        else:
            self.open_source(source)

    def open_video(self) -> None:
        path = self.ask_open_path(self.root, "Open a video", [("Videos", "*.avi *.mp4 *.mkv *.mov"), ("All", "*")])
        if path:
            self.open_spec(path)

    def open_folder(self) -> None:
        path = self.ask_open_path(self.root, "Open a folder of frames", [], folder=True)
        if path:
            self.open_spec(path)

    def _stop_worker(self, timeout: float = 0.5) -> None:
        if self.worker is not None:
            self.worker.stop(timeout=timeout)
            self.worker = None


    # ================================================================== polling & drawing
    def _tick(self) -> None:
        if self._closed:
            return
        try:
            self._check_opened()
            self.spec_canvas.poll()
            self.fit_canvas.poll()
            self._handle_events()
            if self.worker is not None:
                result = self.worker.results.take()
                if result is not None and self.held is None and self.light_confirmed:
                    self._show(result)
        finally:
            if not self._closed:
                self._after_id = self.root.after(self.poll_ms, self._tick)

    def _handle_events(self) -> None:
        worker = self.worker
        if worker is None:
            return
        for _ in range(20):
            try:
                event: Event = worker.events.get_nowait()
            except Exception:
                break
            self._on_event(event)
        notes = worker.source.notes  # not .info: that would query the device from the Tk thread
        for note in notes:
            if note not in self._notes_seen:
                self._notes_seen.add(note)
                self.report(note, level="warning")

    def _on_event(self, event: Event) -> None:
        if event.kind == "lost":
            kept = len(self.held_frames) or (1 if self.last_frame_image is not None else 0)
            self.report(f"source lost: {event.message}", level="error")
            self.frame_canvas.itemconfigure(self._frame_text, text="SOURCE LOST — last frame kept; open another source")
            self._set_source_text(self.source_text + " — lost")
            if kept:
                self.report(f"{kept} frame(s) stay available for calibrate, identify and save")
            return
        if event.kind == "ended":
            self.report(event.message, level="warning")
            self._set_source_text(self.source_text + " — ended")
            return
        if event.kind == "job":
            handler = getattr(self, f"_done_{event.name}", None)
            self.busy.discard(event.name)
            self._set_busy(event.name, False)
            if not event.ok:
                if event.name == "live":
                    self.report(event.message, level="warning")
                else:
                    self.report(f"{event.name}: {event.message}", level="error")
                    if event.value:
                        log.debug(event.value)
                return
            if handler is not None:
                handler(event.value)

    def _show(self, result: LiveResult) -> None:
        started = time.perf_counter()
        self.last_result = result
        if result.note and result.note != self._last_note:
            self.report(result.note, level="warning")  # e.g. no band found, a dark of another size
        self._last_note = result.note
        self._draw_frame(result)
        self._draw_spectrum(result)
        self._show_clipping(result)
        self.stats.draw_time_s += time.perf_counter() - started
        self.stats.note_shown(time.perf_counter())
        if self.stats.frames_shown == 30:
            _freeze_heap()  # what the first frames created (geometry, extractor, plot) lives on too
        if self.worker is not None and self.worker.last_frame is not None:
            self.last_frame_image = self.worker.last_frame.image

    def _on_frame_resize(self, event) -> None:
        self._display_size = (max(16, event.width), max(16, event.height))
        self._display_box[0] = self._display_size
        self._overlay_key = None
        if self.last_result is not None:
            self._draw_frame(self.last_result)

    def _draw_frame(self, result: LiveResult) -> None:
        canvas = self.frame_canvas
        image = result.display_image
        height, width = image.shape[:2]
        pil = Image.fromarray(image)
        if self._photo is None or self._photo_size != (width, height):
            self._photo = ImageTk.PhotoImage(pil)
            self._photo_size = (width, height)
            canvas.itemconfigure(self._frame_image_item, image=self._photo)
            self._overlay_key = None
        else:
            self._photo.paste(pil)
        offset_x = max(0, (self._display_size[0] - width) // 2)
        offset_y = max(0, (self._display_size[1] - height) // 2)
        canvas.coords(self._frame_image_item, offset_x, offset_y)
        # The overlay is drawn into the image on the worker thread (processing.paint_overlay:
        # antialiased, through the geometry's mapping); only its legend lives here.
        key = result.overlay is not None
        if key == self._overlay_key:
            return
        self._overlay_key = key
        if result.overlay is None:
            self.frame_legend.configure(text="no band found")
            return
        self.frame_legend.configure(text="amber: band   teal: aperture   violet shade: background rows")

    def _on_spec_rendered(self) -> None:
        """A full render is on screen: keep it as the background and draw the newest trace on it."""
        self._spec_background = self.spec_canvas.copy_from_bbox(self.spec_axes.bbox)
        self._blit_artists()
        self.spec_canvas.blit(self.spec_axes.bbox)

    def _blit_artists(self) -> None:
        ax = self.spec_axes
        ax.draw_artist(self._spec_line)

    def _draw_spectrum(self, result: LiveResult, *, force: bool = False) -> None:
        ax = self.spec_axes
        if self.spec_canvas.rendering:
            # the figure is being rendered on the helper thread; this trace waits for the next frame
            self.stats.spectrum_skipped += 1
            if force:
                self._spec_axis_state = None
            return
        x, y = result.axis, result.intensity
        if x.size == 0:
            self._spec_line.set_data([], [])
            return
        top = float(np.max(y)) if y.size else 1.0
        top = top if top > 0 else 1.0
        low = min(0.0, float(np.min(y)))
        state = self._spec_axis_state
        xlim = (float(np.min(x)), float(np.max(x)))
        needs_redraw = force or state is None or state[0] != result.axis_is_wavelength or state[1] != xlim \
            or top > state[2] * 0.93 or top < state[2] * 0.3 or low < state[3]
        self._spec_line.set_data(x, y)
        if needs_redraw or force:
            self._marks_spec = None
        needs_redraw = self._update_marks(result, top * 1.45 if needs_redraw else state[2]) or needs_redraw
        if needs_redraw:
            ylim_top = top * 1.45
            ax.set_xlim(*xlim)
            ax.set_ylim(low * 1.1 if low < 0 else 0.0, ylim_top)
            ax.set_xlabel("wavelength in air (nm)" if result.axis_is_wavelength else "pixel along the band",
                          fontsize=9)
            ax.set_ylabel("signal (linear counts)", fontsize=9)
            self._spec_axis_state = (result.axis_is_wavelength, xlim, ylim_top, low * 1.1 if low < 0 else 0.0)
            self.stats.full_redraws += 1
            self._spec_background = None
            self.spec_canvas.render_async()  # _on_spec_rendered stores the background and blits
            return
        if self._spec_background is None:
            return
        self.spec_canvas.restore_region(self._spec_background)
        self._blit_artists()
        self.spec_canvas.blit(ax.bbox)

    def _update_marks(self, result: LiveResult, ylim_top: float) -> bool:
        """Place the line marks and labels; True when they changed (a full redraw is due).

        Labels are part of the static plot, so changing them costs a full
        render. Noise must not trigger one: only lines above 5% of the plot
        height count, a line that moved less than 1% of the axis or 8% of the
        height is the same line, and labels change at most every 2 seconds
        (at once when the axis itself is redrawn).
        """
        x_span = float(np.ptp(result.axis)) or 1.0
        spec = []
        for line in result.lines[: len(self._spec_labels)]:
            if line.height < 0.05 * ylim_top:
                continue  # weak lines come and go with the noise
            if line.saturated:
                colour = PALETTE["warning"]
            elif line.wavelength_nm is not None:
                colour = wavelength_hex(line.reference_nm or line.wavelength_nm)
            else:
                colour = PALETTE["accent"]
            spec.append((line.label + (" clipped" if line.saturated else ""), line.position, line.height, colour,
                         line.species))
        old = self._marks_spec
        if old is not None:
            def same(a, b):
                return a[4] == b[4] and a[3] == b[3] and abs(a[1] - b[1]) <= 0.01 * x_span \
                    and abs(a[2] - b[2]) <= 0.08 * ylim_top
            unchanged = len(old) == len(spec) and all(same(a, b) for a, b in zip(old, spec))
            if unchanged or time.monotonic() - self._marks_time < 2.0:
                return False
        self._marks_time = time.monotonic()
        self._marks_spec = spec
        gap = 0.02 * ylim_top
        for text in self._spec_labels:
            text.set_visible(False)
        segments, colours = [], []
        # Every line gets a tick; a label only when no taller line's label is too close to read.
        min_dx = 0.022 * x_span
        placed: list[float] = []
        for k in sorted(range(len(spec)), key=lambda i: -spec[i][2]):
            text, x, height, colour, _species = spec[k]
            segments.append([(x, height + gap), (x, height + 3 * gap)])
            colours.append(colour)
            if any(abs(x - other) < min_dx for other in placed):
                continue
            placed.append(x)
            label = self._spec_labels[len(placed) - 1]
            label.set_position((x, height + 3.6 * gap))
            label.set_text(text)
            label.set_color(PALETTE["warning"] if text.endswith("clipped") else PALETTE["ink"])
            label.set_visible(True)
        self._spec_marks.set_segments(segments)
        self._spec_marks.set_color(colours or PALETTE["accent"])
        return True

    def _show_clipping(self, result: LiveResult) -> None:
        """The level strip: peak level while all is well, a warning while lines clip.

        The strip is always there with the same height, so the warning never
        changes the layout (a relayout would redraw every plot).
        """
        clipped = [l for l in result.lines if l.saturated]
        if result.saturated_columns:
            what = f"{len(clipped)} line(s)" if clipped else f"{result.saturated_columns} column(s)"
            text = (f"CLIPPING: {what} at full scale: shorten the exposure or move the lamp back "
                    "(clipped lines give wrong centres and strengths)")
            style = "Warn.TLabel"
        else:
            text = f"Signal level: brightest pixel in the aperture at {100 * result.peak_fraction:.0f}% of full scale"
            style = "Level.TLabel"
        if text != self._clip_text:
            self._clip_text = text
            self.clip_warning.configure(text=text, style=style)

    def _update_status(self) -> None:
        if self._closed:
            return
        worker = self.worker
        if worker is not None:
            rate = self.stats.rate_hz()
            recent = list(worker.recent_process_s)
            cost = float(np.median(recent)) * 1000 if recent else 0.0
            self.rate_label.configure(text=f"{rate:4.1f} frames/s · {cost:.0f} ms")
        self._status_after = self.root.after(500, self._update_status)

    # ================================================================== messages
    def report(self, text: str, *, level: str = "info") -> None:
        """Show ``text`` in the message strip and the Log page, and log it."""
        stamp = time.strftime("%H:%M:%S")
        line = f"{stamp}  {text}"
        self.log_lines.append(f"{level}: {text}")
        getattr(log, {"info": "info", "warning": "warning", "error": "error"}.get(level, "info"))(text)
        self.log_text.configure(state="normal")
        self.log_text.insert("end", line + "\n", (level,) if level != "info" else ())
        self.log_text.see("end")
        self.log_text.configure(state="disabled")
        self.message.configure(text=text, foreground=PALETTE["warning"] if level != "info" else PALETTE["muted"])

    def _set_busy(self, name: str, busy: bool) -> None:
        button = self.buttons.get(name)
        if button is not None:
            button.configure(state="disabled" if busy else "normal")

    def _run(self, name: str, job: Callable, *, message: str) -> bool:
        if self.worker is None:
            self.report(f"{name}: no source is open; open one with Source ▾", level="error")
            return False
        if name in self.busy:
            return False
        self.busy.add(name)
        self._set_busy(name, True)
        self.report(message)
        self.worker.submit(name, job)
        return True

    # ================================================================== actions
    def _frames_now(self) -> list[np.ndarray]:
        """The frames an action works on: the held stack, else the newest frame."""
        if self.held_frames:
            return list(self.held_frames)
        frame = self.worker.last_frame if self.worker is not None else None
        if frame is not None:
            return [frame.image]
        if self.last_frame_image is not None:
            return [self.last_frame_image]
        return []

    def toggle_hold(self) -> None:
        if self.held is not None:
            self.held = None
            self.held_frames = []
            self.buttons["hold"].configure(text="Hold")
            self.spectrum_state.configure(text="live")
            if self.worker is not None:
                self.worker.pause_live(False)
            return
        frames = self._frames_now()
        if not frames:
            self.report("nothing to hold yet: wait for the first frame", level="warning")
            return
        self._hold(frames, "held frame")

    def _hold(self, frames: list[np.ndarray], label: str) -> None:
        self.held_frames = list(frames)
        if self.worker is not None:
            self.worker.pause_live(True)
        self.buttons["hold"].configure(text="Live")
        self.spectrum_state.configure(text=label)
        size = self._display_size

        processor = self.processor

        def job():
            note = ""
            if len(frames) > 1 and processor.calibration is None:
                note = processor.relocate(frames)  # a stack gives a steadier band than one frame
            stacked = processor.stack(frames) if len(frames) > 1 else None
            return processor.live(frames[-1], display_size=size, frame_index=-1, stacked=stacked), note

        self.held = self.last_result or True  # placeholder until the held result is computed
        self._run("held", job, message=f"{label}: computing the spectrum of {len(frames)} frame(s)")

    def _done_held(self, value) -> None:
        result, note = value
        if note:
            self.report(note)
            self._overlay_key = None
            if self.processor.calibration is None and self.calibration is not None:
                self._forget_calibration_view()
        if self.held is None:
            return
        self.held = result
        self._draw_frame(result)
        self._draw_spectrum(result, force=True)
        self._show_clipping(result)
        self.last_result = result

    def stack(self) -> None:
        """Stack the next N frames and hold their spectrum."""
        if self.worker is None:
            self.report("stack: no source is open", level="error")
            return
        count = self._stack_n()
        if count is None:
            return
        if self.held is not None:
            self.toggle_hold()  # back to live: the stack is of new frames
        self.report(f"stacking {count} frame(s)…")
        self._set_busy("stack", True)
        self.worker.collect(count, "stacked", lambda frames, reason: (frames, reason))

    def _stack_n(self) -> int | None:
        try:
            count = int(self.stack_count.get())
        except (tk.TclError, ValueError):
            count = -1
        if not 1 <= count <= 500:
            self.report("N (frames to stack) must be a whole number from 1 to 500", level="error")
            return None
        return count

    def _done_stacked(self, value) -> None:
        frames, reason = value
        self._set_busy("stack", False)
        if reason:
            self.report(f"stack cut short: {len(frames)} of {self._stack_n()} frames ({reason})", level="warning")
        if not frames:
            self.report("no frames were captured for the stack", level="error")
            return
        self._hold(frames, f"stack of {len(frames)}")

    def take_dark(self) -> None:
        if self.worker is None:
            self.report("dark: no source is open", level="error")
            return
        count = self._stack_n()
        if count is None:
            return
        self.report(f"taking a dark from {count} frame(s): the light should be off or the lens covered")
        self._set_busy("dark", True)
        processor = self.processor

        def then(frames, reason):
            if not frames:
                raise SourceError(f"no frames for the dark ({reason})")
            text = processor.set_dark(frames)
            return text + (f"; cut short: {reason}" if reason else "")

        self.worker.collect(count, "dark", then)

    def _done_dark(self, text: str) -> None:
        self.report(text)

    def find_band(self) -> None:
        """Measure the band again on the next N frames (after moving the camera or the grating)."""
        if self.worker is None:
            self.report("band: no source is open", level="error")
            return
        count = self._stack_n()
        if count is None:
            return
        self._set_busy("band", True)
        processor = self.processor

        def then(frames, reason):
            if not frames:
                raise SourceError(f"no frames to find the band on ({reason})")
            return processor.relocate(frames) + (f"; cut short: {reason}" if reason else "")

        self.report(f"measuring the band on {count} frame(s)…")
        self.worker.collect(count, "band", then)

    def _done_band(self, text: str) -> None:
        self.report(text)
        self._overlay_key = None
        self._spec_axis_state = None
        if self.processor.calibration is None and self.calibration is not None:
            self._forget_calibration_view()

    def _forget_calibration_view(self) -> None:
        self.calibration = None
        self.identification = None
        self.fit_summary.configure(text="Not calibrated: the band was measured again; calibrate again (c).")
        self.fit_table.delete(*self.fit_table.get_children())

    def clear_dark(self) -> None:
        self.processor.clear_dark()
        self.report("dark frame cleared")

    def calibrate(self) -> None:
        frames = self._frames_now()
        if not frames:
            self.report("calibrate: no frame yet; wait for the source", level="error")
            return
        lamp = self.lamp.get()
        self.action_frames = frames
        if lamp == "daylight":  # the Sun's caution every time, whatever light was confirmed
            _, items = cautions_for("daylight")
            self.report(f"caution: {items[0]} {items[1]}")
        self._run("calibrate", lambda processor=self.processor: processor.calibrate(frames, lamp=lamp),
                  message=f"calibrating on {len(frames)} frame(s) with the {lamp} "
                          f"{'dark lines (coarser than a lamp)' if lamp == 'daylight' else 'lamp'}…")

    def _done_calibrate(self, summary: CalibrationSummary) -> None:
        _freeze_heap()
        self.calibration = summary
        self.identification = None
        self._show_calibration(summary)
        self.report(f"calibrated with {summary.lamp}: weighted RMS {summary.rms_nm:.3f} nm ({summary.rms_px:.2f} px), "
                    f"{sum(1 for r in summary.rows if r.get('used', True))} lines, {_model_words(summary)}, "
                    f"{summary.verdict}")
        self._spec_axis_state = None
        self._refresh_held()
        self.pages.select(0)

    def _refresh_held(self) -> None:
        if self.held is not None and self.held_frames:
            self._hold(self.held_frames, self.spectrum_state.cget("text"))

    def _show_calibration(self, summary: CalibrationSummary) -> None:
        used = [r for r in summary.rows if r.get("used", True)]
        self.fit_summary.configure(
            text=f"Lamp {summary.lamp}: weighted RMS {summary.rms_nm:.3f} nm = {summary.rms_px:.3f} px, "
                 f"{len(used)} of {len(summary.rows)} lines, {_model_words(summary)}.\n"
                 f"Verdict: {summary.verdict}. {summary.message}".strip())
        self.fit_table.delete(*self.fit_table.get_children())
        for row in summary.rows:
            self.fit_table.insert("", "end", values=(f"{row['pixel']:.2f}", f"{row['wavelength_nm']:.3f}",
                                                     row.get("species", ""),
                                                     f"{row['residual_nm']:+.3f}" if row.get("used", True) else "not used"))
        self.fit_canvas.wait()
        ax = self.fit_axes
        ax.clear()
        self._style_axes(ax)
        ax.axhline(0, color=PALETTE["muted"], lw=0.8)
        (x_low, x_high), reach = residual_plot_limits(summary.rows)
        xs = np.array([r["wavelength_nm"] for r in used], dtype=float)
        ys = np.array([r["residual_nm"] for r in used], dtype=float)
        errors = np.array([r.get("uncertainty_nm", 0.0) for r in used], dtype=float)
        if xs.size and summary.uncertainty_nm.size:
            # the fit's 1-sigma between the outermost lines; beyond them it is extrapolated
            inside = (summary.fit_wavelength_nm >= xs.min()) & (summary.fit_wavelength_nm <= xs.max())
            if np.count_nonzero(inside) >= 2:
                ax.fill_between(summary.fit_wavelength_nm[inside], -summary.uncertainty_nm[inside],
                                summary.uncertainty_nm[inside], color=PALETTE["accent_light"], lw=0,
                                label="1σ of the fit")
        if xs.size:
            ax.errorbar(xs, ys, yerr=errors, fmt="none", ecolor=PALETTE["muted"], elinewidth=0.8, capsize=1.5,
                        zorder=2)
            ax.scatter(xs, ys, s=18, c=[wavelength_hex(x) for x in xs], edgecolors=PALETTE["ink"], linewidths=0.6,
                       zorder=3)
        top = 1.2 * reach
        out = [r for r in summary.rows if not r.get("used", True)]
        if out:  # rejected lines; one far off is drawn at the edge, pointing the way it lies
            rx = np.array([r["wavelength_nm"] for r in out], dtype=float)
            ry = np.array([r["residual_nm"] for r in out], dtype=float)
            near = np.abs(ry) <= top
            ax.scatter(rx[near], ry[near], s=18, marker="x", color=PALETTE["warning"], zorder=3)
            edge = 0.93 * top
            ax.scatter(rx[~near & (ry > 0)], np.full(np.count_nonzero(~near & (ry > 0)), edge), s=22, marker="^",
                       color=PALETTE["warning"], zorder=3)
            ax.scatter(rx[~near & (ry < 0)], np.full(np.count_nonzero(~near & (ry < 0)), -edge), s=22, marker="v",
                       color=PALETTE["warning"], zorder=3)
        ax.set_xlim(x_low, x_high)
        ax.set_ylim(-top, top)
        ax.set_xlabel("wavelength (nm)", fontsize=8)
        ax.set_ylabel("residual (nm)", fontsize=8)
        self.fit_canvas.draw_idle()

    def load_calibration(self) -> None:
        path = self.ask_open_path(self.root, "Load a calibration", [("Calibration", "*.json"), ("All", "*")])
        if not path:
            return
        shape = self._frames_now()[0].shape if self._frames_now() else None
        self._run("calibrate", lambda processor=self.processor: processor.load_calibration(path, frame_shape=shape),
                  message=f"loading calibration {path}…")

    def identify(self) -> None:
        frames = self._frames_now()
        if not frames:
            self.report("identify: no frame yet; wait for the source", level="error")
            return
        self.action_frames = frames
        self._run("identify", lambda processor=self.processor: processor.identify(frames),
                  message=f"identifying on {len(frames)} frame(s)…")

    def _done_identify(self, summary: IdentificationSummary) -> None:
        self.identification = summary
        self._show_identification(summary)
        top = summary.top_symbol or "nothing"
        self.report(f"identified: {summary.verdict}; best match {top}")
        self._refresh_held()
        self.pages.select(1)

    def _show_identification(self, summary: IdentificationSummary) -> None:
        self.species_summary.configure(text=f"Verdict: {summary.verdict}. {summary.message}".strip())
        self.species_table.delete(*self.species_table.get_children())
        for rank, match in enumerate(summary.ranked, start=1):
            self.species_table.insert("", "end", values=(rank, match["symbol"], f"{match['score']:.2f}",
                                                         f"{match.get('fraction', 0.0):.2f}", len(match.get("lines", ()))))
        lines = []
        missing = {m.symbol: m.missing_nm for m in getattr(summary.core, "matches", ())}
        for match in summary.ranked:
            found = [f"{l.get('observed_nm', l.get('wavelength_nm', 0.0)):.1f}" for l in match.get("lines", ())]
            if found:
                lines.append(f"{match['symbol']} explains: " + ", ".join(found) + " nm")
            seen = [l.get("observed_nm", 0.0) for l in match.get("lines", ())]
            absent = [w for w in (missing.get(match["symbol"]) or ()) if not any(abs(w - o) < 1.0 for o in seen)]
            if absent:
                lines.append(f"   {match['symbol']} lines expected but not seen: "
                             + ", ".join(f"{w:.1f}" for w in absent[:5]) + " nm")
        if summary.unexplained:
            lines.append("Unexplained: " + ", ".join(f"{l['wavelength_nm']:.1f}" for l in summary.unexplained) + " nm")
        else:
            lines.append("Every line is explained.")
        self.species_lines.configure(state="normal")
        self.species_lines.delete("1.0", "end")
        self.species_lines.insert("end", "\n".join(lines))
        self.species_lines.configure(state="disabled")

    def set_exposure(self, factor: float | None = None) -> None:
        worker = self.worker
        if worker is None or not worker.source.info.can_set_exposure:
            self.report("exposure: this source has a fixed exposure (only cameras that allow it can change it)",
                        level="warning")
            return
        try:
            value = float(self.exposure.get())
        except (tk.TclError, ValueError):
            self.report("exposure must be a number (driver units)", level="error")
            return
        if factor:
            value = max(1.0, value * factor)
            self.exposure.set(round(value, 1))
        source = worker.source
        self._run("exposure", lambda: source.set_exposure(value), message=f"setting the exposure to {value:g}…")

    def _done_exposure(self, outcome) -> None:
        if outcome.accepted:
            self.report(f"exposure set to {outcome.reported:g}")
        else:
            self.report(f"the camera refused exposure {outcome.requested:g} (it reports {outcome.reported}); "
                        "it may be under automatic control", level="warning")

    # ------------------------------------------------------------------ saving
    def _ask(self, title: str, default: str, types) -> Path | None:
        path = self.ask_save_path(self.root, title, default, types)
        return Path(path) if path else None

    def capture_to_session(self) -> None:
        """Save the frames on screen, their spectrum and the calibration to the session folder."""
        frames = self._frames_now()
        if not frames:
            self.report("capture: no frame yet", level="error")
            return
        if self.session_folder is None:
            folder = self.ask_open_path(self.root, "Choose (or create) a session folder", [], folder=True)
            if not folder:
                return
            self.session_folder = Path(folder)
        folder = self.session_folder
        light = self.light
        record = self._source_record()
        label = f"{record.get('kind', 'source')} {Path(str(record.get('name', ''))).name}".strip()
        self._run("capture", lambda processor=self.processor: processor.capture_to_session(
            folder, frames, source_type=light, metadata={"source": record}, label=label),
            message=f"saving a capture of {len(frames)} frame(s) to the session log…")

    def _done_capture(self, text: str) -> None:
        self.report(text)

    def save_spectrum(self) -> None:
        frames = self._frames_now()
        if not frames:
            self.report("save: no spectrum yet", level="error")
            return
        path = self._ask("Save the spectrum", "spectrum.csv", [("CSV", "*.csv"), ("JSON", "*.json"),
                                                              ("JCAMP-DX", "*.jdx"), ("All", "*")])
        if path is None:
            return
        info = self._source_record()
        self._run("save_spectrum", lambda processor=self.processor: processor.save_spectrum(frames, path, source=info),
                  message=f"saving the spectrum to {path}…")

    def save_calibration(self) -> None:
        path = self._ask("Save the calibration", "calibration.json", [("Calibration", "*.json")])
        if path is None:
            return
        self._run("save_calibration", lambda processor=self.processor: processor.save_calibration(path),
                  message=f"saving the calibration to {path}…")

    def save_frame(self) -> None:
        frames = self._frames_now()
        if not frames:
            self.report("save: no frame yet", level="error")
            return
        path = self._ask("Save the frame", "frame.png", [("PNG", "*.png"), ("TIFF", "*.tif")])
        if path is None:
            return
        image = frames[-1]
        self._run("save_frame", lambda processor=self.processor: processor.save_frame(image, path), message=f"saving the frame to {path}…")

    def save_plot(self) -> None:
        result = self.held if isinstance(self.held, LiveResult) else self.last_result
        if result is None:
            self.report("save: no spectrum to plot yet", level="error")
            return
        path = self._ask("Save the plot", "spectrum.png", [("PNG", "*.png"), ("SVG", "*.svg"), ("PDF", "*.pdf")])
        if path is None:
            return
        title = f"benchspec bench viewer: {self.source_text}"  # read on the Tk thread
        self._run("save_plot", lambda processor=self.processor: processor.save_plot(result, path, title=title),
                  message=f"saving the plot to {path}…")

    def _done_save_spectrum(self, text):
        self.report(text)

    _done_save_calibration = _done_save_frame = _done_save_plot = _done_save_spectrum

    def _source_record(self) -> dict:
        info = self.worker.source.info if self.worker is not None else None
        record = {"light_source": self.light}
        if info is not None:
            record.update(kind=info.kind, name=info.name, refused_settings=list(info.refused_settings))
        return record

    # ================================================================== keys, help, closing
    def _bind_keys(self) -> None:
        actions = {
            "hold": self.toggle_hold, "stack": self.stack, "dark": self.take_dark, "band": self.find_band, "calibrate": self.calibrate,
            "identify": self.identify, "exposure_up": lambda: self.set_exposure(1.25),
            "exposure_down": lambda: self.set_exposure(0.8), "save_spectrum": self.save_spectrum, "capture": self.capture_to_session,
            "save_calibration": self.save_calibration, "save_frame": self.save_frame, "save_plot": self.save_plot,
            "load_calibration": self.load_calibration, "open_video": self.open_video,
            "choose_light": self.show_light_chooser, "quit": self.close,
        }
        self.actions = actions
        for key, (action, _) in SHORTCUTS.items():
            self.root.bind(key, lambda event, a=action, k=key: self._on_key(event, a, k))

    def _on_key(self, event, action: str, key: str):
        if key in _LETTER_KEYS:
            focus = self.root.focus_get()
            if isinstance(focus, (tk.Entry, ttk.Entry, tk.Text, ttk.Spinbox, ttk.Combobox)):
                return None  # typing, not a shortcut
        if not self.light_confirmed and action not in ("quit", "choose_light"):
            return "break"
        self.actions[action]()
        return "break"

    def show_keys(self) -> None:
        text = "\n".join(f"{key.strip('<>').replace('Control-', 'Ctrl+'):>10}  {desc}"
                         for key, (_, desc) in SHORTCUTS.items())
        self.report("keyboard shortcuts:\n" + text)
        self.pages.select(2)

    def close(self) -> None:
        if self._closed:
            return
        self._closed = True
        self._stop_worker(timeout=3.0)
        for after in (self._after_id, self._status_after):
            if after is not None:
                try:
                    self.root.after_cancel(after)
                except tk.TclError:
                    pass
        self._stop_worker()
        if self.pending_source is not None:
            self.pending_source.close()
        self._plot_executor.shutdown(wait=True)
        try:
            self.root.destroy()
        except tk.TclError:
            pass
        # Collect Tk objects now, on the Tk thread; left to chance, a worker thread's
        # garbage collection could run their clean-up where Tk cannot answer.
        import gc

        gc.collect()
