"""Azimuthal integration with pyFAI at a fitted geometry, lens distortion included.

The elliptical lens distortion is an affine map about the pattern centre
(:mod:`ringid.image.ellipse`); pyFAI's detector tilt is not one (docs/design.md), so the
distortion is expressed as corrected pixel positions instead. The third-order radial
distortion (:mod:`ringid.image.radial`, k₃ = ``Geometry.radial_distortion_k3_per_px2``) acts on
the ellipse-corrected radius ρ alone, so it is undone per pixel on the same array,
R = f⁻¹(ρ), before the histogram: every bin then holds the pixels of one interval of true g,
on the uniform g grid the profile stage expects. With k₃ = 0 that step is skipped. Two
equivalent routes are provided:

``method="radial"`` (default)
    The undistorted radius |A⁻¹(p − c)| of every pixel centre is computed once
    (float32, two broadcasts), corrected for k₃ (a short series in k₃ρ², in place) and
    converted to g = 10·R/K (1/nm, K in Å·px, so that d = K/R exactly); pyFAI's own histogram engines
    (``pyFAI.ext.histogram.histogram1d_engine`` / ``histogram2d_engine``) then
    integrate on that radial array with Poisson error propagation
    (``ErrorModel.POISSON``). No PONI, no wavelength: g is the radial unit itself.
    Measured on a simulated ε = 4 % ring: the integrated ring sits at its true
    radius to better than 0.01 px (tests/test_integrate.py).
``method="corners"``
    A ``pyFAI.detectors.Detector`` whose pixel corners are affine- and k₃-corrected
    (``set_pixel_corners``, array (ny, nx, 4, 3) of z, y, x in metres, built
    vectorised in float32 and cached per geometry), integrated by an
    ``AzimuthalIntegrator`` in the radial unit ``r_mm`` with the PONI at the
    centre: poni1 = (c_y + 0.5)·p, poni2 = (c_x + 0.5)·p (pyFAI measures from the
    detector corner). It supports pixel splitting but costs 200 MB for 2048²
    and is slower; it serves as an independent check of the radial route.

This is the only module that imports pyFAI or uses PONI metres. The small-angle
flat-detector projection (R·d = λL(1 + 1.5θ²), 0.06 % at θ = 20 mrad) has the form of a
third-order pincushion, k₃ = 3/(8L²) with L in px: a calibration from a standard takes it up in
k₃ when it is significant, otherwise in K (by convention d = K/R).
"""

from __future__ import annotations

import functools
import math

import numpy as np

from ringid.image.ellipse import undistorted_offsets, undistortion_matrix
from ringid.image.radial import scaled_true_radius_from_squared, undistort_radius
from ringid.core.model import Geometry, Profile

PIXEL_SIZE_M = 1.0e-4  # nominal pixel pitch handed to pyFAI; cancels out of g
DISTANCE_M = 1.0  # nominal distance handed to pyFAI; unused by the r_mm unit


def default_g_step_per_nm(camera_constant_A_px: float, px_per_bin: float = 0.5) -> float:
    """Bin width in g (1/nm) corresponding to ``px_per_bin`` pixels of radius: Δg = 10·Δr/K."""
    return 10.0 * px_per_bin / camera_constant_A_px


def g_array(shape, geometry: Geometry) -> np.ndarray:
    """g = 10·R/K (1/nm) of every pixel centre, R its undistorted radius in px (float32): the
    ellipse-corrected radius ρ, and R = f⁻¹(ρ) when the geometry has a radial distortion k₃."""
    _check_geometry(geometry)
    ux, uy = undistorted_offsets(shape, geometry.center_x_px, geometry.center_y_px, geometry.ellipticity,
                                 geometry.ellipse_angle_deg)
    np.multiply(ux, ux, out=ux)
    np.multiply(uy, uy, out=uy)
    ux += uy
    k3 = geometry.radial_distortion_k3_per_px2
    if k3:
        return scaled_true_radius_from_squared(ux, k3, rho_max_px=_max_rho_of_image(shape, geometry),
                                               scale=10.0 / geometry.camera_constant_A_px, work=uy)
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
        Centre, ε, θ, radial distortion k₃ and camera constant K (Å·px).
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


def _max_rho_of_image(shape, geometry: Geometry) -> float:
    """Largest ellipse-corrected radius ρ (px) of a pixel centre: at a corner (|A⁻¹(p − c)| is convex)."""
    ny, nx = shape
    inv = undistortion_matrix(geometry.ellipticity, geometry.ellipse_angle_deg)
    corners = np.array([[0, 0], [nx - 1, 0], [0, ny - 1], [nx - 1, ny - 1]], float)
    d = corners - [geometry.center_x_px, geometry.center_y_px]
    return float(np.hypot(*(inv @ d.T)).max())


def _max_g_of_image(shape, geometry: Geometry) -> float:
    r = undistort_radius(_max_rho_of_image(shape, geometry), geometry.radial_distortion_k3_per_px2)
    return float(10.0 * r / geometry.camera_constant_A_px)


@functools.lru_cache(maxsize=2)
def _cached_detector(shape, cx, cy, eps, ang, k3):
    from pyFAI.detectors import Detector

    det = Detector(pixel1=PIXEL_SIZE_M, pixel2=PIXEL_SIZE_M, max_shape=shape)
    det.set_pixel_corners(affine_corrected_corners(shape, cx, cy, eps, ang, radial_distortion_k3_per_px2=k3))
    return det


def affine_corrected_corners(shape, center_x_px: float, center_y_px: float, ellipticity: float,
                             ellipse_angle_deg: float, pixel_size_m: float = PIXEL_SIZE_M, *,
                             radial_distortion_k3_per_px2: float = 0.0) -> np.ndarray:
    """Pixel-corner array (ny, nx, 4, 3) in metres (z, y, x) with the lens distortion undone.

    Corner j of pixel [i, k] (pyFAI order: (i, k), (i+1, k), (i+1, k+1), (i, k+1) in
    corner coordinates) is moved to c + A⁻¹(p − c), scaled about c by f⁻¹(ρ)/ρ when there is a
    radial distortion k₃ (ρ = |A⁻¹(p − c)|). Built from one (ny+1, nx+1) grid
    in float32, so 2048² takes a fraction of a second.
    """
    ny, nx = shape
    inv = undistortion_matrix(ellipticity, ellipse_angle_deg).astype(np.float32)
    # corner coordinates in pixel units from the detector corner; pixel centre [0,0] is at 0.5
    cxp, cyp = np.float32(center_x_px + 0.5), np.float32(center_y_px + 0.5)
    xs = np.arange(nx + 1, dtype=np.float32) - cxp
    ys = np.arange(ny + 1, dtype=np.float32) - cyp
    scale = np.float32(pixel_size_m)
    ux = inv[0, 0] * xs[None, :] + inv[0, 1] * ys[:, None]
    uy = inv[1, 0] * xs[None, :] + inv[1, 1] * ys[:, None]
    if radial_distortion_k3_per_px2:
        rho = np.hypot(ux, uy)
        with np.errstate(invalid="ignore", divide="ignore"):
            factor = undistort_radius(rho, radial_distortion_k3_per_px2) / rho
        factor[rho == 0] = 1.0
        ux *= factor
        uy *= factor
    gx = (ux + cxp) * scale
    gy = (uy + cyp) * scale
    out = np.zeros((ny, nx, 4, 3), np.float32)
    for j, (di, dk) in enumerate(((0, 0), (1, 0), (1, 1), (0, 1))):
        out[:, :, j, 1] = gy[di : di + ny, dk : dk + nx]
        out[:, :, j, 2] = gx[di : di + ny, dk : dk + nx]
    return out


def _integrate_corners(raw, mask, geometry, g_lo, g_hi, n_g, n_azimuth, with_cake) -> Profile:
    from pyFAI.integrator.azimuthal import AzimuthalIntegrator

    det = _cached_detector(raw.shape, geometry.center_x_px, geometry.center_y_px, geometry.ellipticity,
                           geometry.ellipse_angle_deg, geometry.radial_distortion_k3_per_px2)
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
