"""The 1-D spectrum that every stage after extraction hands on.

A :class:`Spectrum` is frozen: stages return new spectra, they never edit one.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any, Mapping

import numpy as np

from .errors import InputError

__all__ = ["Spectrum", "as_spectrum"]


def _frozen_array(values, *, name: str, dtype=np.float64) -> np.ndarray:
    array = np.array(values, dtype=dtype, copy=True)
    if array.ndim != 1:
        raise InputError(f"`{name}` must be 1-D, got shape {array.shape}")
    array.setflags(write=False)
    return array


@dataclass(frozen=True)
class Spectrum:
    """A 1-D spectrum with per-sample uncertainty.

    Attributes
    ----------
    intensity : ndarray, shape (n,)
        Linear signal (detector counts, or relative units after response
        correction), background subtracted.
    uncertainty : ndarray, shape (n,)
        1-sigma uncertainty of ``intensity`` in the same units.
    pixel : ndarray, shape (n,)
        Pixel coordinate along the dispersion axis of the rectified band.
        For spectra imported from other instruments this is ``arange(n)``.
    wavelength_nm : ndarray, shape (n,) or None
        Air wavelength of each sample in nm, strictly increasing; ``None``
        until the spectrum is calibrated.
    wavelength_uncertainty_nm : ndarray, shape (n,) or None
        1-sigma uncertainty of the wavelength solution at each sample.
    saturated : ndarray of bool, shape (n,)
        True where any pixel summed into the sample was clipped.
    provenance : mapping
        How the spectrum was made: frames and hashes, settings, calibration,
        software version. JSON-serialisable values only.
    """

    intensity: np.ndarray
    uncertainty: np.ndarray
    pixel: np.ndarray
    wavelength_nm: np.ndarray | None = None
    wavelength_uncertainty_nm: np.ndarray | None = None
    saturated: np.ndarray | None = None
    provenance: Mapping[str, Any] = field(default_factory=dict)

    def __post_init__(self):
        intensity = _frozen_array(self.intensity, name="intensity")
        n = intensity.size
        object.__setattr__(self, "intensity", intensity)
        for name in ("uncertainty", "pixel", "wavelength_nm", "wavelength_uncertainty_nm"):
            value = getattr(self, name)
            if value is None:
                continue
            array = _frozen_array(value, name=name)
            if array.size != n:
                raise InputError(
                    f"`{name}` has {array.size} samples but `intensity` has {n}; "
                    "every array of a spectrum must have the same length"
                )
            object.__setattr__(self, name, array)
        saturated = self.saturated
        if saturated is None:
            saturated = np.zeros(n, dtype=bool)
        saturated = _frozen_array(saturated, name="saturated", dtype=bool)
        if saturated.size != n:
            raise InputError(f"`saturated` has {saturated.size} samples but `intensity` has {n}")
        object.__setattr__(self, "saturated", saturated)
        object.__setattr__(self, "provenance", dict(self.provenance))
        if self.wavelength_nm is not None and n > 1 and not np.all(np.diff(self.wavelength_nm) > 0):
            raise InputError("`wavelength_nm` must be strictly increasing; sort the samples or drop repeats")

    @property
    def is_calibrated(self) -> bool:
        """True when the spectrum has a wavelength axis."""
        return self.wavelength_nm is not None

    @property
    def size(self) -> int:
        return int(self.intensity.size)

    def with_(self, **changes) -> "Spectrum":
        """A copy with some fields replaced (the original is untouched)."""
        return replace(self, **changes)


def as_spectrum(
    wavelength_nm,
    intensity,
    *,
    uncertainty=None,
    provenance: Mapping[str, Any] | None = None,
) -> Spectrum:
    """Build a calibrated :class:`Spectrum` from plain arrays (e.g. another instrument's data).

    Missing uncertainties are estimated from the scatter of the first
    differences (a robust noise estimate, common practice, no source).
    """
    wavelength = np.asarray(wavelength_nm, dtype=np.float64)
    values = np.asarray(intensity, dtype=np.float64)
    if wavelength.shape != values.shape or wavelength.ndim != 1:
        raise InputError(
            f"wavelength and intensity must be 1-D of the same length, got {wavelength.shape} and {values.shape}"
        )
    if uncertainty is None:
        if values.size > 2:
            noise = 1.4826 * np.median(np.abs(np.diff(values) - np.median(np.diff(values)))) / np.sqrt(2)
        else:
            noise = 0.0
        uncertainty = np.full(values.size, noise if noise > 0 else max(1e-12, 1e-3 * np.nanmax(np.abs(values), initial=1.0)))
    return Spectrum(
        intensity=values,
        uncertainty=uncertainty,
        pixel=np.arange(values.size, dtype=np.float64),
        wavelength_nm=wavelength,
        provenance=dict(provenance or {}),
    )
