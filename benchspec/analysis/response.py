"""Relative spectral response of the instrument, from a lamp of known spectrum.

A halogen or incandescent lamp of stated colour temperature is treated as a
Planck radiator (CIE illuminant A is Planck at 2856 K); daylight is a rough
reference (CIE D65). The measured spectrum divided by the reference's,
smoothed, is the response; where the lamp gave too little signal or clipped,
it is invalid. Dividing any spectrum by the response gives relative
spectral power.

The response file (``RESP.json``) is versioned JSON::

    {"format": "benchspec-response", "version": 1,
     "wavelength_nm": [...], "relative_response": [...], "uncertainty": [...],
     "valid": [...], "reference": "planck", "temperature_k": 2900, ...}
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from typing import Any, Mapping

import numpy as np

from scipy.signal import savgol_coeffs as signal_savgol_coeffs
from scipy.signal import savgol_filter

from ..errors import AnalysisError, FileFormatError, InputError
from ..physics import planck_spectral_radiance
from ..spectrum import Spectrum
from ._common import contiguous_runs, positive_uncertainty, require_calibrated, sample_step_nm, warn_degraded

__all__ = [
    "SpectralResponse",
    "RESPONSE_FORMAT",
    "RESPONSE_VERSION",
    "REFERENCES",
    "reference_spectrum",
    "compute_response",
    "apply_response",
    "response_to_dict",
    "response_from_dict",
    "save_response",
    "load_response",
]

RESPONSE_FORMAT = "benchspec-response"
RESPONSE_VERSION = 1

#: Reference sources: "planck" (halogen/incandescent at a stated colour
#: temperature) and "daylight" (CIE D65; rough: real daylight varies with
#: sky, time and weather).
REFERENCES = ("planck", "daylight")

#: Polynomial order of the Savitzky-Golay smoother: cubic keeps the steep
#: edge of an IR-cut filter (a 10 nm window biases it by < 0.1%).
_SG_ORDER = 3


@dataclass(frozen=True)
class SpectralResponse:
    """Relative spectral response of an instrument.

    Attributes
    ----------
    wavelength_nm : ndarray
        Air wavelengths, increasing.
    relative_response : ndarray
        Counts per unit spectral radiance, normalised to 1 at its maximum
        inside the valid range; NaN where invalid.
    uncertainty : ndarray
        1-sigma of ``relative_response`` (same units); NaN where invalid.
    valid : ndarray of bool
        True where the lamp gave enough unsaturated signal.
    valid_range_nm : (float, float)
        The longest contiguous valid stretch.
    reference : str
        "planck" or "daylight".
    temperature_k : float or None
        Colour temperature of the Planck reference.
    smoothing_nm : float
        Savitzky-Golay window, in nm, of the smoothing applied to the ratio.
    provenance : mapping
        How the response was made (lamp spectrum's provenance, settings).
    """

    wavelength_nm: np.ndarray
    relative_response: np.ndarray
    uncertainty: np.ndarray
    valid: np.ndarray
    valid_range_nm: tuple[float, float]
    reference: str
    temperature_k: float | None
    smoothing_nm: float
    min_signal_fraction: float
    provenance: Mapping[str, Any] = field(default_factory=dict)

    def __post_init__(self):
        n = np.asarray(self.wavelength_nm).size
        for name in ("wavelength_nm", "relative_response", "uncertainty"):
            array = np.array(getattr(self, name), dtype=np.float64)
            if array.ndim != 1 or array.size != n:
                raise InputError(f"`{name}` of a response must be 1-D with {n} samples, got shape {array.shape}")
            array.setflags(write=False)
            object.__setattr__(self, name, array)
        valid = np.array(self.valid, dtype=bool)
        if valid.shape != (n,):
            raise InputError(f"`valid` of a response must have {n} samples, got shape {valid.shape}")
        valid.setflags(write=False)
        object.__setattr__(self, "valid", valid)
        if n > 1 and not np.all(np.diff(self.wavelength_nm) > 0):
            raise InputError("the response's `wavelength_nm` must be strictly increasing")
        object.__setattr__(self, "provenance", dict(self.provenance))


def reference_spectrum(wavelength_nm, *, reference: str = "planck", temperature_k: float | None = None, c2_m_k: float | None = None) -> np.ndarray:
    """Relative spectral radiance of the reference source at ``wavelength_nm`` (max 1 over the grid).

    "planck": Planck's law at ``temperature_k`` (:func:`benchspec.physics.planck_spectral_radiance`).
    "daylight": CIE illuminant D65 (colour-science's table, linearly interpolated; NaN
    outside its 300-780 nm).
    """
    wavelength = np.asarray(wavelength_nm, dtype=np.float64)
    if reference == "planck":
        if temperature_k is None:
            raise InputError("a Planck reference needs the lamp's colour temperature: pass `temperature_k` (e.g. 2900 for a halogen lamp)")
        if not 1000 <= temperature_k <= 4000:
            raise InputError(
                f"`temperature_k` must be in 1000-4000 K for a filament lamp, was {temperature_k:g}; "
                "halogen lamps run at about 2800-3200 K"
            )
        values = planck_spectral_radiance(wavelength, temperature_k, c2_m_k=c2_m_k)
    elif reference == "daylight":
        import colour

        d65 = colour.SDS_ILLUMINANTS["D65"]
        values = np.interp(wavelength, np.asarray(d65.wavelengths, float), np.asarray(d65.values, float), left=np.nan, right=np.nan)
        if not np.any(np.isfinite(values)):
            raise InputError("the daylight reference (CIE D65) covers 300-780 nm and the spectrum lies outside it")
    else:
        raise InputError(f"`reference` must be one of {', '.join(REFERENCES)}, was {reference!r}")
    return values / np.nanmax(values)


def compute_response(
    lamp: Spectrum,
    *,
    reference: str = "planck",
    temperature_k: float | None = None,
    smoothing_nm: float | None = None,
    min_signal_fraction: float = 0.05,
    min_snr: float = 20.0,
) -> SpectralResponse:
    """Relative spectral response from a spectrum of a reference lamp.

    Parameters
    ----------
    lamp : Spectrum
        Calibrated, dark-subtracted spectrum of the lamp (or of daylight
        scattered from a white card).
    reference : {"planck", "daylight"}
    temperature_k : float
        Colour temperature of the lamp, for "planck".
    smoothing_nm : float, optional
        Window of the Savitzky-Golay smoother (cubic) in nm; default 10 nm
        for a lamp (removes noise, keeps the camera's colour-filter and
        IR-cut structure) and 30 nm for daylight (washes out the Fraunhofer
        lines, which the D65 table does not share at the same resolution).
    min_signal_fraction : float
        Samples below this fraction of the lamp spectrum's maximum are
        invalid (the response there is mostly noise and stray light).
    min_snr : float
        Samples whose smoothed signal is below this many sigma are invalid.

    Raises
    ------
    AnalysisError
        When no part of the spectrum is valid (all dark or all saturated).

    Notes
    -----
    response = SG(S / reference), Savitzky & Golay (1964) smoothing of the
    ratio; its variance is the per-sample variance convolved with the
    squared filter coefficients.
    """
    lamp = require_calibrated(lamp, name="lamp")
    if reference not in REFERENCES:
        raise InputError(f"`reference` must be one of {', '.join(REFERENCES)}, was {reference!r}")
    if not 0 < min_signal_fraction < 1:
        raise InputError(f"`min_signal_fraction` must be between 0 and 1, was {min_signal_fraction}")
    if smoothing_nm is None:
        smoothing_nm = 10.0 if reference == "planck" else 30.0
    if smoothing_nm < 0:
        raise InputError(f"`smoothing_nm` must be zero or positive, was {smoothing_nm}")
    wl = lamp.wavelength_nm
    step = sample_step_nm(wl)
    signal = np.where(np.isfinite(lamp.intensity), lamp.intensity, np.nan)
    sigma = positive_uncertainty(lamp)
    saturated = np.array(lamp.saturated) | ~np.isfinite(signal)
    peak = float(np.nanmax(np.where(saturated, np.nan, signal))) if not np.all(saturated) else float("nan")
    if np.count_nonzero(saturated) > 0.5 * saturated.size:
        raise AnalysisError(
            f"the lamp spectrum is saturated at {int(np.count_nonzero(saturated))} of {saturated.size} samples; "
            "reduce the exposure or dim the lamp and record it again"
        )
    if not peak > 0:
        raise AnalysisError("the lamp spectrum has no signal above zero; check the lamp is on and the dark was subtracted")
    window = int(round(smoothing_nm / step)) | 1  # odd number of samples
    window = max(window, _SG_ORDER + 2 if (_SG_ORDER + 2) % 2 else _SG_ORDER + 3)
    if window >= wl.size:
        raise InputError(
            f"`smoothing_nm` = {smoothing_nm:g} spans {window} samples but the spectrum has {wl.size}; use a smaller window"
        )
    ref = reference_spectrum(wl, reference=reference, temperature_k=temperature_k)
    ratio = signal / ref
    ratio_sigma = sigma / ref
    # Saturated samples carry no shape information: bridge them linearly, then mark them invalid.
    good = ~saturated & np.isfinite(ref)
    if np.count_nonzero(good) < window:
        raise AnalysisError("too few unsaturated samples inside the reference's range to compute a response")
    ratio_filled = np.interp(wl, wl[good], ratio[good])
    coefficients = signal_savgol_coeffs(window, _SG_ORDER)
    response = savgol_filter(ratio_filled, window, _SG_ORDER, mode="interp")
    variance = np.convolve(np.where(good, ratio_sigma, 0.0) ** 2, coefficients**2, mode="same")
    outside_reference = np.convolve((~np.isfinite(ref)).astype(float), np.ones(window), mode="same") > 0
    response_sigma = np.sqrt(variance)
    smooth_signal = savgol_filter(np.interp(wl, wl[good], signal[good]), window, _SG_ORDER, mode="interp")
    # Valid: away from saturation by half a window, bright enough, and well above the noise.
    near_saturation = np.convolve(saturated.astype(float), np.ones(window), mode="same") > 0
    with np.errstate(invalid="ignore", divide="ignore"):
        valid = (
            np.isfinite(response)
            & (response > 0)
            & ~near_saturation
            & ~outside_reference
            & (smooth_signal >= min_signal_fraction * peak)
            & (response >= min_snr * response_sigma)
        )
    # The polynomial smoother is unreliable within half a window of the ends.
    valid[: window // 2] = False
    valid[-(window // 2) :] = False
    if not np.any(valid):
        raise AnalysisError(
            f"no part of the lamp spectrum is above {100 * min_signal_fraction:g}% of its peak with SNR >= {min_snr:g}; "
            "increase the exposure or stack more frames"
        )
    if np.any(lamp.saturated):
        warn_degraded(
            f"{int(np.count_nonzero(lamp.saturated))} samples of the lamp spectrum are saturated; "
            "the response is invalid around them - reduce the exposure"
        )
    scale = float(np.nanmax(response[valid]))
    response = np.where(valid, response / scale, np.nan)
    response_sigma = np.where(valid, response_sigma / scale, np.nan)
    runs = contiguous_runs(valid)
    start, stop = max(runs, key=lambda r: r[1] - r[0])
    valid_range = (float(wl[start]), float(wl[stop - 1]))
    if len(runs) > 1:
        warn_degraded(
            f"the response is valid in {len(runs)} separate stretches; the longest is {valid_range[0]:.0f}-{valid_range[1]:.0f} nm"
        )
    provenance = {
        "lamp": dict(lamp.provenance),
        "reference": reference,
        "temperature_k": temperature_k,
        "smoothing_nm": float(smoothing_nm),
    }
    return SpectralResponse(
        wavelength_nm=wl.copy(),
        relative_response=response,
        uncertainty=response_sigma,
        valid=valid,
        valid_range_nm=valid_range,
        reference=reference,
        temperature_k=None if temperature_k is None else float(temperature_k),
        smoothing_nm=float(smoothing_nm),
        min_signal_fraction=float(min_signal_fraction),
        provenance=provenance,
    )


def apply_response(spectrum: Spectrum, response: SpectralResponse, *, outside: str = "drop") -> Spectrum:
    """Divide a spectrum by the instrument response: relative spectral power.

    Parameters
    ----------
    spectrum : Spectrum
        Calibrated spectrum recorded with the same camera settings as the
        response's lamp.
    response : SpectralResponse
    outside : {"drop", "nan"}
        What to do with samples where the response is invalid or does not
        reach: drop them (default), or keep them as NaN.

    Returns
    -------
    Spectrum
        New spectrum; uncertainty combines the spectrum's and the
        response's in quadrature. Its provenance records the response.

    Raises
    ------
    AnalysisError
        When the spectrum does not overlap the response's valid range.
    """
    spectrum = require_calibrated(spectrum)
    if not isinstance(response, SpectralResponse):
        raise InputError(f"`response` must be a SpectralResponse (see load_response), got {type(response).__name__}")
    if outside not in ("drop", "nan"):
        raise InputError(f"`outside` must be 'drop' or 'nan', was {outside!r}")
    wl = spectrum.wavelength_nm
    rwl = response.wavelength_nm
    valid_values = np.where(response.valid, response.relative_response, np.nan)
    r = np.interp(wl, rwl, valid_values, left=np.nan, right=np.nan)
    # np.interp does not propagate NaN reliably to neighbours: mark as invalid any
    # sample whose bracketing response samples are not both valid.
    idx = np.clip(np.searchsorted(rwl, wl), 1, rwl.size - 1)
    bracket_valid = response.valid[idx - 1] & response.valid[idx] & (wl >= rwl[0]) & (wl <= rwl[-1])
    r = np.where(bracket_valid, r, np.nan)
    r_sigma = np.interp(wl, rwl, np.where(response.valid, response.uncertainty, 0.0))
    ok = np.isfinite(r) & (r > 0)
    if not np.any(ok):
        raise AnalysisError(
            f"the spectrum ({wl[0]:.0f}-{wl[-1]:.0f} nm) does not overlap the response's valid range "
            f"({response.valid_range_nm[0]:.0f}-{response.valid_range_nm[1]:.0f} nm); record a lamp spectrum covering it"
        )
    with np.errstate(invalid="ignore", divide="ignore"):
        corrected = spectrum.intensity / r
        corrected_sigma = np.abs(corrected) * np.hypot(spectrum.uncertainty / np.abs(spectrum.intensity), r_sigma / r)
        # where the signal is ~0 the relative form is undefined: fall back to sigma / r
        small = ~np.isfinite(corrected_sigma) | (np.abs(spectrum.intensity) < spectrum.uncertainty)
        corrected_sigma = np.where(small, np.hypot(spectrum.uncertainty / r, np.abs(corrected) * r_sigma / r), corrected_sigma)
    provenance = dict(spectrum.provenance)
    provenance["response"] = {
        "applied": True,
        "reference": response.reference,
        "temperature_k": response.temperature_k,
        "valid_range_nm": list(response.valid_range_nm),
        "smoothing_nm": response.smoothing_nm,
    }
    if outside == "nan":
        return spectrum.with_(
            intensity=np.where(ok, corrected, np.nan),
            uncertainty=np.where(ok, corrected_sigma, np.nan),
            provenance=provenance,
        )
    keep = ok
    def pick(a):
        return None if a is None else np.asarray(a)[keep]
    return Spectrum(
        intensity=corrected[keep],
        uncertainty=corrected_sigma[keep],
        pixel=spectrum.pixel[keep],
        wavelength_nm=wl[keep],
        wavelength_uncertainty_nm=pick(spectrum.wavelength_uncertainty_nm),
        saturated=spectrum.saturated[keep],
        provenance=provenance,
    )


def _finite_or_none(values: np.ndarray) -> list:
    return [None if not math.isfinite(v) else float(v) for v in values]


def response_to_dict(response: SpectralResponse) -> dict:
    """The JSON-ready form of a response (the RESP.json schema, version 1)."""
    from ..io import jsonable

    return {
        "format": RESPONSE_FORMAT,
        "version": RESPONSE_VERSION,
        "reference": response.reference,
        "temperature_k": response.temperature_k,
        "smoothing_nm": response.smoothing_nm,
        "min_signal_fraction": response.min_signal_fraction,
        "valid_range_nm": list(response.valid_range_nm),
        "wavelength_nm": [float(v) for v in response.wavelength_nm],
        "relative_response": _finite_or_none(response.relative_response),
        "uncertainty": _finite_or_none(response.uncertainty),
        "valid": [bool(v) for v in response.valid],
        "provenance": jsonable(dict(response.provenance), name="provenance"),
    }


def response_from_dict(obj: Any, *, source: str = "response") -> SpectralResponse:
    """Validate and build a :class:`SpectralResponse` from its JSON form.

    Raises
    ------
    FileFormatError
        Wrong format tag or version, missing keys, arrays of different
        lengths, non-increasing wavelengths, invalid values marked valid.
    """
    def bad(problem: str) -> FileFormatError:
        return FileFormatError(f"{source}: {problem}; make the response again with `benchspec response`")

    if not isinstance(obj, Mapping):
        raise bad("not a JSON object")
    if obj.get("format") != RESPONSE_FORMAT:
        raise bad(f"not a benchspec response file (format is {obj.get('format')!r}, expected {RESPONSE_FORMAT!r})")
    version = obj.get("version")
    if version != RESPONSE_VERSION or isinstance(version, bool):
        raise bad(f"response file version {version!r} is not supported (this benchspec reads version {RESPONSE_VERSION})")
    for key in ("wavelength_nm", "relative_response", "uncertainty", "valid", "reference"):
        if key not in obj:
            raise bad(f"key {key!r} is missing")
    def numeric_list(key, *, allow_null):
        items = obj[key]
        if not isinstance(items, list):
            raise bad(f"{key} must be a list")
        for v in items:
            if v is None and allow_null:
                continue
            if isinstance(v, bool) or not isinstance(v, (int, float)):
                raise bad(f"{key} holds {v!r}; expected numbers{' or null' if allow_null else ''}")
        return np.array([np.nan if v is None else v for v in items], dtype=np.float64)

    wl = numeric_list("wavelength_nm", allow_null=False)
    values = numeric_list("relative_response", allow_null=True)
    sigma = numeric_list("uncertainty", allow_null=True)
    if not isinstance(obj["valid"], list) or not all(isinstance(v, bool) for v in obj["valid"]):
        raise bad("valid must be a list of true/false")
    valid = np.array(obj["valid"], dtype=bool)
    if not isinstance(obj["reference"], str):
        raise bad("reference must be a string")
    n = wl.size
    if n < 2 or not all(a.ndim == 1 and a.size == n for a in (values, sigma, valid)):
        raise bad("wavelength_nm, relative_response, uncertainty and valid must be lists of the same length (at least 2)")
    if not np.all(np.isfinite(wl)) or not np.all(np.diff(wl) > 0):
        raise bad("wavelength_nm must be finite and strictly increasing")
    if not np.any(valid):
        raise bad("no sample is marked valid")
    if np.any(valid & ~(np.isfinite(values) & (values > 0) & np.isfinite(sigma) & (sigma >= 0))):
        raise bad("a sample marked valid has a missing, non-positive or non-finite response")
    if not isinstance(obj["reference"], str) or obj["reference"] not in REFERENCES:
        raise bad(f"reference {obj['reference']!r} is unknown")
    for key in ("temperature_k", "smoothing_nm", "min_signal_fraction"):
        value = obj.get(key)
        if value is not None and (isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value)):
            raise bad(f"`{key}` must be a number or null, was {value!r}")
    if obj.get("provenance") is not None and not isinstance(obj["provenance"], Mapping):
        raise bad("`provenance` must be an object")
    runs = contiguous_runs(valid)
    start, stop = max(runs, key=lambda r: r[1] - r[0])
    temperature = obj.get("temperature_k")
    provenance = obj.get("provenance") or {}
    if not isinstance(provenance, Mapping):
        raise bad("provenance must be a JSON object")
    numbers = {}
    for key in ("temperature_k", "smoothing_nm", "min_signal_fraction"):
        value = obj.get(key)
        if value is None:
            numbers[key] = None
            continue
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise bad(f"{key} must be a finite number or null, got {value!r}")
        numbers[key] = float(value)
    if obj["reference"] == "planck" and not (numbers["temperature_k"] and numbers["temperature_k"] > 0):
        raise bad(f"a Planck response needs a positive temperature_k, got {temperature!r}")
    return SpectralResponse(
        wavelength_nm=wl,
        relative_response=np.where(valid, values, np.nan),
        uncertainty=np.where(valid, sigma, np.nan),
        valid=valid,
        valid_range_nm=(float(wl[start]), float(wl[stop - 1])),
        reference=obj["reference"],
        temperature_k=numbers["temperature_k"],
        smoothing_nm=numbers["smoothing_nm"] or 0.0,
        min_signal_fraction=numbers["min_signal_fraction"] or 0.0,
        provenance=dict(provenance),
    )


def save_response(response: SpectralResponse, path, *, force: bool = False):
    """Write ``response`` as RESP.json atomically (temporary file, then rename).

    Raises
    ------
    ExportError
        The file exists (without ``force``), or the folder is not writable.
    """
    from ..io import atomic_write_text

    text = json.dumps(response_to_dict(response), ensure_ascii=False, allow_nan=False, indent=1) + "\n"
    return atomic_write_text(path, text, force=force)


def load_response(path) -> SpectralResponse:
    """Read and validate a RESP.json written by :func:`save_response`.

    Raises
    ------
    FileFormatError
        Missing, unreadable or not a valid response file (see :func:`response_from_dict`).
    """
    from ..io import read_json_file

    return response_from_dict(read_json_file(path, what="response"), source=str(path))
