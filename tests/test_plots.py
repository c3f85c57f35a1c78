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
