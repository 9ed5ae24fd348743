"""Camera-constant calibration from a pattern of a standard film (e.g. evaporated Au).

Steps: load and mask the image; fit the centre and ellipse on its rings
(:func:`ringid.image.center.refine_geometry`); assign the observed rings to the
standard's reflections; fit K, centre, ε, θ and the third-order radial distortion k₃
(:mod:`ringid.image.radial`, kept when significant) jointly by least squares on the
ring positions measured in azimuth sectors; integrate the profile at the result
and fit each assigned ring's width to give the instrumental FWHM as a line in g.

Ring assignment: every pairing of an observed ring radius R_k with a standard
d-spacing d_j proposes K = R_k·d_j (within ±15 % of a nominal K when one is given,
otherwise all). Each proposal is scored by how many observed rings fall within
0.5 % of a standard ring, minus the unexplained observed rings, minus the strong
standard rings that should lie in the observed radius range but were not seen
(this rejects sub-multiples such as K/2, which maps 111, 200, … onto 222, 400, …).
The standard's list comes either from the phase library or, as an outside check,
from pyFAI's calibrant tables (plain arrays of d and relative intensity).

The standard's own lattice parameter sets the accuracy ceiling: a strained or
alloyed film shifts K by the same relative amount (docs/design.md).
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field

import numpy as np

from ringid.core.errors import RingidError
from ringid.core.model import Geometry, InstrumentProfile, Profile
from ringid.core.records import CalibrationRecord, CalibrationRing, write_calibration_record
from ringid.core.units import electron_wavelength_angstrom
from ringid.image.radial import distorted_radius, undistort_radius

MATCH_TOLERANCE = 0.005  # relative radius tolerance for a ring to count as assigned
NOMINAL_WINDOW = 0.15  # a nominal K is trusted to ±15 %
STRONG_FRACTION = 0.2  # standard rings at ≥ 20 % of the strongest must be seen when in range
MIN_ASSIGNED_RINGS = 3


@dataclass(frozen=True)
class RingAssignment:
    """Observed ring k assigned to standard ring j (indices into the inputs), and the K proposal."""

    camera_constant_A_px: float
    observed_index: np.ndarray
    standard_index: np.ndarray
    score: float
    unassigned_observed: np.ndarray


@dataclass(frozen=True)
class Calibration:
    """Result of a calibration (its file is :meth:`record`, a :class:`ringid.core.records.CalibrationRecord`).

    geometry: K (Å·px), centre, ε, θ, radial distortion k₃ (0 when not significant), voltage.
    Sigmas are standard uncertainties from the least-squares covariance scaled by the residual
    scatter (σ(k₃) is given even when k₃ is recorded as 0: see :func:`fit_camera_constant`).
    ring_* arrays are per assigned ring. FWHM line: fwhm_per_nm = fwhm_c0_per_nm + fwhm_c1 · g_per_nm.
    """

    geometry: Geometry
    camera_constant_sigma_A_px: float
    ellipticity_sigma: float
    ellipse_angle_sigma_deg: float
    ring_hkl: tuple[str, ...]
    ring_d_calc_angstrom: np.ndarray
    ring_g_obs_per_nm: np.ndarray
    ring_g_sigma_per_nm: np.ndarray
    ring_fwhm_per_nm: np.ndarray
    fwhm_c0_per_nm: float
    fwhm_c1: float
    unassigned_g_per_nm: np.ndarray
    standard: str = ""
    standard_source: str = ""
    image: str = ""
    instrument_eta: float = 0.5  # pseudo-Voigt mixing η of the standard's rings (median)
    radial_distortion_k3_sigma_per_px2: float = math.nan
    flags: tuple[str, ...] = ()
    notes: tuple[str, ...] = field(default_factory=tuple)
    # the standard's azimuthal profile at the fitted geometry (for the figure; not in the record)
    profile: Profile | None = field(default=None, compare=False, repr=False)

    @property
    def ring_g_calc_per_nm(self) -> np.ndarray:
        return 10.0 / self.ring_d_calc_angstrom

    def instrument_fwhm_per_nm(self, g_per_nm):
        """Instrumental ring FWHM (1/nm) at g (1/nm), from the fitted line."""
        return self.fwhm_c0_per_nm + self.fwhm_c1 * np.asarray(g_per_nm, dtype=float)

    def record(self, *, calibration: str = "", pixel_size_um: float | None = None,
               nominal_camera_constant_A_px: float | None = None) -> CalibrationRecord:
        """The calibration record of this fit (``calibration`` is the sheet's id; ``pixel_size_um``
        gives the camera length L = K·p/λ)."""
        g = self.geometry
        wavelength = electron_wavelength_angstrom(g.voltage_kv)
        resid = 100.0 * (self.ring_g_obs_per_nm - self.ring_g_calc_per_nm) / self.ring_g_calc_per_nm
        rings = tuple(
            CalibrationRing(hkl=h, d_calc_angstrom=float(dc), g_calc_per_nm=float(10.0 / dc), g_obs_per_nm=float(go),
                            g_sigma_per_nm=float(gs), d_obs_angstrom=float(10.0 / go), residual_percent=float(r),
                            fwhm_per_nm=float(fw))
            for h, dc, go, gs, r, fw in zip(self.ring_hkl, self.ring_d_calc_angstrom, self.ring_g_obs_per_nm,
                                            self.ring_g_sigma_per_nm, resid, self.ring_fwhm_per_nm)
        )
        instrument = InstrumentProfile(self.fwhm_c0_per_nm, self.fwhm_c1, self.instrument_eta,
                                       float(np.min(self.ring_g_obs_per_nm)), float(np.max(self.ring_g_obs_per_nm)))
        return CalibrationRecord(
            calibration=calibration, kind="standard", voltage_kv=g.voltage_kv,
            camera_constant_A_px=g.camera_constant_A_px, camera_constant_sigma_A_px=self.camera_constant_sigma_A_px,
            center_x_px=g.center_x_px, center_y_px=g.center_y_px, center_sigma_px=g.center_sigma_px,
            ellipticity=g.ellipticity, ellipticity_sigma=self.ellipticity_sigma,
            ellipse_angle_deg=g.ellipse_angle_deg, ellipse_angle_sigma_deg=self.ellipse_angle_sigma_deg,
            radial_distortion_k3_per_px2=g.radial_distortion_k3_per_px2,
            radial_distortion_k3_sigma_per_px2=_finite_or_none(self.radial_distortion_k3_sigma_per_px2),
            wavelength_angstrom=wavelength, standard=self.standard, standard_source=self.standard_source,
            image=self.image, nominal_camera_constant_A_px=nominal_camera_constant_A_px,
            camera_length_mm=g.camera_constant_A_px * pixel_size_um * 1e-3 / wavelength if pixel_size_um else None,
            pixel_size_um=pixel_size_um, n_rings_assigned=int(self.ring_d_calc_angstrom.size),
            rms_residual_percent=float(np.sqrt(np.mean(resid**2))), rings=rings, instrument=instrument,
            unassigned_rings_g_per_nm=tuple(float(x) for x in self.unassigned_g_per_nm),
            flags=tuple(self.flags), notes=tuple(self.notes),
        )


def _finite_or_none(x: float) -> float | None:
    return float(x) if math.isfinite(x) else None


def assign_rings(radius_px, standard_d_angstrom, standard_intensity=None, *,
                 nominal_camera_constant_A_px: float | None = None, search_min_radius_px: float = 0.0,
                 search_max_radius_px: float | None = None, tolerance: float = MATCH_TOLERANCE) -> RingAssignment:
    """Assign observed ring radii (px) to a standard's d-spacings (Å) and propose K (Å·px).

    See the module docstring for the scoring. ``search_min_radius_px`` and
    ``search_max_radius_px`` bound where a ring could have been seen (beam stop,
    image edge); a strong standard ring predicted inside them but not observed
    counts against a proposal.
    """
    r = np.asarray(radius_px, dtype=float)
    d = np.asarray(standard_d_angstrom, dtype=float)
    inten = np.ones_like(d) if standard_intensity is None else np.asarray(standard_intensity, dtype=float)
    use = (d > 0) & (inten > 0)
    d_use, i_use = d[use], inten[use]
    idx_use = np.flatnonzero(use)
    if r.size == 0 or d_use.size == 0:
        return RingAssignment(math.nan, np.zeros(0, int), np.zeros(0, int), -math.inf, np.arange(r.size))
    strong = i_use >= STRONG_FRACTION * i_use.max()
    r_hi = search_max_radius_px if search_max_radius_px is not None else r.max() * 1.02
    proposals = (r[:, None] * d_use[None, :]).ravel()
    if nominal_camera_constant_A_px:
        k0 = float(nominal_camera_constant_A_px)
        proposals = proposals[np.abs(proposals / k0 - 1.0) <= NOMINAL_WINDOW]
    best = None
    for k in np.unique(np.round(proposals, 6)):
        for _ in range(2):  # score, refine K on the matched rings, score again
            pred = k / d_use  # predicted radii
            j = np.argmin(np.abs(r[:, None] - pred[None, :]), axis=1)
            rel = np.abs(r - pred[j]) / pred[j]
            ok = rel < tolerance
            # one observed ring per standard ring: keep the closest
            for jj in np.unique(j[ok]):
                dup = np.flatnonzero(ok & (j == jj))
                if dup.size > 1:
                    ok[dup[dup != dup[np.argmin(rel[dup])]]] = False
            if ok.sum() == 0:
                break
            g = 1.0 / d_use[j[ok]]
            k = float(np.sum(r[ok] * g) / np.sum(g * g))
        if ok.sum() == 0:
            continue
        pred = k / d_use
        seen = np.zeros(d_use.size, bool)
        seen[j[ok]] = True
        in_range = (pred >= search_min_radius_px) & (pred <= r_hi)
        missing = strong & in_range & ~seen
        score = ok.sum() - 0.5 * (~ok).sum() - 1.0 * missing.sum()
        rms = float(np.sqrt(np.mean(rel[ok] ** 2)))
        key = (score, -rms)
        if best is None or key > best[0]:
            best = (key, k, np.flatnonzero(ok), idx_use[j[ok]], np.flatnonzero(~ok))
    if best is None:
        return RingAssignment(math.nan, np.zeros(0, int), np.zeros(0, int), -math.inf, np.arange(r.size))
    (score, _), k, obs, std, unassigned = best
    return RingAssignment(camera_constant_A_px=k, observed_index=obs, standard_index=std, score=float(score),
                          unassigned_observed=unassigned)


def fit_camera_constant(points, ring_standard_g_per_A, geometry: Geometry, camera_constant_A_px: float, *,
                        fit_ellipse: bool = True, fit_radial: bool = True):
    """Joint least squares of K, centre, ε, θ and the radial distortion k₃ on sector points of assigned rings.

    Parameters
    ----------
    points : ringid.image.center.SectorPoints
        Sector measurements; points.ring_index refers to ``ring_standard_g_per_A``
        entries (1/d in 1/Å of the standard ring each observed ring is assigned to;
        NaN for rings not assigned, whose points are left out).
    geometry : Geometry
        Starting centre and ellipse.
    fit_radial : bool
        Also fit the third-order radial distortion k₃ (kept only when significant, see Notes).

    Returns
    -------
    (Geometry, sigmas dict, residuals_px array, used bool array)

    Notes
    -----
    Residual per point: (|A⁻¹(p − c)| − f(K·g_j))/σ, f(R) = R(1 + k₃R²) (:mod:`ringid.image.radial`),
    with ε and θ parametrised as (ε cos 2θ, ε sin 2θ) so that small ε has no angle singularity, and
    k₃ as κ = k₃·R_ref², the fractional distortion at R_ref = K₀·max g_j (the outermost assigned ring
    at the starting K): κ is of order 10⁻³ like ε, not 10⁻⁹ px⁻², and the normal matrix stays well
    conditioned. Two passes: points beyond 4 robust standard deviations are dropped after the first.

    The fit without k₃ is made first and, with ``fit_radial``, again with k₃ free (its own two
    passes: an uncorrected pincushion would otherwise drop the outer rings as outliers). k₃ is kept
    when |k₃| > 3σ(k₃) (RADIAL_SIGNIFICANCE): with no radial distortion an estimate that large
    arises by chance in 0.3 % of calibrations (normal errors), and a smaller one cannot be told from
    zero, while applying it would add its own noise to every sample's d-spacings at large g. Below
    the threshold the fit without k₃ is returned unchanged, with k₃ = 0 and the σ(k₃) of the free fit,
    which bounds what is left uncorrected: about 3σ(k₃)·R² relative at radius R. σ(k₃) is the larger
    of the point-level value and the value from the ring means (see :func:`_ring_level_k3_sigma`).
    """
    x, y = points.pixel_positions()
    g_std = np.asarray(ring_standard_g_per_A, dtype=float)[points.ring_index]
    use = np.isfinite(g_std)
    x, y, g_std, sig = x[use], y[use], g_std[use], points.sigma_px[use]
    ring = points.ring_index[use]

    e0 = geometry.ellipticity
    t0 = math.radians(2 * geometry.ellipse_angle_deg)
    p0 = np.array([camera_constant_A_px, geometry.center_x_px, geometry.center_y_px,
                   e0 * math.cos(t0), e0 * math.sin(t0), 0.0])
    r_ref = float(camera_constant_A_px * np.max(g_std)) if g_std.size else math.nan
    fit = _JointFit(x, y, g_std, sig, p0, r_ref, geometry.ellipticity, geometry.ellipse_angle_deg,
                    fit_ellipse=fit_ellipse)
    plain = fit.solve(radial=False)
    sig_k3 = math.nan
    chosen = plain
    if fit_radial and np.unique(ring).size >= 3:
        radial = fit.solve(radial=True)
        k3, sig_k3_points = radial.k3_per_px2, radial.k3_sigma_per_px2
        sig_k3 = max(sig_k3_points, _ring_level_k3_sigma(radial, ring, g_std))
        if math.isfinite(sig_k3) and abs(k3) > RADIAL_SIGNIFICANCE * sig_k3:
            chosen = radial
    k, cx, cy, eps, ang = fit.unpack(chosen.p_full)
    cov = chosen.cov
    sig_k = math.sqrt(max(cov[0, 0], 0))
    sig_c = math.sqrt(max(0.5 * (cov[1, 1] + cov[2, 2]), 0))
    sig_e, sig_a = _ellipse_sigmas(chosen.p_full[3:5], cov[3:5, 3:5], eps) if fit_ellipse else (math.nan, math.nan)
    geom = Geometry(center_x_px=cx, center_y_px=cy, ellipticity=eps, ellipse_angle_deg=(ang + 90.0) % 180.0 - 90.0,
                    camera_constant_A_px=k, voltage_kv=geometry.voltage_kv, center_sigma_px=sig_c,
                    radial_distortion_k3_per_px2=chosen.k3_per_px2)
    resid_px = chosen.residual_px
    sigmas = {"camera_constant": sig_k, "ellipticity": sig_e, "ellipse_angle_deg": sig_a,
              "radial_distortion_k3": sig_k3}
    return geom, sigmas, resid_px, chosen.keep


RADIAL_SIGNIFICANCE = 3.0  # k₃ is kept when |k₃| exceeds this many standard uncertainties


@dataclass(frozen=True)
class _JointSolution:
    """One joint fit: full parameter vector (K, cx, cy, ε cos 2θ, ε sin 2θ, κ), covariance of the free
    parameters in that order (κ last when fitted), kept points, reduced χ², whether κ was free, k₃ and its
    point-level σ (1/px²), and every point's radial residual and σ (px)."""

    p_full: np.ndarray
    cov: np.ndarray
    keep: np.ndarray
    chi2: float
    radial: bool
    k3_per_px2: float
    k3_sigma_per_px2: float
    residual_px: np.ndarray
    sigma_px: np.ndarray


class _JointFit:
    """The least squares of :func:`fit_camera_constant` on sector points at pixel positions (x, y) of rings
    with standard g (1/Å) ``g_std`` and radial σ ``sig`` (px); ``r_ref`` (px) scales κ = k₃·r_ref²."""

    def __init__(self, x, y, g_std, sig, p0, r_ref, eps_fixed, ang_fixed, *, fit_ellipse: bool):
        self.x, self.y, self.g_std, self.sig, self.p0 = x, y, g_std, sig, p0
        self.r_ref, self.eps_fixed, self.ang_fixed, self.fit_ellipse = r_ref, eps_fixed, ang_fixed, fit_ellipse

    def unpack(self, p):
        eps = math.hypot(p[3], p[4]) if self.fit_ellipse else self.eps_fixed
        ang = 0.5 * math.degrees(math.atan2(p[4], p[3])) if self.fit_ellipse else self.ang_fixed
        return p[0], p[1], p[2], min(eps, 0.5), ang

    def residual(self, p, keep, radial: bool):
        k, cx, cy, eps, ang = self.unpack(p)
        t = math.radians(ang)
        c, s = math.cos(t), math.sin(t)
        root = math.sqrt(1.0 - eps)
        dx, dy = self.x[keep] - cx, self.y[keep] - cy
        along = c * dx + s * dy
        across = -s * dx + c * dy
        r = np.hypot(along * root, across / root)
        model = k * self.g_std[keep]
        if radial:
            model = model * (1.0 + p[5] * (model / self.r_ref) ** 2)
        return (r - model) / self.sig[keep]

    def solve(self, *, radial: bool) -> _JointSolution:
        from scipy.optimize import least_squares

        free = [0, 1, 2] + ([3, 4] if self.fit_ellipse else []) + ([5] if radial else [])
        n_par = len(free)
        x_all = np.ones(self.x.size, bool)

        def full(p):
            out = self.p0.copy()
            out[free] = p
            return out

        keep = x_all
        for _ in range(2):
            sol = least_squares(lambda p: self.residual(full(p), keep, radial), self.p0[free], method="lm",
                                x_scale="jac")
            res_all = self.residual(full(sol.x), x_all, radial)
            scale = 1.4826 * np.median(np.abs(res_all[keep]))
            new_keep = np.abs(res_all) < 4.0 * max(scale, 1e-12)
            if np.array_equal(new_keep, keep):
                break
            keep = new_keep
        dof = max(keep.sum() - n_par, 1)
        chi2 = float(np.sum(sol.fun**2)) / dof
        cov = np.linalg.pinv(sol.jac.T @ sol.jac) * chi2
        p_full = full(sol.x)
        k3 = k3_sig = 0.0
        if radial:
            k3 = float(p_full[5] / self.r_ref**2)
            k3_sig = math.sqrt(max(cov[-1, -1], 0)) / self.r_ref**2
        resid_px = self.residual(p_full, x_all, radial) * self.sig
        return _JointSolution(p_full=p_full, cov=cov, keep=keep, chi2=chi2, radial=radial, k3_per_px2=k3,
                              k3_sigma_per_px2=k3_sig, residual_px=resid_px, sigma_px=self.sig)


def _ring_level_k3_sigma(solution: _JointSolution, ring, g_std) -> float:
    """σ(k₃) from the ring means: errors shared by every sector of a ring (a neighbour's tail, curvature
    of the background under the ring) do not show in the sector scatter that scales the point-level σ,
    but they move k₃, which is fixed by how the ring radii depend on g. Here the kept sector residuals
    are averaged per ring and the point-level σ is scaled by the Birge ratio of those means,
    √(χ²/ν) with ν = rings − 2 (K and k₃ set the radial scale), when it exceeds 1 (Birge, Phys. Rev.
    40, 207 (1932)). NaN with fewer than three rings."""
    ring_ids = np.unique(ring)
    nu = ring_ids.size - 2
    if nu < 1 or not math.isfinite(solution.k3_sigma_per_px2):
        return math.nan
    z = 0.0
    for j in ring_ids:
        sel = (ring == j) & solution.keep
        if not sel.any():
            return math.nan
        w = 1.0 / solution.sigma_px[sel] ** 2
        mean = float(np.sum(w * solution.residual_px[sel]) / np.sum(w))
        z += mean**2 * float(np.sum(w)) / solution.chi2
    return solution.k3_sigma_per_px2 * math.sqrt(z / nu)
def _ellipse_sigmas(pq: np.ndarray, cov_pq: np.ndarray, eps: float) -> tuple[float, float]:
    """σ of ε and of θ (°) from the covariance of (p, q) = (ε cos 2θ, ε sin 2θ): ε = |(p, q)|,
    θ = atan2(q, p)/2, propagated to first order (θ undefined at ε = 0: NaN)."""
    if eps > 0:
        ge = pq / eps
        ga = np.array([-pq[1], pq[0]]) / eps**2 * 0.5
        return math.sqrt(max(ge @ cov_pq @ ge, 0)), math.degrees(math.sqrt(max(ga @ cov_pq @ ga, 0)))
    return math.sqrt(max(0.5 * np.trace(cov_pq), 0)), math.nan


def fit_ring_widths(profile, g_centers_per_nm, fwhm_guess_per_nm):
    """Pseudo-Voigt FWHM (1/nm) and position of each ring in a 1D profile, on a local linear background.

    Windows are ±3 FWHM around each ring, cut half-way to a neighbour. Returns
    (fwhm, g_fit, eta) arrays with NaN where a fit failed.
    """
    from scipy.optimize import curve_fit

    from ringid.profile.lineshape import unit_pseudo_voigt

    g_all, y_all, s_all = profile.g_per_nm, profile.intensity, profile.sigma
    centers = np.asarray(g_centers_per_nm, dtype=float)
    order = np.argsort(centers)
    fwhm_out = np.full(centers.size, np.nan)
    g_out = np.full(centers.size, np.nan)
    eta_out = np.full(centers.size, np.nan)
    for rank, i in enumerate(order):
        g0, w0 = centers[i], max(float(fwhm_guess_per_nm[i]), 2 * (g_all[1] - g_all[0]))
        half = 3.0 * w0
        if rank > 0:
            half = min(half, 0.5 * (g0 - centers[order[rank - 1]]))
        if rank < centers.size - 1:
            half = min(half, 0.5 * (centers[order[rank + 1]] - g0))
        sel = (np.abs(g_all - g0) <= half) & np.isfinite(y_all) & (s_all > 0)
        if sel.sum() < 8:
            continue
        gx, yy, ss = g_all[sel], y_all[sel], s_all[sel]

        def model(g, area, center, fwhm, eta, b0, b1):
            return area * unit_pseudo_voigt(g - center, fwhm, eta) + b0 + b1 * (g - g0)

        b_guess = float(min(yy[0], yy[-1]))
        a_guess = float(max(np.sum(yy - b_guess) * (gx[1] - gx[0]), 1e-6))
        step = float(gx[1] - gx[0])
        lower = [0.0, g0 - half, step, 0.0, -np.inf, -np.inf]
        upper = [np.inf, g0 + half, 2 * half, 1.0, np.inf, np.inf]
        p0 = [a_guess, g0, min(max(w0, 1.5 * step), 1.9 * half), 0.3, b_guess, 0.0]
        try:
            popt, _ = curve_fit(model, gx, yy, p0=p0, sigma=ss, bounds=(lower, upper), method="trf", maxfev=4000)
        except (RuntimeError, ValueError):
            continue
        if abs(popt[1] - g0) < half and 0 < abs(popt[2]) < 2 * half:
            fwhm_out[i] = abs(popt[2])
            g_out[i] = popt[1]
            eta_out[i] = popt[3]
    return fwhm_out, g_out, eta_out


def calibrate_pattern(data: np.ndarray, mask: np.ndarray | None, standard_d_angstrom, *, voltage_kv: float,
                      standard_intensity=None, standard_hkl=None, nominal_camera_constant_A_px: float | None = None,
                      center_guess: tuple[float, float] | None = None, standard: str = "",
                      standard_source: str = "", path=None, fit_radial: bool = True) -> Calibration:
    """Calibrate K, centre, ε, θ and the radial distortion k₃ from a masked pattern of a standard.

    Parameters
    ----------
    data, mask : arrays
        Pattern (counts) and mask (True = excluded), e.g. from :func:`ringid.image.mask.build_mask`.
    standard_d_angstrom, standard_intensity : array_like
        The standard's ring d-spacings (Å) and relative intensities (optional).
    standard_hkl : sequence of str or None
        Labels for the rings (written to the calibration record).
    voltage_kv : float
        Accelerating voltage (kV), recorded.
    nominal_camera_constant_A_px : float or None
        Nominal K (e.g. from camera length and pixel size); trusted to ±15 %. None: search.
    fit_radial : bool
        Fit the third-order radial distortion k₃ too (kept only when significant,
        :func:`fit_camera_constant`); False gives the fit without it.

    Raises
    ------
    RingidError
        When fewer than three rings can be assigned to the standard.
    """
    from ringid.image.center import refine_geometry
    from ringid.image.integrate import integrate_profile

    d_std = np.asarray(standard_d_angstrom, dtype=float)
    hkl = tuple(standard_hkl) if standard_hkl is not None else tuple("" for _ in d_std)
    gfit = refine_geometry(data, mask, center_guess=center_guess, fit_ellipse=True, max_rings=16, path=path)
    radii = gfit.ring_radius_px
    assignment = assign_rings(radii, d_std, standard_intensity,
                              nominal_camera_constant_A_px=nominal_camera_constant_A_px,
                              search_min_radius_px=gfit.min_radius_px, search_max_radius_px=gfit.max_radius_px)
    n_assigned = assignment.observed_index.size
    if n_assigned < MIN_ASSIGNED_RINGS:
        what = standard or "the standard"
        hint = " within ±15 % of the nominal camera constant" if nominal_camera_constant_A_px else ""
        raise RingidError(path, f"only {n_assigned} of {radii.size} rings found could be assigned to {what}{hint}; "
                                f"a calibration needs at least {MIN_ASSIGNED_RINGS}")
    g_std = np.full(radii.size, np.nan)
    g_std[assignment.observed_index] = 1.0 / d_std[assignment.standard_index]
    start = Geometry(center_x_px=gfit.geometry.center_x_px, center_y_px=gfit.geometry.center_y_px,
                     ellipticity=gfit.geometry.ellipticity, ellipse_angle_deg=gfit.geometry.ellipse_angle_deg,
                     voltage_kv=float(voltage_kv))
    geom, sig, resid_px, keep = fit_camera_constant(gfit.points, g_std, start, assignment.camera_constant_A_px,
                                                    fit_radial=fit_radial)

    k = geom.camera_constant_A_px
    k3 = geom.radial_distortion_k3_per_px2
    obs = assignment.observed_index
    g_obs, g_sig = _observed_ring_g(gfit.points.ring_index, g_std, obs, k, resid_px, keep, k3)

    profile = integrate_profile(data, mask, geom, with_cake=False)
    fwhm_guess = gfit.ring_fwhm_px[obs] * 10.0 / k
    fwhm, _, eta = fit_ring_widths(profile, g_obs, fwhm_guess)
    c0, c1 = _fit_fwhm_line(g_obs, fwhm)
    instrument_eta = float(np.nanmedian(eta)) if np.isfinite(eta).any() else 0.5
    flags = list(gfit.flags)
    notes = [f"{n_assigned} of {radii.size} rings assigned; {int((~keep).sum())} of {keep.size} sector points "
             f"rejected as outliers"]
    if assignment.unassigned_observed.size:
        flags.append("unassigned_rings")
    if k3:
        r_out = k * float(np.max(g_std[np.isfinite(g_std)]))
        notes.append(f"radial distortion k3 = {k3:.4g} ± {sig['radial_distortion_k3']:.2g} per px² "
                     f"({100 * k3 * r_out**2:+.3f} % at the outermost assigned ring, r = {r_out:.0f} px) "
                     f"is significant and corrected")
    order = np.argsort(g_obs)
    return Calibration(
        geometry=geom, camera_constant_sigma_A_px=sig["camera_constant"], ellipticity_sigma=sig["ellipticity"],
        ellipse_angle_sigma_deg=sig["ellipse_angle_deg"],
        radial_distortion_k3_sigma_per_px2=sig["radial_distortion_k3"],
        ring_hkl=tuple(hkl[j] for j in assignment.standard_index[order]),
        ring_d_calc_angstrom=d_std[assignment.standard_index][order], ring_g_obs_per_nm=g_obs[order],
        ring_g_sigma_per_nm=g_sig[order], ring_fwhm_per_nm=fwhm[order], fwhm_c0_per_nm=c0, fwhm_c1=c1,
        profile=profile,
        unassigned_g_per_nm=10.0 * undistort_radius(radii[assignment.unassigned_observed], k3) / k,
        standard=standard,
        standard_source=standard_source, image="" if path is None else os.fspath(path),
        instrument_eta=instrument_eta, flags=tuple(flags),
        notes=tuple(notes))


def _observed_ring_g(ring_index, g_std, observed, k, resid_px, keep, k3: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """Observed g (1/nm) of each assigned ring and its σ: the mean sector radius at the final
    geometry over K, from the kept sector points (``resid_px``: their radial residuals, px), each
    point's radius corrected for the radial distortion k₃ (1/px²) first."""
    ring_idx = ring_index[np.isfinite(g_std[ring_index])]
    g_obs = np.empty(observed.size)
    g_sig = np.empty(observed.size)
    for n, kk in enumerate(observed):
        sel = (ring_idx == kk) & keep
        r_true = k * g_std[kk]
        if k3:
            rr = undistort_radius(distorted_radius(r_true, k3) + resid_px[sel], k3)
        else:
            rr = r_true + resid_px[sel]
        g_obs[n] = 10.0 * rr.mean() / k
        g_sig[n] = 10.0 * (rr.std(ddof=1) / math.sqrt(max(sel.sum(), 1)) if sel.sum() > 1 else math.nan) / k
    return g_obs, g_sig


def _fit_fwhm_line(g, fwhm) -> tuple[float, float]:
    ok = np.isfinite(fwhm) & np.isfinite(g)
    if ok.sum() >= 3:
        c1, c0 = np.polyfit(g[ok], fwhm[ok], 1)
        return float(c0), float(c1)
    if ok.sum() >= 1:
        return float(np.median(fwhm[ok])), 0.0
    return math.nan, math.nan


def calibrate_image(image_path, standard_d_angstrom, *, voltage_kv: float, standard_intensity=None,
                    standard_hkl=None, nominal_camera_constant_A_px: float | None = None, standard: str = "",
                    standard_source: str = "", user_mask_path=None, frame: int | None = None,
                    saturation_level: float | None = None, negative_floor: float | None = None,
                    fit_radial: bool = True) -> Calibration:
    """Load, mask and calibrate one image of a standard (see :func:`calibrate_pattern`); the image
    options are those of a sample's image job."""
    from ringid.image.stage import load_and_mask

    img, masks = load_and_mask(image_path, frame=frame, saturation_level=saturation_level,
                               negative_floor=negative_floor, user_mask_path=user_mask_path)
    cal = calibrate_pattern(img.data, masks.mask, standard_d_angstrom, voltage_kv=voltage_kv,
                            standard_intensity=standard_intensity, standard_hkl=standard_hkl,
                            nominal_camera_constant_A_px=nominal_camera_constant_A_px,
                            center_guess=masks.rough_center_xy, standard=standard, standard_source=standard_source,
                            path=image_path, fit_radial=fit_radial)
    notes = cal.notes + img.notes + masks.notes + tuple(img.warnings)
    return Calibration(**{**cal.__dict__, "notes": notes})


def pyfai_calibrant_rings(name: str, d_min_angstrom: float = 0.7):
    """(d_angstrom, intensity=None, hkl labels) of a pyFAI calibrant table, e.g. "Au" or "Si".

    pyFAI's tables list d-spacings only (from published lattice parameters); the
    assignment then treats every ring as equally likely.
    """
    import pyFAI.calibrant

    try:
        cal = pyFAI.calibrant.get_calibrant(name)
    except Exception:
        raise RingidError(None, f"pyFAI has no calibrant table named {name!r}") from None
    d = np.asarray(cal.dspacing, dtype=float)
    d = d[d >= d_min_angstrom]
    return d, None, tuple(f"ring {i + 1}" for i in range(d.size))


def write_calibration(path, calibration: Calibration, **kw) -> None:
    """Write the calibration record of ``calibration`` atomically (``kw``: those of :meth:`Calibration.record`)."""
    write_calibration_record(path, calibration.record(**kw))
