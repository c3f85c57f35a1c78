"""The one-page PDF report: renders with pdftoppm, holds the provenance as text, cautions never cut."""

from __future__ import annotations

import re
import shutil
import subprocess

import numpy as np
import pytest
from PIL import Image

import benchspec
from benchspec import Spectrum, load_line_list
from benchspec.cli import main
from benchspec.errors import ExportError, InputError
from benchspec.io import build_provenance, write_spectrum
from benchspec.report import build_report, result_lines, write_report
from benchspec.safety import GENERAL_CAUTION, cautions_for

pytestmark = pytest.mark.skipif(shutil.which("pdftoppm") is None or shutil.which("pdftotext") is None,
                                reason="needs poppler-utils (pdftoppm, pdftotext)")

FRAME_SHA = "5e" * 32
CAL_SHA = "c0" * 32


@pytest.fixture
def helium(rng):
    # He I air wavelengths and relative intensities from the NIST ASD (calibration/lines/He.csv).
    pixel = np.arange(900.0)
    wavelength = 390.0 + 0.36 * pixel + 1.0e-5 * pixel**2
    lines = load_line_list("He").lines
    strongest = max(line.relative_intensity for line in lines)
    intensity = np.full(pixel.size, 15.0)
    for line in lines:
        intensity += 900.0 * line.relative_intensity / strongest * np.exp(-0.5 * ((wavelength - line.wavelength_nm) / 0.7) ** 2)
    intensity += rng.normal(0.0, 3.0, pixel.size)
    provenance = build_provenance(
        frames=[{"path": "frames/tube A 001.png", "sha256": FRAME_SHA}],
        calibration={"path": "cal/bench B cfl.json", "sha256": CAL_SHA, "rms_nm": 0.042, "rms_px": 0.11, "lamp": "cfl",
                     "line_list_source": "Hg: NIST ASD"},
        response={"method": "Planck", "reference": "halogen 2856 K"},
        settings={"gamma": "srgb", "stack": "median", "aperture_px": 18},
        source_type="discharge",
        created_utc="2026-12-01T10:15:00Z",
    )
    return Spectrum(intensity=intensity, uncertainty=np.full(pixel.size, 3.0), pixel=pixel, wavelength_nm=wavelength,
                    wavelength_uncertainty_nm=np.full(pixel.size, 0.05), provenance=provenance)


CALIBRATION = {
    "verdict": "good", "verdict_reason": "6 lines, RMS 0.11 px", "rms_nm": 0.042,
    "matches": [{"reference_nm": w, "residual_nm": r, "species": "Hg", "used_in_fit": True}
                for w, r in ((404.656, 0.03), (435.833, -0.04), (546.075, 0.02), (576.961, -0.05), (579.067, 0.04))],
}


def _pdf_text(path) -> str:
    return subprocess.run(["pdftotext", "-layout", str(path), "-"], capture_output=True, text=True, check=True).stdout


def _render(path, tmp_path):
    subprocess.run(["pdftoppm", "-r", "60", "-png", str(path), str(tmp_path / "page")], check=True, capture_output=True)
    pages = sorted(tmp_path.glob("page*.png"))
    return pages


def test_report_renders_one_page_with_the_plot(tmp_path, helium):
    from benchspec.identify import identify

    result = identify(helium)
    path = write_report(tmp_path / "rapport élève.pdf", helium, calibration=CALIBRATION, results=result,
                        title="Mystery tube A (invented bench B)")
    pages = _render(path, tmp_path)
    assert len(pages) == 1  # one page
    pixels = np.asarray(Image.open(pages[0]).convert("RGB"), dtype=float) / 255.0
    height, width, _ = pixels.shape
    assert abs(width / height - 8.27 / 11.69) < 0.01  # A4 portrait
    # The spectrum panel (top third of the page) is drawn: dark trace and coloured line ticks.
    panel = pixels[int(0.09 * height): int(0.38 * height), int(0.09 * width): int(0.95 * width)]
    assert np.any(panel < 0.5, axis=2).mean() > 0.01
    assert ((panel.max(axis=2) - panel.min(axis=2)) > 0.35).any()
    text = _pdf_text(path)
    assert "Identification: identified" in text and "He 587.56" in text  # NIST ASD He I 587.562 nm


def test_report_text_holds_every_provenance_field(tmp_path, helium):
    path = write_report(tmp_path / "r.pdf", helium, calibration=CALIBRATION, results={"title": "Line check", "peak_nm": 587.56})
    text = _pdf_text(path)
    flat = re.sub(r"\s+", " ", text)
    for field in (
        "frames/tube A 001.png", FRAME_SHA,                 # source frames and hashes
        "cal/bench B cfl.json", CAL_SHA, "rms_nm 0.042",    # calibration with its RMS
        "line_list_source: Hg: NIST ASD",                    # line-list source
        "response correction: method Planck",               # response correction
        'gamma="srgb"', "aperture_px=18",                   # settings
        f"benchspec {benchspec.__version__}",               # software version
        "created_utc: 2026-12-01T10:15:00Z",                # time
        "Line check", "peak_nm: 587.56",                    # the result
    ):
        assert field in flat, field
    title, cautions = cautions_for("discharge")
    assert title in flat
    for caution in cautions + (GENERAL_CAUTION,):
        assert re.sub(r"\s+", " ", caution)[:40] in flat  # cautions shown, not cut


def test_cautions_are_never_cut_even_with_a_long_result(tmp_path, helium):
    long_result = {"title": "Many numbers", "values": [{"wavelength_nm": 400 + i, "value": i} for i in range(200)]}
    path = write_report(tmp_path / "long.pdf", helium, results=long_result, source_type="laser")
    flat = re.sub(r"\s+", " ", _pdf_text(path))
    for caution in cautions_for("laser")[1] + (GENERAL_CAUTION,):
        assert re.sub(r"\s+", " ", caution)[:40] in flat
    assert len(_render(path, tmp_path)) == 1


def test_many_frames_and_spectra_still_fit_one_page(tmp_path, helium):
    frames = [{"path": f"frames/stack {i:03d}.png", "sha256": f"{i:064x}"} for i in range(40)]
    busy = helium.with_(provenance={**helium.provenance, "frames": frames})
    path = write_report(tmp_path / "busy.pdf", [helium, busy], labels=["first", "second"], calibration=CALIBRATION)
    assert len(_render(path, tmp_path)) == 1
    text = _pdf_text(path)
    assert "[first]" in text and "more frames" in text


def test_result_lines_for_identification_and_analysis():
    lines = result_lines({"verdict": "mixture", "matches": [{"symbol": "Ne", "score": 0.91, "fraction": 0.7, "lines": [{}] * 9},
                                                           {"symbol": "Hg", "score": 0.6, "fraction": 0.25, "lines": [{}] * 3}],
                          "unexplained": [{"wavelength_nm": 612.3}]})
    assert lines[0] == "Identification: mixture" and "Ne: score 0.91" in lines[1] and "612.3" in lines[-1]
    assert result_lines(None)[0].startswith("No result")
    assert result_lines({"cct_K": 2856.0, "duv": 0.0012})[:2] == ["cct_K: 2856", "duv: 0.0012"]


def test_report_refuses_bad_input(tmp_path, helium):
    keep = write_report(tmp_path / "r.pdf", helium)
    before = keep.read_bytes()
    with pytest.raises(ExportError, match="already exists; pass --force"):
        write_report(keep, helium)
    assert keep.read_bytes() == before
    with pytest.raises(ExportError, match="ending in .pdf"):
        write_report(tmp_path / "r.png", helium)
    with pytest.raises(InputError, match="unknown source type"):
        build_report(helium, source_type="volcano")
    with pytest.raises(InputError, match="at least one"):
        build_report([])


def test_report_command(tmp_path, helium, capsys):
    spectrum = write_spectrum(helium, tmp_path / "tube A.json")
    out = tmp_path / "report.pdf"
    assert main(["report", str(spectrum), "--out", str(out), "--identify", "--title", "Tube A"]) == 0
    printed = capsys.readouterr().out
    assert "identification: identified (He)" in printed and "kilovolts" in printed  # discharge cautions printed
    assert "Tube A" in _pdf_text(out)
    assert main(["report", str(spectrum), "--out", str(out)]) == 2  # no overwrite without --force
    assert "--force" in capsys.readouterr().err
    assert main(["report", str(tmp_path / "missing.csv"), "--out", str(tmp_path / "x.pdf")]) == 2
    assert not (tmp_path / "x.pdf").exists()
    assert main(["report", str(spectrum), "--out", str(out), "--force", "--source-type", "laser"]) == 0


def test_calibration_file_layout_gives_residuals_and_verdict(tmp_path, helium):
    # The calibration file nests the solution under `wavelength_calibration` (benchspec.calfile schema).
    calibration_file = {"schema": "benchspec.calibration/1", "wavelength_calibration": CALIBRATION}
    figure = build_report(helium, calibration=calibration_file)
    titles = [ax.get_title(loc="left") for ax in figure.axes]
    assert any("verdict: good" in t for t in titles)
    residual_ax = next(ax for ax in figure.axes if ax.get_ylabel() == "residual (nm)")
    assert len(residual_ax.collections[-1].get_offsets()) == len(CALIBRATION["matches"])


def test_report_labels_neither_overprint_nor_leave_their_panels(helium, rng):
    # A CFL calibration: Hg I lines from the NIST ASD and the phosphor features (common practice, no
    # source; calibration/lines); 542.4 and 546.075 nm are closer than a label's width, 650.0 ends the axis.
    from benchspec.identify import identify

    matches = [{"reference_nm": line.wavelength_nm, "residual_nm": float(rng.normal(0.0, 0.05)), "species": species,
                "used_in_fit": True}
               for species in ("Hg", "CFL-phosphor") for line in load_line_list(species).lines
               if line.relative_intensity >= 100 and 400.0 < line.wavelength_nm <= 650.0]
    figure = build_report(helium, calibration={"verdict": "good", "matches": matches}, results=identify(helium))
    figure.draw_without_rendering()
    residual_ax = next(ax for ax in figure.axes if ax.get_ylabel() == "residual (nm)")
    spectrum_ax = figure.axes[0]

    def overlaps(a, b):
        return min(a.x1, b.x1) - max(a.x0, b.x0) > 0.5 and min(a.y1, b.y1) - max(a.y0, b.y0) > 0.5

    legend = residual_ax.get_legend()
    texts = [t for t in list(residual_ax.texts) + (legend.get_texts() if legend else []) if t.get_text()]
    boxes = [t.get_window_extent() for t in texts]
    frame = residual_ax.get_window_extent()
    for i, (text, box) in enumerate(zip(texts, boxes)):
        assert not any(overlaps(box, other) for other in boxes[i + 1:]), text.get_text()
        inside = frame.x0 <= box.x0 and box.x1 <= frame.x1 and frame.y0 <= box.y0 and box.y1 <= frame.y1
        assert inside or box.y1 <= frame.y0, f"{text.get_text()!r} runs across the residual panel's edge"
    assert [t.get_text() for t in texts].count("CFL-phosphor") == 1  # each species named once
    # the spectrum's line labels (He I, NIST ASD) stay inside their panel and apart
    labels = [t for t in spectrum_ax.texts if t.get_rotation() == 90]
    assert len(labels) >= 5
    frame = spectrum_ax.get_window_extent()
    boxes = [t.get_window_extent() for t in labels]
    for i, box in enumerate(boxes):
        assert frame.x0 <= box.x0 and box.x1 <= frame.x1 and box.y1 <= frame.y1
        assert not any(overlaps(box, other) for other in boxes[i + 1:])
