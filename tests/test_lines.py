"""Line finding and fitting: centres, uncertainties, widths, areas, flags, absorption lines."""

import numpy as np
import pytest

from benchspec.errors import InputError, LineError
from benchspec.lines import LineTable, estimate_noise, find_lines
from benchspec.spectrum import Spectrum, as_spectrum

from synthetic_lines import FWHM_PER_SIGMA, gaussian_spectrum


def test_single_line_centre_width_height_and_area(rng):
    spectrum = gaussian_spectrum(rng, [200.3], sigma=1.5, height=1000.0)
    table = find_lines(spectrum)
    assert isinstance(table, LineTable) and len(table) == 1
    line = table[0]
    assert line.kind == "emission" and not line.blended and not line.saturated
    assert line.centre_px == pytest.approx(200.3, abs=4 * line.centre_uncertainty_px)
    assert line.fwhm_px == pytest.approx(1.5 * FWHM_PER_SIGMA, rel=0.05)
    assert line.peak == pytest.approx(1000.0, rel=0.05)
    # Area of a Gaussian: height * sigma * sqrt(2 pi) (textbook)
    assert line.area == pytest.approx(1000.0 * 1.5 * np.sqrt(2 * np.pi), rel=0.05)
    assert line.snr == pytest.approx(1000.0 / np.sqrt(1020.0), rel=0.1)
    assert line.centre_nm is None


def test_centre_uncertainty_is_a_real_one_sigma(rng):
    # Pulls (fitted - true) / reported sigma over many seeded noisy lines should have unit spread.
    pulls = []
    for k in range(60):
        centre = 150.0 + rng.uniform(-0.5, 0.5)
        line = find_lines(gaussian_spectrum(rng, [centre], height=300.0, n=300, noise=8.0))[0]
        pulls.append((line.centre_px - centre) / line.centre_uncertainty_px)
    pulls = np.array(pulls)
    assert abs(np.mean(pulls)) < 0.3
    assert 0.75 < np.std(pulls) < 1.3


def test_photon_noise_floor_sigma_over_sqrt_n(rng):
    # Centroid precision of a Gaussian image with N detected counts is about sigma / sqrt(N)
    # (photon-noise floor; common practice, no source): the fit must come close to it.
    sigma, height = 1.5, 4000.0
    counts = height * sigma * np.sqrt(2 * np.pi)
    line = find_lines(gaussian_spectrum(rng, [100.0], sigma=sigma, height=height, n=200, background=0.0))[0]
    floor = sigma / np.sqrt(counts)
    assert floor < line.centre_uncertainty_px < 2.0 * floor


def test_blended_pair_is_flagged_and_both_found(rng):
    sigma = 1.5
    separation = 1.6 * sigma * FWHM_PER_SIGMA
    table = find_lines(gaussian_spectrum(rng, [200.0, 200.0 + separation, 320.0], sigma=sigma, height=800))
    assert len(table) == 3
    pair = [l for l in table if l.centre_px < 260]
    assert all(l.blended for l in pair)
    assert not table[2].blended
    assert pair[0].centre_px == pytest.approx(200.0, abs=0.15)
    assert pair[1].centre_px == pytest.approx(200.0 + separation, abs=0.15)


def test_saturated_line_is_flagged_and_centred_from_its_wings(rng):
    table = find_lines(gaussian_spectrum(rng, [180.4, 260.0], sigma=2.0, height=3000, clip=1200.0))
    clipped = [l for l in table if l.saturated]
    assert len(clipped) == 2
    for line, true in zip(sorted(table, key=lambda l: l.centre_px), (180.4, 260.0)):
        assert line.centre_px == pytest.approx(true, abs=0.1)


def _clipped_as_extracted(rng, centre, *, sigma, height, clip, n=200, background=20.0):
    """A Gaussian line clipped the way an extracted spectrum clips it (invented test data).

    Extraction keeps clipped pixels, so a column with some clipped pixels records a varying part of
    what it received above the clip level (a lower bound, not a flat top), and the columns beside
    the clipped core are flagged too (a curved slit image clips at a neighbouring column in some
    rows) while losing a little. Three unclipped lines (30, 60, 160 px) show the line width.
    """
    x = np.arange(n, dtype=float)
    truth = background + height * np.exp(-0.5 * ((x - centre) / sigma) ** 2)
    truth += sum(0.2 * clip * np.exp(-0.5 * ((x - c) / sigma) ** 2) for c in (30.0, 60.0, 160.0))
    sd = np.sqrt(truth)
    y = truth + rng.normal(0, 1, n) * sd
    core = truth >= clip
    saturated = core | np.r_[core[1:], False] | np.r_[False, core[:-1]]
    deficit = rng.uniform(0.0, 0.6, n)
    y = np.where(core, clip + (1 - deficit) * (y - clip), y)
    y = np.where(saturated & ~core, y * (1 - 0.1 * deficit), y)
    return Spectrum(intensity=y, uncertainty=sd, pixel=x, saturated=saturated)


def test_deeply_clipped_narrow_line_is_centred_with_an_honest_uncertainty(rng):
    # A narrow line (sigma 0.8 px) 4x over the clip leaves one or two unclipped samples per wing:
    # a wings-only Gaussian fit is degenerate there (it used to lose the line in about a third of
    # the draws and miss by ~1 px RMS otherwise). The clipped samples bound the line from below.
    errors, pulls = [], []
    for _ in range(30):
        centre = 100.0 + rng.uniform(0.0, 1.0)
        table = find_lines(_clipped_as_extracted(rng, centre, sigma=0.8, height=4000.0, clip=1000.0))
        near = [l for l in table if abs(l.centre_px - centre) < 3.0]
        assert len(near) == 1 and near[0].saturated
        errors.append(near[0].centre_px - centre)
        pulls.append(errors[-1] / near[0].centre_uncertainty_px)
    # 0.2 px: the 0.2 px target of the issue for a calibration line. The stated uncertainty may be
    # conservative (the wings leave height and width partly free, and that widens the covariance)
    # but must not understate the scatter: pull RMS below 1.6 (common practice, no source).
    assert np.sqrt(np.mean(np.square(errors))) < 0.2
    assert np.sqrt(np.mean(np.square(pulls))) < 1.6


def test_pure_noise_gives_no_line(rng):
    x = np.arange(3000.0)
    spectrum = Spectrum(intensity=50 + rng.normal(0, 2.0, x.size), uncertainty=np.full(x.size, 2.0), pixel=x)
    assert len(find_lines(spectrum, min_snr=6.0)) == 0


def test_calibrated_axis_gives_nm_values(rng):
    base = gaussian_spectrum(rng, [120.0], sigma=2.0)
    wavelength = 400.0 + 0.5 * base.pixel  # 0.5 nm/px
    spectrum = base.with_(wavelength_nm=wavelength, wavelength_uncertainty_nm=np.full(base.size, 0.02))
    line = find_lines(spectrum)[0]
    assert line.centre_nm == pytest.approx(400.0 + 0.5 * line.centre_px, abs=1e-6)
    assert line.fwhm_nm == pytest.approx(0.5 * line.fwhm_px, rel=1e-6)
    assert line.centre_uncertainty_nm >= 0.02


def test_absorption_lines_on_a_sloped_continuum(rng):
    x = np.arange(600.0)
    continuum = 1000 + 0.8 * x
    dips = [(150.0, 0.3), (300.0, 0.5), (451.5, 0.2)]
    y = continuum * np.prod([1 - depth * np.exp(-0.5 * ((x - c) / 2.0) ** 2) for c, depth in dips], axis=0)
    sd = np.full(x.size, 3.0)
    spectrum = Spectrum(intensity=y + rng.normal(0, 3.0, x.size), uncertainty=sd, pixel=x)
    table = find_lines(spectrum, absorption=True)
    assert table.kind == "absorption"
    assert len(table) == 3
    for line, (centre, depth) in zip(table, dips):
        assert line.centre_px == pytest.approx(centre, abs=0.1)
        assert line.peak / line.continuum == pytest.approx(depth, rel=0.1)


def test_solar_absorption_lines_in_astm_g173():
    # ASTM G173-03 extraterrestrial spectrum (pvlib, 0.5-1 nm steps): H-alpha and H-beta
    # (NIST ASD air 656.279 and 486.135 nm) appear as dips; 1 nm sampling limits the centres to ~0.6 nm.
    pvlib = pytest.importorskip("pvlib")
    table = pvlib.spectrum.get_reference_spectra()
    wl = table.index.values.astype(float)
    keep = (wl >= 450) & (wl <= 700)
    spectrum = as_spectrum(wl[keep], table["extraterrestrial"].values[keep])
    lines = find_lines(spectrum, absorption=True, min_snr=3.0)
    centres = np.array([l.centre_nm for l in lines])
    for target in (656.279, 486.135):
        assert np.min(np.abs(centres - target)) < 0.8


def test_input_is_not_modified_and_result_is_frozen(rng):
    spectrum = gaussian_spectrum(rng, [100.0])
    before = spectrum.intensity.copy()
    table = find_lines(spectrum)
    assert np.array_equal(spectrum.intensity, before)
    with pytest.raises(Exception):
        table[0].centre_px = 3.0  # frozen dataclass


def test_errors_name_the_problem():
    x = np.arange(50.0)
    with pytest.raises(LineError, match="flat"):
        find_lines(Spectrum(intensity=np.ones(50), uncertainty=np.ones(50), pixel=x))
    with pytest.raises(InputError, match="at least 7"):
        find_lines(Spectrum(intensity=np.ones(4), uncertainty=np.ones(4), pixel=np.arange(4.0)))
    with pytest.raises(InputError, match="`min_snr` must be positive"):
        find_lines(Spectrum(intensity=np.arange(50.0), uncertainty=np.ones(50), pixel=x), min_snr=0)
    with pytest.raises(InputError, match="Spectrum"):
        find_lines(np.arange(50.0))


def test_noise_estimate_ignores_lines(rng):
    x = np.arange(2000.0)
    y = rng.normal(0, 3.0, x.size) + 500 * np.exp(-0.5 * ((x - 1000) / 2) ** 2)
    assert estimate_noise(y) == pytest.approx(3.0, rel=0.1)


def test_quick_finder_inverse_is_nan_for_a_singular_matrix_without_a_warning():
    # A flat stretch gives the live finder's 3x3 normal matrix a zero determinant. The inverse is
    # then nan by design (the peak is dropped), and it must not print a RuntimeWarning on every
    # live frame. The inverse of a regular matrix is checked against numpy.linalg.inv.
    import warnings

    from benchspec.lines import _inverse_3x3

    regular = np.array([[4.0, 1.0, 0.5], [1.0, 3.0, 0.2], [0.5, 0.2, 2.0]])
    singular = np.array([[1.0, 2.0, 3.0], [2.0, 4.0, 6.0], [3.0, 6.0, 9.0]])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        inverse, determinant = _inverse_3x3(np.stack([regular, singular]))
    assert np.allclose(inverse[0], np.linalg.inv(regular), rtol=1e-12)
    assert determinant[1] == 0.0
    assert np.all(np.isnan(inverse[1]) | np.isinf(inverse[1]))


def test_faint_line_beside_a_bright_one_keeps_its_width_and_height(rng):
    """A faint line 9.3 px from one 30 times brighter and wider is measured as the Gaussian it is.

    The reference is the injected profile (synthetic, seeded): sigma 1.1 px (FWHM 2.59 px),
    height 110 over a flat background with noise 4.5; the bright line has sigma 1.65 px. Before each fit window stopped at the
    midpoint to the neighbouring line, the faint line's window took in the bright line's wing
    and the fit shrank it to a 0.7 px spike at a third of its height.
    """
    from benchspec.spectrum import Spectrum

    x = np.arange(800, dtype=float)
    profile = lambda c, h, s: h * np.exp(-0.5 * ((x - c) / s) ** 2)
    truth = 167.0 + profile(615.4, 110.0, 1.1) + profile(624.7, 3400.0, 1.65) + profile(629.6, 3000.0, 1.2)
    found = []
    for _ in range(5):
        y = truth + rng.normal(0.0, 4.5, x.size)
        table = find_lines(Spectrum(intensity=y, uncertainty=np.full(x.size, 4.5), pixel=x))
        faint = [line for line in table.lines if abs(line.centre_px - 615.4) < 1.5]
        assert len(faint) == 1
        found.append(faint[0])
    for line in found:
        # within 3 sigma of the injected centre, and the width and height of a line with SNR 24
        assert abs(line.centre_px - 615.4) < 3 * line.centre_uncertainty_px + 0.02
        assert line.fwhm_px == pytest.approx(1.1 * FWHM_PER_SIGMA, rel=0.15)
        assert line.peak == pytest.approx(110.0, rel=0.15)
