"""The grating model in the wavelength calibration's final fit: chosen when the data are grating-shaped,
not when they are a plain quadratic; it extrapolates; its file round-trips and is validated."""

import json

import numpy as np
import pytest

from benchspec.calfile import Calibration, read_calibration, write_calibration
from benchspec.errors import FileFormatError
from benchspec.geometry import Geometry
from benchspec.spectrum import Spectrum
from benchspec.wavecal import WavelengthSolution, calibrate_spectrum

from synthetic_lamp import lamp_lines, render, wavelength_to_pixel

# Isolated lines redder than the CFL's last tightly known line (Hg 579.07 nm), NIST ASD air wavelengths:
# Ne I 640.225, H I 656.279 (H-alpha), He I 667.815.
RED_LINES_NM = (640.225, 656.279, 667.815)


def _grating_bench(seed):
    # 0.25 nm/px over a 1920 px sensor behind a 1000 lines/mm grating: the frame spans ~395-745 nm and
    # the CFL's tight lines (Hg, Tb3+ blends excepted) stop near 579 nm, ~350 px before H-alpha.
    return render(lamp_lines("cfl"), rng=np.random.default_rng(seed), n_pixels=1920, nm_per_px=0.25,
                  centre_nm=520.0, lines_per_mm=1000.0, peak_counts=3000)


@pytest.fixture(scope="module", params=[2, 3])
def grating_case(request):
    spectrum, truth = _grating_bench(request.param)
    return calibrate_spectrum(spectrum, lamp="cfl"), truth


def test_grating_model_is_chosen_and_extrapolates(grating_case):
    calibration, truth = grating_case
    solution = calibration.solution
    assert solution.model == "grating"
    assert "grating model" in calibration.format_table()
    tight = [m.pixel for m in calibration.matches if m.used_in_fit and m.anchor]
    true_px = wavelength_to_pixel(RED_LINES_NM, **truth["geometry"])
    assert np.all(true_px > max(tight) + 250)  # really outside the calibrated span
    error_px = np.abs(solution.pixel_of(RED_LINES_NM) - true_px)
    # 250-350 px beyond the last tight line the solution's stated 1-sigma (its own fit and the
    # model-averaging term) is 0.5-1.3 px; the true error must lie within it. On ten seeds of this
    # bench the errors were 0.04-0.6 px, so the 0.2 px NIST target is not a per-seed bound here.
    stated_px = solution.uncertainty_nm(true_px) / np.abs(solution.dispersion_nm_per_px(true_px))
    assert np.all(error_px < stated_px), (error_px, stated_px)
    # and the grating's shape is why: the cubic fitted to the same lines misses them by 0.5-1.5 px
    assert solution.alternative is not None and solution.alternative.model == "polynomial"
    polynomial_px = np.abs(solution.alternative.pixel_of(RED_LINES_NM) - true_px)
    assert np.all(error_px < 0.5 * polynomial_px), (error_px, polynomial_px)


def test_grating_solution_derivative_and_uncertainty(grating_case):
    calibration, _ = grating_case
    s = calibration.solution
    x = np.linspace(0, 1919, 50)
    numeric = (s.wavelength_nm(x + 0.01) - s.wavelength_nm(x - 0.01)) / 0.02
    assert s.dispersion_nm_per_px(x) == pytest.approx(numeric, rel=1e-5)
    sigma = s.uncertainty_nm(x)
    assert np.all(np.isfinite(sigma)) and np.all(sigma > 0)
    # inside the lines the solution is known far better than a pixel (0.25 nm); it grows outwards
    tight = [m.pixel for m in calibration.matches if m.used_in_fit and m.anchor]
    inside = s.uncertainty_nm(np.linspace(min(tight), max(tight), 20))
    assert inside.max() < 0.05
    assert s.uncertainty_nm(1919.0) > inside.min()


def test_exact_quadratic_keeps_a_polynomial():
    x = np.arange(1280.0)
    wavelength = 560.0 + 0.5 * (x - 640.0) - 6e-5 * (x - 640.0) ** 2
    signal = np.zeros_like(x)
    lines = lamp_lines("cfl")
    strongest = max(s for _, s in lines)
    for w, s in lines:
        if wavelength.min() < w < wavelength.max():
            signal += 3000.0 * s / strongest * np.exp(-0.5 * ((x - np.interp(w, wavelength, x)) / 1.2) ** 2)
    noisy = signal + np.random.default_rng(4).normal(0, 1, x.size) * np.sqrt(4.0 + signal)
    spectrum = Spectrum(intensity=noisy, uncertainty=np.sqrt(4.0 + np.maximum(noisy, 0)), pixel=x,
                        saturated=np.zeros(x.size, dtype=bool))
    calibration = calibrate_spectrum(spectrum, lamp="cfl")
    assert calibration.solution.model == "polynomial"
    assert calibration.solution.order == 2


def _calibration(wavelength):
    geometry = Geometry(frame_width_px=1920, frame_height_px=1080, rotation_deg=0.5, rotation_uncertainty_deg=0.01,
                        centre_x_px=960.0, centre_y_px=540.0, first_column_s_px=0.0, n_columns=1920, n_rows=200,
                        centre_row=100, aperture_rows=(40, 160), background_rows=((5, 30), (170, 195)),
                        band_height_px=100.0)
    return Calibration(geometry=geometry, wavelength=wavelength,
                       frames=({"path": "lamp.png", "sha256": "0" * 64, "lamp": "cfl"},),
                       settings={"gamma": "2.2", "channel": "mean"},
                       line_list=({"wavelength_nm": 435.833, "relative_intensity": 4000, "species": "Hg",
                                   "tolerance_nm": 0.005},),
                       reference_spectrum=tuple(np.ones(1920)))


def test_grating_calibration_file_round_trips(tmp_path, grating_case):
    calibration, _ = grating_case
    path = write_calibration(_calibration(calibration), tmp_path / "cal.json")
    data = json.loads(path.read_text())
    assert data["wavelength_calibration"]["solution"]["model"] == "grating"
    back = read_calibration(path)
    assert back.wavelength == calibration
    x = np.linspace(0, 1919, 7)
    assert back.wavelength.wavelength_nm(x) == pytest.approx(calibration.wavelength_nm(x), abs=1e-9)


@pytest.mark.parametrize("edit, message", [
    (lambda s: s.update(sign=0), "sign"),
    (lambda s: s.update(parameters=s["parameters"][:3]), "parameters"),
    (lambda s: s.update(parameter_names=["a", "b", "c", "d"]), "parameter_names"),
    (lambda s: s.update(covariance=[[0.0]]), "covariance"),
    (lambda s: s.update(model="spline"), "model"),
    (lambda s: s.pop("model"), "model"),
])
def test_damaged_grating_solution_is_refused(tmp_path, grating_case, edit, message):
    calibration, _ = grating_case
    path = write_calibration(_calibration(calibration), tmp_path / "cal.json")
    data = json.loads(path.read_text())
    edit(data["wavelength_calibration"]["solution"])
    path.write_text(json.dumps(data))
    with pytest.raises(FileFormatError, match=message):
        read_calibration(path)


def test_polynomial_solution_dict_is_unchanged():
    s = WavelengthSolution(coefficients=(550.0, 300.0, -2.0), covariance=((1e-4, 0, 0), (0, 1e-4, 0), (0, 0, 1e-4)),
                           pixel_centre=640.0, pixel_scale=640.0, pixel_range=(0.0, 1279.0))
    d = s.to_dict()
    assert d["model"] == "polynomial" and d["order"] == 2 and "parameters" not in d
    assert WavelengthSolution.from_dict(d) == s
    legacy = {k: v for k, v in d.items() if k != "model"}  # an in-memory dict without the field
    assert WavelengthSolution.from_dict(legacy) == s


def test_a_polynomial_solution_carries_the_grating_model_as_its_alternative():
    # Setup 5 of the practicals benchmark's redrawn ensemble: the lines barely tell an order-2
    # polynomial from the grating model, the polynomial is reported (the grating model keeps a weight
    # of about 0.24), and beyond the last tightly known line the two disagree at H-alpha (656.28 nm,
    # NIST ASD air wavelength). The polynomial's own sigma there understates its true error against the
    # simulator's truth; with the model-averaging term the truth is inside 2 sigma.
    # (Setup 0 was used before; its weight sat at 0.47-0.53, so the reported model flipped with the
    # last bit of numpy's SIMD maths between CPUs. Setup 5 sits clear of the tie.)
    import warnings

    from benchspec import simulate
    from benchspec.benchmarks.accuracy import truth_wavelength_at
    from benchspec.benchmarks.practicals import draw_setup
    from benchspec.errors import DegradedResultWarning
    from benchspec.pipeline import calibrate_frames

    bench, cfl, jpeg, _ = draw_setup(5)
    rendered = [simulate.render(bench, seed=s, source=cfl) for s in (1000, 1001)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegradedResultWarning)
        calibration = calibrate_frames([simulate.as_written(r, jpeg_quality=jpeg) for r in rendered], lamp="cfl")
    solution = calibration.wavelength.solution
    assert solution.model == "polynomial"  # on this setup (if that changes, pick a setup where it holds)
    assert solution.alternative is not None and solution.alternative.model == "grating"
    assert 0.05 < solution.alternative_weight < 0.45  # clear of the 0.5 tie
    grid = np.linspace(*solution.pixel_range, 4000)
    true = truth_wavelength_at(grid, calibration.geometry, rendered[0].truth)
    ok = np.isfinite(true)
    order = np.argsort(true[ok])
    pixel = float(np.interp(656.28, true[ok][order], grid[ok][order]))
    error = float(solution.wavelength_nm(pixel)) - 656.28
    assert abs(error) < 2.0 * float(solution.uncertainty_nm(pixel))
    assert float(solution.uncertainty_nm(pixel)) > float(solution.statistical_uncertainty_nm(pixel))
