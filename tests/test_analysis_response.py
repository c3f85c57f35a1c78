"""Relative spectral response from a Planck lamp, checked with CIE illuminant A (colour-science)."""

import json

import colour
import numpy as np
import pytest

from benchspec import as_spectrum
from benchspec.analysis.response import (
    SpectralResponse,
    apply_response,
    compute_response,
    load_response,
    reference_spectrum,
    response_to_dict,
    save_response,
)
from benchspec.errors import AnalysisError, DegradedResultWarning, ExportError, FileFormatError, InputError
from benchspec.physics import planck_spectral_radiance


def camera_sensitivity(wl):
    """An invented camera: broad silicon-and-filter bell with an IR-cut edge at 660 nm (for the test)."""
    return np.exp(-0.5 * ((wl - 540) / 70) ** 2) / (1 + np.exp((wl - 660) / 8))


def halogen_spectrum(rng=None, *, temperature_k=2900.0, peak_counts=1e5, step=0.5, saturate_above=None):
    wl = np.arange(380.0, 720.0, step)
    shape = camera_sensitivity(wl) * planck_spectral_radiance(wl, temperature_k)
    mean = peak_counts * shape / shape.max()
    sigma = np.sqrt(mean + 25.0)
    counts = mean if rng is None else rng.normal(mean, sigma)
    saturated = None
    if saturate_above is not None:
        saturated = mean > saturate_above
        counts = np.where(saturated, saturate_above, counts)
    spectrum = as_spectrum(wl, counts, uncertainty=sigma)
    return spectrum if saturated is None else spectrum.with_(saturated=saturated)


def test_cie_illuminant_a_is_planck_at_2856_k():
    # CIE 15: illuminant A is Planck's law with c2 = 1.435e-2 m K at 2848 K (the 1931 definition),
    # normalised to 100 at 560 nm, i.e. 2856 K on today's c2 = hc/k; colour-science's table.
    a = colour.SDS_ILLUMINANTS["A"]
    wl = np.asarray(a.wavelengths, float)
    keep = (wl >= 380) & (wl <= 780)
    table = np.asarray(a.values, float)[keep]
    defined = planck_spectral_radiance(wl[keep], 2848.0, c2_m_k=1.435e-2)
    defined = 100 * defined / planck_spectral_radiance(560.0, 2848.0, c2_m_k=1.435e-2)
    assert np.allclose(defined, table, rtol=1e-5)
    codata = planck_spectral_radiance(wl[keep], 2856.0)  # CODATA h, c, k (scipy.constants)
    codata = 100 * codata / planck_spectral_radiance(560.0, 2856.0)
    assert np.allclose(codata, table, rtol=2e-3)  # c2 = hc/k today vs 1.4388e-2 used to restate A: < 0.1%


def test_illuminant_a_as_lamp_gives_a_flat_response():
    # A perfect instrument looking at illuminant A, taken as a 2856 K lamp, must come out flat.
    a = colour.SDS_ILLUMINANTS["A"]
    wl = np.asarray(a.wavelengths, float)
    keep = (wl >= 380) & (wl <= 780)
    values = np.asarray(a.values, float)[keep]
    lamp = as_spectrum(wl[keep], values, uncertainty=1e-4 * values)
    response = compute_response(lamp, temperature_k=2856.0)
    r = response.relative_response[response.valid]
    assert r.min() / r.max() > 0.998  # the c2 conventions differ by < 0.1% over 390-770 nm
    # The table is at 5 nm: the smoother's half window (2 samples) is lost at each end.
    assert response.valid_range_nm == (390.0, 770.0)


def test_halogen_corrected_with_its_own_response_is_flat(rng):
    # Noise-free: the smoother's bias on the IR-cut edge stays under 0.2%.
    clean = halogen_spectrum()
    response = compute_response(clean, temperature_k=2900.0)
    flat = apply_response(clean, response)
    ratio = flat.intensity / planck_spectral_radiance(flat.wavelength_nm, 2900.0)
    assert np.ptp(ratio / np.median(ratio)) < 0.002
    # With photon noise at 1e5 counts (stacked frames): flat within 2% at every sample.
    noisy = halogen_spectrum(rng)
    response = compute_response(noisy, temperature_k=2900.0)
    flat = apply_response(noisy, response)
    ratio = flat.intensity / planck_spectral_radiance(flat.wavelength_nm, 2900.0)
    ratio /= np.median(ratio)
    # Per sample, where the lamp gives at least 20% of its peak (photon noise <= 0.7%): within 2%.
    bright = noisy.intensity[np.isin(noisy.wavelength_nm, flat.wavelength_nm)] >= 0.2 * noisy.intensity.max()
    assert np.all(np.abs(ratio[bright] - 1) < 0.02)
    # Averaged over 5 nm bins, across the whole valid range: within 2%.
    bins = np.floor(flat.wavelength_nm / 5.0)
    means = np.array([ratio[bins == b].mean() for b in np.unique(bins)])
    assert np.all(np.abs(means - 1) < 0.02)
    # The response follows the invented camera within its stated uncertainty (5 sigma over ~500 samples).
    truth = camera_sensitivity(response.wavelength_nm)
    valid = response.valid
    truth = truth / np.max(truth[valid]) * np.max(response.relative_response[valid]) / 1.0
    scale = np.median(response.relative_response[valid] / truth[valid])
    pulls = (response.relative_response[valid] - scale * truth[valid]) / response.uncertainty[valid]
    assert np.max(np.abs(pulls)) < 5


def test_validity_range_excludes_dim_and_saturated_parts():
    spectrum = halogen_spectrum(saturate_above=8e4)
    with pytest.warns(DegradedResultWarning, match="saturated"):
        response = compute_response(spectrum, temperature_k=2900.0)
    assert not np.any(response.valid & spectrum.saturated)
    wl = response.wavelength_nm
    assert not response.valid[wl < 400].any()  # the lamp is below 5% of its peak there
    assert np.all(np.isnan(response.relative_response[~response.valid]))


def test_response_errors():
    wl = np.arange(380.0, 720.0, 0.5)
    dark = as_spectrum(wl, np.zeros(wl.size), uncertainty=np.ones(wl.size))
    with pytest.raises(AnalysisError, match="no signal above zero"):
        compute_response(dark, temperature_k=2900.0)
    clipped = as_spectrum(wl, np.full(wl.size, 255.0), uncertainty=np.ones(wl.size)).with_(saturated=np.ones(wl.size, bool))
    with pytest.raises(AnalysisError, match="saturated at 680 of 680"):
        compute_response(clipped, temperature_k=2900.0)
    with pytest.raises(InputError, match="colour temperature"):
        compute_response(halogen_spectrum(), reference="planck")
    with pytest.raises(InputError, match="1000-4000 K"):
        compute_response(halogen_spectrum(), temperature_k=6500.0)


def test_daylight_reference_is_d65():
    d65 = colour.SDS_ILLUMINANTS["D65"]
    wl = np.asarray(d65.wavelengths, float)
    keep = (wl >= 380) & (wl <= 780)
    values = np.asarray(d65.values, float)[keep]
    ref = reference_spectrum(wl[keep], reference="daylight")
    assert np.allclose(ref, values / values.max())
    lamp = as_spectrum(wl[keep], values, uncertainty=1e-3 * values)
    response = compute_response(lamp, reference="daylight")
    r = response.relative_response[response.valid]
    assert r.min() / r.max() > 0.9  # rough by design: D65's own dips are smoothed differently


def test_round_trip_and_atomic_writes(tmp_path):
    response = compute_response(halogen_spectrum(), temperature_k=2900.0)
    path = tmp_path / "RESP.json"
    save_response(response, path)
    loaded = load_response(path)
    assert isinstance(loaded, SpectralResponse)
    assert np.array_equal(loaded.valid, response.valid)
    assert np.allclose(loaded.relative_response[loaded.valid], response.relative_response[response.valid])
    assert loaded.valid_range_nm == response.valid_range_nm and loaded.temperature_k == 2900.0
    before = path.read_bytes()
    with pytest.raises(ExportError, match="already exists"):
        save_response(response, path)
    assert path.read_bytes() == before
    save_response(response, path, force=True)
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no temporary files left


@pytest.mark.parametrize(
    "change, message",
    [
        ({"version": 99}, "version 99 is not supported"),
        ({"format": "something-else"}, "not a benchspec response file"),
        ({"wavelength_nm": [1.0, 2.0]}, "same length"),
    ],
)
def test_bad_response_files(tmp_path, change, message):
    data = response_to_dict(compute_response(halogen_spectrum(), temperature_k=2900.0))
    data.update(change)
    path = tmp_path / "bad.json"
    path.write_text(json.dumps(data))
    with pytest.raises(FileFormatError, match=message):
        load_response(path)


def test_valid_sample_without_value_is_refused(tmp_path):
    data = response_to_dict(compute_response(halogen_spectrum(), temperature_k=2900.0))
    index = data["valid"].index(True)
    data["relative_response"][index] = None
    path = tmp_path / "bad.json"
    path.write_text(json.dumps(data))
    with pytest.raises(FileFormatError, match="marked valid"):
        load_response(path)


def test_apply_response_drop_and_nan():
    lamp = halogen_spectrum()
    response = compute_response(lamp, temperature_k=2900.0)
    dropped = apply_response(lamp, response)
    assert dropped.size < lamp.size and np.all(np.isfinite(dropped.intensity))
    assert dropped.provenance["response"]["applied"] is True
    kept = apply_response(lamp, response, outside="nan")
    assert kept.size == lamp.size and np.isnan(kept.intensity[0])
    assert lamp.intensity.flags.writeable is False  # input untouched (frozen)
    far = as_spectrum(np.arange(800.0, 900.0), np.ones(100), uncertainty=np.ones(100))
    with pytest.raises(AnalysisError, match="does not overlap"):
        apply_response(far, response)


def test_daylight_response_beyond_the_d65_table_is_invalid_there():
    # Spectra from the pipeline reach past 300-780 nm (extrapolated columns); D65 does not: invalid there.
    d65 = colour.SDS_ILLUMINANTS["D65"]
    wl = np.arange(250.0, 850.0, 1.0)
    values = 100 * (np.interp(wl, np.asarray(d65.wavelengths, float), np.asarray(d65.values, float), left=50, right=50))
    response = compute_response(as_spectrum(wl, values, uncertainty=np.full(wl.size, 0.5)), reference="daylight")
    low, high = response.valid_range_nm
    assert 300 <= low and high <= 780
    assert not response.valid[(wl < 300) | (wl > 780)].any()
