"""Small synthetic spectrometer frames with known geometry, for the geometry and extraction tests.

Independent of benchspec.simulate on purpose: the band is drawn directly in
frame coordinates from the model the geometry module assumes (a rotated
band; each line a Gaussian stroke displaced along the dispersion by
c(s) * t**2), so a test can compare against exact numbers. Invented test
data, not a real instrument.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.special import erf


def band_coordinates(shape, *, rotation_deg, centre):
    """(s, t) of every pixel for a band through ``centre`` at ``rotation_deg``."""
    height, width = shape
    y, x = np.mgrid[0:height, 0:width].astype(np.float64)
    th = math.radians(rotation_deg)
    dx, dy = x - centre[0], y - centre[1]
    s = dx * math.cos(th) + dy * math.sin(th)
    t = -dx * math.sin(th) + dy * math.cos(th)
    return s, t


def synthetic_band(
    *,
    shape=(360, 640),
    rotation_deg=0.0,
    centre=None,
    half_height=40.0,
    edge_sigma=1.2,
    lines_s=(-220.0, -130.0, -40.0, 50.0, 140.0, 230.0),
    line_amplitude=800.0,
    line_sigma=1.1,
    curvature=(0.0, 0.0),
    continuum=0.0,
    background=20.0,
    gaussian_profile_sigma=None,
    noise_sigma=0.0,
    rng=None,
):
    """A linear float32 frame and its truth.

    ``curvature`` = (c0, c1): c(s) = c0 + c1 * s (1/px). ``gaussian_profile_sigma``
    replaces the top-hat slit profile by a Gaussian across the band.
    Returns (image, truth) where truth holds the noise-free image too.
    """
    height, width = shape
    if centre is None:
        centre = ((width - 1) / 2.0, (height - 1) / 2.0)
    s, t = band_coordinates(shape, rotation_deg=rotation_deg, centre=centre)
    if gaussian_profile_sigma is None:
        root = math.sqrt(2) * edge_sigma
        profile = 0.5 * (erf((t + half_height) / root) - erf((t - half_height) / root))
    else:
        profile = np.exp(-0.5 * (t / gaussian_profile_sigma) ** 2)
    signal = np.full(shape, float(continuum))
    amplitudes = np.broadcast_to(np.asarray(line_amplitude, dtype=float), (len(lines_s),))
    for s_line, amp in zip(lines_s, amplitudes):
        c = curvature[0] + curvature[1] * s_line
        signal = signal + amp * np.exp(-0.5 * ((s - s_line - c * t * t) / line_sigma) ** 2)
    clean = (signal * profile + background).astype(np.float32)
    image = clean.copy()
    if noise_sigma:
        rng = rng if rng is not None else np.random.default_rng(0)
        image = (clean + rng.normal(0.0, noise_sigma, shape)).astype(np.float32)
    truth = {
        "rotation_deg": rotation_deg,
        "centre": centre,
        "curvature": curvature,
        "lines_s": list(lines_s),
        "half_height": half_height,
        "clean": clean,
        "background": background,
        "line_sigma": line_sigma,
    }
    return image, truth


def line_straightness(rect_image, geometry, *, columns, half_rows, bin_rows=4, window=5):
    """Max |deviation| (px) of each line's centre across row bins of a rectified band, per line."""
    image = np.asarray(rect_image, dtype=np.float64)
    c = geometry.centre_row
    result = []
    for col in columns:
        col = int(round(col))
        centres = []
        for r0 in range(int(c - half_rows), int(c + half_rows) - bin_rows + 1, bin_rows):
            prof = image[r0:r0 + bin_rows, col - window:col + window + 1].mean(axis=0)
            prof = prof - np.median(np.r_[prof[:2], prof[-2:]])
            prof = np.clip(prof, 0, None)
            xs = np.arange(col - window, col + window + 1)
            # a Gaussian through the peak and its neighbours (continuous in the data, unlike a thresholded centroid)
            k = int(np.clip(np.argmax(prof), 1, prof.size - 2))
            lo, mid, hi = np.log(np.maximum(prof[k - 1:k + 2], 1e-9))
            centres.append(xs[k] + 0.5 * (lo - hi) / (lo - 2 * mid + hi))
        centres = np.asarray(centres)
        result.append(float(np.max(np.abs(centres - np.median(centres)))))
    return result


def rectified_columns(geometry, truth):
    """Rectified column of each true line (where its t = 0 point lands), by nearest centre-row sample."""
    th = math.radians(truth["rotation_deg"])
    cx, cy = truth["centre"]
    u = np.arange(geometry.n_columns, dtype=float)
    x, y = geometry.frame_coordinates(u, np.full(u.shape, float(geometry.centre_row)))
    columns = []
    for s_line in truth["lines_s"]:
        fx, fy = cx + s_line * math.cos(th), cy + s_line * math.sin(th)
        d = np.hypot(x - fx, y - fy)
        k = int(np.argmin(d))
        # sub-pixel: project the offset on the local column direction
        if 0 < k < u.size - 1:
            step = np.array([x[k + 1] - x[k], y[k + 1] - y[k]])
            k = k + float(np.dot([fx - x[k], fy - y[k]], step) / np.dot(step, step))
        columns.append(float(k))
    return columns
