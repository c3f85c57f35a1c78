"""Automatic calibration of real lamps, whose phosphor lines sit anywhere within their listed tolerance.

The virtual bench's ``source.lamp_unit`` draws one physical lamp: each line at a draw within its
listed tolerance (taken as 1 sigma). Reference wavelengths are the packaged line lists (Hg I: NIST
ASD air wavelengths, calibration/lines/Hg.csv; CFL phosphor lines: common practice, no source,
+-0.5-1.5 nm). The truth is the simulator's own pixel -> wavelength mapping.
"""

import math
import warnings

import numpy as np
import pytest

from benchspec import simulate
from benchspec.benchmarks.accuracy import truth_wavelength_at
from benchspec.errors import DegradedResultWarning
from benchspec.pipeline import calibrate_frames
from benchspec.wavecal import _distinct


def _lamp_unit_calibration(unit, seeds):
    source = {"kind": "lamp", "name": "cfl", "lamp_unit": unit}
    rendered = [simulate.render(simulate.Bench(), seed=s, source=source) for s in seeds]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegradedResultWarning)
        return calibrate_frames([r.image for r in rendered], lamp="cfl"), rendered[0].truth


def test_a_lamp_whose_red_phosphor_group_shows_two_lines_is_calibrated_not_called_ambiguous():
    # Lamp unit 10 puts the Eu3+ 626 nm group 0.6 nm long and the weak Hg 623.44 nm line beside it:
    # two fits that differ only in which of the two goes to the loosely known 626 nm feature used to
    # be refused as rival answers; they agree within their uncertainty wherever there are lines.
    calibration, truth = _lamp_unit_calibration(10, (1018, 1019))
    w = calibration.wavelength
    assert w.verdict in ("good", "fair") and w.n_used >= 8
    for m in w.matches:  # every assignment is the line the simulator put there
        true_nm = truth_wavelength_at([m.pixel], calibration.geometry, truth)[0]
        disp = abs(float(w.solution.dispersion_nm_per_px(m.pixel)))
        assert abs(true_nm - m.reference_nm) < max(3 * math.hypot(m.reference_uncertainty_nm, m.pixel_uncertainty * disp),
                                                   1.5 * disp)
    # Hg I 435.833 and 546.075 nm (NIST ASD): within half a pixel of the truth at their fitted pixels.
    for nist in (435.833, 546.075):
        pixel = float(w.solution.pixel_of(nist))
        true_nm = truth_wavelength_at([pixel], calibration.geometry, truth)[0]
        assert abs(true_nm - nist) < 0.5 * abs(float(w.solution.dispersion_nm_per_px(pixel)))


class _Fit:
    """The fields of a matching candidate that _distinct reads."""

    def __init__(self, coefficients, covariance, peaks, wavelengths):
        self.coefficients = np.asarray(coefficients, dtype=float)
        self.covariance = np.asarray(covariance, dtype=float)
        self.peak_index = np.asarray(peaks, dtype=int)
        self.used = np.ones(len(peaks), dtype=bool)
        self._wavelengths = [w if isinstance(w, tuple) else (w,) for w in wavelengths]

    def feature_members_nm(self):
        return self._wavelengths


def test_distinct_answers_are_judged_where_there_are_lines_and_against_their_uncertainty():
    # Invented numbers: a 1 nm/px linear mapping on t = pixel / 100, lines at t = -1 ... 1.
    t = np.array([-1.0, -0.5, 0.0, 0.5, 1.0, 3.0])  # the last detected line is not matched by either fit
    tight = np.diag([1e-4, 1e-4])
    a = _Fit([500.0, 100.0], tight, [0, 1, 2, 3, 4], [400, 450, 500, 550, 600])
    # within 3 px wherever either matches a line: the same answer
    # (b - a = -0.5 + 0.5 t nm: 1 px at t = -1, 0 at t = 1, 1 px at t = 3, all below 3 px)
    b = _Fit([499.5, 100.5], tight, [0, 1, 2, 3, 4], [400, 450, 500, 550, 600])
    assert not _distinct(a, b, t, 100.0)
    # (b - a = 1 + t nm: 4 px at the unmatched line at t = 3, at most 2 px at the matched ones)
    b = _Fit([501.0, 101.0], tight, [0, 1, 2, 3, 4], [400, 450, 500, 550, 600])
    assert not _distinct(a, b, t, 100.0)
    # 5 px apart at a matched line with tight covariances: different answers
    c = _Fit([505.0, 100.0], tight, [0, 1, 2, 3, 4], [400, 450, 500, 550, 600])
    assert _distinct(a, c, t, 100.0)
    # ... unless the fits are uncertain by that much (3 sigma of the difference exceeds it)
    loose = np.diag([9.0, 9.0])
    assert not _distinct(_Fit(a.coefficients, loose, a.peak_index, a._wavelengths),
                         _Fit(c.coefficients, loose, c.peak_index, c._wavelengths), t, 100.0)
    # a line both match to different references makes them different answers whatever the mapping
    d = _Fit([500.0, 100.0], tight, [0, 1, 2, 3, 4], [400, 450, 500, 550, 611.6])
    assert _distinct(a, d, t, 100.0)
    # ... but a blend holding the other's line is the same line (Tb3+ 542.4 + Hg 546.07 nm blend)
    e = _Fit([500.0, 100.0], tight, [0, 1, 2, 3, 4], [400, 450, 500, 550, 600])
    f = _Fit([500.0, 100.0], tight, [0, 1, 2, 3, 4], [400, 450, 500, (542.4, 546.075), 600])
    e._wavelengths[3] = (546.075,)
    assert not _distinct(e, f, t, 100.0)


def test_accuracy_benchmark_counts_real_lamp_units_against_the_truth():
    # The accuracy benchmark's real-lamp part: each CFL unit calibrated with no first guess and every
    # assignment checked against the simulator's truth mapping (Hg I: NIST ASD air wavelengths).
    from benchspec.benchmarks.accuracy import _lamp_units, format_report

    units = _lamp_units(2)
    assert units["units"] == 2 and units["ok"] + units["refused"] + units["wrong"] == 2
    assert units["wrong"] == 0, units["wrong_answers"]
    assert units["ok"] >= 1  # units 1-2 of the default bench calibrate (both did when this was written)
