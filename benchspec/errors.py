"""Every error and warning benchspec raises, in one place.

The tree::

    BenchspecError                 base of everything below; carries a one-line message
    ├── InputError                 a parameter or value the caller passed is out of range
    ├── FileFormatError            a file could not be read: missing, truncated, wrong type, bad schema
    ├── BenchFileError             a virtual-bench description is invalid (unknown field, impossible geometry)
    ├── FrameError                 frames are unusable: blank, black, all saturated, wrong size
    ├── GeometryError              no spectral band, or the band touches the frame edge
    ├── ExtractionError            the 1-D spectrum could not be extracted
    ├── LineError                  line finding or fitting failed
    ├── CalibrationError           no trustworthy wavelength solution
    ├── IdentificationError        a spectrum cannot be identified (bad axis, bad range)
    ├── AnalysisError              a practical (absorbance, Rydberg, metrics, ...) has no valid answer
    ├── ExportError                a result could not be written (read-only folder, full disk, name clash)
    └── SourceError                a camera, video or folder stopped delivering frames

    DegradedResultWarning          the result is usable but worse than it should be (saturation, low SNR)

Every message is a single line that names the problem and says what to try.
The command line prints it and exits with code 2.
"""

from __future__ import annotations

__all__ = [
    "BenchspecError",
    "InputError",
    "FileFormatError",
    "BenchFileError",
    "FrameError",
    "GeometryError",
    "ExtractionError",
    "LineError",
    "CalibrationError",
    "IdentificationError",
    "AnalysisError",
    "ExportError",
    "SourceError",
    "DegradedResultWarning",
]


class BenchspecError(Exception):
    """Base of all benchspec errors; the message is one line for people."""

    def __init__(self, message: str):
        message = " ".join(str(message).split())  # always one line
        super().__init__(message)


class InputError(BenchspecError, ValueError):
    """A parameter or value passed by the caller is out of range or of the wrong kind."""


class FileFormatError(BenchspecError):
    """A file is missing, unreadable, truncated, of the wrong type or fails its schema."""


class BenchFileError(BenchspecError):
    """A virtual-bench description is invalid: unknown field, bad value, impossible geometry."""


class FrameError(BenchspecError):
    """Frames are unusable: blank, black, fully saturated or of mismatched size."""


class GeometryError(BenchspecError):
    """No spectral band was found, or it cannot be rectified."""


class ExtractionError(BenchspecError):
    """A 1-D spectrum could not be extracted from the rectified band."""


class LineError(BenchspecError):
    """Lines could not be found or fitted."""


class CalibrationError(BenchspecError):
    """No trustworthy wavelength solution could be found."""


class IdentificationError(BenchspecError):
    """A spectrum cannot be identified (bad axis, range or sampling)."""


class AnalysisError(BenchspecError):
    """A lab analysis has no valid answer for these inputs."""


class ExportError(BenchspecError):
    """A result could not be written; earlier files are left intact."""


class SourceError(BenchspecError):
    """A camera, video or image folder stopped delivering frames."""


class DegradedResultWarning(UserWarning):
    """The result is usable but degraded (saturated lines, low SNR, blends)."""
