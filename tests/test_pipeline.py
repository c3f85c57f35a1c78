"""Frames -> calibrated spectra through the public API, on virtual-bench frames.

Reference values: NIST ASD air wavelengths of the packaged line lists (Hg I 435.833 and
546.075 nm, ...) and the CIE F-series fluorescent illuminants FL2 and FL11 (colour-science
SDS_ILLUMINANTS, 5 nm steps).
"""

import warnings

import numpy as np
import pytest

from benchspec import simulate
from benchspec.benchmarks.accuracy import truth_wavelength_at
from benchspec.calfile import Calibration
from benchspec.errors import CalibrationError, DegradedResultWarning, FrameError
from benchspec.lines import find_lines
from benchspec.pipeline import apply_calibration, calibrate_frames, extract_frames

BENCH = simulate.Bench().with_(
    camera={"width_px": 960, "height_px": 540, "horizontal_fov_deg": 45.0, "rotation_deg": 6.0},
    slit={"height_px": 120.0, "smile_px": 12.0},
)


@pytest.fixture(scope="module")
def cfl():
    return simulate.render(BENCH, seed=11)


@pytest.fixture(scope="module")
def calibration(cfl):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegradedResultWarning)
        return calibrate_frames([cfl.image], lamp="cfl")


def test_calibration_from_one_cfl_frame(calibration, cfl):
    assert isinstance(calibration, Calibration)
    w = calibration.wavelength
    assert w.rms_px < 0.5 and w.verdict in ("good", "fair")
    assert calibration.geometry.rotation_deg == pytest.approx(6.0, abs=0.1)
    # Every assignment is the line the simulator put there.
    for m in w.matches:
        true_nm = truth_wavelength_at([m.pixel], calibration.geometry, cfl.truth)[0]
        disp = abs(float(w.solution.dispersion_nm_per_px(m.pixel)))
        assert abs(true_nm - m.reference_nm) < max(3 * np.hypot(m.reference_uncertainty_nm, m.pixel_uncertainty * disp),
                                                   1.5 * disp)
    assert len(calibration.reference_spectrum) == calibration.geometry.n_columns
    assert calibration.settings["gamma_requested"] == "auto" and calibration.settings["gamma"] in ("2.2", "srgb")


def test_mercury_lines_of_a_later_frame_match_nist(calibration):
    hg = simulate.render(BENCH.with_(source={"kind": "lamp", "name": "hg"}), seed=12)
    spectrum = extract_frames([hg.image], calibration)
    assert spectrum.is_calibrated and np.all(np.diff(spectrum.wavelength_nm) > 0)
    assert spectrum.wavelength_uncertainty_nm is not None and np.all(spectrum.wavelength_uncertainty_nm > 0)
    centres = np.array([l.centre_nm for l in find_lines(spectrum, min_snr=10)])
    disp = float(np.median(np.abs(np.diff(spectrum.wavelength_nm))))
    for nist in (435.833, 546.075):  # Hg I, NIST ASD air wavelengths
        assert np.min(np.abs(centres - nist)) < 0.5 * disp
    assert spectrum.provenance["calibration"]["rms_px"] == calibration.wavelength.rms_px


def test_each_gives_a_time_series_and_a_moved_band_warns(calibration):
    frames = [simulate.render(BENCH, seed=s).image for s in (21, 22)]
    series = extract_frames(frames, calibration, each=True)
    assert len(series) == 2 and all(s.is_calibrated for s in series)
    bumped = simulate.render(BENCH.with_(slit={"centre_row_px": 300.0}), seed=23).image
    with pytest.warns(DegradedResultWarning, match="moved"):
        extract_frames([bumped], calibration)


def test_frames_of_another_resolution_are_refused(calibration):
    small = simulate.render(BENCH.with_(camera={"width_px": 640, "height_px": 360}), seed=24).image
    with pytest.raises(FrameError, match="640x360"):
        extract_frames([small], calibration)


def test_wrong_lamp_is_refused(cfl):
    with pytest.raises(CalibrationError):
        calibrate_frames([cfl.image], lamp="ne")


def test_apply_calibration_reverses_blue_on_the_right(calibration):
    from benchspec.spectrum import Spectrum

    n = calibration.geometry.n_columns
    spectrum = Spectrum(intensity=np.ones(n), uncertainty=np.ones(n), pixel=np.arange(n, dtype=float))
    out = apply_calibration(spectrum, calibration)
    assert np.all(np.diff(out.wavelength_nm) > 0)
    assert out.size <= n


def _fluorescent_source(monkeypatch, name):
    """Make the virtual bench emit a CIE F-series spectrum (colour-science SDS_ILLUMINANTS, 5 nm steps)."""
    colour = pytest.importorskip("colour")
    sd = colour.SDS_ILLUMINANTS[name]
    wl = np.asarray(sd.wavelengths, float)
    values = np.asarray(sd.values, float)
    grid = np.arange(340.0, 1050.0, 0.05)
    spd = np.interp(grid, wl, values, left=0.0, right=0.0)
    model = simulate._SourceModel(np.zeros(0), np.zeros(0), np.zeros(0), (), grid, spd / spd.max())
    monkeypatch.setattr(simulate, "source_spectrum", lambda source: model)


@pytest.mark.xfail(reason="known limitation: sampled at 5 nm, the CIE tables' lines are ~6 nm wide (8-9 px here, "
                   "against a 2-3 px line-spread function) and sit up to 1-2 nm from the lines' wavelengths (FL11: 612.7 "
                   "for Eu3+ 611.6+-0.5, 489 for Tb3+ 487.7+-1.0; Hg 546.1 merges with Tb3+ 542.4). FL2 keeps 4 usable "
                   "lines with no tightly known match (evidence 8 of 21 nats needed); FL11's best match keeps only 3 of "
                   "7 lines. Calibration refuses: an explicit refusal, not a wrong answer",
                   raises=CalibrationError, strict=False)
@pytest.mark.parametrize("name, features", [("FL2", (435.8, 546.1)), ("FL11", (435.8, 546.1, 611.6))])
def test_cie_fluorescent_spectra_through_the_bench(monkeypatch, name, features):
    # CIE FL2 (halophosphate) and FL11 (triphosphor): Hg lines at 435.8 and 546.1 nm, and FL11's
    # Eu3+ 611.6 nm line, must appear within their 5 nm sampling (+-2.5 nm) after calibration.
    _fluorescent_source(monkeypatch, name)
    bench = BENCH.with_(exposure={"level": 0.9})
    frame = simulate.render(bench, seed=31).image
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegradedResultWarning)
        # The user knows the grating (1000 lines/mm): the hint narrows the dispersion search.
        cal = calibrate_frames([frame], lamp="cfl", hint_lines_per_mm=1000)
        spectrum = extract_frames([frame], cal)
    centres = np.array([l.centre_nm for l in find_lines(spectrum, min_snr=10)])
    for feature in features:
        assert np.min(np.abs(centres - feature)) <= 2.5, (feature, centres)


@pytest.mark.parametrize("name, features", [("FL2", (435.8, 546.1)), ("FL11", (435.8, 546.1, 611.6))])
def test_cie_fluorescent_spectra_measured_on_a_calibrated_bench(monkeypatch, name, features):
    # CIE FL2 and FL11 (colour-science SDS_ILLUMINANTS, 5 nm steps) seen on a bench calibrated as a user
    # would, on its own CFL lamp frame: the Hg 435.8 and 546.1 nm features and FL11's Eu3+ 611.6 nm one lie
    # within the tables' 5 nm sampling (+-2.5 nm). Self-calibration from these tables refuses (test above).
    bench = BENCH.with_(exposure={"level": 0.9})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegradedResultWarning)
        cal = calibrate_frames([simulate.render(bench, seed=30).image], lamp="cfl")
        _fluorescent_source(monkeypatch, name)
        spectrum = extract_frames([simulate.render(bench, seed=31).image], cal)
    lines = find_lines(spectrum, min_snr=10)
    centres = np.array([l.centre_nm for l in lines])
    peaks = np.array([l.peak for l in lines])
    for feature in features:
        nearest = int(np.argmin(np.abs(centres - feature)))
        assert abs(centres[nearest] - feature) <= 2.5, (feature, centres)
        # one of the spectrum's main features (a tenth of the brightest or more), not a faint stray peak
        # that happens to lie near: measured, FL11's 435.8 nm feature is the weakest at 0.18
        assert peaks[nearest] >= 0.1 * peaks.max(), (feature, peaks[nearest] / peaks.max())


def test_wide_angle_curvature_takes_the_grating_shape_beyond_the_traced_lines():
    """The slit images' curvature follows tan(beta) across the whole band, not only between the traced lines.

    Physics (from memory): a straight slit seen through a plane grating images as a curve whose
    curvature grows with tan(beta), the spectral-line curvature of plane-grating spectrographs;
    behind a pinhole camera of focal length f the sag of a slit point t px off the band's centre
    is t**2 tan(beta) / (2 f). The reference here is that formula with the virtual bench's own
    beta (grating equation at the true wavelength of each column) and f (its truth record).
    """
    from benchspec.benchmarks.accuracy import residual_sag_px
    from benchspec.frames import stack_frames
    from benchspec.geometry import measure_geometry
    from benchspec.physics import diffraction_angle_deg

    bench = simulate.Bench().with_(
        grating={"lines_per_mm": 600.0},
        camera={"width_px": 1280, "height_px": 720, "horizontal_fov_deg": 100.0, "rotation_deg": 3.0},
        slit={"height_px": 180.0},
    )
    rendered = simulate.render(bench, seed=5)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegradedResultWarning)
        cal = calibrate_frames([rendered.image], lamp="cfl")
    g = cal.geometry
    # The wavelength model may be either family: on these 8 lines the grating model and an order-2
    # polynomial fit equally well (BIC within 1; both at 0.006 px RMS). The curvature takes the
    # grating shape either way, from that solution or from the grating model fitted to its lines.
    assert len(g.curvature_grating) == 5 and any("tan(beta)" in note for note in g.notes)
    # c(s) against t**2 tan(beta) / (2 f) over the lit band (380-720 nm), traced lines or not
    columns = np.arange(g.n_columns, dtype=float)
    wavelength = truth_wavelength_at(columns, g, rendered.truth)
    lit = np.isfinite(wavelength) & (wavelength >= 380.0) & (wavelength <= 720.0)
    beta = np.radians([diffraction_angle_deg(w, lines_per_mm=600.0, order=1) for w in wavelength[lit]])
    expected = np.tan(beta) / (2.0 * rendered.truth["geometry"]["focal_length_px"])
    t_edge = max(abs(g.aperture_rows[0] - g.centre_row), abs(g.aperture_rows[1] - 1 - g.centre_row))
    sag_error = np.abs(g.curvature_at(g.first_column_s_px + columns[lit]) - expected) * t_edge**2
    # 0.3 px: the rectification round-trip tolerance
    assert sag_error.max() < 0.3, sag_error.max()
    # the polynomial fitted to the same frame's traced lines, extrapolated, leaves more
    stacked = stack_frames([rendered.image])
    polynomial = measure_geometry(stacked.image, saturated=stacked.saturated)
    assert not polynomial.curvature_grating
    assert residual_sag_px(bench, g, rendered.truth) < 0.5 * residual_sag_px(bench, polynomial, rendered.truth)


def test_few_traced_lines_on_a_wide_lens_keep_the_change_of_curvature():
    """Coarse dispersion behind a 109 deg lens: seven lines in 90 px, two of them traceable.

    The slit's sag grows from 11 px at 400 nm to 19 px at 680 nm (the virtual bench's conical
    diffraction). With so few traced lines the curvature must still change along the band:
    a constant left 4.4 px of sag over the matched lines of this frame and a solution 1.6 px
    off (and on other seeds of it, too little evidence to calibrate at all). The frame goes
    through an RGGB mosaic and JPEG at quality 82, as a webcam's would. The reference is the
    virtual bench's own slit images and wavelength mapping (its truth record).
    """
    from benchspec.benchmarks.accuracy import _check_assignments, _frame, residual_sag_px

    bench = simulate.Bench().with_(
        grating={"lines_per_mm": 500.0, "order": 1},
        camera={"width_px": 1920, "height_px": 1080, "horizontal_fov_deg": 109.0, "rotation_deg": -7.06,
                "mosaic": "rggb"},
        slit={"height_px": 136.8, "smile_px": 15.35}, optics={"lsf_sigma_px": 0.72}, exposure={"level": 1.77},
        output={"gamma": "1"},
    )
    image, truth = _frame(bench, seed=4, jpeg_quality=82)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegradedResultWarning)
        cal = calibrate_frames([image], lamp="cfl", gamma="1")
    correct, true_error_px, problems = _check_assignments(cal, truth)
    assert correct, problems
    assert true_error_px < 0.5, true_error_px  # the 0.5 px calibration target
    # Over the matched lines (405-650 nm); a constant curvature left 4.4 px there. A sag s at the
    # aperture's edge moves a top-hat slit image's centroid by about s/3 (the mean of t**2 over
    # the aperture): 1.5 px keeps that within the 0.5 px target.
    assert residual_sag_px(bench, cal.geometry, truth, wavelength_range_nm=(400.0, 660.0)) < 1.5


def test_polynomial_solution_gets_the_grating_shaped_curvature_too():
    """A polynomial wavelength solution: the grating model fitted to its lines gives beta for the curvature's shape.

    Same physics as above (curvature proportional to tan(beta), from memory); the reference is the
    virtual bench's own slit images (``residual_sag_px``). A narrow 29.8 deg lens, the slit's sag
    set to 19.8 px at 650 nm, saturated lines: the calibration keeps a polynomial.
    """
    from benchspec.benchmarks.accuracy import residual_sag_px
    from benchspec.frames import stack_frames
    from benchspec.geometry import measure_geometry

    bench = simulate.Bench().with_(
        grating={"lines_per_mm": 1000.0},
        camera={"width_px": 640, "height_px": 360, "horizontal_fov_deg": 29.8, "rotation_deg": -1.4},
        slit={"height_px": 58.0, "smile_px": 19.8}, optics={"lsf_sigma_px": 0.93}, exposure={"level": 2.7},
        output={"gamma": "1"},
    )
    rendered = simulate.render(bench, seed=4)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegradedResultWarning)
        cal = calibrate_frames([rendered.image], lamp="cfl", gamma="1")
    assert cal.wavelength.solution.model == "polynomial"
    assert cal.geometry.curvature_grating and "fitted to the polynomial solution's lines" in cal.geometry.notes[-1]
    stacked = stack_frames([rendered.image], gamma="1")
    polynomial = measure_geometry(stacked.image, saturated=stacked.saturated)
    sag, before = residual_sag_px(bench, cal.geometry, rendered.truth), residual_sag_px(bench, polynomial, rendered.truth)
    # 0.3 px: the rectification round-trip tolerance
    assert sag < 0.3 and sag < 0.5 * before, (sag, before)
