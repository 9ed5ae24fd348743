"""Pattern centre (and, for a calibration, the elliptical distortion), coarse then fine.

Coarse: a ring pattern is point-symmetric about its centre, so the masked
normalised cross-correlation of the (log, high-passed, block-averaged) image
with its 180° rotation peaks at twice the centre (Padfield 2012, "Masked object
registration in the Fourier domain", IEEE Trans. Image Process. 21, 2706). The
correlation with the rotated image is a convolution of the image with itself,
computed with FFTs; masked pixels (beam stop, saturation) are left out of every
sum, and the overlap is renormalised per shift.

Fine: rings are found in the radial profile, then each ring's radius is
measured by a background-subtracted centroid in azimuth sectors of the current
undistorted frame, and one centre (plus, optionally, one ellipse) is fitted to all
rings jointly (:func:`ringid.image.ellipse.fit_sector_positions`); the sectors are
re-measured at the updated geometry until the centre moves less than 0.01 px (or a third of its
standard uncertainty).
The joint fit of ring positions over azimuth sectors is the usual method of
automatic SAED centring with ellipse correction (e.g. Mitchell, Microsc. Res.
Tech. 2022).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ringid.image.ellipse import compose_distortion, distortion_matrix, fit_sector_positions, undistortion_matrix
from ringid.image.mask import block_mean
from ringid.core.errors import RingidError
from ringid.core.model import Geometry

RADIAL_STEP_PX = 0.5
SECTOR_STEP_PX = 0.25


@dataclass(frozen=True)
class CoarseCenter:
    """Centre from the point-symmetry correlation: x, y in px, and the correlation peak value (0–1)."""

    center_x_px: float
    center_y_px: float
    peak_correlation: float
    block_px: int


@dataclass(frozen=True)
class SectorPoints:
    """Ring radii measured in azimuth sectors of the undistorted frame of ``geometry``.

    ring_index, azimuth_rad, radius_px, sigma_px are flat arrays, one entry per
    usable (ring, sector).
    """

    geometry: Geometry
    ring_index: np.ndarray
    azimuth_rad: np.ndarray
    radius_px: np.ndarray
    sigma_px: np.ndarray

    def pixel_positions(self) -> tuple[np.ndarray, np.ndarray]:
        """(x, y) pixel positions of the measured points in the observed (distorted) image."""
        g = self.geometry
        a = distortion_matrix(g.ellipticity, g.ellipse_angle_deg)
        ux = self.radius_px * np.cos(self.azimuth_rad)
        uy = self.radius_px * np.sin(self.azimuth_rad)
        return g.center_x_px + a[0, 0] * ux + a[0, 1] * uy, g.center_y_px + a[1, 0] * ux + a[1, 1] * uy


@dataclass(frozen=True)
class GeometryFit:
    """Result of the fine centre (and ellipse) fit.

    geometry carries the centre, its standard uncertainty ``center_sigma_px``, ε and θ.
    ring_radius_px / ring_radius_sigma_px / ring_fwhm_px: undistorted ring radii (px) of
    the rings used. points: the last sector measurements (for a calibration's joint fit).
    """

    geometry: Geometry
    ellipticity_sigma: float
    ellipse_angle_sigma_deg: float
    ring_radius_px: np.ndarray
    ring_radius_sigma_px: np.ndarray
    ring_fwhm_px: np.ndarray
    rms_px: float
    n_iterations: int
    points: SectorPoints | None
    coarse: CoarseCenter | None = None
    min_radius_px: float = math.nan
    max_radius_px: float = math.nan
    flags: tuple[str, ...] = ()
    notes: tuple[str, ...] = field(default_factory=tuple)


def coarse_center(data: np.ndarray, mask: np.ndarray | None = None, *, target_px: int = 256) -> CoarseCenter:
    """Centre of point symmetry by masked FFT correlation of the image with its 180° rotation.

    Parameters
    ----------
    data : (ny, nx) array
        Pattern (counts).
    mask : bool array or None
        True where pixels are excluded.
    target_px : int
        The image is block-averaged to about this size first; the result is then
        good to a fraction of a block (about 1–2 px for 2048²).
    """
    from scipy import fft, ndimage

    valid = None if mask is None else ~mask
    block = max(1, int(math.ceil(max(data.shape) / target_px)))
    small, frac = block_mean(data, valid, block)
    w = (frac > 0.5).astype(np.float64)
    f = np.log1p(np.clip(small, 0, None).astype(np.float64))
    # high-pass so that rings, not the smooth diffuse falloff, set the peak
    wsm = ndimage.gaussian_filter(w, 4.0) + 1e-9
    f = (f - ndimage.gaussian_filter(f * w, 4.0) / wsm) * w
    shape = [2 * s for s in f.shape]
    ff = fft.rfft2(f, shape, workers=-1)
    fw = fft.rfft2(w, shape, workers=-1)
    f2 = fft.rfft2(f * f, shape, workers=-1)
    s_fg = fft.irfft2(ff * ff, shape, workers=-1)
    s_f = fft.irfft2(ff * fw, shape, workers=-1)
    s_ff = fft.irfft2(f2 * fw, shape, workers=-1)
    n = fft.irfft2(fw * fw, shape, workers=-1)
    n_min = 0.3 * w.sum()
    with np.errstate(invalid="ignore", divide="ignore"):
        num = s_fg - s_f * s_f / n
        den = s_ff - s_f * s_f / n
        ncc = np.where((n > n_min) & (den > 0), num / den, -1.0)
    iy, ix = np.unravel_index(int(np.argmax(ncc)), ncc.shape)
    dy = _parabolic_offset(ncc[iy - 1 : iy + 2, ix]) if 0 < iy < ncc.shape[0] - 1 else 0.0
    dx = _parabolic_offset(ncc[iy, ix - 1 : ix + 2]) if 0 < ix < ncc.shape[1] - 1 else 0.0
    cy_small, cx_small = (iy + dy) / 2.0, (ix + dx) / 2.0
    # a tile k of the block image has its centre at full-resolution k·block + (block − 1)/2
    return CoarseCenter(center_x_px=cx_small * block + (block - 1) / 2.0,
                        center_y_px=cy_small * block + (block - 1) / 2.0,
                        peak_correlation=float(ncc[iy, ix]), block_px=block)


@dataclass(frozen=True)
class FalloffCenter:
    """Centre of the diffuse falloff (x, y in px, may lie outside the image) and the fraction
    (0–1, weighted by gradient strength) of the image whose intensity gradient points at it."""

    center_x_px: float
    center_y_px: float
    agreement: float


def falloff_center(data: np.ndarray, mask: np.ndarray | None = None, *, target_px: int = 64) -> FalloffCenter:
    """Where the diffuse intensity (inelastic and small-angle scattering) comes from.

    The intensity of a diffraction pattern falls off with distance from the direct beam, so
    the gradient of the smoothed log-intensity points at the centre everywhere. The centre is
    the point nearest, in least squares, to the lines through every block along its gradient
    (weights: gradient strength), c = [Σ w (1 − n nᵀ)]⁻¹ Σ w (1 − n nᵀ) p. Unlike the
    point-symmetry centre it can lie outside the image, which is what it is used to tell.
    ``agreement`` is the weighted fraction of blocks whose gradient points within 30° of c
    (≈ 0.17 for an image without a falloff).
    """
    from scipy import ndimage

    valid = None if mask is None else ~mask
    block = max(1, int(math.ceil(max(data.shape) / target_px)))
    small, frac = block_mean(data, valid, block)
    good = frac > 0.5
    if good.sum() < 16:
        return FalloffCenter(math.nan, math.nan, 0.0)
    f = np.log1p(np.clip(small, 0, None).astype(np.float64))
    w = good.astype(np.float64)
    # zero outside the frame, so that the blocks near its edges (where a reflected image would
    # flatten the gradient) drop out by their coverage
    wsm = ndimage.gaussian_filter(w, 2.0, mode="constant")
    fs = ndimage.gaussian_filter(f * w, 2.0, mode="constant") / np.where(wsm > 0, wsm, 1.0)
    gy, gx = np.gradient(fs)
    mag = np.hypot(gx, gy)
    use = good & (wsm > 0.9) & (mag > 0)
    if use.sum() < 16:
        return FalloffCenter(math.nan, math.nan, 0.0)
    # uphill direction: towards the centre
    nx, ny = gx[use] / mag[use], gy[use] / mag[use]
    iy, ix = np.nonzero(use)
    px, py = ix * block + (block - 1) / 2.0, iy * block + (block - 1) / 2.0
    # strong gradients (ring flanks, the falloff near the beam) count most; noise on a flat
    # background points anywhere and is down-weighted by iterative reweighting on the distance
    # of each line from the current centre (Cauchy weights, scale: one tenth of the frame)
    strength = mag[use] ** 2
    scale = 0.1 * max(data.shape)
    wt = strength
    cx = cy = math.nan
    for _ in range(10):
        # projector onto the normal of each line: P = 1 − n nᵀ
        a11, a12, a22 = wt * (1 - nx * nx), -wt * nx * ny, wt * (1 - ny * ny)
        A = np.array([[a11.sum(), a12.sum()], [a12.sum(), a22.sum()]])
        b = np.array([(a11 * px + a12 * py).sum(), (a12 * px + a22 * py).sum()])
        if not np.linalg.cond(A) < 1e8:
            return FalloffCenter(math.nan, math.nan, 0.0)
        cx, cy = np.linalg.solve(A, b)
        line_distance = np.abs((cx - px) * ny - (cy - py) * nx)
        wt = strength / (1.0 + (line_distance / scale) ** 2)
    dx, dy = cx - px, cy - py
    dist = np.hypot(dx, dy)
    cos = (dx * nx + dy * ny) / np.where(dist > 0, dist, 1.0)
    agreement = float(strength[np.abs(cos) > math.cos(math.radians(30.0))].sum() / strength.sum())
    return FalloffCenter(float(cx), float(cy), agreement)


def _parabolic_offset(v) -> float:
    den = v[0] - 2 * v[1] + v[2]
    if not np.isfinite(den) or den >= 0:
        return 0.0
    return float(np.clip(0.5 * (v[0] - v[2]) / den, -0.5, 0.5))


def find_rings(radius_px: np.ndarray, values: np.ndarray, *, max_rings: int = 12, min_radius_px: float = 10.0,
               max_radius_px: float | None = None, significance: float = 8.0):
    """Find ring peaks in the radial profile of valid pixels.

    Returns (radius_px, fwhm_px, significance) arrays sorted by radius. Background is a
    morphological opening of the profile (60 px wide) smoothed to the same width; a
    peak must stand ``significance`` Poisson standard errors above it.
    """
    from scipy import ndimage, signal

    step = RADIAL_STEP_PX
    idx = (radius_px / step).astype(np.int64)
    n_bins = int(idx.max()) + 1 if idx.size else 1
    counts = np.bincount(idx, minlength=n_bins).astype(np.float64)
    sums = np.bincount(idx, weights=values, minlength=n_bins)
    r = (np.arange(n_bins) + 0.5) * step
    with np.errstate(invalid="ignore", divide="ignore"):
        prof = np.where(counts > 0, sums / counts, np.nan)
        coverage = counts / (2 * np.pi * np.maximum(r, step) * step)
    usable = np.isfinite(prof) & (coverage > 0.2) & (r >= min_radius_px)
    if max_radius_px is not None:
        usable &= r <= max_radius_px
    if usable.sum() < 20:
        return np.zeros(0), np.zeros(0), np.zeros(0)
    first, last = np.flatnonzero(usable)[[0, -1]]
    p = prof[first : last + 1].copy()
    ok = usable[first : last + 1]
    p[~ok] = np.interp(np.flatnonzero(~ok), np.flatnonzero(ok), p[ok]) if (~ok).any() else p[~ok]
    width = max(int(60 / step), 5)
    bg = ndimage.uniform_filter1d(ndimage.grey_opening(p, size=width, mode="nearest"), width, mode="nearest")
    bg = np.minimum(bg, p)
    resid = p - bg
    c = counts[first : last + 1]
    noise = np.sqrt(np.maximum(p, 1.0) / np.maximum(c, 1.0))
    # smooth a little (1 px) before the test so single-bin noise does not count
    sm = ndimage.uniform_filter1d(resid, 3)
    peaks, props = signal.find_peaks(sm, prominence=significance * noise / math.sqrt(3), distance=max(int(3 / step), 1),
                                     width=1)
    if peaks.size == 0:
        return np.zeros(0), np.zeros(0), np.zeros(0)
    sig = props["prominences"] / (noise[peaks] / math.sqrt(3))
    fwhm = signal.peak_widths(sm, peaks, rel_height=0.5)[0] * step
    keep = np.argsort(sig)[::-1][:max_rings]
    peaks, sig, fwhm = peaks[keep], sig[keep], fwhm[keep]
    order = np.argsort(peaks)
    return r[first + peaks[order]], np.maximum(fwhm[order], 1.0), sig[order]


def refine_geometry(data: np.ndarray, mask: np.ndarray | None, *, center_guess: tuple[float, float] | None = None,
                    ellipticity: float = 0.0, ellipse_angle_deg: float = 0.0, fit_ellipse: bool = True,
                    n_sectors: int = 36, max_rings: int = 12, min_radius_px: float | None = None,
                    max_iter: int = 10, tolerance_px: float = 0.01, path=None) -> GeometryFit:
    """Fine centre (and ε, θ when ``fit_ellipse``) from ring positions over azimuth sectors.

    Parameters
    ----------
    data : (ny, nx) array
        Pattern (counts).
    mask : bool array or None
        True where pixels are excluded.
    center_guess : (x, y) or None
        Start centre in px; None runs :func:`coarse_center` first.
    ellipticity, ellipse_angle_deg : float
        Distortion to start from (a sample passes its calibration's values and
        ``fit_ellipse=False`` to keep them).
    n_sectors : int
        Azimuth sectors per ring (36 → 10° each).

    Returns
    -------
    GeometryFit

    Raises
    ------
    RingidError
        When no ring can be found to centre on.
    """
    coarse = None
    if center_guess is None:
        coarse = coarse_center(data, mask)
        cx, cy = coarse.center_x_px, coarse.center_y_px
    else:
        cx, cy = map(float, center_guess)
    refinement = _GeometryRefinement(_Pixels.valid(data, mask), cx, cy, float(ellipticity), float(ellipse_angle_deg),
                                     fit_ellipse=fit_ellipse, n_sectors=n_sectors, max_rings=max_rings,
                                     min_radius_px=min_radius_px, max_iter=max_iter, tolerance_px=tolerance_px,
                                     path=path)
    refinement.run()
    return refinement.result(coarse)


@dataclass(frozen=True)
class _Pixels:
    """Flat list of pixels: row and column of each pixel centre (px) and its value (counts), all float32."""

    rows: np.ndarray
    cols: np.ndarray
    vals: np.ndarray

    @classmethod
    def valid(cls, data: np.ndarray, mask: np.ndarray | None) -> _Pixels:
        """The pixels of ``data`` not excluded by ``mask`` (True = excluded), in raster order."""
        _, nx = data.shape
        valid = np.ones(data.shape, bool) if mask is None else ~mask
        flat_idx = np.flatnonzero(valid.reshape(-1))
        return cls(rows=(flat_idx // nx).astype(np.float32), cols=(flat_idx % nx).astype(np.float32),
                   vals=data.reshape(-1)[flat_idx].astype(np.float32))

    def take(self, sel) -> _Pixels:
        """The pixels picked by an index array or slice ``sel``."""
        return _Pixels(rows=self.rows[sel], cols=self.cols[sel], vals=self.vals[sel])

    def offsets(self, cx: float, cy: float, eps: float, ang: float) -> tuple[np.ndarray, np.ndarray]:
        """Undistorted offsets (ux, uy) in px from the centre (cx, cy) px, for distortion ε and θ (deg)."""
        inv = undistortion_matrix(eps, ang).astype(np.float32)
        dx = self.cols - np.float32(cx)
        dy = self.rows - np.float32(cy)
        return inv[0, 0] * dx + inv[0, 1] * dy, inv[1, 0] * dx + inv[1, 1] * dy

    def radius(self, cx: float, cy: float, eps: float, ang: float) -> np.ndarray:
        """Undistorted radius (px) of each pixel, geometry as in :meth:`offsets`."""
        ux, uy = self.offsets(cx, cy, eps, ang)
        return np.sqrt(ux * ux + uy * uy)


class _GeometryRefinement:
    """The sector-fit iteration of :func:`refine_geometry`, with its state in plain attributes.

    Geometry: cx, cy (px), eps (ε), ang (θ, deg). Rings: ``radii`` and window widths
    ``ring_fwhm`` (undistorted px), found at the geometry ``detected_at``, and ``near``, the
    valid pixels near them. With more than 400 000 of those it iterates on every ``stride`` = 4th
    pixel until the centre moves less than ``phase_tol`` = 0.05 px, then on all of them; when
    the geometry has moved by more than 1.5 px since the rings were found (a poor start), they
    are found again at the new geometry (at most twice).
    """

    def __init__(self, pixels: _Pixels, cx: float, cy: float, eps: float, ang: float, *, fit_ellipse: bool,
                 n_sectors: int, max_rings: int, min_radius_px: float | None, max_iter: int, tolerance_px: float,
                 path):
        self.pixels = pixels
        self.cx, self.cy, self.eps, self.ang = cx, cy, eps, ang
        self.fit_ellipse, self.n_sectors, self.max_rings = fit_ellipse, n_sectors, max_rings
        self.max_iter, self.tolerance_px, self.path = max_iter, tolerance_px, path
        rad = pixels.radius(cx, cy, eps, ang)
        # rings are searched outside the beam (stop) and within the covered part of the image
        self.min_radius_px = _first_covered_radius(rad) + 8.0 if min_radius_px is None else float(min_radius_px)
        self.max_radius_px = _last_covered_radius(rad)
        self.n_detect = 0
        self.n_iter = 0
        self.fit = None
        self.points = None
        self._detect(rad)

    def _detect(self, rad: np.ndarray) -> None:
        """Find the rings in the radial profile of all pixels (undistorted radii ``rad``, px), keep the pixels near
        them and restart on every ``stride``-th of those."""
        ring_r, ring_fwhm, _ = find_rings(rad, self.pixels.vals, max_rings=self.max_rings,
                                          min_radius_px=self.min_radius_px)
        if ring_r.size == 0:
            raise RingidError(self.path, "no ring found to fit the centre on")
        # start with windows wide enough for a ring smeared by an uncorrected ellipse (ε up
        # to about 3 %), narrowed to the measured widths once the geometry has settled
        if self.fit_ellipse:
            ring_fwhm = np.maximum(ring_fwhm, 3.0 + 0.03 * ring_r)
        self.near = self.pixels.take(_near_rings(rad, ring_r, 3.0 * ring_fwhm + 6.0))
        self.ring_fwhm = ring_fwhm
        self.radii = ring_r.copy()
        self.detected_at = (self.cx, self.cy, self.eps, self.ang)
        self.n_detect += 1
        self.stride = 4 if self.near.vals.size > 400_000 else 1
        self.phase_tol = 0.05 if self.stride > 1 else self.tolerance_px

    def run(self) -> None:
        """Sector passes until the geometry moves less than the tolerance (or the passes run out)."""
        while self.n_iter < self.max_iter + 2 * (self.n_detect - 1):
            self.n_iter += 1
            moved, sigma_now = self._sector_pass()
            if self._drift() > 1.5 and self.n_detect < 3 and moved < 1.0:
                self._detect(self.pixels.radius(self.cx, self.cy, self.eps, self.ang))
                continue
            if self.stride > 1:
                if moved < self.phase_tol or self.n_iter >= self.max_iter - 2:
                    self._narrow_to_windows()
                continue
            if moved < max(self.tolerance_px, 0.3 * sigma_now):
                break

    def _sector_pass(self) -> tuple[float, float]:
        """Measure the rings in azimuth sectors, fit them jointly and move the geometry by the fit.

        Returns how far the geometry moved (px: the centre shift, or the ellipse change at the
        outermost ring if larger) and the centre's standard uncertainty (px).
        """
        px = self.near.take(slice(None, None, self.stride))
        geometry = Geometry(center_x_px=self.cx, center_y_px=self.cy, ellipticity=self.eps,
                            ellipse_angle_deg=self.ang)
        ux, uy = px.offsets(self.cx, self.cy, self.eps, self.ang)
        points, widths = _sector_points(ux, uy, px.vals, self.radii, self.ring_fwhm, self.n_sectors, geometry)
        del ux, uy
        n_used = np.unique(points.ring_index).size
        if points.radius_px.size < 6 + n_used:
            raise RingidError(self.path, "too few ring sectors with signal to fit the centre")
        fit = fit_sector_positions(points.ring_index, points.azimuth_rad, points.radius_px, points.sigma_px,
                                   self.radii.size, fit_distortion=self.fit_ellipse)
        self.fit, self.points = fit, points
        a = distortion_matrix(self.eps, self.ang)
        shift = a @ np.array([fit.delta_x_px, fit.delta_y_px])
        self.cx, self.cy = self.cx + float(shift[0]), self.cy + float(shift[1])
        if self.fit_ellipse:
            self.eps, self.ang = compose_distortion(self.eps, self.ang, fit.e1, fit.e2)
        fitted = np.isfinite(fit.ring_radius_px) & (fit.ring_radius_px > 0)
        self.radii = np.where(fitted, fit.ring_radius_px, self.radii)
        e_move = math.hypot(fit.e1, fit.e2) * float(self.radii.max())
        sigma_now = math.sqrt(max(0.5 * (fit.covariance[0, 0] + fit.covariance[1, 1]), 0.0))
        moved = max(math.hypot(*shift), e_move)
        # windows follow the ring widths measured in this pass when its geometry was within
        # 0.5 px of the result (before, an uncorrected ellipse smears a ring into a double horn)
        if moved < 0.5:
            self.ring_fwhm = np.where(np.isfinite(widths), np.clip(widths, 1.0, 3.0 * self.ring_fwhm),
                                      self.ring_fwhm)
        return moved, sigma_now

    def _drift(self) -> float:
        """How far (px) the geometry has moved since the rings were found: centre shift plus Δε times the
        outermost ring radius."""
        x0, y0, eps0, _ = self.detected_at
        return math.hypot(self.cx - x0, self.cy - y0) + abs(self.eps - eps0) * float(self.radii.max())

    def _narrow_to_windows(self) -> None:
        """Go on with every pixel, dropping those outside the ring windows, which have narrowed to the measured
        widths."""
        self.stride, self.phase_tol = 1, self.tolerance_px
        rad = self.near.radius(self.cx, self.cy, self.eps, self.ang)
        self.near = self.near.take(_near_rings(rad, self.radii, 3.0 * self.ring_fwhm + 6.0))

    def result(self, coarse: CoarseCenter | None) -> GeometryFit:
        """The geometry of the last pass with its uncertainties; rings with fewer than 3 usable sectors in that
        pass are dropped."""
        radii, ring_fwhm, points, fit = self.radii, self.ring_fwhm, self.points, self.fit
        flags: list[str] = []
        if radii.size < 2:
            flags.append("single_ring_center")
        n_pts = np.bincount(points.ring_index, minlength=radii.size)
        keep_rings = n_pts >= 3
        if not keep_rings.all():
            remap = np.cumsum(keep_rings) - 1
            sel_pts = keep_rings[points.ring_index]
            points = SectorPoints(geometry=points.geometry, ring_index=remap[points.ring_index[sel_pts]],
                                  azimuth_rad=points.azimuth_rad[sel_pts], radius_px=points.radius_px[sel_pts],
                                  sigma_px=points.sigma_px[sel_pts])
            radii, ring_fwhm = radii[keep_rings], ring_fwhm[keep_rings]
            ring_sigma = fit.ring_radius_sigma_px[keep_rings]
        else:
            ring_sigma = fit.ring_radius_sigma_px
        cov = fit.covariance
        center_sigma = math.sqrt(max(0.5 * (cov[0, 0] + cov[1, 1]), 0.0))
        eps, eps_sigma, ang_sigma = self.eps, float("nan"), float("nan")
        if self.fit_ellipse:
            # ε ≈ 2·|e| to first order, θ = atan2(e₂, e₁)/2 in the current frame
            e_sig = math.sqrt(max(0.5 * (cov[2, 2] + cov[3, 3]), 0.0))
            eps_sigma = 2.0 * e_sig
            ang_sigma = math.degrees(e_sig / max(eps, e_sig)) / 2.0 if eps > 0 else float("nan")
        geometry = Geometry(center_x_px=self.cx, center_y_px=self.cy, ellipticity=eps, ellipse_angle_deg=self.ang,
                            center_sigma_px=center_sigma)
        return GeometryFit(geometry=geometry, ellipticity_sigma=eps_sigma, ellipse_angle_sigma_deg=ang_sigma,
                           ring_radius_px=radii, ring_radius_sigma_px=ring_sigma, ring_fwhm_px=ring_fwhm,
                           rms_px=fit.rms_px, n_iterations=self.n_iter, points=points, coarse=coarse,
                           min_radius_px=float(self.min_radius_px), max_radius_px=self.max_radius_px,
                           flags=tuple(flags))


def _near_rings(rad: np.ndarray, radii: np.ndarray, margin: np.ndarray) -> np.ndarray:
    """Indices of the entries of ``rad`` within ``margin`` of a ring radius (a look-up table, not a loop)."""
    lut_n = int((radii.max() + margin.max()) / RADIAL_STEP_PX) + 2
    lut = np.zeros(lut_n, bool)
    for rk, mk in zip(radii, margin):
        lut[int(max(rk - mk, 0) / RADIAL_STEP_PX) : int((rk + mk) / RADIAL_STEP_PX) + 1] = True
    return np.flatnonzero(lut[np.minimum((rad / RADIAL_STEP_PX).astype(np.int64), lut_n - 1)])


def _first_covered_radius(rad: np.ndarray) -> float:
    """Smallest radius beyond which at least half of each 2 px annulus is valid (outside beam stop/beam)."""
    step = 2.0
    idx = (rad / step).astype(np.int64)
    counts = np.bincount(idx)
    r = (np.arange(counts.size) + 0.5) * step
    coverage = counts / (2 * np.pi * r * step)
    good = coverage > 0.5
    # first radius from which the next 5 annuli are all covered
    for i in range(good.size - 5):
        if good[i : i + 5].all():
            return float(r[i])
    return 0.0


def _last_covered_radius(rad: np.ndarray, coverage_min: float = 0.3) -> float:
    """Largest radius whose 2 px annulus is still at least ``coverage_min`` inside the valid image."""
    step = 2.0
    counts = np.bincount((rad / step).astype(np.int64))
    r = (np.arange(counts.size) + 0.5) * step
    good = np.flatnonzero(counts / (2 * np.pi * r * step) >= coverage_min)
    return float(r[good[-1]]) if good.size else 0.0


@dataclass(frozen=True)
class _RingWindows:
    """Radial window of each ring for the sector measurement, on the SECTOR_STEP_PX grid.

    half: window half-width (px), 3 FWHM but never past half-way to a neighbouring ring, at least 2 px;
    n_bins: radial bins of the widest window; ring_bins: bins inside each ring's own window; edge_bins:
    bins at each end of a window that measure the background (a fifth of the window, at least 2).
    """

    half: np.ndarray
    n_bins: int
    ring_bins: np.ndarray
    edge_bins: np.ndarray

    @classmethod
    def around(cls, radii: np.ndarray, fwhm: np.ndarray) -> _RingWindows:
        """Windows around the ring radii ``radii`` with widths ``fwhm`` (undistorted px)."""
        gaps = np.diff(radii)
        left_gap = np.concatenate([[np.inf], gaps])
        right_gap = np.concatenate([gaps, [np.inf]])
        half = np.minimum(3.0 * fwhm, 0.5 * np.minimum(left_gap, right_gap))
        half = np.maximum(half, 2.0)
        n_bins = int(math.ceil(2 * half.max() / SECTOR_STEP_PX)) + 1
        ring_bins = np.ceil(2 * half / SECTOR_STEP_PX).astype(int)
        edge_bins = np.maximum((0.2 * ring_bins).astype(int), 2)
        return cls(half=half, n_bins=n_bins, ring_bins=ring_bins, edge_bins=edge_bins)


@dataclass(frozen=True)
class _SectorBins:
    """Pixels binned by (ring, azimuth sector, radial bin): arrays of shape (n_rings, n_sectors, n_bins).

    count: pixels per bin; total: sum of their values (counts); mean: mean value; radius: mean undistorted
    radius of the pixels (px, exact, not the bin centre); variance: Poisson variance of the mean (counts²).
    mean, radius and variance are NaN in empty bins.
    """

    count: np.ndarray
    total: np.ndarray
    mean: np.ndarray
    radius: np.ndarray
    variance: np.ndarray


def _sector_bins(ux, uy, vals, radii, windows: _RingWindows, n_sectors: int) -> _SectorBins:
    """Bin the pixels at undistorted offsets (ux, uy) (px) with values ``vals`` into the ring windows, split
    into ``n_sectors`` azimuth sectors from −π; pixels outside every window are left out (a look-up table on
    the radius, then one bincount per sum)."""
    n_rings = radii.size
    half, n_b, step = windows.half, windows.n_bins, SECTOR_STEP_PX
    rad = np.sqrt(ux * ux + uy * uy)
    lut_n = int((radii.max() + half.max()) / step) + 2
    lut = np.full(lut_n, -1, np.int32)
    for k in range(n_rings):
        lo = int(max((radii[k] - half[k]) / step, 0))
        hi = int(min((radii[k] + half[k]) / step, lut_n - 1))
        lut[lo : hi + 1] = k
    ri = np.minimum((rad / step).astype(np.int64), lut_n - 1)
    ring = lut[ri]
    inside = np.flatnonzero(ring >= 0)
    ring = ring[inside].astype(np.int64)
    rad_in = rad[inside]
    rel = rad_in - (radii[ring] - half[ring])
    b = (rel / step).astype(np.int64)
    ok = (b >= 0) & (b < n_b)
    inside, ring, b, rad_in = inside[ok], ring[ok], b[ok], rad_in[ok]
    psi = np.arctan2(uy[inside], ux[inside])
    s = ((psi + np.pi) * (n_sectors / (2 * np.pi))).astype(np.int64) % n_sectors
    key = (ring * n_sectors + s) * n_b + b
    size = n_rings * n_sectors * n_b
    cnt = np.bincount(key, minlength=size).reshape(n_rings, n_sectors, n_b)
    tot = np.bincount(key, weights=vals[inside], minlength=size).reshape(n_rings, n_sectors, n_b)
    rsum = np.bincount(key, weights=rad_in, minlength=size).reshape(n_rings, n_sectors, n_b)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = tot / cnt
        rpos = rsum / cnt
        var = np.maximum(mean, 1.0) / cnt
    return _SectorBins(count=cnt, total=tot, mean=mean, radius=rpos, variance=var)


def _masked_mean(a: np.ndarray, m: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean over the last axis of the finite entries of ``a`` (n_rings, n_sectors, n_bins) in the bins ``m``
    (n_rings, n_bins), and how many there were."""
    m3 = np.broadcast_to(m[:, None, :], a.shape) & np.isfinite(a)
    num = np.where(m3, a, 0).sum(-1)
    den = m3.sum(-1)
    return num / np.maximum(den, 1), den


def _sector_centroids(bins: _SectorBins, radii, fwhm, windows: _RingWindows, n_sectors: int,
                      geometry: Geometry) -> SectorPoints:
    """Centroid (px) of each ring in each sector above a linear background through the window's edge bins,
    over the core within 1.5 FWHM of the ring radius; kept when the core is complete, the peak area exceeds
    5 σ and the centroid lies inside the core."""
    half, step = windows.half, SECTOR_STEP_PX
    bin_no = np.arange(windows.n_bins)
    nb_ring, edge_n = windows.ring_bins, windows.edge_bins
    in_win = bin_no[None, :] < nb_ring[:, None]  # (n_rings, n_b)
    left = in_win & (bin_no[None, :] < edge_n[:, None])
    right = in_win & (bin_no[None, :] >= (nb_ring - edge_n)[:, None])
    cen_half = np.minimum(1.5 * fwhm, half)
    r_lo = (radii - half)[:, None]
    rcent = r_lo + (bin_no[None, :] + 0.5) * step  # (n_rings, n_b) nominal bin centres
    core = np.abs(rcent - radii[:, None]) <= cen_half[:, None]

    mean, rpos, var = bins.mean, bins.radius, bins.variance
    yl, nl = _masked_mean(mean, left)
    yr, nr = _masked_mean(mean, right)
    xl, _ = _masked_mean(rpos, left)
    xr, _ = _masked_mean(rpos, right)
    slope = (yr - yl) / np.where(xr - xl != 0, xr - xl, 1.0)
    background = yl[..., None] + slope[..., None] * (rpos - xl[..., None])
    y = mean - background
    core3 = np.broadcast_to(core[:, None, :], y.shape)
    have = core3 & np.isfinite(y)
    yw = np.where(have, y, 0.0)
    # centroid of the background-subtracted core; negative excursions kept (unbiased for noise)
    r0 = radii[:, None, None]
    dr = np.where(have, rpos - r0, 0.0)
    area = yw.sum(-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        centroid = (yw * dr).sum(-1) / area
        var_c = (np.where(have, var, 0.0) * (dr - centroid[..., None]) ** 2).sum(-1) / area**2
        area_sig = np.sqrt(np.where(have, var, 0.0).sum(-1))
    complete = have.sum(-1) >= 0.9 * core.sum(-1)[:, None]
    good = complete & (nl > 0) & (nr > 0) & (area > 5.0 * area_sig) & np.isfinite(centroid) & (var_c > 0)
    good &= np.abs(centroid) < cen_half[:, None]
    k_idx, s_idx = np.nonzero(good)
    psi_c = -np.pi + (s_idx + 0.5) * (2 * np.pi / n_sectors)
    return SectorPoints(geometry=geometry, ring_index=k_idx, azimuth_rad=psi_c,
                        radius_px=radii[k_idx] + centroid[k_idx, s_idx],
                        sigma_px=np.sqrt(var_c[k_idx, s_idx]))


def _ring_widths(bins: _SectorBins, windows: _RingWindows) -> np.ndarray:
    """FWHM (px) of each ring in the all-sector profile of its window: the half-maximum width above a linear
    background through the edge bins, interpolated between bins; NaN when the profile has no positive peak,
    does not fall to half maximum inside the window, or has fewer than 6 bins with pixels."""
    with np.errstate(invalid="ignore", divide="ignore"):
        prof = bins.total.sum(1) / bins.count.sum(1)
    n_rings = prof.shape[0]
    widths = np.full(n_rings, np.nan)
    for k in range(n_rings):
        y = prof[k, : windows.ring_bins[k]]
        fin = np.isfinite(y)
        if fin.sum() < 6:
            continue
        if not fin.all():  # an empty edge bin (the window is cut on the 0.25 px grid)
            y = np.interp(np.arange(y.size), np.flatnonzero(fin), y[fin])
        e = windows.edge_bins[k]
        base = np.linspace(y[:e].mean(), y[-e:].mean(), y.size)
        z = y - base
        i0 = int(np.argmax(z))
        half_max = 0.5 * z[i0]
        if half_max <= 0:
            continue
        lo = i0
        while lo > 0 and z[lo - 1] > half_max:
            lo -= 1
        hi = i0
        while hi < z.size - 1 and z[hi + 1] > half_max:
            hi += 1
        if lo == 0 or hi == z.size - 1:
            continue
        left = lo - (z[lo] - half_max) / (z[lo] - z[lo - 1])
        right = hi + (z[hi] - half_max) / (z[hi] - z[hi + 1])
        widths[k] = (right - left) * SECTOR_STEP_PX
    return widths


def _sector_points(ux, uy, vals, radii, fwhm, n_sectors, geometry) -> tuple[SectorPoints, np.ndarray]:
    """Background-subtracted centroid of each ring in each azimuth sector (vectorised over all of them), and
    each ring's FWHM in this frame (px, NaN where not measured).

    ux, uy: pixel offsets from the centre in the undistorted frame of ``geometry`` (px); vals: their values
    (counts); radii, fwhm: ring radii and widths (undistorted px).
    """
    windows = _RingWindows.around(radii, fwhm)
    bins = _sector_bins(ux, uy, vals, radii, windows, n_sectors)
    points = _sector_centroids(bins, radii, fwhm, windows, n_sectors, geometry)
    return points, _ring_widths(bins, windows)


def refine_sample_center(data: np.ndarray, mask: np.ndarray | None, calibration: Geometry, *,
                         center_guess: tuple[float, float] | None = None, n_sectors: int = 36,
                         disagreement_sigma: float = 4.0, disagreement_abs: float = 0.002, path=None) -> GeometryFit:
    """Centre of a sample pattern at its calibration's ε and θ, with a check of its own ellipse.

    Beam shifts move the centre, not the lens distortion, so the sample keeps the
    calibration's ε and θ and only its centre is refined. A residual ellipse is then
    fitted (one linear least-squares step) to the final sector positions, which were
    measured in the calibration's undistorted frame; when the ε difference it implies
    exceeds ``disagreement_sigma`` standard uncertainties and ``disagreement_abs``
    (absolute), the flag ``ellipticity_disagrees_with_calibration`` is set. The
    sample's own ε and θ are given in the notes either way.
    """
    fixed = refine_geometry(data, mask, center_guess=center_guess, ellipticity=calibration.ellipticity,
                            ellipse_angle_deg=calibration.ellipse_angle_deg, fit_ellipse=False,
                            n_sectors=n_sectors, path=path)
    flags = list(fixed.flags)
    notes = list(fixed.notes)
    g = fixed.geometry
    pts = fixed.points
    # the sample's own ellipse: one linearised fit of a residual ellipse to the final sector
    # points, which were measured in the calibration's undistorted frame
    if pts is not None and np.unique(pts.ring_index).size >= 2:
        free = fit_sector_positions(pts.ring_index, pts.azimuth_rad, pts.radius_px, pts.sigma_px,
                                    fixed.ring_radius_px.size, fit_distortion=True)
        own_eps, own_ang = compose_distortion(calibration.ellipticity, calibration.ellipse_angle_deg, free.e1, free.e2)
        # residual ellipse |(e₁, e₂)| ≈ Δε/2 whatever the angle
        diff = 2.0 * math.hypot(free.e1, free.e2)
        e_sig = 2.0 * math.sqrt(max(0.5 * (free.covariance[2, 2] + free.covariance[3, 3]), 0.0))
        notes.append(f"own ellipse fit: ellipticity {own_eps:.5f} at {own_ang:.1f} deg "
                     f"(calibration {calibration.ellipticity:.5f} at {calibration.ellipse_angle_deg:.1f} deg)")
        if diff > disagreement_abs and diff > disagreement_sigma * e_sig:
            flags.append("ellipticity_disagrees_with_calibration")
    return GeometryFit(geometry=g, ellipticity_sigma=float("nan"), ellipse_angle_sigma_deg=float("nan"),
                       ring_radius_px=fixed.ring_radius_px, ring_radius_sigma_px=fixed.ring_radius_sigma_px,
                       ring_fwhm_px=fixed.ring_fwhm_px, rms_px=fixed.rms_px, n_iterations=fixed.n_iterations,
                       points=fixed.points, coarse=fixed.coarse, min_radius_px=fixed.min_radius_px,
                       max_radius_px=fixed.max_radius_px, flags=tuple(flags), notes=tuple(notes))
