"""Grating equation, Planck's law and air/vacuum conversion against published values."""

import numpy as np
import pytest
from scipy import constants

from benchspec import physics
from benchspec.errors import InputError


def test_grating_equation_textbook_example():
    # Textbook worked example: 1000 lines/mm at 546.1 nm, first order, normal incidence -> 33.10 deg.
    beta = physics.diffraction_angle_deg(546.1, lines_per_mm=1000, order=1)
    assert beta == pytest.approx(33.10, abs=0.005)
    assert physics.grating_wavelength_nm(beta, lines_per_mm=1000) == pytest.approx(546.1, abs=1e-9)


def test_second_order_of_380_lands_on_first_order_760():
    # Grating equation: m*lambda is what sets the angle, so 2 x 380 nm overlaps 1 x 760 nm.
    a = physics.diffraction_angle_deg(380.0, lines_per_mm=500, order=2)
    b = physics.diffraction_angle_deg(760.0, lines_per_mm=500, order=1)
    assert a == pytest.approx(b, abs=1e-9)


def test_no_diffraction_angle_is_a_clear_error():
    with pytest.raises(InputError, match="has no diffraction angle in order 2 at 1000 lines/mm"):
        physics.diffraction_angle_deg(700.0, lines_per_mm=1000, order=2)


def test_planck_uses_codata_constants_and_wien_peak():
    # Wien displacement: b = 2.897771955e-3 m K (CODATA 2018, as given in scipy.constants).
    assert physics.WIEN_B_M_K == pytest.approx(2.897771955e-3, rel=1e-9)
    temperature = 2856.0
    wl = np.linspace(900, 1100, 200001)
    peak = wl[np.argmax(physics.planck_spectral_radiance(wl, temperature))]
    assert peak == pytest.approx(2.897771955e-3 / temperature * 1e9, abs=0.002)
    # Absolute value against a direct evaluation with scipy.constants (CODATA).
    lam = 500e-9
    direct = 2 * constants.h * constants.c**2 / lam**5 / np.expm1(constants.h * constants.c / (lam * constants.k * 5000))
    assert physics.planck_spectral_radiance(500.0, 5000.0) == pytest.approx(direct, rel=1e-12)


def test_planck_2856k_matches_cie_illuminant_a():
    # CIE illuminant A (colour-science SDS_ILLUMINANTS['A']). CIE 15:2004 computes it from Planck with
    # c2 = 1.435e-2 m K at T = 2848 K, which keeps c2/T of the original 2856 K definition (made with
    # c2 = 1.438e-2). So Planck at 2856 K with CODATA c2 (scipy.constants) matches within 0.2%,
    # and so does c2 = 1.435e-2 at 2848 K.
    colour = pytest.importorskip("colour")
    sd = colour.SDS_ILLUMINANTS["A"]
    wl = np.arange(380, 781, 5.0)
    table = np.array([sd[w] for w in wl])
    for temperature, c2 in ((2856.0, None), (2848.0, 1.435e-2)):
        ours = physics.planck_spectral_radiance(wl, temperature, c2_m_k=c2)
        ours = 100 * ours / physics.planck_spectral_radiance(560.0, temperature, c2_m_k=c2)
        assert np.max(np.abs(ours / table - 1)) < 0.002


@pytest.mark.parametrize(
    "air, vacuum",
    [
        (656.279, 656.460),  # H-alpha, NIST ASD (air and vacuum values), design notes
        (546.075, 546.227),  # Hg I green line, NIST ASD (546.23 nm vacuum quoted in design notes)
        (486.135, 486.271),  # H-beta, NIST ASD (from memory)
    ],
)
def test_edlen_air_vacuum_against_nist_pairs(air, vacuum):
    assert physics.air_to_vacuum_nm(air) == pytest.approx(vacuum, abs=0.003)
    assert physics.vacuum_to_air_nm(vacuum) == pytest.approx(air, abs=0.003)


def test_air_vacuum_round_trip():
    wl = np.linspace(350, 1000, 50)
    assert np.allclose(physics.vacuum_to_air_nm(physics.air_to_vacuum_nm(wl)), wl, atol=1e-9)
