"""Plots: colours from the CIE 1931 functions, labelled lines, residuals, sober look, metadata."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys

import numpy as np
import pytest
from PIL import Image

from benchspec import Spectrum
from benchspec import plots
from benchspec.errors import ExportError, InputError
from benchspec.io import build_provenance, write_spectrum

HG_LINES = [(404.656, "Hg 404.66"), (435.833, "Hg 435.83"), (546.075, "Hg 546.07"), (576.961, "Hg 576.96"), (579.067, "Hg 579.07")]


@pytest.fixture
def lamp(rng):
    # Hg I air wavelengths from the NIST Atomic Spectra Database (as listed in calibration/lines).
    pixel = np.arange(700.0)
    wavelength = 390.0 + 0.45 * pixel + 1.2e-5 * pixel**2
    intensity = np.full(pixel.size, 20.0)
    for centre, _ in HG_LINES:
        intensity += 900.0 * np.exp(-0.5 * ((wavelength - centre) / 0.8) ** 2)
    intensity += rng.normal(0.0, 4.0, pixel.size)
    return Spectrum(intensity=intensity, uncertainty=np.sqrt(intensity.clip(1)) + 4, pixel=pixel, wavelength_nm=wavelength,
                    saturated=intensity > 880, provenance=build_provenance(settings={"gamma": "srgb"}))


def test_wavelength_colours_follow_the_cie_1931_functions():
    # CIE 1931 2-degree colour-matching functions (colour-science): blue at 450 nm, green at 530 nm,
    # red at 630 nm, dark outside the visible range.
    rgb = plots.wavelength_colour([450.0, 530.0, 630.0, 300.0, 900.0])
    assert np.argmax(rgb[0]) == 2 and np.argmax(rgb[1]) == 1 and np.argmax(rgb[2]) == 0
    assert np.all(rgb[3] < 0.05) and np.all(rgb[4] < 0.05)
    # The fallback computed here straight from colour.MSDS_CMFS agrees with the analysis module.
    grid = np.linspace(400.0, 700.0, 61)
    np.testing.assert_allclose(plots._cie_srgb(grid), plots.wavelength_colour(grid), atol=0.03)


def test_line_labels_accept_pairs_mappings_and_numbers():
    labels = plots.normalise_line_labels([(546.075, "Hg"), {"wavelength_nm": 435.833, "species": "Hg"}, 611.6,
                                          {"observed_nm": 501.57, "label": "He 501.57"}])
    assert [d["wavelength_nm"] for d in labels] == [435.833, 501.57, 546.075, 611.6]
    assert labels[0]["label"] == "Hg 435.8" and labels[3]["label"] == "611.6"
    with pytest.raises(InputError, match="wavelength_nm"):
        plots.normalise_line_labels([{"species": "Hg"}])
    with pytest.raises(InputError, match="finite"):
        plots.normalise_line_labels([float("nan")])


def test_residuals_from_a_calibration_record():
    calibration = {"verdict": "good", "matches": [
        {"reference_nm": 435.833, "residual_nm": 0.03, "species": "Hg", "used_in_fit": True},
        {"reference_nm": 546.075, "residual_nm": -0.04, "species": "Hg", "used_in_fit": True},
        {"reference_nm": 611.6, "residual_nm": 0.9, "species": "Eu", "used_in_fit": False},
    ]}
    data = plots.normalise_residuals({"calibration": calibration})
    np.testing.assert_array_equal(data["used"], [True, True, False])
    assert data["rms_nm"] == pytest.approx(np.sqrt((0.03**2 + 0.04**2) / 2))  # RMS of the lines used in the fit
    assert plots.normalise_residuals({"nothing": 1}) is None


def _ink(path):
    pixels = np.asarray(Image.open(path).convert("RGB"), dtype=float) / 255.0
    non_white = np.any(pixels < 0.9, axis=2)
    spread = pixels.max(axis=2) - pixels.min(axis=2)
    vivid = spread > 0.35  # strongly coloured pixels
    return pixels, non_white, vivid


def test_png_plot_is_sober_and_carries_provenance(tmp_path, lamp):
    path = write_spectrum(lamp, tmp_path / "lampe é.png", lines=HG_LINES, title="invented bench B")
    pixels, non_white, vivid = _ink(path)
    assert pixels.shape[:2] == (1140, 2100)  # 7.0 x 3.8 in at 300 dpi
    assert 0.02 < non_white.mean() < 0.5  # a plot, not a blank page nor a filled area
    assert vivid.mean() < 0.06  # no rainbow fill under the curve: colour only in ticks and the thin strip
    assert vivid.any()  # but the wavelength colours are there
    description = json.loads(Image.open(path).text["Description"])
    assert description["settings"] == {"gamma": "srgb"}


def test_svg_and_pdf_text_is_searchable(tmp_path, lamp):
    svg = write_spectrum(lamp, tmp_path / "s.svg", lines=HG_LINES).read_text(encoding="utf-8")
    assert "Hg 546.07" in svg and "wavelength in air (nm)" in svg
    pdf = write_spectrum(lamp, tmp_path / "s.pdf", lines=HG_LINES)
    if shutil.which("pdftotext") is None:
        pytest.skip("pdftotext (poppler-utils) is not installed")
    text = subprocess.run(["pdftotext", str(pdf), "-"], capture_output=True, text=True, check=True).stdout
    assert "Hg 546.07" in text and "wavelength in air (nm)" in text


def test_uncalibrated_and_overlaid_plots(tmp_path, lamp):
    raw = lamp.with_(wavelength_nm=None)
    figure = plots.spectrum_figure(raw)
    assert figure.axes[0].get_xlabel().startswith("pixel")
    figure = plots.spectrum_figure([lamp, lamp.with_(intensity=lamp.intensity * 0.5)], labels=["before", "after"])
    legend = [t.get_text() for t in figure.axes[0].get_legend().get_texts()]
    assert legend.count("saturated samples") <= 1 and [t for t in legend if t != "saturated samples"] == ["before", "after"]
    with pytest.raises(InputError, match="cannot overlay"):
        plots.spectrum_figure([lamp, raw])


def test_residual_figure_and_empty_residuals(tmp_path):
    rows = [{"wavelength_nm": w, "residual_nm": r, "species": "Hg"} for w, r in ((404.7, 0.02), (546.1, -0.03), (579.1, 0.01))]
    path = plots.save_figure(plots.residuals_figure(rows), tmp_path / "r.png")
    _, non_white, vivid = _ink(path)
    assert non_white.mean() > 0.02 and vivid.any()
    figure = plots.residuals_figure(None)
    assert any("no calibration residuals" in t.get_text() for t in figure.axes[0].texts)
    with pytest.raises(ExportError, match="already exists"):
        plots.save_figure(plots.residuals_figure(rows), path)
    with pytest.raises(ExportError, match=r"\.png, \.svg or \.pdf"):
        plots.save_figure(plots.residuals_figure(rows), tmp_path / "r.gif")


def test_no_pyplot_and_no_matplotlib_in_the_core():
    code = (
        "import sys\n"
        "import benchspec, benchspec.io, benchspec.session\n"
        "assert 'matplotlib' not in sys.modules, 'the core imported matplotlib'\n"
    )
    subprocess.run([sys.executable, "-c", code], check=True, timeout=120)
    # Figures are built on matplotlib.figure.Figure, never through pyplot's global state.
    # (colour-science itself may import pyplot; benchspec's modules must not.)
    from pathlib import Path

    for module in (plots, __import__("benchspec.report", fromlist=["x"])):
        source = Path(module.__file__).read_text(encoding="utf-8")
        assert "pyplot" not in source.replace("never through pyplot", "").replace("no pyplot", ""), module.__name__


def test_columns_extrapolated_past_what_a_camera_records_are_not_drawn(lamp):
    # A calibration extrapolated to 60-1400 nm (wide lens, lines only in the middle): the plot keeps to
    # the 300-1100 nm a silicon camera behind glass can record (common practice, no source); the data stay.
    from matplotlib.figure import Figure

    wide = lamp.with_(wavelength_nm=np.linspace(60.0, 1400.0, lamp.size))
    ax = Figure().add_subplot()
    plots.plot_spectrum(ax, wide)
    low, high = ax.get_xlim()
    assert low >= plots.VIEW_RANGE_NM[0] and high <= plots.VIEW_RANGE_NM[1]
    assert high - low > 700  # the whole recordable range is still shown
    assert wide.wavelength_nm.min() == 60.0  # the spectrum itself is not cut


# --------------------------------------------------------------------------- labels that can be read


def _extents(figure, texts):
    """Window extents (display px) of ``texts`` after the figure's layout, by matplotlib's own renderer."""
    figure.draw_without_rendering()
    return [t.get_window_extent() for t in texts if t.get_visible() and t.get_text()]


def _overlapping(boxes):
    """Pairs of boxes that share more than half a pixel in both directions."""
    pairs = []
    for i in range(len(boxes)):
        for j in range(i + 1, len(boxes)):
            a, b = boxes[i], boxes[j]
            if min(a.x1, b.x1) - max(a.x0, b.x0) > 0.5 and min(a.y1, b.y1) - max(a.y0, b.y0) > 0.5:
                pairs.append((i, j))
    return pairs


def _line_labels(ax):
    return [t for t in ax.texts if t.get_rotation() == 90]  # the line labels stand upright


@pytest.mark.parametrize("species, name", [("Ne", "Ne"), ("CFL-phosphor", "CFL-phosphor")])
def test_line_labels_never_overlap_and_stay_inside_the_axes(rng, species, name):
    # Every line of a packaged list labelled: Ne I from the NIST ASD (160 lines, many closer than a label's
    # height) and the CFL phosphor features (common practice, no source) with long labels.
    from benchspec import load_line_list

    lines = load_line_list(species).lines
    wavelength = np.linspace(380.0, 760.0, 1400)
    intensity = np.full(wavelength.size, 10.0)
    for line in lines:
        intensity += 500.0 * np.sqrt(line.relative_intensity) * np.exp(-0.5 * ((wavelength - line.wavelength_nm) / 0.6) ** 2)
    intensity += rng.normal(0.0, 2.0, wavelength.size)
    spectrum = Spectrum(intensity=intensity, uncertainty=np.full(wavelength.size, 2.0), pixel=np.arange(wavelength.size, dtype=float),
                        wavelength_nm=wavelength)
    labels = [(line.wavelength_nm, f"{name} {line.wavelength_nm:.2f}") for line in lines]
    figure = plots.spectrum_figure(spectrum, lines=labels)
    ax = figure.axes[0]
    texts = _line_labels(ax)
    boxes = _extents(figure, texts)
    assert len(boxes) >= min(len(lines), 12)  # a crowded axis still names a dozen lines
    assert _overlapping(boxes) == []
    frame = ax.get_window_extent()
    for text, box in zip(texts, boxes):
        assert frame.x0 <= box.x0 and box.x1 <= frame.x1 and frame.y0 <= box.y0 and box.y1 <= frame.y1, text.get_text()
    # the strongest line is always among those named
    strongest = max(lines, key=lambda line: line.relative_intensity)
    assert f"{name} {strongest.wavelength_nm:.2f}" in {t.get_text() for t in texts}


def test_label_spreading_keeps_order_and_spacing():
    # positions closer than the spacing are moved apart as little as possible and kept in the range
    placed = plots._spread(np.array([10.0, 10.5, 11.0, 30.0]), gap=2.0, low=0.0, high=31.0)
    np.testing.assert_allclose(np.diff(placed)[:2], 2.0)
    assert placed[1] == pytest.approx(10.5)  # the middle of a symmetric cluster stays put
    assert placed[-1] == pytest.approx(30.0)
    assert plots._spread(np.array([1.0, 2.0, 3.0]), gap=2.0, low=0.0, high=3.0) is None  # 3 labels need 4 units


def test_residual_panel_names_each_species_once_without_overprinting(rng):
    # A CFL's calibration lines: Hg I from the NIST ASD and the phosphor features (common practice, no
    # source); 542.4 and 546.075 nm lie closer than a label's width, 650.0 nm ends the axis.
    from benchspec import load_line_list

    rows = [{"wavelength_nm": line.wavelength_nm, "residual_nm": float(rng.normal(0.0, 0.05)), "species": species}
            for species in ("Hg", "CFL-phosphor") for line in load_line_list(species).lines
            if line.relative_intensity >= 100 and 400.0 < line.wavelength_nm <= 650.0]
    rows[-1]["used"] = False
    figure = plots.residuals_figure(rows)
    ax = figure.axes[0]
    texts = list(ax.texts) + (ax.get_legend().get_texts() if ax.get_legend() else [])
    boxes = _extents(figure, texts)
    names = [t.get_text() for t in texts if t.get_visible() and t.get_text()]
    assert names.count("Hg") == 1 and names.count("CFL-phosphor") == 1
    assert _overlapping(boxes) == []
    frame, page = ax.get_window_extent(), figure.bbox
    for name, box in zip(names, boxes):
        inside = frame.x0 <= box.x0 and box.x1 <= frame.x1 and frame.y0 <= box.y0 and box.y1 <= frame.y1
        outside = box.y1 <= frame.y0 or box.y0 >= frame.y1
        assert inside or outside, f"{name!r} crosses the edge of the axes"
        assert page.x0 <= box.x0 and box.x1 <= page.x1 and page.y0 <= box.y0, name
    # nor does any text stand on a data point
    points = np.vstack([c.get_offset_transform().transform(c.get_offsets()) for c in ax.collections if len(c.get_offsets())])
    assert len(points) == len(rows)
    for name, box in zip(names, boxes):
        assert not np.any((points[:, 0] > box.x0) & (points[:, 0] < box.x1) & (points[:, 1] > box.y0) & (points[:, 1] < box.y1)), name


def test_demo_plots_carry_their_lines(tmp_path, monkeypatch):
    # The demo's tube plots name the identified lines (species and nm), its daylight plot the dark lines.
    from benchspec import demo_run

    drawn = {}
    original = plots.save_spectrum_plot

    def recording(spectrum, path, **options):
        drawn[path.name] = options.get("lines")
        return original(spectrum, path, **options)

    monkeypatch.setattr(plots, "save_spectrum_plot", recording)
    assert demo_run.run_demo(tmp_path / "demo") == 0
    assert {"tube_A.png", "tube_B.png", "tube_C.png", "daylight.png", "cfl_1.png"} <= set(drawn)
    for name in ("tube_A.png", "tube_B.png", "tube_C.png", "daylight.png"):
        assert (tmp_path / "demo" / name).stat().st_size > 5000
    tube_a = [d["label"] for d in drawn["tube_A.png"]]
    # demo_images/README.md: tube A is helium; He I 587.562 nm from the NIST ASD
    assert tube_a and all(label.startswith("He ") for label in tube_a)
    assert "He 587.56" in tube_a
    assert all(drawn[name] for name in ("tube_B.png", "tube_C.png"))
    daylight = dict((label.split()[0], wavelength) for wavelength, label in drawn["daylight.png"])
    # Fraunhofer F is H-beta, 486.13 nm, and D the Na I pair 588.995/589.592 nm (NIST ASD air wavelengths)
    assert daylight["F"] == pytest.approx(486.13, abs=0.5)
    assert daylight["D2+D1"] == pytest.approx(589.3, abs=1.0)
    assert drawn["cfl_1.png"] is None  # the other plots are as before
