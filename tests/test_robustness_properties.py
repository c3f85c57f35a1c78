"""Property-based tests (hypothesis) of the core and of the file readers.

* Parsers never raise anything but benchspec's own errors, whatever bytes they get.
* Rectification round trip: a band drawn with a known rotation, tilt and
  smile comes out of :func:`benchspec.geometry.rectify` straight, with the
  values the model predicts; :func:`measure_geometry` recovers the rotation.
* Extraction conserves flux (box and Horne 1986 optimal extraction).
* Wavelength calibration is unchanged by flipping or shifting the pixel axis:
  every feature gets the same wavelength.

Every test is derandomised and has a small ``max_examples`` so the file runs
in well under 30 s; ``python -m benchspec.fuzz --minutes 10`` is the long run
over the readers.
"""

from __future__ import annotations

import math
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st

from benchspec import fuzz
from benchspec.errors import BenchspecError, DegradedResultWarning

FAST = settings(max_examples=12, deadline=None, derandomize=True, database=None,
                suppress_health_check=list(HealthCheck))
# Slow examples are not shrunk: a failure is reported as drawn (each example takes seconds).
SLOW = settings(max_examples=3, deadline=None, derandomize=True, database=None,
                suppress_health_check=list(HealthCheck), phases=[Phase.explicit, Phase.generate])

READERS = fuzz.readers()


# --------------------------------------------------------------------------- parsers


@pytest.mark.parametrize("reader", READERS, ids=[r.name for r in READERS])
def test_reader_raises_only_benchspec_errors_on_mutated_files(tmp_path_factory, reader):
    folder = tmp_path_factory.mktemp("mutated")

    @FAST
    @given(fuzz.mutations(reader))
    def check(sample):
        data, description = sample
        path = fuzz.write_input(folder, reader, data)
        outcome = fuzz.classify(reader, path)
        assert outcome.ok, f"{reader.name} ({description}): {outcome.kind}: {outcome.message}\n{outcome.traceback}"

    check()


@pytest.mark.parametrize("reader", READERS, ids=[r.name for r in READERS])
def test_reader_raises_only_benchspec_errors_on_random_bytes(tmp_path_factory, reader):
    folder = tmp_path_factory.mktemp("random")
    content = st.text(max_size=400).map(lambda t: t.encode("utf-8")) if reader.text else st.binary(max_size=1024)

    @settings(max_examples=8, deadline=None, derandomize=True, database=None, suppress_health_check=list(HealthCheck))
    @given(content)
    def check(data):
        path = fuzz.write_input(folder, reader, data)
        outcome = fuzz.classify(reader, path)
        assert outcome.ok, f"{reader.name}: {outcome.kind}: {outcome.message}\n{outcome.traceback}"

    check()


# --------------------------------------------------------------------------- a band drawn from the model

geometry_module = pytest.importorskip("benchspec.geometry")
Geometry = geometry_module.Geometry

FRAME_W, FRAME_H = 480, 320
HALF_ROWS = 48
N_COLUMNS = 300
PROFILE_SIGMA = 8.0
LINE_SIGMA = 2.5  # px along the dispersion: smooth enough for bilinear resampling (error ~ A / (8 sigma^2))
LINES = ((-110.0, 1.0), (-45.0, 0.6), (20.0, 0.9), (70.0, 0.4), (120.0, 0.75))


def _flux_along(s, scale):
    """Signal per unit length along the dispersion: a weak continuum and five lines (invented)."""
    s = np.asarray(s, dtype=float)
    return scale * (0.05 + sum(a * np.exp(-0.5 * ((s - s0) / LINE_SIGMA) ** 2) for s0, a in LINES))


def _model_geometry(rotation_deg, tilt, curvature, *, stored_profile_sigma=PROFILE_SIGMA):
    aperture = (HALF_ROWS - 32, HALF_ROWS + 33)  # +-4 sigma of the spatial profile
    t = np.arange(*aperture) - HALF_ROWS
    stored = np.exp(-0.5 * (t / stored_profile_sigma) ** 2)  # as measure_geometry stores it: normalised over the aperture
    return Geometry(
        frame_width_px=FRAME_W, frame_height_px=FRAME_H, rotation_deg=rotation_deg, rotation_uncertainty_deg=0.0,
        centre_x_px=FRAME_W / 2, centre_y_px=FRAME_H / 2, first_column_s_px=-N_COLUMNS / 2, n_columns=N_COLUMNS,
        n_rows=2 * HALF_ROWS + 1, centre_row=HALF_ROWS, aperture_rows=aperture,
        background_rows=((4, 12), (2 * HALF_ROWS - 11, 2 * HALF_ROWS - 3)), band_height_px=2.3548 * PROFILE_SIGMA,
        tilt_coefficients=(tilt,), curvature_coefficients=(curvature,), curvature_known=True,
        spatial_profile=tuple(stored / stored.sum()),
    )


def _model_frame(geometry, *, scale=1000.0, background=20.0):
    """The frame the geometry's model predicts: F(s) g(t) + background, with s from inverting the curved mapping.

    The mapping is s' = s + b t + c t^2 with constant b and c, so s = s' - b t - c t^2 exactly.
    """
    y, x = np.mgrid[0:geometry.frame_height_px, 0:geometry.frame_width_px].astype(float)
    theta = math.radians(geometry.rotation_deg)
    dx, dy = x - geometry.centre_x_px, y - geometry.centre_y_px
    s_curved = dx * math.cos(theta) + dy * math.sin(theta)
    t = -dx * math.sin(theta) + dy * math.cos(theta)
    s = s_curved - geometry.tilt_coefficients[0] * t - geometry.curvature_coefficients[0] * t * t
    profile = np.exp(-0.5 * (t / PROFILE_SIGMA) ** 2) / (PROFILE_SIGMA * math.sqrt(2 * math.pi))
    return (background + _flux_along(s, scale) * profile).astype(np.float32)


geometry_cases = st.tuples(
    st.floats(-12.0, 12.0),          # rotation, degrees (the range)
    st.floats(-0.05, 0.05),          # residual tilt of the slit images, px per px
    st.floats(-0.015, 0.015),        # curvature: up to ~15 px of smile at the aperture's edge rows
)


@FAST
@given(geometry_cases)
def test_rectification_round_trip(case):
    rotation, tilt, curvature = case
    geometry = _model_geometry(rotation, tilt, curvature)
    frame = _model_frame(geometry)
    band = geometry_module.rectify(frame, geometry)
    rows = np.arange(geometry.n_rows)[:, None] - geometry.centre_row
    columns = geometry.first_column_s_px + np.arange(geometry.n_columns)[None, :]
    expected = 20.0 + _flux_along(columns, 1000.0) * np.exp(-0.5 * (rows / PROFILE_SIGMA) ** 2) / (PROFILE_SIGMA * math.sqrt(2 * math.pi))
    assert band.valid.all()  # the whole band lies inside the frame
    peak = float(expected.max() - 20.0)
    # bilinear resampling of a line of sigma 2.5 px errs by at most ~A/(8 sigma^2) = 2% of its peak
    assert np.max(np.abs(band.image - expected)) < 0.03 * peak
    # every line is straight: its centroid is the same in every aperture row (the issue asks for 0.3 px)
    a0, a1 = geometry.aperture_rows
    for s0, _ in LINES:
        u0 = int(round(s0 - geometry.first_column_s_px))
        window = band.image[a0 + 8:a1 - 8, u0 - 7:u0 + 8].astype(float) - 20.0
        centroid = (window * np.arange(u0 - 7, u0 + 8)).sum(axis=1) / window.sum(axis=1)
        # bilinear resampling moves a centroid by up to ~0.05 px with the sampling phase, which changes row by row
        assert np.ptp(centroid) < 0.2, (s0, np.ptp(centroid))
        assert abs(np.mean(centroid) - (s0 - geometry.first_column_s_px)) < 0.1


@SLOW
@given(st.floats(-12.0, 12.0), st.floats(0.0, 0.012))
def test_measured_geometry_recovers_rotation_and_straightens_lines(rotation, curvature):
    geometry = _model_geometry(rotation, 0.0, curvature)
    frame = _model_frame(geometry)
    measured = geometry_module.measure_geometry(frame)
    # the target: within 0.1 degree and 0.3 px
    assert abs(measured.rotation_deg - rotation) < 0.1
    assert measured.curvature_known
    assert measured.curvature_rms_px is not None and measured.curvature_rms_px < 0.3


# --------------------------------------------------------------------------- extraction

extract_module = pytest.importorskip("benchspec.extract")


@FAST
@given(geometry_cases, st.floats(100.0, 50_000.0), st.floats(0.0, 500.0), st.sampled_from(["box", "optimal"]))
def test_extraction_conserves_flux(case, scale, background, method):
    rotation, tilt, curvature = case
    geometry = _model_geometry(rotation, tilt, curvature)
    frame = _model_frame(geometry, scale=scale, background=background)
    band = geometry_module.rectify(frame, geometry)
    noise = extract_module.NoiseModel(gain_e_per_dn=4.0, read_noise_dn=2.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegradedResultWarning)
        spectrum = extract_module.extract(band, noise_model=noise, method=method)
    truth = _flux_along(geometry.first_column_s_px + np.arange(geometry.n_columns), scale)  # profile integrates to 1
    # whole band: flux in equals flux out (interpolation errors cancel over a line)
    assert abs(spectrum.intensity.sum() - truth.sum()) < 0.005 * truth.sum()
    # column by column, within the resampling error at the line peaks
    assert np.max(np.abs(spectrum.intensity - truth)) < 0.03 * truth.max()
    assert np.all(spectrum.uncertainty > 0)


# --------------------------------------------------------------------------- calibration: flips and shifts

sys.path.insert(0, str(Path(__file__).parent))
wavecal = pytest.importorskip("benchspec.wavecal")
lines_module = pytest.importorskip("benchspec.lines")


def _calibrate(spectrum):
    from benchspec.errors import CalibrationError

    try:
        return wavecal.calibrate_lines(lines_module.find_lines(spectrum), lamp="hg")
    except CalibrationError:
        return None


def _reindexed(spectrum, keep):
    from benchspec.spectrum import Spectrum

    intensity = np.asarray(spectrum.intensity)[keep]
    return Spectrum(intensity=intensity.copy(), uncertainty=np.asarray(spectrum.uncertainty)[keep].copy(),
                    pixel=np.arange(intensity.size, dtype=float))


@SLOW
@given(st.floats(0.3, 0.8), st.booleans(), st.integers(5, 120), st.integers(0, 2**16))
def test_calibration_is_unchanged_by_flips_and_shifts(nm_per_px, blue_right, shift, seed):
    from synthetic_lamp import lamp_lines, render

    # Hg I lines (NIST ASD, via the packaged line list) on a flat-sensor grating dispersion
    spectrum, truth = render(lamp_lines("hg"), rng=np.random.default_rng(seed), n_pixels=900, nm_per_px=nm_per_px,
                             centre_nm=520.0, blue_right=blue_right, peak_counts=3000.0)
    n = spectrum.intensity.size
    original = _calibrate(spectrum)
    flipped = _calibrate(_reindexed(spectrum, slice(None, None, -1)))
    if original is None:
        # a refusal must not depend on which side blue is: the flipped spectrum is refused too
        assert flipped is None, "the matcher refused the spectrum but accepted it flipped"
        return
    shifted = _calibrate(_reindexed(spectrum, slice(shift, None)))
    assert flipped is not None and shifted is not None
    assert flipped.solution.blue_on_right != original.solution.blue_on_right
    for calibration, to_new in ((flipped, lambda p: n - 1 - p), (shifted, lambda p: p - shift)):
        reference = {round(m.reference_nm, 3) for m in original.matches if m.used_in_fit and to_new(m.pixel) >= 2}
        again = {round(m.reference_nm, 3) for m in calibration.matches if m.used_in_fit}
        assert reference <= again, reference - again  # every feature matched again, to the same line
        # the same pixel of the sensor gets the same wavelength, within the solutions' 1-sigma
        pixels = np.array([m.pixel for m in original.matches if m.used_in_fit and to_new(m.pixel) >= 2])
        before = original.wavelength_nm(pixels)
        after = calibration.wavelength_nm(to_new(pixels))
        sigma = np.hypot(original.uncertainty_nm(pixels), calibration.uncertainty_nm(to_new(pixels)))
        assert np.all(np.abs(after - before) <= np.maximum(3 * sigma, 0.01)), np.abs(after - before)
    # and the wavelengths of isolated lines are the true ones (right, not merely consistent); a blend's
    # centroid is not a single line's position, so blends are left out
    isolated = np.array([m.pixel for m in original.matches if m.used_in_fit and not m.blended and len(m.members_nm) == 1])
    assert isolated.size >= 3
    assert np.max(np.abs(original.wavelength_nm(isolated) - truth["wavelength_of"](isolated))) < 0.2


def test_optimal_extraction_conserves_flux_when_the_band_has_widened():
    # (was an expected failure: optimal extraction now shrinks each column's profile towards the
    # frame's own mean profile rather than the one stored with the geometry)
    # the band is 20% wider than when the geometry was stored (refocused camera, moved slit)
    geometry = _model_geometry(0.0, 0.0, 0.0, stored_profile_sigma=PROFILE_SIGMA / 1.2)
    frame = _model_frame(geometry, scale=100.0, background=0.0)
    band = geometry_module.rectify(frame, geometry)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegradedResultWarning)
        spectrum = extract_module.extract(band, noise_model=extract_module.NoiseModel(4.0, 2.0), method="optimal")
    truth = _flux_along(geometry.first_column_s_px + np.arange(geometry.n_columns), 100.0)
    assert abs(spectrum.intensity.sum() - truth.sum()) < 0.02 * truth.sum()


def test_the_long_fuzzing_run_works_and_finds_nothing(tmp_path):
    """`python -m benchspec.fuzz --minutes N` in miniature: a few seconds over two readers."""
    totals = fuzz.run(minutes=0.04, seed=1, reader_names=["spectrum-jdx", "bench-json"], out_dir=tmp_path / "crashes",
                      batch=40, log=lambda line: None)
    assert totals["inputs"] > 20
    assert totals["crashes"] == 0 and totals["bad_messages"] == 0
    assert not (tmp_path / "crashes").exists()
    assert fuzz.main(["--list"]) == 0
