"""Synthetic selected-area ring patterns, for tests, benchmarks and the demo.

The forward model follows docs/design.md: a ring of d-spacing d lies at true radius
R = K/d (K the camera constant in Å·px) and is drawn through the area-preserving
elliptical distortion of :mod:`ringid.image.ellipse`. The azimuthal-mean profile of a
ring has an integrated area over g proportional to the listed ring intensity
(Vainshtein's polycrystal formula; a :class:`ringid.core.model.PhaseRings` list is
already in those units). Ring shape is a pseudo-Voigt whose Gaussian part is the
instrumental FWHM and whose Lorentzian part is the Scherrer size broadening of
FWHM K_s/D in g units, combined with the Thompson–Cox–Hastings (1987) formulas. The
default K_s = 8/(3π) = 0.8488 makes D the sphere diameter that :mod:`ringid.sample.size` reports:
a Lorentzian's integral breadth is (π/2)·FWHM, so its breadth is then 4/(3D), the
sphere-diameter constant K_β = 4/3 of Langford & Wilson (1978). Counts follow Poisson
statistics.

Every pixel's undistorted radius is computed once and continuous rings are drawn
by ``np.interp`` of a 1D profile, so 2048² takes a fraction of a second. Spotty
rings (few grains) and texture multiply each ring by an azimuthal modulation.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from ringid.image.ellipse import undistorted_offsets
from ringid.profile.lineshape import unit_pseudo_voigt, voigt_as_pseudo_voigt
from ringid.core.model import Geometry
from ringid.core.units import electron_wavelength_angstrom

DEFAULT_SCHERRER_CONSTANT = 8.0 / (3.0 * math.pi)  # Lorentzian FWHM·D; integral breadth 4/(3D)


@dataclass(frozen=True)
class SimulatedPattern:
    """A simulated pattern and its ground truth.

    image : (ny, nx) uint16 or float32 counts. geometry : the true Geometry.
    beam_stop : bool array of the true shadow (None without a beam stop).
    hot_pixels, dead_pixels : flat indices of the injected defects.
    """

    image: np.ndarray
    geometry: Geometry
    beam_stop: np.ndarray | None
    hot_pixels: np.ndarray
    dead_pixels: np.ndarray
    ring_g_per_nm: np.ndarray
    ring_fwhm_per_nm: np.ndarray
    settings: dict = field(default_factory=dict)




def simulate_pattern(
    d_angstrom,
    intensity,
    *,
    camera_constant_A_px: float,
    shape: tuple[int, int] = (2048, 2048),
    center_x_px: float | None = None,
    center_y_px: float | None = None,
    ellipticity: float = 0.0,
    ellipse_angle_deg: float = 0.0,
    voltage_kv: float = 200.0,
    instrument_fwhm_per_nm: float = 0.05,
    crystallite_size_nm: float | None = None,
    scherrer_constant: float = DEFAULT_SCHERRER_CONSTANT,
    n_grains: int | None = None,
    texture_strength: float = 0.0,
    texture_angle_deg: float = 0.0,
    ring_area_counts_per_nm: float = 60.0,
    background_counts: float = 200.0,
    background_exponent: float = 2.0,
    floor_counts: float = 5.0,
    halo: Callable[[np.ndarray], np.ndarray] | None = None,
    halo_counts: float = 1.0,
    direct_beam: bool = True,
    direct_beam_sigma_px: float = 4.0,
    beam_stop: bool = False,
    beam_stop_radius_px: float = 40.0,
    beam_stop_rod_width_px: float = 24.0,
    beam_stop_angle_deg: float = 300.0,
    beam_stop_transmission: float = 0.01,
    dose: float = 1.0,
    noise: bool = True,
    hot_pixel_fraction: float = 0.0,
    dead_pixel_fraction: float = 0.0,
    dtype: str = "uint16",
    saturation_level: float | None = None,
    seed: int = 0,
) -> SimulatedPattern:
    """Simulate a ring pattern.

    Parameters
    ----------
    d_angstrom, intensity : array_like
        Ring d-spacings (Å) and relative integrated intensities (any scale; the
        strongest is drawn with area ``ring_area_counts_per_nm``).
    camera_constant_A_px : float
        K = λL/p (Å·px); a ring is drawn at true radius K/d px.
    shape : (ny, nx)
        Image shape in pixels.
    center_x_px, center_y_px : float
        Pattern centre (x = column, y = row); default the image centre.
    ellipticity, ellipse_angle_deg : float
        Area-preserving distortion ε = 1 − b/a and major-axis angle (deg from +x towards +y).
    voltage_kv : float
        Accelerating voltage, recorded in the Geometry.
    instrument_fwhm_per_nm : float
        Gaussian instrumental ring FWHM in g (1/nm).
    crystallite_size_nm : float or None
        Adds Lorentzian Scherrer broadening β = K_s/D (1/nm); None for none.
    n_grains : int or None
        Number of diffracting grains per ring (spotty rings); None for smooth rings.
    texture_strength, texture_angle_deg : float
        Two-fold azimuthal intensity modulation 1 + s·cos 2(ψ − ψ_t) with the phase
        shifted by 90° on every other ring (arcs of a tilted fibre texture).
    ring_area_counts_per_nm : float
        Integrated area over g of the strongest ring in the azimuthal mean (counts·nm⁻¹ per pixel).
    background_counts, background_exponent, floor_counts : float
        Diffuse background b·(g² + 0.3²)^(−n/2) in counts (b at g ≈ 1 nm⁻¹) plus a flat floor.
    halo : callable or None
        Any I(g) (g in 1/nm, e.g. a Debye-equation halo); added times ``halo_counts``.
    direct_beam : bool
        Add a saturated Gaussian direct beam at the centre.
    beam_stop : bool
        Shadow of a round beam stop on a rod running to the image edge at ``beam_stop_angle_deg``.
    dose : float
        Scales all expected counts before Poisson noise (1 = normal, 0.05 = low dose).
    hot_pixel_fraction, dead_pixel_fraction : float
        Fractions of pixels set to a high value or to 0.
    dtype : "uint16" or "float32"
        Output type; uint16 clips at 65535 (the saturation level).
    seed : int
        Seed of the random generator: equal seeds give equal images.

    Returns
    -------
    SimulatedPattern
    """
    rng = np.random.default_rng(seed)
    ny, nx = shape
    cx = (nx - 1) / 2.0 if center_x_px is None else float(center_x_px)
    cy = (ny - 1) / 2.0 if center_y_px is None else float(center_y_px)
    d = np.atleast_1d(np.asarray(d_angstrom, dtype=float))
    inten = np.atleast_1d(np.asarray(intensity, dtype=float))
    keep = (d > 0) & (inten > 0)
    d, inten = d[keep], inten[keep]
    area = ring_area_counts_per_nm * inten / (inten.max() if inten.size else 1.0)
    g_rings = 10.0 / d

    ux, uy = undistorted_offsets(shape, cx, cy, ellipticity, ellipse_angle_deg)
    radius = np.sqrt(ux * ux + uy * uy)
    px_per_g = camera_constant_A_px / 10.0  # px per (1/nm)
    g_img = radius / np.float32(px_per_g)

    size_fwhm = scherrer_constant / crystallite_size_nm if crystallite_size_nm else 0.0
    fwhm, eta = voigt_as_pseudo_voigt(instrument_fwhm_per_nm, size_fwhm)
    g_max = float(g_img.max())
    step = min(fwhm / 8.0, 0.25 / px_per_g)
    g_grid = np.arange(0.0, g_max + 2 * step, step)

    # continuous part: background + halo + smooth rings, through one 1D profile
    profile = floor_counts + background_counts * (g_grid**2 + 0.09) ** (-background_exponent / 2.0)
    if halo is not None:
        profile = profile + halo_counts * np.asarray(halo(g_grid), dtype=float)
    modulated = n_grains is not None or texture_strength != 0.0
    if not modulated:
        for gk, ak in zip(g_rings, area):
            profile += ak * unit_pseudo_voigt(g_grid - gk, fwhm, eta)
    expected = np.interp(g_img, g_grid, profile).astype(np.float32)

    if modulated:
        _add_modulated_rings(expected, g_img, ux, uy, g_rings, area, fwhm, eta, n_grains,
                             texture_strength, texture_angle_deg, px_per_g, rng)
    del ux, uy

    # observed (distorted) distance from the centre, for beam and beam stop
    xx = np.arange(nx, dtype=np.float32) - np.float32(cx)
    yy = np.arange(ny, dtype=np.float32) - np.float32(cy)
    shadow = None
    if beam_stop:
        shadow = _beam_stop_shadow(xx, yy, beam_stop_radius_px, beam_stop_rod_width_px, beam_stop_angle_deg)
    if direct_beam:
        r2 = xx[None, :] ** 2 + yy[:, None] ** 2
        peak = 4.0e5 / max(dose, 1e-6)
        beam = np.float32(peak) * np.exp(-r2 / np.float32(2 * direct_beam_sigma_px**2))
        if shadow is not None:
            beam[shadow] = 0.0  # the stop blocks the direct beam itself
        expected += beam
        del r2, beam
    if shadow is not None:
        expected[shadow] *= np.float32(beam_stop_transmission)

    expected *= np.float32(dose)
    if noise:
        img = rng.poisson(expected).astype(np.float32)
    else:
        img = expected
    level = saturation_level
    if dtype == "uint16":
        level = 65535.0 if level is None else min(level, 65535.0)
    if level is not None:
        np.minimum(img, np.float32(level), out=img)

    n_px = nx * ny
    hot = (
        rng.choice(n_px, size=int(round(hot_pixel_fraction * n_px)), replace=False)
        if hot_pixel_fraction
        else np.zeros(0, int)
    )
    dead = (
        rng.choice(n_px, size=int(round(dead_pixel_fraction * n_px)), replace=False)
        if dead_pixel_fraction
        else np.zeros(0, int)
    )
    flat = img.reshape(-1)
    if hot.size:
        flat[hot] = np.minimum(flat[hot] * 20.0 + 2000.0 * dose + 500.0, level if level else np.inf)
    if dead.size:
        flat[dead] = 0.0

    if dtype == "uint16":
        out = np.rint(img).astype(np.uint16)
    elif dtype == "float32":
        out = img.astype(np.float32, copy=False)
    else:
        raise ValueError(f"dtype must be 'uint16' or 'float32', got {dtype!r}")

    geometry = Geometry(center_x_px=cx, center_y_px=cy, ellipticity=float(ellipticity),
                        ellipse_angle_deg=float(ellipse_angle_deg),
                        camera_constant_A_px=float(camera_constant_A_px), voltage_kv=float(voltage_kv))
    settings = dict(dose=dose, beam_stop=beam_stop, n_grains=n_grains, crystallite_size_nm=crystallite_size_nm,
                    instrument_fwhm_per_nm=instrument_fwhm_per_nm, seed=seed,
                    wavelength_angstrom=electron_wavelength_angstrom(voltage_kv))
    return SimulatedPattern(image=out, geometry=geometry, beam_stop=shadow, hot_pixels=hot, dead_pixels=dead,
                            ring_g_per_nm=g_rings, ring_fwhm_per_nm=np.full(g_rings.size, fwhm), settings=settings)


def _beam_stop_shadow(xx, yy, radius_px, rod_width_px, angle_deg):
    """Boolean shadow of a disc of ``radius_px`` on a rod from the centre to the edge at ``angle_deg``."""
    r2 = xx[None, :] ** 2 + yy[:, None] ** 2
    shadow = r2 <= radius_px**2
    t = math.radians(angle_deg)
    along = xx[None, :] * math.cos(t) + yy[:, None] * math.sin(t)
    across = -xx[None, :] * math.sin(t) + yy[:, None] * math.cos(t)
    shadow |= (along >= 0) & (np.abs(across) <= rod_width_px / 2.0)
    return shadow


def _add_modulated_rings(expected, g_img, ux, uy, g_rings, area, fwhm, eta, n_grains, texture_strength,
                         texture_angle_deg, px_per_g, rng):
    """Add rings with an azimuthal modulation (grain spots and/or texture) pixel by pixel in their annulus."""
    n_psi = 4096
    psi_grid = np.linspace(-math.pi, math.pi, n_psi + 1)
    half = 6.0 * fwhm
    g_flat = g_img.reshape(-1)
    for k, (gk, ak) in enumerate(zip(g_rings, area)):
        sel = np.flatnonzero(np.abs(g_flat - gk) < half)
        if sel.size == 0:
            continue
        psi = np.arctan2(uy.reshape(-1)[sel], ux.reshape(-1)[sel])
        mod = np.ones(n_psi + 1)
        if texture_strength:
            phase = math.radians(texture_angle_deg) + (k % 2) * math.pi / 2
            mod = mod * (1.0 + texture_strength * np.cos(2 * (psi_grid - phase)))
        if n_grains is not None:
            # each grain: a spot of angular width ~ the radial width over the ring radius
            sigma_psi = max(fwhm / gk / 2.355, 0.5 / (gk * px_per_g))
            n = max(int(n_grains), 1)
            centres = rng.uniform(-math.pi, math.pi, n)
            weights = rng.exponential(1.0, n)
            spots = np.zeros(n_psi + 1)
            for c, w in zip(centres, weights):
                dpsi = np.angle(np.exp(1j * (psi_grid - c)))
                spots += w * np.exp(-0.5 * (dpsi / sigma_psi) ** 2)
            spots /= spots[:-1].mean()
            mod = mod * spots
        shape = unit_pseudo_voigt(g_flat[sel] - gk, fwhm, eta) * ak
        expected.reshape(-1)[sel] += (shape * np.interp(psi, psi_grid, mod)).astype(np.float32)
