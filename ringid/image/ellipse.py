"""Elliptical (affine) lens distortion: the map, its inverse, and the joint ring fit.

The projector lenses distort a ring pattern by an area-preserving affine map
about the pattern centre (docs/design.md): a ring of true radius R is drawn as an
ellipse with semi-axes a = R/√(1−ε) and b = R·√(1−ε), the major axis at angle θ
from +x towards +y, and every ring shares the same centre, ε and θ. In matrix form
an observed offset from the centre is ``p − c = A·u`` with
``A = Rot(θ)·diag(1/√(1−ε), √(1−ε))·Rot(θ)ᵀ`` and u the undistorted offset.

This module holds that map and the linearised least-squares fit of ring
positions measured in azimuth sectors, r_ks = R_k·(1 + e₁cos2ψ + e₂sin2ψ) +
δx·cosψ + δy·sinψ, where (δx, δy) is the residual centre offset and (e₁, e₂) the
residual distortion in the current undistorted frame; the elliptical form
r(φ) ≈ r₀[1 + ε/2·cos2(φ−φ₀)] is the usual small-ε expansion (e.g. Mitchell,
Microsc. Res. Tech. 2022). The sector measurements themselves are made in
:mod:`ringid.image.center`. Direct conic fitting (Fitzgibbon et al. 1999) is not used:
it fits each ring on its own and is biased towards small ellipses.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np


def distortion_matrix(ellipticity: float, ellipse_angle_deg: float) -> np.ndarray:
    """The 2×2 matrix A mapping an undistorted offset u to an observed offset A·u (x, y order).

    Parameters
    ----------
    ellipticity : float
        ε = 1 − b/a, dimensionless, 0 ≤ ε < 1.
    ellipse_angle_deg : float
        Major-axis angle in degrees from +x towards +y.
    """
    if not 0.0 <= ellipticity < 1.0:
        raise ValueError(f"ellipticity must be in [0, 1), got {ellipticity}")
    t = math.radians(ellipse_angle_deg)
    c, s = math.cos(t), math.sin(t)
    rot = np.array([[c, -s], [s, c]])
    root = math.sqrt(1.0 - ellipticity)
    return rot @ np.diag([1.0 / root, root]) @ rot.T


def undistortion_matrix(ellipticity: float, ellipse_angle_deg: float) -> np.ndarray:
    """The inverse of :func:`distortion_matrix`: u = A⁻¹·(p − c)."""
    t = math.radians(ellipse_angle_deg)
    c, s = math.cos(t), math.sin(t)
    rot = np.array([[c, -s], [s, c]])
    root = math.sqrt(1.0 - ellipticity)
    return rot @ np.diag([root, 1.0 / root]) @ rot.T


def undistorted_offsets(shape, center_x_px: float, center_y_px: float, ellipticity: float,
                        ellipse_angle_deg: float, dtype=np.float32):
    """Undistorted offsets (ux, uy) in px of every pixel centre of an image of ``shape``.

    Pixel [row, col] has its centre at x = col, y = row (docs/design.md). Computed by
    broadcasting one row and one column vector, in ``dtype`` (float32 by default:
    2048² costs 2 × 16 MB and a few milliseconds).
    """
    ny, nx = shape
    inv = undistortion_matrix(ellipticity, ellipse_angle_deg).astype(dtype)
    dx = np.arange(nx, dtype=dtype) - dtype(center_x_px)
    dy = np.arange(ny, dtype=dtype) - dtype(center_y_px)
    ux = inv[0, 0] * dx[None, :] + inv[0, 1] * dy[:, None]
    uy = inv[1, 0] * dx[None, :] + inv[1, 1] * dy[:, None]
    return ux, uy


def ellipse_from_matrix(stretch: np.ndarray) -> tuple[float, float]:
    """(ε, θ in degrees) of any 2×2 map S taking undistorted to observed offsets.

    Only S·Sᵀ matters for ring shapes (a rotation of the undistorted frame leaves
    circles circles); its eigenvalues λ₁ ≥ λ₂ give ε = 1 − √(λ₂/λ₁) and the
    eigenvector of λ₁ the major-axis angle, reduced to (−90°, 90°].
    """
    b = stretch @ stretch.T
    vals, vecs = np.linalg.eigh(0.5 * (b + b.T))
    ratio = math.sqrt(max(vals[0], 0.0) / vals[1])
    angle = math.degrees(math.atan2(vecs[1, 1], vecs[0, 1]))
    angle = (angle + 90.0) % 180.0 - 90.0
    if angle == -90.0:
        angle = 90.0
    return 1.0 - ratio, angle


def compose_distortion(ellipticity: float, ellipse_angle_deg: float, e1: float, e2: float) -> tuple[float, float]:
    """Apply a residual stretch I + [[e₁, e₂], [e₂, −e₁]] (undistorted frame) to the current map.

    Returns the new (ε, θ in degrees), area kept at 1 by construction of ε.
    """
    a = distortion_matrix(ellipticity, ellipse_angle_deg)
    residual = np.array([[1.0 + e1, e2], [e2, 1.0 - e1]])
    return ellipse_from_matrix(a @ residual)


@dataclass(frozen=True)
class SectorFit:
    """Result of the linearised joint fit of ring positions over azimuth sectors.

    delta_x_px, delta_y_px: centre correction in the current undistorted frame (px);
    e1, e2: residual distortion terms (dimensionless, 0 when not fitted);
    ring_radius_px: fitted undistorted radius per ring (px); covariance of
    (δx, δy[, e₁, e₂]); rms_px the weighted rms residual; n_points used.
    """

    delta_x_px: float
    delta_y_px: float
    e1: float
    e2: float
    ring_radius_px: np.ndarray
    ring_radius_sigma_px: np.ndarray
    covariance: np.ndarray
    rms_px: float
    n_points: int
    inliers: np.ndarray


def fit_sector_positions(ring_index: np.ndarray, azimuth_rad: np.ndarray, radius_px: np.ndarray,
                         sigma_px: np.ndarray, n_rings: int, *, fit_distortion: bool = True,
                         huber_k: float = 2.5, n_iter: int = 5) -> SectorFit:
    """Fit one centre offset (and optionally one residual ellipse) to ring positions of all rings jointly.

    Parameters
    ----------
    ring_index : (n,) int
        Which ring each measurement belongs to (0 … n_rings−1).
    azimuth_rad : (n,) float
        Sector azimuth ψ (rad) in the current undistorted frame.
    radius_px, sigma_px : (n,) float
        Measured ring radius (px) in that sector and its standard uncertainty.
    fit_distortion : bool
        Fit e₁, e₂ as well (a calibration); otherwise only the centre (a sample
        that inherits its distortion).

    Notes
    -----
    Weighted linear least squares, iteratively reweighted with Huber weights
    (Huber 1964) so that sectors hit by a beam-stop edge or a lone spot of a
    spotty ring do not pull the fit.
    """
    ring_index = np.asarray(ring_index, dtype=int)
    cos1, sin1 = np.cos(azimuth_rad), np.sin(azimuth_rad)
    cols = [cos1, sin1]
    radius_guess = np.zeros(n_rings)
    if fit_distortion:
        # R_k·e₁cos2ψ ≈ R̄_k·e₁cos2ψ, with R̄_k the ring's mean measured radius
        for k in range(n_rings):
            sel = ring_index == k
            radius_guess[k] = np.median(radius_px[sel]) if sel.any() else 0.0
        rk = radius_guess[ring_index]
        cols += [rk * np.cos(2 * azimuth_rad), rk * np.sin(2 * azimuth_rad)]
    n_shared = len(cols)
    design = np.zeros((radius_px.size, n_shared + n_rings))
    design[:, :n_shared] = np.column_stack(cols)
    design[np.arange(radius_px.size), n_shared + ring_index] = 1.0
    weight = 1.0 / np.asarray(sigma_px, float) ** 2
    robust = np.ones_like(weight)
    scale = 1.0
    for _ in range(n_iter):
        w = np.sqrt(weight * robust)
        sol, *_ = np.linalg.lstsq(design * w[:, None], radius_px * w, rcond=None)
        resid = (radius_px - design @ sol) * np.sqrt(weight)
        scale = 1.4826 * np.median(np.abs(resid)) or 1.0
        z = np.abs(resid) / (huber_k * scale)
        robust = np.where(z <= 1.0, 1.0, 1.0 / np.maximum(z, 1e-12))
    w = np.sqrt(weight * robust)
    wdesign = design * w[:, None]
    dof = max(radius_px.size - design.shape[1], 1)
    chi2 = float(np.sum(((radius_px - design @ sol) * w) ** 2)) / dof
    cov = np.linalg.pinv(wdesign.T @ wdesign) * max(chi2, 1e-30)
    e1 = e2 = 0.0
    if fit_distortion:
        e1, e2 = sol[2], sol[3]
    radii = sol[n_shared:].copy()
    rsig = np.sqrt(np.clip(np.diag(cov)[n_shared:], 0, None))
    unmeasured = np.bincount(ring_index, minlength=n_rings) == 0
    radii[unmeasured] = np.nan
    rsig[unmeasured] = np.nan
    rms = float(np.sqrt(np.sum(((radius_px - design @ sol) ** 2) * weight * robust) / np.sum(weight * robust)))
    return SectorFit(
        delta_x_px=float(sol[0]), delta_y_px=float(sol[1]), e1=float(e1), e2=float(e2),
        ring_radius_px=radii, ring_radius_sigma_px=rsig, covariance=cov[:n_shared, :n_shared],
        rms_px=rms, n_points=int(radius_px.size), inliers=robust > 0.5,
    )
