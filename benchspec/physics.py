"""Physics shared by every stage: the grating equation, Planck's law and the
refractive index of air.

All wavelengths are in nm unless a name says otherwise; angles in degrees.
"""

from __future__ import annotations

import numpy as np
from scipy import constants

from .errors import InputError

__all__ = [
    "diffraction_angle_deg",
    "grating_wavelength_nm",
    "planck_spectral_radiance",
    "wien_peak_nm",
    "refractive_index_air_edlen",
    "air_to_vacuum_nm",
    "vacuum_to_air_nm",
    "WIEN_B_M_K",
]

#: Wien displacement constant b in m K (CODATA, via scipy.constants).
WIEN_B_M_K = constants.physical_constants["Wien wavelength displacement law constant"][0]


def diffraction_angle_deg(wavelength_nm, *, lines_per_mm: float, order: int = 1, incidence_deg: float = 0.0):
    """Diffraction angle beta from the grating equation m*lambda = d*(sin(alpha) + sin(beta)).

    Parameters
    ----------
    wavelength_nm : float or ndarray
        Wavelength in nm (in the medium around the grating, i.e. air).
    lines_per_mm : float
        Groove density; d = 1/lines_per_mm.
    order : int
        Diffraction order m (negative orders diffract to the other side).
    incidence_deg : float
        Angle of incidence alpha from the grating normal.

    Returns
    -------
    float or ndarray
        beta in degrees.

    Raises
    ------
    InputError
        When |sin(beta)| > 1: the wavelength has no diffraction angle in that order.
    """
    if lines_per_mm <= 0:
        raise InputError(f"`lines_per_mm` must be positive, was {lines_per_mm}")
    if order == 0 or int(order) != order:
        raise InputError(f"`order` must be a non-zero whole number, was {order}")
    wavelength = np.asarray(wavelength_nm, dtype=np.float64)
    groove_spacing_nm = 1e6 / lines_per_mm
    sin_beta = order * wavelength / groove_spacing_nm - np.sin(np.radians(incidence_deg))
    if np.any(np.abs(sin_beta) > 1):
        worst = float(wavelength.flat[int(np.argmax(np.abs(sin_beta)))])
        limit = groove_spacing_nm * (1 + abs(np.sin(np.radians(incidence_deg)))) / abs(order)
        raise InputError(
            f"wavelength {worst:g} nm has no diffraction angle in order {order} at {lines_per_mm:g} lines/mm "
            f"(incidence {incidence_deg:g} deg); the order reaches at most about {limit:.0f} nm"
        )
    beta = np.degrees(np.arcsin(sin_beta))
    return float(beta) if np.ndim(beta) == 0 else beta


def grating_wavelength_nm(beta_deg, *, lines_per_mm: float, order: int = 1, incidence_deg: float = 0.0):
    """Inverse of :func:`diffraction_angle_deg`: the wavelength diffracted to ``beta_deg``."""
    groove_spacing_nm = 1e6 / lines_per_mm
    value = groove_spacing_nm * (np.sin(np.radians(incidence_deg)) + np.sin(np.radians(beta_deg))) / order
    return float(value) if np.ndim(value) == 0 else value


def planck_spectral_radiance(wavelength_nm, temperature_k: float, *, c2_m_k: float | None = None):
    """Planck's law: spectral radiance B_lambda in W sr^-1 m^-3.

    Uses h, c and k from scipy.constants (CODATA). ``c2_m_k`` overrides the
    second radiation constant hc/k (CIE 15 defines illuminant A with
    c2 = 1.435e-2 m K); the first constant then stays 2hc^2.
    """
    if temperature_k <= 0:
        raise InputError(f"`temperature_k` must be positive, was {temperature_k}")
    wavelength_m = np.asarray(wavelength_nm, dtype=np.float64) * 1e-9
    h, c, k = constants.h, constants.c, constants.k
    c2 = h * c / k if c2_m_k is None else c2_m_k
    with np.errstate(over="ignore"):
        return 2 * h * c**2 / wavelength_m**5 / np.expm1(c2 / (wavelength_m * temperature_k))


def wien_peak_nm(temperature_k: float) -> float:
    """Wavelength of the Planck maximum (per unit wavelength), b/T, in nm."""
    if temperature_k <= 0:
        raise InputError(f"`temperature_k` must be positive, was {temperature_k}")
    return WIEN_B_M_K / temperature_k * 1e9


def refractive_index_air_edlen(vacuum_wavelength_nm):
    """Refractive index of standard air (15 C, 101 325 Pa, 0.03% CO2), Edlén 1966.

    n - 1 = 1e-8 * (8342.13 + 2406030 / (130 - s^2) + 15997 / (38.9 - s^2)),
    with s the vacuum wavenumber in um^-1.
    """
    sigma2 = (1e3 / np.asarray(vacuum_wavelength_nm, dtype=np.float64)) ** 2
    return 1 + 1e-8 * (8342.13 + 2406030.0 / (130.0 - sigma2) + 15997.0 / (38.9 - sigma2))


def vacuum_to_air_nm(vacuum_wavelength_nm):
    """Air wavelength for a vacuum wavelength (Edlén 1966)."""
    vacuum = np.asarray(vacuum_wavelength_nm, dtype=np.float64)
    result = vacuum / refractive_index_air_edlen(vacuum)
    return float(result) if np.ndim(result) == 0 else result


def air_to_vacuum_nm(air_wavelength_nm):
    """Vacuum wavelength for an air wavelength (Edlén 1966, inverted by fixed-point iteration)."""
    air = np.asarray(air_wavelength_nm, dtype=np.float64)
    vacuum = air * 1.0003
    for _ in range(6):  # converges to < 1e-9 nm in 3-4 steps
        vacuum = air * refractive_index_air_edlen(vacuum)
    return float(vacuum) if np.ndim(vacuum) == 0 else vacuum
