"""Lab practicals and source metrics, on calibrated :class:`~benchspec.spectrum.Spectrum` objects.

=================  ==============================================================
module             what it computes
=================  ==============================================================
``response``       relative spectral response from a Planck lamp or daylight;
                   ``apply_response``, ``save_response`` / ``load_response`` (RESP.json)
``absorbance``     transmittance and absorbance with uncertainty and a stray-light
                   limit; Beer-Lambert fit, limit of detection, inverse prediction
``rydberg``        Balmer lines -> Rydberg constant, compared with CODATA
``metrics``        peak, centroid, FWHM, chromaticity, dominant wavelength, CCT/Duv,
                   laser against nominal
``colour``         CIE 1931 chromaticity, CCT (Ohno 2013 / Robertson 1968), dominant
                   wavelength, ``wavelength_to_srgb``
``daylight``       Fraunhofer and telluric lines of daylight; the reference set as a
                   LineList for calibration
``planner``        grating/camera setup prediction and a dispersion hint for calibration
``plots``          figures of every result (the only module here that imports matplotlib)
=================  ==============================================================

Every core function is pure and returns a frozen dataclass; errors are
:class:`~benchspec.errors.AnalysisError` (no valid answer) or
:class:`~benchspec.errors.InputError` (bad arguments).
"""

from __future__ import annotations

from .absorbance import (
    AbsorbanceSpectrum,
    BeerLambertFit,
    ConcentrationEstimate,
    absorbance_spectrum,
    band_absorbance,
    fit_beer_lambert,
    predict_concentration,
)
from .colour import chromaticity, correlated_colour_temperature, dominant_wavelength, wavelength_to_srgb
from .daylight import continuum_normalise, daylight_line_list, find_absorption_features, identify_daylight_lines
from .metrics import SourceMetrics, source_metrics
from .planner import SetupPlan, dispersion_hint, plan_setup
from .response import SpectralResponse, apply_response, compute_response, load_response, save_response
from .rydberg import RydbergResult, find_balmer_lines, fit_rydberg, rydberg_from_spectrum

__all__ = [
    "AbsorbanceSpectrum",
    "BeerLambertFit",
    "ConcentrationEstimate",
    "absorbance_spectrum",
    "band_absorbance",
    "fit_beer_lambert",
    "predict_concentration",
    "chromaticity",
    "correlated_colour_temperature",
    "dominant_wavelength",
    "wavelength_to_srgb",
    "continuum_normalise",
    "daylight_line_list",
    "find_absorption_features",
    "identify_daylight_lines",
    "SourceMetrics",
    "source_metrics",
    "SetupPlan",
    "dispersion_hint",
    "plan_setup",
    "SpectralResponse",
    "apply_response",
    "compute_response",
    "load_response",
    "save_response",
    "RydbergResult",
    "find_balmer_lines",
    "fit_rydberg",
    "rydberg_from_spectrum",
]
