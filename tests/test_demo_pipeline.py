"""The whole pipeline on the shipped demo frames, checked against NIST ASD.

The demo frames come from the virtual bench (an invented school bench: 1000 lines/mm,
720p, JPEG tubes); the checks use only outside values: the NIST ASD wavelengths in
calibration/ and CODATA via scipy.constants.
"""

import warnings

import numpy as np
import pytest

from benchspec import demo
from benchspec.identify import identify
from benchspec.lines import find_lines
from benchspec.pipeline import calibrate_frames, extract_frames
from benchspec.refdata import load_line_list


@pytest.fixture(scope="module")
def calibration():
    folder = demo.demo_folder()
    return calibrate_frames([folder / f"cfl_{i}.png" for i in (1, 2, 3)], lamp="cfl", dark=[folder / "dark.png"])


@pytest.fixture(scope="module")
def tubes(calibration):
    folder = demo.demo_folder()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return {name: extract_frames([folder / f"tube_{name}.jpg"], calibration, dark=[folder / "dark.png"]) for name in "ABC"}


def _isolated_line_errors_px(spectrum, species, dispersion_nm_per_px):
    """Observed minus NIST (px) for strong lines with no listed neighbour within 3 nm."""
    listed = load_line_list(species)
    wl, strength = listed.wavelength_nm, listed.relative_intensity
    table = find_lines(spectrum, min_snr=20)
    errors = []
    for line in table.lines:
        if line.blended or line.saturated or line.centre_nm is None:
            continue
        near = np.abs(wl - line.centre_nm) < 1.5
        if near.sum() != 1:
            continue
        reference = wl[near][0]
        crowd = (np.abs(wl - reference) < 3.0) & (strength > 0.05 * strength[near][0])
        if crowd.sum() != 1:
            continue
        errors.append((line.centre_nm - reference) / dispersion_nm_per_px)
    return np.asarray(errors)


def test_cfl_calibration_succeeds_without_clicks(calibration):
    assert calibration.wavelength.verdict in ("good", "fair")
    assert calibration.wavelength.n_used >= 5


@pytest.mark.parametrize("tube, species", [("A", "He"), ("B", "Ne"), ("C", "H")])
def test_mystery_tubes_are_identified(tubes, tube, species):
    # Answer key: demo_images/README.md (He, Ne, H); line lists: NIST ASD.
    result = identify(tubes[tube])
    assert result.verdict == "identified", (result.verdict, [(m.symbol, m.score) for m in result.matches])
    assert result.matches[0].symbol == species


@pytest.mark.parametrize("tube, species", [("A", "He"), ("B", "Ne"), ("C", "H")])
def test_isolated_lines_sit_at_their_nist_wavelengths(tubes, tube, species):
    # Target of the calibration issue: isolated lines within 0.2 px RMS of NIST ASD after a CFL
    # calibration of the same bench. These frames are JPEG (q 90), so allow 0.3 px here; the
    # shipped accuracy benchmark measures the 0.2 px target over PNG and JPEG benches.
    spectrum = tubes[tube]
    dispersion = float(np.median(np.diff(spectrum.wavelength_nm)))
    errors = _isolated_line_errors_px(spectrum, species, dispersion)
    assert errors.size >= 2
    assert np.sqrt(np.mean(errors**2)) < 0.3
