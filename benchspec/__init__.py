"""benchspec: calibrated spectra from a webcam and a diffraction grating.

The core (everything importable from here) never imports tkinter or
matplotlib; the command line (:mod:`benchspec.cli`) and the viewer
(:mod:`benchspec.gui`) are thin shells over it.
"""

from __future__ import annotations

__version__ = "0.1.0"

from .errors import *  # noqa: F401,F403
from .errors import __all__ as _error_names
from .spectrum import Spectrum, as_spectrum
from .refdata import load_line_list, load_lamp, available_species, available_lamps

__all__ = [
    "__version__",
    "Spectrum",
    "as_spectrum",
    "load_line_list",
    "load_lamp",
    "available_species",
    "available_lamps",
    *_error_names,
]
