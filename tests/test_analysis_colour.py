"""Colour metrics against colour-science (CIE tables, Ohno 2013, Robertson 1968, dominant wavelength)."""

import colour
import numpy as np
import pytest

from benchspec import as_spectrum
from benchspec.analysis.colour import (
    chromaticity,
    correlated_colour_temperature,
    dominant_wavelength,
    wavelength_to_srgb,
)
from benchspec.analysis.metrics import source_metrics
from benchspec.errors import AnalysisError, DegradedResultWarning, InputError

CMFS = colour.MSDS_CMFS["CIE 1931 2 Degree Standard Observer"]


def illuminant(name):
    sd = colour.SDS_ILLUMINANTS[name]
    values = np.asarray(sd.values, dtype=float)
    return as_spectrum(np.asarray(sd.wavelengths, float), values, uncertainty=np.full(values.size, 1e-3 * values.max()))


def gaussian_source(peak_nm, sigma_nm, *, step=1.0, noise=1e-3, rng=None):
    wl = np.arange(360.0, 830.0, step)
    y = np.exp(-0.5 * ((wl - peak_nm) / sigma_nm) ** 2)
    if rng is not None:
        y = y + rng.normal(0, noise, wl.size)
    return as_spectrum(wl, y, uncertainty=np.full(wl.size, noise))


@pytest.mark.parametrize("method", ["Ohno 2013", "Robertson 1968"])
@pytest.mark.parametrize("name, expected_k", [("D65", 6504.0), ("A", 2856.0)])
def test_cct_of_cie_illuminants(name, expected_k, method):
    # CIE 15: D65 has CCT ~6504 K and illuminant A is Planck at 2856 K; CIE tables via colour-science.
    metrics = source_metrics(illuminant(name), cct_method=method)
    assert metrics.is_white
    assert metrics.cct_k == pytest.approx(expected_k, abs=10)
    # Same spectra through colour-science's own integration and CCT method.
    xyz = colour.sd_to_XYZ(colour.SDS_ILLUMINANTS[name], CMFS)
    uv = colour.UCS_to_uv(colour.XYZ_to_UCS(xyz))
    reference_cct, reference_duv = colour.uv_to_CCT(uv, method=method)
    assert metrics.cct_k == pytest.approx(reference_cct, abs=2)
    assert metrics.duv == pytest.approx(reference_duv, abs=2e-4)
    assert metrics.dominant_wavelength_nm is None and metrics.fwhm_nm is None


@pytest.mark.parametrize("name", ["A", "D65", "FL2", "FL11"])
def test_chromaticity_matches_colour_science(name):
    # CIE 1931 chromaticity of CIE illuminants (FL2/FL11 fluorescent tables from colour-science).
    ours = chromaticity(illuminant(name))
    xy = colour.XYZ_to_xy(colour.sd_to_XYZ(colour.SDS_ILLUMINANTS[name], CMFS))
    assert ours.cie_x == pytest.approx(xy[0], abs=5e-4)
    assert ours.cie_y == pytest.approx(xy[1], abs=5e-4)
    assert ours.visible_coverage_fraction > 0.99


@pytest.mark.parametrize("peak_nm, sigma_nm", [(465.0, 10.0), (525.0, 14.0), (590.0, 6.0), (625.0, 8.0)])
def test_dominant_wavelength_matches_colour_science(peak_nm, sigma_nm):
    # Dominant wavelength against E, compared with colour.dominant_wavelength on the same spectrum.
    spectrum = gaussian_source(peak_nm, sigma_nm)
    metrics = source_metrics(spectrum)
    sd = colour.SpectralDistribution(dict(zip(spectrum.wavelength_nm, spectrum.intensity)))
    xy = colour.XYZ_to_xy(colour.sd_to_XYZ(sd, CMFS))
    fine = CMFS.copy().interpolate(colour.SpectralShape(360, 830, 0.1))
    reference = float(colour.dominant_wavelength(xy, np.array([1 / 3, 1 / 3]), fine)[0])
    assert not metrics.is_white and metrics.cct_k is None and metrics.duv is None
    assert metrics.dominant_wavelength_nm == pytest.approx(reference, abs=0.3)
    # A narrow line's dominant wavelength is close to its peak (monochromatic limit).
    if sigma_nm <= 6:
        assert metrics.dominant_wavelength_nm == pytest.approx(peak_nm, abs=3)


def test_purple_has_a_complementary_wavelength():
    wl = np.arange(380.0, 780.0, 1.0)
    y = np.exp(-0.5 * ((wl - 450) / 8) ** 2) + np.exp(-0.5 * ((wl - 640) / 8) ** 2)
    result = source_metrics(as_spectrum(wl, y, uncertainty=np.full(wl.size, 1e-3)), white=False)
    assert result.complementary_wavelength is True
    assert 490 < result.dominant_wavelength_nm < 570  # complementary of purple is green (CIE 15 construction)


def test_gaussian_led_peak_centroid_fwhm(rng):
    # FWHM of a Gaussian = 2 sqrt(2 ln 2) sigma (exact).
    pulls = []
    for _ in range(60):
        centre = 530 + rng.uniform(-0.5, 0.5)
        wl = np.arange(380.0, 780.0, 0.5)
        y = np.exp(-0.5 * ((wl - centre) / 9.0) ** 2) + rng.normal(0, 5e-3, wl.size)
        m = source_metrics(as_spectrum(wl, y, uncertainty=np.full(wl.size, 5e-3)))
        pulls.append((m.peak_nm - centre) / m.peak_uncertainty_nm)
        assert m.centroid_nm == pytest.approx(centre, abs=5 * m.centroid_uncertainty_nm + 0.01)
        assert m.fwhm_nm == pytest.approx(2 * np.sqrt(2 * np.log(2)) * 9.0, abs=5 * m.fwhm_uncertainty_nm + 0.05)
    assert 0.6 < np.std(pulls) < 1.5  # peak uncertainty is honest (60 draws)


def test_laser_against_nominal():
    from benchspec.refdata import load_lasers

    green = next(l for l in load_lasers() if l.key == "dpss-green")
    spectrum = gaussian_source(532.3, 0.6, step=0.1)
    m = source_metrics(spectrum, laser_nominal_nm=green.nominal_nm, laser_tolerance_nm=green.tolerance_nm)
    assert m.laser.within_tolerance and m.laser.offset_nm == pytest.approx(0.3, abs=0.02)
    assert m.fwhm_resolution_limited is False
    # Sampled by 1 nm pixels, the same laser is resolution-limited (FWHM under 3 samples).
    coarse = source_metrics(gaussian_source(532.3, 0.6, step=1.0))
    assert coarse.fwhm_resolution_limited is True
    assert coarse.peak_nm == pytest.approx(532.3, abs=0.05)  # log-parabola: exact for a Gaussian
    off = source_metrics(gaussian_source(534.0, 0.6), laser_nominal_nm=532.0, laser_tolerance_nm=0.5)
    assert not off.laser.within_tolerance
    with pytest.raises(InputError, match="laser_tolerance_nm"):
        source_metrics(spectrum, laser_nominal_nm=532.0)


def test_white_source_without_cct_is_an_error():
    # A blue LED lies far from the Planckian locus: no CCT (|Duv| > 0.05).
    with pytest.raises(AnalysisError, match="has no correlated colour temperature"):
        source_metrics(gaussian_source(465.0, 10.0), white=True)
    with pytest.raises(AnalysisError, match="no correlated colour temperature"):
        correlated_colour_temperature(0.15, 0.06)
    with pytest.raises(InputError, match="outside the CIE 1931 diagram"):
        correlated_colour_temperature(0.8, 0.5)


def test_amber_led_near_the_locus_is_not_called_white():
    # Narrow sources can sit within 0.05 of the Planckian locus; the energy-spread rule keeps them coloured.
    m = source_metrics(gaussian_source(595.0, 7.0))
    assert not m.is_white and m.cct_k is None and m.dominant_wavelength_nm is not None


def test_dark_spectrum_has_no_metrics():
    wl = np.arange(380.0, 780.0, 1.0)
    with pytest.raises(AnalysisError, match="no signal above zero"):
        source_metrics(as_spectrum(wl, np.zeros(wl.size), uncertainty=np.ones(wl.size)))


def test_partial_coverage_warns_for_broad_sources():
    d65 = illuminant("D65")
    cropped = as_spectrum(d65.wavelength_nm[40:80], d65.intensity[40:80], uncertainty=d65.uncertainty[40:80])
    with pytest.warns(DegradedResultWarning, match="covers only"):
        source_metrics(cropped)


def test_wavelength_to_srgb_from_cmfs():
    rgb = wavelength_to_srgb([450.0, 530.0, 580.0, 650.0, 900.0])
    assert rgb.shape == (5, 3) and np.all((rgb >= 0) & (rgb <= 1))
    assert np.argmax(rgb[0]) == 2  # blue
    assert np.argmax(rgb[1]) == 1  # green
    assert rgb[2, 0] > 0.5 and rgb[2, 1] > 0.5 and rgb[2, 2] < 0.1  # yellow
    assert np.argmax(rgb[3]) == 0  # red
    assert np.all(rgb[4] == 0)  # outside the CIE table: black
    # Hue agrees with colour-science's XYZ -> sRGB for the same CMF values (where in gamut after clipping).
    xyz = colour.wavelength_to_XYZ(530.0, CMFS)
    reference = np.clip(colour.XYZ_to_sRGB(xyz / xyz[1], apply_cctf_encoding=False), 0, None)
    ours_linear = colour.models.eotf_sRGB(rgb[1])
    assert np.allclose(ours_linear / ours_linear.max(), reference / reference.max(), atol=1e-6)
    # Scalar input gives a single colour.
    assert wavelength_to_srgb(550.0).shape == (3,)


def test_dominant_wavelength_of_white_point_is_an_error():
    with pytest.raises(AnalysisError, match="white point itself"):
        dominant_wavelength(1 / 3, 1 / 3)
