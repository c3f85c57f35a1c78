"""Setup planner: where the spectrum lands on the sensor before anything is built.

Model (the same as the virtual bench's): light from the slit meets a
transmission grating at incidence ``incidence_deg``; order m leaves at beta
from the grating equation m lambda = d (sin alpha + sin beta). A pinhole
camera right behind the grating, its axis turned by ``tilt_deg`` from the
grating normal, images direction beta at column

    x = cx + f tan(beta - tilt),   f = (width / 2) / tan(HFOV / 2)

(a flat sensor: the dispersion is not linear in x).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from ..physics import diffraction_angle_deg

__all__ = ["SetupPlan", "plan_setup", "centring_tilt_deg", "dispersion_hint"]


@dataclass(frozen=True)
class SetupPlan:
    """Predicted layout of the spectrum on the sensor.

    Arrays over the sensor's columns (``column_px`` = 0 .. width-1) hold
    the first-order wavelength seen at each column (NaN where no wavelength
    of that order reaches) and the local dispersion in nm/px.

    Resolution figures are FWHM-like widths in nm at ``reference_nm``:
    the slit image, two pixels (Nyquist), and lambda / (m N) for the grooves;
    ``resolution_nm`` is their quadrature sum and ``limited_by`` names the
    largest.
    """

    lines_per_mm: float
    order: int
    image_width_px: int
    horizontal_fov_deg: float
    tilt_deg: float
    incidence_deg: float
    focal_length_px: float
    range_nm: tuple[float, float]
    range_columns_px: tuple[float | None, float | None]
    range_on_sensor: bool
    visible_range_nm: tuple[float, float] | None
    column_px: np.ndarray
    wavelength_nm: np.ndarray
    dispersion_nm_per_px: np.ndarray
    dispersion_range_nm_per_px: tuple[float, float] | None
    wavelength_increases_with_column: bool
    reference_nm: float
    slit_resolution_nm: float | None
    pixel_resolution_nm: float
    groove_resolution_nm: float
    resolution_nm: float
    resolving_power: float
    limited_by: str
    shortest_detected_nm: float
    second_order_overlap_from_nm: float
    second_order_on_sensor: bool
    second_order_start_column_px: float | None
    centring_tilt_deg: float
    centred_range_fits: bool
    zero_order_column_px: float | None

    def column_of(self, wavelength_nm, *, order: int | None = None):
        """Sensor column of ``wavelength_nm`` in ``order`` (default the plan's); NaN off the sensor."""
        return _column(
            np.asarray(wavelength_nm, dtype=np.float64),
            lines_per_mm=self.lines_per_mm,
            order=self.order if order is None else order,
            incidence_deg=self.incidence_deg,
            tilt_deg=self.tilt_deg,
            focal_length_px=self.focal_length_px,
            width=self.image_width_px,
        )


def _beta_deg(wavelength_nm, *, lines_per_mm, order, incidence_deg):
    d_nm = 1e6 / lines_per_mm
    s = order * np.asarray(wavelength_nm, dtype=np.float64) / d_nm - np.sin(np.radians(incidence_deg))
    with np.errstate(invalid="ignore"):
        return np.where(np.abs(s) <= 1, np.degrees(np.arcsin(np.clip(s, -1, 1))), np.nan)


def _column(wavelength_nm, *, lines_per_mm, order, incidence_deg, tilt_deg, focal_length_px, width):
    beta = _beta_deg(wavelength_nm, lines_per_mm=lines_per_mm, order=order, incidence_deg=incidence_deg)
    angle = np.radians(beta - tilt_deg)
    with np.errstate(invalid="ignore"):
        x = width / 2 + focal_length_px * np.tan(angle)
        x = np.where(np.abs(angle) < np.pi / 2, x, np.nan)
    x = np.where((x >= -0.5) & (x <= width - 0.5), x, np.nan)
    return float(x) if np.ndim(x) == 0 else x


def centring_tilt_deg(range_nm, *, lines_per_mm: float, order: int = 1, incidence_deg: float = 0.0) -> float:
    """Camera tilt that puts ``range_nm`` symmetrically about the frame centre.

    With x = cx + f tan(beta - tilt) and tan odd, the ends land at equal
    distances from cx when tilt = (beta_low + beta_high) / 2.
    """
    low, high = (float(v) for v in range_nm)
    beta_low = diffraction_angle_deg(low, lines_per_mm=lines_per_mm, order=order, incidence_deg=incidence_deg)
    beta_high = diffraction_angle_deg(high, lines_per_mm=lines_per_mm, order=order, incidence_deg=incidence_deg)
    return 0.5 * (beta_low + beta_high)


def plan_setup(
    *,
    lines_per_mm: float,
    image_width_px: int,
    horizontal_fov_deg: float,
    tilt_deg: float | None = None,
    slit_width_mm: float | None = None,
    slit_distance_mm: float | None = None,
    illuminated_width_mm: float = 3.0,
    range_nm=(380.0, 750.0),
    order: int = 1,
    incidence_deg: float = 0.0,
    shortest_detected_nm: float = 380.0,
    reference_nm: float = 550.0,
) -> SetupPlan:
    """Predict where a spectrum lands on the sensor, its dispersion and its resolution.

    Parameters
    ----------
    lines_per_mm : float
        Grating groove density (500 and 1000 are common film gratings).
    image_width_px : int
        Sensor columns along the dispersion (e.g. 1280).
    horizontal_fov_deg : float
        The camera's horizontal field of view.
    tilt_deg : float, optional
        Angle between the camera's axis and the grating normal; default the
        tilt that centres ``range_nm``.
    slit_width_mm, slit_distance_mm : float, optional
        Slit width and its distance from the grating; both needed for the
        slit-limited resolution.
    illuminated_width_mm : float
        Width of grating the camera sees light through (about the lens
        entrance pupil, a few mm for a webcam; common practice, no source).
    range_nm : (float, float)
        The wavelength range to place (default 380-750 nm).
    order : int
        Diffraction order to plan for (1 normally).
    shortest_detected_nm : float
        Shortest wavelength that reaches the sensor (about 380 nm for a
        glass lens); its second order contaminates first order from twice it.
    reference_nm : float
        Wavelength at which resolution figures are given.

    Notes
    -----
    Slit: an angular width w / L at incidence maps to dlambda = d cos(alpha)
    (w / L) / m, the same at every beta. Pixels: two pixels (Nyquist) times
    the local nm/px. Grooves: resolving power R = m N with N the number of
    illuminated grooves.
    """
    if not lines_per_mm > 0:
        raise InputError(f"`lines_per_mm` must be positive, was {lines_per_mm}")
    if int(image_width_px) != image_width_px or image_width_px < 16:
        raise InputError(f"`image_width_px` must be a whole number of at least 16, was {image_width_px}")
    if not 1 <= horizontal_fov_deg < 170:
        raise InputError(f"`horizontal_fov_deg` must be in 1-170 degrees, was {horizontal_fov_deg}")
    if order == 0 or int(order) != order:
        raise InputError(f"`order` must be a non-zero whole number, was {order}")
    low, high = (float(v) for v in range_nm)
    if not 0 < low < high:
        raise InputError(f"`range_nm` must be (low, high) with 0 < low < high, was ({low:g}, {high:g})")
    if (slit_width_mm is None) != (slit_distance_mm is None):
        raise InputError("give both `slit_width_mm` and `slit_distance_mm` (slit to grating), or neither")
    if slit_width_mm is not None and not (slit_width_mm > 0 and slit_distance_mm > 0):
        raise InputError(f"slit width and distance must be positive, were {slit_width_mm} and {slit_distance_mm} mm")
    if not illuminated_width_mm > 0:
        raise InputError(f"`illuminated_width_mm` must be positive, was {illuminated_width_mm}")
    width = int(image_width_px)
    focal = (width / 2) / np.tan(np.radians(horizontal_fov_deg) / 2)
    grating = dict(lines_per_mm=lines_per_mm, order=order, incidence_deg=incidence_deg)
    centre_tilt = centring_tilt_deg((low, high), **grating)
    tilt = centre_tilt if tilt_deg is None else float(tilt_deg)

    columns = np.arange(width, dtype=np.float64)
    beta_at_column = tilt + np.degrees(np.arctan((columns - width / 2) / focal))
    d_nm = 1e6 / lines_per_mm
    lam = d_nm * (np.sin(np.radians(incidence_deg)) + np.sin(np.radians(beta_at_column))) / order
    lam = np.where(lam > 0, lam, np.nan)
    # dlambda/dx = (d cos beta / m) dbeta/dx, dbeta/dx = f / (f^2 + (x - cx)^2)
    dbeta_dx = focal / (focal**2 + (columns - width / 2) ** 2)
    dispersion = np.abs(d_nm * np.cos(np.radians(beta_at_column)) / order * dbeta_dx)
    dispersion = np.where(np.isfinite(lam), dispersion, np.nan)

    col_low = _column(low, tilt_deg=tilt, focal_length_px=focal, width=width, **grating)
    col_high = _column(high, tilt_deg=tilt, focal_length_px=focal, width=width, **grating)
    on_sensor = bool(np.isfinite(col_low) and np.isfinite(col_high))
    in_visible = np.isfinite(lam) & (lam >= 380) & (lam <= 780)
    visible = (float(np.nanmin(lam[in_visible])), float(np.nanmax(lam[in_visible]))) if np.any(in_visible) else None
    shown = np.isfinite(lam) & (lam >= low) & (lam <= high)
    dispersion_range = (float(dispersion[shown].min()), float(dispersion[shown].max())) if np.any(shown) else None
    increasing = bool(np.nanmean(np.diff(lam)) > 0)

    # Resolution at the reference wavelength.
    col_ref = _column(reference_nm, tilt_deg=tilt, focal_length_px=focal, width=width, **grating)
    if np.isfinite(col_ref):
        local = float(np.interp(col_ref, columns, np.nan_to_num(dispersion, nan=np.nanmedian(dispersion))))
    else:
        beta_ref = diffraction_angle_deg(reference_nm, **grating)
        local = abs(d_nm * np.cos(np.radians(beta_ref)) / order / focal * np.cos(np.radians(beta_ref - tilt)) ** 2)
    pixel_res = 2.0 * local
    grooves = illuminated_width_mm * lines_per_mm
    resolving_power = abs(order) * grooves
    groove_res = reference_nm / resolving_power
    slit_res = None
    if slit_width_mm is not None:
        slit_res = d_nm * np.cos(np.radians(incidence_deg)) * (slit_width_mm / slit_distance_mm) / abs(order)
    parts = {"pixels": pixel_res, "grooves": groove_res}
    if slit_res is not None:
        parts["slit"] = slit_res
    total = float(np.sqrt(sum(v * v for v in parts.values())))
    limited_by = max(parts, key=parts.get)

    # Second order: m = 2 light of shortest_detected_nm sits where first order 2x it does.
    overlap_from = 2.0 * shortest_detected_nm * abs(order)
    second_column = _column(shortest_detected_nm, lines_per_mm=lines_per_mm, order=2 * order, incidence_deg=incidence_deg,
                            tilt_deg=tilt, focal_length_px=focal, width=width)
    second_on = bool(np.isfinite(second_column))
    zero_column = _column(1e-9, lines_per_mm=lines_per_mm, order=1, incidence_deg=incidence_deg, tilt_deg=tilt,
                          focal_length_px=focal, width=width) if incidence_deg == 0 else None
    half_span = np.radians(0.5 * (diffraction_angle_deg(high, **grating) - diffraction_angle_deg(low, **grating)))
    fits = bool(focal * np.tan(abs(half_span)) <= width / 2 - 0.5)
    return SetupPlan(
        lines_per_mm=float(lines_per_mm),
        order=int(order),
        image_width_px=width,
        horizontal_fov_deg=float(horizontal_fov_deg),
        tilt_deg=float(tilt),
        incidence_deg=float(incidence_deg),
        focal_length_px=float(focal),
        range_nm=(low, high),
        range_columns_px=(None if not np.isfinite(col_low) else float(col_low), None if not np.isfinite(col_high) else float(col_high)),
        range_on_sensor=on_sensor,
        visible_range_nm=visible,
        column_px=columns,
        wavelength_nm=lam,
        dispersion_nm_per_px=dispersion,
        dispersion_range_nm_per_px=dispersion_range,
        wavelength_increases_with_column=increasing,
        reference_nm=float(reference_nm),
        slit_resolution_nm=None if slit_res is None else float(slit_res),
        pixel_resolution_nm=float(pixel_res),
        groove_resolution_nm=float(groove_res),
        resolution_nm=total,
        resolving_power=float(resolving_power),
        limited_by=limited_by,
        shortest_detected_nm=float(shortest_detected_nm),
        second_order_overlap_from_nm=float(overlap_from),
        second_order_on_sensor=second_on,
        second_order_start_column_px=float(second_column) if second_on else None,
        centring_tilt_deg=float(centre_tilt),
        centred_range_fits=fits,
        zero_order_column_px=None if zero_column is None or not np.isfinite(zero_column) else float(zero_column),
    )


def dispersion_hint(plan: SetupPlan, *, margin: float = 0.3) -> tuple[float, float]:
    """A range of nm/px for a wavelength calibration to search, from a plan.

    The plan's dispersion range over ``range_nm`` widened by ``margin`` (30%
    by default: the focal length and angles are only nominal).
    """
    if plan.dispersion_range_nm_per_px is None:
        finite = plan.dispersion_nm_per_px[np.isfinite(plan.dispersion_nm_per_px)]
        if finite.size == 0:
            raise InputError("the plan puts no wavelength on the sensor; change the tilt or the grating")
        low, high = float(finite.min()), float(finite.max())
    else:
        low, high = plan.dispersion_range_nm_per_px
    return low * (1 - margin), high * (1 + margin)
