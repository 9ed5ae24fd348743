"""Azimuthal integration with pyFAI at a fitted geometry, lens distortion included.

The elliptical lens distortion is an affine map about the pattern centre
(:mod:`ringid.ellipse`); pyFAI's detector tilt is not one (DESIGN.md), so the
distortion is expressed as corrected pixel positions instead. Two equivalent
routes are provided:

``method="radial"`` (default)
    The undistorted radius |A⁻¹(p − c)| of every pixel centre is computed once
    (float32, two broadcasts) and converted to g = 10·R/K (1/nm, K in Å·px, so that
    d = K/R exactly); pyFAI's own histogram engines
    (``pyFAI.ext.histogram.histogram1d_engine`` / ``histogram2d_engine``) then
    integrate on that radial array with Poisson error propagation
    (``ErrorModel.POISSON``). No PONI, no wavelength: g is the radial unit itself.
    Measured on a simulated ε = 4 % ring: the integrated ring sits at its true
    radius to better than 0.01 px (tests/test_integrate.py).
``method="corners"``
    A ``pyFAI.detectors.Detector`` whose pixel corners are affine-corrected
    (``set_pixel_corners``, array (ny, nx, 4, 3) of z, y, x in metres, built
    vectorised in float32 and cached per geometry), integrated by an
    ``AzimuthalIntegrator`` in the radial unit ``r_mm`` with the PONI at the
    centre: poni1 = (c_y + 0.5)·p, poni2 = (c_x + 0.5)·p (pyFAI measures from the
    detector corner). It supports pixel splitting but costs 200 MB for 2048²
    and is slower; it serves as an independent check of the radial route.

This is the only module that imports pyFAI or uses PONI metres. The small-angle
flat-detector projection (R·d = λL(1 + 1.5θ²), 0.06 % at θ = 20 mrad) is not
corrected: by convention d = K/R, and a calibration absorbs it into K.
"""

from __future__ import annotations

import functools
import math

import numpy as np

from .ellipse import undistorted_offsets, undistortion_matrix
from .model import Geometry, Profile

PIXEL_SIZE_M = 1.0e-4  # nominal pixel pitch handed to pyFAI; cancels out of g
DISTANCE_M = 1.0  # nominal distance handed to pyFAI; unused by the r_mm unit


def default_g_step_per_nm(camera_constant_A_px: float, px_per_bin: float = 0.5) -> float:
    """Bin width in g (1/nm) corresponding to ``px_per_bin`` pixels of radius: Δg = 10·Δr/K."""
    return 10.0 * px_per_bin / camera_constant_A_px


def g_array(shape, geometry: Geometry) -> np.ndarray:
    """g = 10·R/K (1/nm) of every pixel centre, R its undistorted radius in px (float32)."""
    _check_geometry(geometry)
    ux, uy = undistorted_offsets(shape, geometry.center_x_px, geometry.center_y_px, geometry.ellipticity,
                                 geometry.ellipse_angle_deg)
    np.multiply(ux, ux, out=ux)
    np.multiply(uy, uy, out=uy)
    ux += uy
    np.sqrt(ux, out=ux)
    ux *= np.float32(10.0 / geometry.camera_constant_A_px)
    return ux


def azimuth_array(shape, geometry: Geometry) -> np.ndarray:
    """Azimuth ψ (rad, −π…π) of every pixel centre in the undistorted frame, from +x towards +y."""
    ux, uy = undistorted_offsets(shape, geometry.center_x_px, geometry.center_y_px, geometry.ellipticity,
                                 geometry.ellipse_angle_deg)
    return np.arctan2(uy, ux, out=ux)


def _check_geometry(geometry: Geometry) -> None:
    if not (geometry.camera_constant_A_px > 0):
        raise ValueError("integration needs a camera constant (Geometry.camera_constant_A_px)")


def integrate_profile(data: np.ndarray, mask: np.ndarray | None, geometry: Geometry, *,
                      g_step_per_nm: float | None = None, g_min_per_nm: float = 0.0,
                      g_max_per_nm: float | None = None, n_azimuth: int = 72, with_cake: bool = True,
                      method: str = "radial") -> Profile:
    """Azimuthal mean profile I(g) with Poisson uncertainties, and the (azimuth, g) cake.

    Parameters
    ----------
    data : (ny, nx) array
        Pattern in counts (Poisson error propagation assumes counts).
    mask : bool array or None
        True where pixels are excluded.
    geometry : Geometry
        Centre, ε, θ and camera constant K (Å·px).
    g_step_per_nm : float or None
        Bin width in g (1/nm); default half a pixel of radius.
    g_min_per_nm, g_max_per_nm : float
        Range of g; the default upper end is the largest g of an unmasked pixel.
    n_azimuth : int
        Azimuth bins of the cake (72 → 5° each).
    with_cake : bool
        Also compute the cake (azimuth × g); it shares the 1D grid.
    method : "radial" or "corners"
        See the module docstring; both give the same g scale.

    Returns
    -------
    Profile
        g_per_nm bin centres, azimuthal-mean intensity (counts per pixel) and its
        standard error (Poisson), the cake (n_azimuth, n_g) with NaN for empty cells,
        azimuth_deg cake row centres. Leading bins with no unmasked pixel (inside a
        beam stop) are dropped; an empty bin further out is NaN.
    """
    from pyFAI.containers import ErrorModel
    from pyFAI.ext.histogram import histogram1d_engine, histogram2d_engine

    _check_geometry(geometry)
    k = geometry.camera_constant_A_px
    step = g_step_per_nm or default_g_step_per_nm(k)
    raw = np.ascontiguousarray(data, dtype=np.float32)
    mask8 = None if mask is None else np.ascontiguousarray(mask).view(np.int8)
    if method == "radial":
        g = g_array(data.shape, geometry)
    elif method == "corners":
        g = None
    else:
        raise ValueError(f"method must be 'radial' or 'corners', got {method!r}")
    if g_max_per_nm is None:
        if g is None:
            g_max_per_nm = _max_g_of_image(data.shape, geometry)
        else:
            g_max_per_nm = float(g.max() if mask is None else g[~mask].max())
    n_g = max(int(math.ceil((g_max_per_nm - g_min_per_nm) / step)), 1)
    g_hi = g_min_per_nm + n_g * step
    if method == "corners":
        return _integrate_corners(raw, mask, geometry, g_min_per_nm, g_hi, n_g, n_azimuth, with_cake)
    res = histogram1d_engine(g, n_g, raw, mask=mask8, error_model=ErrorModel.POISSON,
                             radial_range=(g_min_per_nm, g_hi), empty=np.nan)
    position = np.asarray(res.position, dtype=float)
    intensity = np.asarray(res.intensity, dtype=float)
    sigma = np.asarray(res.sigma, dtype=float)
    count = np.asarray(res.count, dtype=float)
    cake = azimuth_deg = None
    if with_cake:
        psi = azimuth_array(data.shape, geometry)
        res2 = histogram2d_engine(g, psi, (n_g, n_azimuth), raw, mask=mask8, error_model=ErrorModel.POISSON,
                                  radial_range=(g_min_per_nm, g_hi), azimuth_range=(-math.pi, math.pi),
                                  empty=np.nan)
        cake = np.asarray(res2.intensity, dtype=float)
        cake[np.asarray(res2.count) <= 0] = np.nan
        azimuth_deg = np.degrees(np.asarray(res2.azimuthal, dtype=float))
        del psi
    return _finish(position, intensity, sigma, count, cake, azimuth_deg)


def _finish(position, intensity, sigma, count, cake, azimuth_deg) -> Profile:
    empty = ~(count > 0)
    intensity = np.where(empty, np.nan, intensity)
    sigma = np.where(empty, np.nan, sigma)
    first = int(np.argmax(~empty)) if (~empty).any() else 0
    last = len(empty) - int(np.argmax(~empty[::-1])) if (~empty).any() else len(empty)
    sl = slice(first, last)
    return Profile(g_per_nm=position[sl], intensity=intensity[sl], sigma=sigma[sl],
                   cake=None if cake is None else cake[:, sl], azimuth_deg=azimuth_deg)


def _max_g_of_image(shape, geometry: Geometry) -> float:
    ny, nx = shape
    inv = undistortion_matrix(geometry.ellipticity, geometry.ellipse_angle_deg)
    corners = np.array([[0, 0], [nx - 1, 0], [0, ny - 1], [nx - 1, ny - 1]], float)
    d = corners - [geometry.center_x_px, geometry.center_y_px]
    r = np.hypot(*(inv @ d.T))
    return float(10.0 * r.max() / geometry.camera_constant_A_px)


@functools.lru_cache(maxsize=2)
def _cached_detector(shape, cx, cy, eps, ang):
    from pyFAI.detectors import Detector

    det = Detector(pixel1=PIXEL_SIZE_M, pixel2=PIXEL_SIZE_M, max_shape=shape)
    det.set_pixel_corners(affine_corrected_corners(shape, cx, cy, eps, ang))
    return det


def affine_corrected_corners(shape, center_x_px: float, center_y_px: float, ellipticity: float,
                             ellipse_angle_deg: float, pixel_size_m: float = PIXEL_SIZE_M) -> np.ndarray:
    """Pixel-corner array (ny, nx, 4, 3) in metres (z, y, x) with the lens distortion undone.

    Corner j of pixel [i, k] (pyFAI order: (i, k), (i+1, k), (i+1, k+1), (i, k+1) in
    corner coordinates) is moved to c + A⁻¹(p − c). Built from one (ny+1, nx+1) grid
    in float32, so 2048² takes a fraction of a second.
    """
    ny, nx = shape
    inv = undistortion_matrix(ellipticity, ellipse_angle_deg).astype(np.float32)
    # corner coordinates in pixel units from the detector corner; pixel centre [0,0] is at 0.5
    cxp, cyp = np.float32(center_x_px + 0.5), np.float32(center_y_px + 0.5)
    xs = np.arange(nx + 1, dtype=np.float32) - cxp
    ys = np.arange(ny + 1, dtype=np.float32) - cyp
    scale = np.float32(pixel_size_m)
    gx = (inv[0, 0] * xs[None, :] + inv[0, 1] * ys[:, None] + cxp) * scale
    gy = (inv[1, 0] * xs[None, :] + inv[1, 1] * ys[:, None] + cyp) * scale
    out = np.zeros((ny, nx, 4, 3), np.float32)
    for j, (di, dk) in enumerate(((0, 0), (1, 0), (1, 1), (0, 1))):
        out[:, :, j, 1] = gy[di : di + ny, dk : dk + nx]
        out[:, :, j, 2] = gx[di : di + ny, dk : dk + nx]
    return out


def _integrate_corners(raw, mask, geometry, g_lo, g_hi, n_g, n_azimuth, with_cake) -> Profile:
    from pyFAI.integrator.azimuthal import AzimuthalIntegrator

    det = _cached_detector(raw.shape, geometry.center_x_px, geometry.center_y_px, geometry.ellipticity,
                           geometry.ellipse_angle_deg)
    ai = AzimuthalIntegrator(dist=DISTANCE_M, poni1=(geometry.center_y_px + 0.5) * PIXEL_SIZE_M,
                             poni2=(geometry.center_x_px + 0.5) * PIXEL_SIZE_M, detector=det)
    mm_per_g = geometry.camera_constant_A_px / 10.0 * PIXEL_SIZE_M * 1e3  # r_mm of one 1/nm
    r_range = (g_lo * mm_per_g, g_hi * mm_per_g)
    method = ("no", "histogram", "cython")
    res = ai.integrate1d(raw, n_g, unit="r_mm", radial_range=r_range, mask=mask, error_model="poisson",
                         correctSolidAngle=False, method=method)
    position = np.asarray(res.radial) / mm_per_g
    count = np.asarray(res.count) if res.count is not None else np.ones(n_g)
    cake = az = None
    if with_cake:
        res2 = ai.integrate2d(raw, n_g, n_azimuth, unit="r_mm", radial_range=r_range, mask=mask,
                              error_model="poisson", correctSolidAngle=False, method=method, dummy=np.nan)
        cake = np.asarray(res2.intensity, dtype=float)
        az = np.asarray(res2.azimuthal, dtype=float)
    return _finish(position, np.asarray(res.intensity, float), np.asarray(res.sigma, float), count, cake, az)


# ---------------------------------------------------------------------------
# the whole image half for one pattern


from dataclasses import dataclass, field  # noqa: E402


@dataclass(frozen=True)
class ImageResult:
    """Everything the image half produces for one pattern.

    geometry: centre (with its uncertainty), ε, θ, K, voltage used for the profile.
    profile: 1D I(g) with Poisson σ and the cake. fit: the centre fit (rings used,
    residuals). mask: the MaskResult. flags / notes: plain-language remarks.
    timings_s: seconds per step (load, mask, center, integrate).
    """

    geometry: Geometry
    profile: Profile
    fit: object
    mask: object
    path: str
    flags: tuple[str, ...] = ()
    notes: tuple[str, ...] = ()
    warnings: tuple[str, ...] = ()
    timings_s: dict = field(default_factory=dict)
    data: np.ndarray | None = None  # the loaded pattern (for thumbnails; not copied)


def process_image(path, calibration: Geometry, *, user_mask_path=None, frame: int | None = None,
                  saturation_level: float | None = None, fit_ellipse: bool = False, n_azimuth: int = 72,
                  g_step_per_nm: float | None = None, with_cake: bool = True, max_pixels: int | None = None,
                  max_bytes: int | None = None) -> ImageResult:
    """Load → mask → centre (at the calibration's ellipse) → integrate one sample pattern.

    Parameters
    ----------
    path : path-like
        The pattern (TIFF or .npy).
    calibration : Geometry
        From :func:`ringid.calibrate.read_calibration` or a known/nominal constant:
        K (Å·px, required), ε, θ, voltage; its centre is only a fallback.
    fit_ellipse : bool
        Fit the sample's own ε and θ instead of inheriting them (e.g. when the
        calibration is a nominal constant with no distortion measured).
    Other parameters are passed to the stages (see :func:`ringid.image.load_image`,
    :func:`ringid.mask.build_mask`, :func:`integrate_profile`).

    Returns
    -------
    ImageResult

    Raises
    ------
    RingidError
        For unreadable input; a pattern without rings is not an error (the centre
        then comes from point symmetry alone, flagged ``center_from_symmetry``).
    """
    import time

    from .center import coarse_center, refine_geometry, refine_sample_center
    from .errors import RingidError
    from .image import DEFAULT_MAX_BYTES, DEFAULT_MAX_PIXELS, load_image
    from .mask import build_mask, load_user_mask

    if not (calibration.camera_constant_A_px > 0):
        raise RingidError(path, "the calibration gives no camera constant")
    t = {}
    t0 = time.perf_counter()
    img = load_image(path, frame=frame, max_pixels=max_pixels or DEFAULT_MAX_PIXELS,
                     max_bytes=max_bytes or DEFAULT_MAX_BYTES)
    t["load"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    user = load_user_mask(user_mask_path, img.shape) if user_mask_path else None
    level = img.saturation_level if saturation_level is None else saturation_level
    masks = build_mask(img.data, invalid=img.invalid, saturation_level=level, user_mask=user)
    t["mask"] = time.perf_counter() - t0
    if masks.mask.all():
        raise RingidError(path, _nothing_usable(img, level))
    t0 = time.perf_counter()
    flags: list[str] = []
    notes = list(img.notes) + list(masks.notes)
    try:
        if fit_ellipse:
            fit = refine_geometry(img.data, masks.mask, center_guess=masks.rough_center_xy,
                                  ellipticity=calibration.ellipticity,
                                  ellipse_angle_deg=calibration.ellipse_angle_deg, fit_ellipse=True, path=path)
        else:
            fit = refine_sample_center(img.data, masks.mask, calibration, center_guess=masks.rough_center_xy,
                                       path=path)
        g = fit.geometry
        flags += list(fit.flags)
        notes += list(fit.notes)
    except RingidError as exc:
        if "ring" not in exc.problem:
            raise
        _refuse_centre_outside(img.data, masks.mask, path)
        cc = coarse_center(img.data, masks.mask)
        fit = None
        g = Geometry(center_x_px=cc.center_x_px, center_y_px=cc.center_y_px, ellipticity=calibration.ellipticity,
                     ellipse_angle_deg=calibration.ellipse_angle_deg, center_sigma_px=float(cc.block_px) / 2)
        flags.append("center_from_symmetry")
        notes.append(f"no ring to centre on ({exc.problem}); centre from point symmetry")
    geometry = Geometry(center_x_px=g.center_x_px, center_y_px=g.center_y_px, ellipticity=g.ellipticity,
                        ellipse_angle_deg=g.ellipse_angle_deg, camera_constant_A_px=calibration.camera_constant_A_px,
                        voltage_kv=calibration.voltage_kv, center_sigma_px=g.center_sigma_px)
    t["center"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    profile = integrate_profile(img.data, masks.mask, geometry, g_step_per_nm=g_step_per_nm, n_azimuth=n_azimuth,
                                with_cake=with_cake)
    t["integrate"] = time.perf_counter() - t0
    return ImageResult(geometry=geometry, profile=profile, fit=fit, mask=masks, path=str(path), flags=tuple(flags),
                       notes=tuple(notes), warnings=tuple(img.warnings), timings_s=t, data=img.data)


FALLOFF_AGREEMENT_MIN = 0.8  # blocks whose gradient points at the falloff centre (noise: ≈ 0.2–0.4, measured)


def _refuse_centre_outside(data, mask, path) -> None:
    """Raise when the pattern is centred outside the frame (arcs, not rings).

    Called when no ring was found about a centre inside the image: if the gradients of the
    whole image agree (≥ FALLOFF_AGREEMENT_MIN) on a centre outside it, the rings are arcs
    about a direct beam off the detector, and a centre from point symmetry would be wrong.
    """
    from .center import falloff_center
    from .errors import RingidError

    fc = falloff_center(data, mask)
    ny, nx = data.shape
    inside = -0.5 <= fc.center_x_px <= nx - 0.5 and -0.5 <= fc.center_y_px <= ny - 0.5
    if fc.agreement >= FALLOFF_AGREEMENT_MIN and not inside:
        raise RingidError(path, f"the pattern's centre is outside the image (near x = {fc.center_x_px:.0f}, "
                                f"y = {fc.center_y_px:.0f} px; image {nx}×{ny} px): the rings are arcs, "
                                "record the pattern with the direct beam on the detector")


def _nothing_usable(img, saturation_level: float) -> str:
    """Why every pixel of a loaded pattern is masked, in one line."""
    import math

    if img.invalid is not None and img.invalid.all():
        return "every pixel is NaN or infinite: no usable data"
    if not np.any(img.data):
        return "every pixel is 0: no counts recorded"
    if math.isfinite(saturation_level) and np.all(img.data >= saturation_level):
        return f"every pixel is saturated (at or above {saturation_level:g} counts): nothing to measure"
    return "every pixel is masked (invalid, saturated, dead, hot or user-masked): nothing to measure"
