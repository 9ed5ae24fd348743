"""Small frozen dataclasses passed between the stages.

Field names follow the output contract columns of docs/design.md (``_px``, ``_per_nm``,
``_angstrom``, ``_kv``, ``_deg``). Arrays are numpy arrays; they are not copied.
Keep this module free of heavy imports (numpy only).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np


@dataclass(frozen=True)
class Geometry:
    """Pattern geometry in pixel coordinates (x = column, y = row, origin at pixel [0, 0] centre).

    ``ellipticity`` is ε = 1 − b/a of the area-preserving elliptical distortion: a ring of
    true radius R is drawn with semi-axes a = R/√(1−ε), b = R·√(1−ε), the major axis at
    ``ellipse_angle_deg`` from +x towards +y. ``camera_constant_A_px`` is K = λL/p (Å·px),
    so d = K / R. ``radial_distortion_k3_per_px2`` is the third-order radial distortion k₃ (1/px²):
    a ring of true radius R lies at ρ = R·(1 + k₃R²) in the ellipse-corrected frame
    (:mod:`ringid.image.radial`); 0 for none.
    """

    center_x_px: float
    center_y_px: float
    ellipticity: float = 0.0
    ellipse_angle_deg: float = 0.0
    camera_constant_A_px: float = math.nan
    voltage_kv: float = math.nan
    center_sigma_px: float = math.nan
    radial_distortion_k3_per_px2: float = 0.0


@dataclass(frozen=True)
class InstrumentProfile:
    """Instrumental ring profile measured on the calibration film.

    FWHM(g) = fwhm_c0_per_nm + fwhm_c1 · g (1/nm), pseudo-Voigt mixing ``eta``; measured on the
    standard's rings between g_min_per_nm and g_max_per_nm (1/nm; NaN when not recorded).
    """

    fwhm_c0_per_nm: float
    fwhm_c1: float = 0.0
    eta: float = 0.5
    g_min_per_nm: float = math.nan
    g_max_per_nm: float = math.nan

    def fwhm_per_nm(self, g_per_nm):
        return self.fwhm_c0_per_nm + self.fwhm_c1 * np.asarray(g_per_nm, dtype=float)


@dataclass(frozen=True)
class Profile:
    """Azimuthally averaged 1D profile on a g grid, and optionally the 2D cake.

    intensity is the azimuthal mean (counts per pixel); sigma its Poisson-propagated
    standard uncertainty per bin. cake has shape (n_azimuth, n_g) on the same g grid,
    with NaN where no unmasked pixel fell.
    """

    g_per_nm: np.ndarray
    intensity: np.ndarray
    sigma: np.ndarray
    cake: np.ndarray | None = None
    azimuth_deg: np.ndarray | None = None


@dataclass(frozen=True)
class Ring:
    """One fitted ring (or broad halo) of a 1D profile.

    g in 1/nm with its standard uncertainty; fwhm in 1/nm; eta the pseudo-Voigt
    Lorentzian fraction; area the integrated intensity over g (profile units × 1/nm).
    kind is ``"ring"``, ``"halo"`` or ``"band"`` (a broad component that is many unresolved
    rings closer than their width, not a halo: left out of identification and size).
    """

    g_per_nm: float
    g_sigma_per_nm: float
    fwhm_per_nm: float
    fwhm_sigma_per_nm: float = math.nan
    eta: float = 0.0
    area: float = math.nan
    area_sigma: float = math.nan
    kind: str = "ring"
    significance: float = math.nan

    @property
    def d_angstrom(self) -> float:
        return 10.0 / self.g_per_nm

    @property
    def d_sigma_angstrom(self) -> float:
        return 10.0 * self.g_sigma_per_nm / self.g_per_nm**2


@dataclass(frozen=True)
class PhaseRings:
    """The kinematic ring list of one phase, strongest ring intensity = 100.

    intensity is Σ|F|²·d² per ring (the integrated area of the ring over g in an
    azimuthal-mean profile, docs/design.md), normalised; double_diffraction marks
    kinematically forbidden rings that double diffraction can light up (intensity 0).
    """

    phase: str
    d_angstrom: np.ndarray
    intensity: np.ndarray
    multiplicity: np.ndarray
    hkl: tuple[str, ...]
    double_diffraction: np.ndarray
    meta: dict = field(default_factory=dict)

    @property
    def g_per_nm(self) -> np.ndarray:
        return 10.0 / self.d_angstrom
