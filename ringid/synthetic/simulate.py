"""Synthetic selected-area ring patterns, for tests, benchmarks and the demo.

The forward model follows docs/design.md: a ring of d-spacing d lies at true radius
R = K/d (K the camera constant in Å·px) and is drawn through the area-preserving
elliptical distortion of docs/design.md, with the simulator's own map (:func:`true_offsets`,
written from the convention, not taken from the analysis code). The azimuthal-mean profile of a
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


@dataclass(frozen=True)
class PatternGeometry:
    """Where the rings fall: image ``shape`` (ny, nx) px, centre (px; None for the image centre),
    ε = 1 − b/a and major-axis angle (deg), camera constant K (Å·px) and voltage (kV)."""

    shape: tuple[int, int]
    center_x_px: float | None
    center_y_px: float | None
    ellipticity: float
    ellipse_angle_deg: float
    camera_constant_A_px: float
    voltage_kv: float

    def center(self) -> tuple[float, float]:
        """Pattern centre (x, y) in px: the given one, or the image centre."""
        ny, nx = self.shape
        cx = (nx - 1) / 2.0 if self.center_x_px is None else float(self.center_x_px)
        cy = (ny - 1) / 2.0 if self.center_y_px is None else float(self.center_y_px)
        return cx, cy


@dataclass(frozen=True)
class RingSpec:
    """Ring shape and strength: instrumental FWHM (1/nm), crystallite size (nm, None for none) and
    Scherrer constant, grains per ring (None for smooth rings), texture strength and angle (deg),
    area of the strongest ring (counts·nm⁻¹ per pixel)."""

    instrument_fwhm_per_nm: float
    crystallite_size_nm: float | None
    scherrer_constant: float
    n_grains: int | None
    texture_strength: float
    texture_angle_deg: float
    ring_area_counts_per_nm: float

    @property
    def modulated(self) -> bool:
        """True when the rings vary with azimuth (grain spots or texture)."""
        return self.n_grains is not None or self.texture_strength != 0.0


@dataclass(frozen=True)
class DiffuseSpec:
    """Diffuse background b·(g² + 0.3²)^(−n/2) plus a flat floor (counts), and an optional halo
    I(g) (g in 1/nm) times ``halo_counts``."""

    background_counts: float
    background_exponent: float
    floor_counts: float
    halo: Callable[[np.ndarray], np.ndarray] | None
    halo_counts: float


@dataclass(frozen=True)
class BeamSpec:
    """Direct beam (Gaussian, σ in px) and beam stop (disc radius and rod width in px, rod angle in
    deg, transmission 0–1)."""

    direct_beam: bool
    direct_beam_sigma_px: float
    beam_stop: bool
    beam_stop_radius_px: float
    beam_stop_rod_width_px: float
    beam_stop_angle_deg: float
    beam_stop_transmission: float


@dataclass(frozen=True)
class DetectorSpec:
    """Dose (scale of the expected counts), Poisson noise, hot and dead pixel fractions, output
    dtype, saturation level (counts; None for the dtype's own) and random seed."""

    dose: float
    noise: bool
    hot_pixel_fraction: float
    dead_pixel_fraction: float
    dtype: str
    saturation_level: float | None
    seed: int


@dataclass(frozen=True)
class PatternSpec:
    """Everything :func:`simulate_pattern` takes besides the ring list, in five groups."""

    geometry: PatternGeometry
    rings: RingSpec
    diffuse: DiffuseSpec
    beam: BeamSpec
    detector: DetectorSpec


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
    spec = PatternSpec(
        geometry=PatternGeometry(shape=shape, center_x_px=center_x_px, center_y_px=center_y_px,
                                 ellipticity=ellipticity, ellipse_angle_deg=ellipse_angle_deg,
                                 camera_constant_A_px=camera_constant_A_px, voltage_kv=voltage_kv),
        rings=RingSpec(instrument_fwhm_per_nm=instrument_fwhm_per_nm, crystallite_size_nm=crystallite_size_nm,
                       scherrer_constant=scherrer_constant, n_grains=n_grains, texture_strength=texture_strength,
                       texture_angle_deg=texture_angle_deg, ring_area_counts_per_nm=ring_area_counts_per_nm),
        diffuse=DiffuseSpec(background_counts=background_counts, background_exponent=background_exponent,
                            floor_counts=floor_counts, halo=halo, halo_counts=halo_counts),
        beam=BeamSpec(direct_beam=direct_beam, direct_beam_sigma_px=direct_beam_sigma_px, beam_stop=beam_stop,
                      beam_stop_radius_px=beam_stop_radius_px, beam_stop_rod_width_px=beam_stop_rod_width_px,
                      beam_stop_angle_deg=beam_stop_angle_deg, beam_stop_transmission=beam_stop_transmission),
        detector=DetectorSpec(dose=dose, noise=noise, hot_pixel_fraction=hot_pixel_fraction,
                              dead_pixel_fraction=dead_pixel_fraction, dtype=dtype,
                              saturation_level=saturation_level, seed=seed),
    )
    return simulate_from_spec(d_angstrom, intensity, spec)


def true_offsets(shape, center_x_px: float, center_y_px: float, ellipticity: float, ellipse_angle_deg: float):
    """True (undistorted) offsets (ux, uy) in px, float32, of every pixel centre of an image of ``shape``.

    The forward model of docs/design.md: a ring of true radius R is drawn as the ellipse
    (x'/a)² + (y'/b)² = 1 with a = R/√(1−ε) along the major axis at θ (from +x towards +y) and
    b = R·√(1−ε) across it. A pixel centre at offset (dx, dy) from the pattern centre (x = column,
    y = row) has axis coordinates x' = dx·cosθ + dy·sinθ, y' = −dx·sinθ + dy·cosθ, so it lies on
    the ring of true radius R = √((x'·√(1−ε))² + (y'/√(1−ε))²). Its true offset keeps that radius
    and the axis frame: u = Rot(θ)·(x'·√(1−ε), y'/√(1−ε)), which written out is the symmetric
    matrix [[s·c² + n²/s, c·n·(s − 1/s)], [c·n·(s − 1/s), s·n² + c²/s]] times (dx, dy), with
    s = √(1−ε), c = cosθ, n = sinθ. Computed in float32 by broadcasting a row and a column.
    """
    ny, nx = shape
    t = math.radians(ellipse_angle_deg)
    c, s_ = math.cos(t), math.sin(t)
    root = math.sqrt(1.0 - ellipticity)
    m_xx = np.float32(root * c * c + s_ * s_ / root)
    m_xy = np.float32(c * s_ * (root - 1.0 / root))
    m_yy = np.float32(root * s_ * s_ + c * c / root)
    dx = np.arange(nx, dtype=np.float32) - np.float32(center_x_px)
    dy = np.arange(ny, dtype=np.float32) - np.float32(center_y_px)
    ux = m_xx * dx[None, :] + m_xy * dy[:, None]
    uy = m_xy * dx[None, :] + m_yy * dy[:, None]
    return ux, uy


def simulate_from_spec(d_angstrom, intensity, spec: PatternSpec) -> SimulatedPattern:
    """Simulate a ring pattern of rings d (Å) with relative intensities ``intensity`` as ``spec`` says.

    The steps, in the order in which they draw from the one random generator: expected counts
    of the rings and the diffuse scattering (grain spots draw here), the direct beam and the
    beam stop, Poisson counts and saturation, hot and dead pixels.
    """
    rng = np.random.default_rng(spec.detector.seed)
    cx, cy = spec.geometry.center()
    g_rings, area = _ring_list(d_angstrom, intensity, spec.rings.ring_area_counts_per_nm)
    expected, fwhm = _expected_counts(spec, cx, cy, g_rings, area, rng)
    shadow = _add_beam_and_stop(expected, spec.beam, spec.geometry.shape, cx, cy, spec.detector.dose)
    img, level = _detector_counts(expected, spec.detector, rng)
    hot, dead = _add_pixel_defects(img, spec.detector, level, spec.geometry.shape, rng)
    out = _output_image(img, spec.detector.dtype)

    g, det, r = spec.geometry, spec.detector, spec.rings
    geometry = Geometry(center_x_px=cx, center_y_px=cy, ellipticity=float(g.ellipticity),
                        ellipse_angle_deg=float(g.ellipse_angle_deg),
                        camera_constant_A_px=float(g.camera_constant_A_px), voltage_kv=float(g.voltage_kv))
    settings = dict(dose=det.dose, beam_stop=spec.beam.beam_stop, n_grains=r.n_grains,
                    crystallite_size_nm=r.crystallite_size_nm, instrument_fwhm_per_nm=r.instrument_fwhm_per_nm,
                    seed=det.seed, wavelength_angstrom=electron_wavelength_angstrom(g.voltage_kv))
    return SimulatedPattern(image=out, geometry=geometry, beam_stop=shadow, hot_pixels=hot, dead_pixels=dead,
                            ring_g_per_nm=g_rings, ring_fwhm_per_nm=np.full(g_rings.size, fwhm), settings=settings)


def _ring_list(d_angstrom, intensity, ring_area_counts_per_nm: float) -> tuple[np.ndarray, np.ndarray]:
    """Ring positions g = 10/d (1/nm) and areas (counts·nm⁻¹; the strongest ``ring_area_counts_per_nm``).

    Rings with d ≤ 0 or intensity ≤ 0 are left out.
    """
    d = np.atleast_1d(np.asarray(d_angstrom, dtype=float))
    inten = np.atleast_1d(np.asarray(intensity, dtype=float))
    keep = (d > 0) & (inten > 0)
    d, inten = d[keep], inten[keep]
    area = ring_area_counts_per_nm * inten / (inten.max() if inten.size else 1.0)
    return 10.0 / d, area


def _expected_counts(spec: PatternSpec, cx: float, cy: float, g_rings, area, rng) -> tuple[np.ndarray, float]:
    """Expected counts (float32, before dose) of the rings and the diffuse scattering, and the ring FWHM (1/nm).

    Every pixel's undistorted g is computed once; the diffuse part and smooth rings are one 1D
    profile drawn by ``np.interp``, azimuthally modulated rings are added pixel by pixel.
    """
    g = spec.geometry
    ux, uy = true_offsets(g.shape, cx, cy, g.ellipticity, g.ellipse_angle_deg)
    radius = np.sqrt(ux * ux + uy * uy)
    px_per_g = g.camera_constant_A_px / 10.0  # px per (1/nm)
    g_img = radius / np.float32(px_per_g)
    del radius

    rings = spec.rings
    size_fwhm = rings.scherrer_constant / rings.crystallite_size_nm if rings.crystallite_size_nm else 0.0
    fwhm, eta = voigt_as_pseudo_voigt(rings.instrument_fwhm_per_nm, size_fwhm)
    g_max = float(g_img.max())
    step = min(fwhm / 8.0, 0.25 / px_per_g)
    g_grid = np.arange(0.0, g_max + 2 * step, step)

    profile = _diffuse_profile(g_grid, spec.diffuse)
    if not rings.modulated:
        for gk, ak in zip(g_rings, area):
            profile += ak * unit_pseudo_voigt(g_grid - gk, fwhm, eta)
    expected = np.interp(g_img, g_grid, profile).astype(np.float32)
    if rings.modulated:
        _add_modulated_rings(expected, g_img, ux, uy, g_rings, area, fwhm, eta, rings, px_per_g, rng)
    return expected, fwhm


def _diffuse_profile(g_grid: np.ndarray, diffuse: DiffuseSpec) -> np.ndarray:
    """Diffuse counts on ``g_grid`` (1/nm): flat floor, b·(g² + 0.09)^(−n/2) falloff and the optional halo."""
    falloff = (g_grid**2 + 0.09) ** (-diffuse.background_exponent / 2.0)
    profile = diffuse.floor_counts + diffuse.background_counts * falloff
    if diffuse.halo is not None:
        profile = profile + diffuse.halo_counts * np.asarray(diffuse.halo(g_grid), dtype=float)
    return profile


def _add_beam_and_stop(expected: np.ndarray, beam: BeamSpec, shape, cx: float, cy: float, dose: float):
    """Add the direct beam to ``expected`` (in place) and shade the beam stop; returns the stop's shadow or None.

    The beam peaks at 4·10⁵/dose expected counts (4·10⁵ once the dose is applied), Gaussian with σ
    in observed (distorted) px; the stop blocks it and passes ``beam_stop_transmission`` of the rest.
    """
    ny, nx = shape
    xx = np.arange(nx, dtype=np.float32) - np.float32(cx)
    yy = np.arange(ny, dtype=np.float32) - np.float32(cy)
    shadow = None
    if beam.beam_stop:
        shadow = _beam_stop_shadow(xx, yy, beam.beam_stop_radius_px, beam.beam_stop_rod_width_px,
                                   beam.beam_stop_angle_deg)
    if beam.direct_beam:
        r2 = xx[None, :] ** 2 + yy[:, None] ** 2
        peak = 4.0e5 / max(dose, 1e-6)
        beam_counts = np.float32(peak) * np.exp(-r2 / np.float32(2 * beam.direct_beam_sigma_px**2))
        del r2
        if shadow is not None:
            beam_counts[shadow] = 0.0  # the stop blocks the direct beam itself
        expected += beam_counts
        del beam_counts
    if shadow is not None:
        expected[shadow] *= np.float32(beam.beam_stop_transmission)
    return shadow


def _detector_counts(expected: np.ndarray, detector: DetectorSpec, rng) -> tuple[np.ndarray, float | None]:
    """Counts (float32) after the dose, Poisson noise and saturation, and the saturation level (counts or None).

    ``expected`` is scaled by the dose in place (and is the result itself without noise).
    """
    expected *= np.float32(detector.dose)
    if detector.noise:
        img = rng.poisson(expected).astype(np.float32)
    else:
        img = expected
    level = detector.saturation_level
    if detector.dtype == "uint16":
        level = 65535.0 if level is None else min(level, 65535.0)
    if level is not None:
        np.minimum(img, np.float32(level), out=img)
    return img, level


def _add_pixel_defects(img: np.ndarray, detector: DetectorSpec, level: float | None, shape, rng):
    """Set hot pixels (20× their counts + 2000·dose + 500, clipped at ``level``) and dead pixels (0) in place.

    Returns the flat indices (hot, dead); hot pixels are drawn first, then dead ones.
    """
    ny, nx = shape
    n_px = nx * ny
    hot = (
        rng.choice(n_px, size=int(round(detector.hot_pixel_fraction * n_px)), replace=False)
        if detector.hot_pixel_fraction
        else np.zeros(0, int)
    )
    dead = (
        rng.choice(n_px, size=int(round(detector.dead_pixel_fraction * n_px)), replace=False)
        if detector.dead_pixel_fraction
        else np.zeros(0, int)
    )
    flat = img.reshape(-1)
    if hot.size:
        flat[hot] = np.minimum(flat[hot] * 20.0 + 2000.0 * detector.dose + 500.0, level if level else np.inf)
    if dead.size:
        flat[dead] = 0.0
    return hot, dead


def _output_image(img: np.ndarray, dtype: str) -> np.ndarray:
    """``img`` as "uint16" (rounded) or "float32" counts."""
    if dtype == "uint16":
        return np.rint(img).astype(np.uint16)
    if dtype == "float32":
        return img.astype(np.float32, copy=False)
    raise ValueError(f"dtype must be 'uint16' or 'float32', got {dtype!r}")


def _beam_stop_shadow(xx, yy, radius_px, rod_width_px, angle_deg):
    """Boolean shadow of a disc of ``radius_px`` on a rod from the centre to the edge at ``angle_deg``."""
    r2 = xx[None, :] ** 2 + yy[:, None] ** 2
    shadow = r2 <= radius_px**2
    t = math.radians(angle_deg)
    along = xx[None, :] * math.cos(t) + yy[:, None] * math.sin(t)
    across = -xx[None, :] * math.sin(t) + yy[:, None] * math.cos(t)
    shadow |= (along >= 0) & (np.abs(across) <= rod_width_px / 2.0)
    return shadow


def _add_modulated_rings(expected, g_img, ux, uy, g_rings, area, fwhm, eta, rings: RingSpec, px_per_g, rng):
    """Add rings with an azimuthal modulation (grain spots and/or texture) pixel by pixel in their annulus.

    g_rings, fwhm in 1/nm, area in counts·nm⁻¹, px_per_g in px·nm; ``expected`` is changed in place.
    """
    n_grains, texture_strength, texture_angle_deg = rings.n_grains, rings.texture_strength, rings.texture_angle_deg
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
