"""The calibration file: schema, round trip, validation on load, atomic and non-clobbering writes."""

import json
import os

import numpy as np
import pytest

from benchspec.calfile import SCHEMA, UNITS, Calibration, read_calibration, write_calibration
from benchspec.errors import ExportError, FileFormatError
from benchspec.geometry import Geometry
from benchspec.wavecal import calibrate_spectrum

from synthetic_lamp import cfl_continuum, lamp_lines, render


@pytest.fixture(scope="module")
def calibration():
    rng = np.random.default_rng(5)
    spectrum, _ = render(lamp_lines("cfl"), rng=rng, nm_per_px=0.5, n_pixels=1280, peak_counts=3000,
                         continuum=cfl_continuum)
    # max_order=2 keeps a polynomial solution, whose fields the edits below damage (the grating model's
    # fields are checked in test_wavecal_grating.py).
    wavelength = calibrate_spectrum(spectrum, lamp="cfl", max_order=2)
    assert wavelength.solution.model == "polynomial"
    geometry = Geometry(frame_width_px=1280, frame_height_px=720, rotation_deg=2.0, rotation_uncertainty_deg=0.01,
                        centre_x_px=640.0, centre_y_px=360.0, first_column_s_px=0.0, n_columns=1280, n_rows=200,
                        centre_row=100, aperture_rows=(40, 160), background_rows=((5, 30), (170, 195)),
                        band_height_px=100.0)
    return Calibration(geometry=geometry, wavelength=wavelength,
                       frames=({"path": "lamp.png", "sha256": "0" * 64, "lamp": "cfl"},),
                       settings={"gamma": "2.2", "channel": "mean"},
                       line_list=({"wavelength_nm": 435.833, "relative_intensity": 4000, "species": "Hg",
                                   "tolerance_nm": 0.005},),
                       reference_spectrum=tuple(np.asarray(spectrum.intensity, float)))


def test_round_trip(tmp_path, calibration):
    path = write_calibration(calibration, tmp_path / "cal.json")
    back = read_calibration(path)
    assert back.geometry == calibration.geometry
    assert back.wavelength == calibration.wavelength
    assert back.reference_spectrum == pytest.approx(calibration.reference_spectrum)
    data = json.loads(path.read_text())
    assert data["schema"] == SCHEMA and data["units"] == UNITS
    assert data["wavelength_calibration"]["rms_px"] == calibration.wavelength.rms_px
    assert data["created_utc"].endswith("Z")
    assert [p.name for p in tmp_path.iterdir()] == ["cal.json"]  # no temporary file left behind


def test_never_overwrites_without_force(tmp_path, calibration):
    path = tmp_path / "cal.json"
    path.write_text("keep me")
    with pytest.raises(ExportError, match="already exists"):
        write_calibration(calibration, path)
    assert path.read_text() == "keep me"
    write_calibration(calibration, path, force=True)
    assert read_calibration(path).wavelength == calibration.wavelength
    with pytest.raises(ExportError, match=".json"):
        write_calibration(calibration, tmp_path / "cal.txt")


def _written(tmp_path, calibration, edit):
    data = calibration.to_dict()
    edit(data)
    path = tmp_path / "edited.json"
    path.write_text(json.dumps(data, allow_nan=True))
    return path


@pytest.mark.parametrize(
    "edit, message",
    [
        (lambda d: d.update(schema="benchspec.calibration/9"), "not supported"),
        (lambda d: d.update(schema="something/1"), "not a benchspec calibration file"),
        (lambda d: d.pop("geometry"), "geometry missing"),
        (lambda d: d.update(extra=1), "unknown field"),
        (lambda d: d.update(units={"wavelength": "angstrom", "medium": "air", "pixel": "rectified column"}), "units"),
        (lambda d: d["wavelength_calibration"].update(rms_px=float("nan")), "non-finite|NaN"),
        (lambda d: d["wavelength_calibration"]["solution"].update(coefficients_nm=[500.0]), "2-4 numbers"),
        (lambda d: d["wavelength_calibration"]["solution"].update(order=9), "order"),
        (lambda d: d["wavelength_calibration"]["matches"][0].update(reference_nm=5461.0), "not a wavelength in nm"),
        (lambda d: d["wavelength_calibration"]["matches"][0].pop("residual_px"), "residual_px"),
        (lambda d: d["wavelength_calibration"].update(verdict="excellent"), "verdict"),
        (lambda d: d.update(reference_spectrum=[1.0, 2.0]), "reference_spectrum"),
        (lambda d: d["geometry"].pop("n_columns"), "n_columns"),
    ],
)
def test_invalid_files_are_refused(tmp_path, calibration, edit, message):
    with pytest.raises(FileFormatError, match=message):
        read_calibration(_written(tmp_path, calibration, edit))


def test_truncated_empty_and_missing_files(tmp_path, calibration):
    path = write_calibration(calibration, tmp_path / "cal.json")
    truncated = tmp_path / "truncated.json"
    truncated.write_bytes(path.read_bytes()[: os.path.getsize(path) // 2])
    with pytest.raises(FileFormatError, match="not valid JSON"):
        read_calibration(truncated)
    empty = tmp_path / "empty.json"
    empty.write_text("")
    with pytest.raises(FileFormatError, match="empty"):
        read_calibration(empty)
    with pytest.raises(FileFormatError, match="does not exist"):
        read_calibration(tmp_path / "nope.json")


def test_schema_is_documented():
    import benchspec.calfile as calfile

    for key in ("geometry", "wavelength_calibration", "line_list", "frames", "dark_frames", "settings",
                "reference_spectrum", "created_utc", "units"):
        assert key in calfile.__doc__


def test_grating_shaped_curvature_in_the_file(tmp_path, calibration):
    """``geometry.curvature_grating`` is optional: files written before it existed load with (), new ones round trip."""
    import dataclasses

    old = _written(tmp_path, calibration, lambda d: d["geometry"].pop("curvature_grating"))
    assert read_calibration(old).geometry.curvature_grating == ()
    shaped = dataclasses.replace(calibration, geometry=dataclasses.replace(
        calibration.geometry, curvature_known=True, curvature_grating=(0.0009, 0.33, 640.0, 1100.0, 1.0)))
    path = write_calibration(shaped, tmp_path / "shaped.json")
    assert read_calibration(path).geometry == shaped.geometry
    with pytest.raises(FileFormatError, match="curvature_grating"):
        read_calibration(_written(tmp_path, shaped, lambda d: d["geometry"].update(curvature_grating=["k", 1.0])))
    with pytest.raises(FileFormatError, match="curvature_grating"):
        read_calibration(_written(tmp_path, shaped, lambda d: d["geometry"].update(curvature_grating=[0.0009, 0.33])))


def _with_alternative(calibration, weight=0.3):
    """The fixture's calibration with an invented alternative model 0.5 nm off at the red end (a demo value)."""
    import dataclasses

    solution = calibration.wavelength.solution
    coefficients = list(solution.coefficients)
    coefficients[1] += 0.25  # t is normalised to about +-1: +-0.25 nm at the ends
    alternative = dataclasses.replace(solution, coefficients=tuple(coefficients))
    with_alt = dataclasses.replace(solution, alternative=alternative, alternative_weight=weight)
    return dataclasses.replace(calibration, wavelength=dataclasses.replace(calibration.wavelength, solution=with_alt))


def test_model_averaging_alternative_in_the_file(tmp_path, calibration):
    # Bayesian model averaging about the reported model (common practice, no source):
    # var = var_own + w (alternative - own)^2 at every pixel.
    edited = _with_alternative(calibration, weight=0.3)
    solution = edited.wavelength.solution
    pixels = np.linspace(*solution.pixel_range, 7)
    difference = solution.alternative.wavelength_nm(pixels) - solution.wavelength_nm(pixels)
    assert np.abs(difference).max() > 0.2
    assert solution.uncertainty_nm(pixels) ** 2 == pytest.approx(
        solution.statistical_uncertainty_nm(pixels) ** 2 + 0.3 * difference**2, rel=1e-9)
    assert solution.statistical_uncertainty_nm(pixels) == pytest.approx(calibration.wavelength.solution.uncertainty_nm(pixels))
    back = read_calibration(write_calibration(edited, tmp_path / "cal.json"))
    assert back.wavelength.solution == solution
    # files without the field (written before it existed) load with no alternative
    assert read_calibration(write_calibration(calibration, tmp_path / "old.json")).wavelength.solution.alternative is None


@pytest.mark.parametrize("weight, message", [(1.5, "weight` must lie within 0-1"), (None, "alternative.weight")])
def test_malformed_alternative_is_refused(tmp_path, calibration, weight, message):
    def edit(d):
        d["wavelength_calibration"]["solution"]["alternative"]["weight"] = weight

    with pytest.raises(FileFormatError, match=message):
        read_calibration(_written(tmp_path, _with_alternative(calibration), edit))
