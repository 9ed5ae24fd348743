"""Crystallite size from ring breadths: instrument removal and Scherrer in g units.

Scherrer in reciprocal units: D = K / β_s, with β_s the integral breadth (area/height) of the
ring in g = 1/d after the instrumental part is removed (no cos θ term in g units).
**Reported D: the diameter of spherical crystallites, K = 4/3 with the integral breadth**
(Stokes & Wilson 1942; Langford & Wilson 1978, J. Appl. Cryst. 11, 102–113, Table 1: for a
sphere 1/β = ¾D, the volume-weighted mean column length). The familiar K ≈ 0.9 gives a V^⅓
or cube-edge length instead, 19 % below the sphere diameter (same table).

Instrument removal (Voigt-aware: Langford, J. Appl. Cryst. 11, 10, 1978; de Keijser et al., J. Appl.
Cryst. 15, 308, 1982): each fitted pseudo-Voigt is split into the
Lorentzian and Gaussian integral breadths of the Voigt with the same shape factor φ = FWHM/β,
using the approximations of de Keijser, Langford, Mittemeijer & Vogels (1982, J. Appl. Cryst.
15, 308–314) to Langford's (1978) Voigt analysis:

    β_L/β = 2.0207 − 0.4803 φ − 1.7756 φ²
    β_G/β = 0.6420 + 1.4187 (φ − 2/π)^½ − 2.2043 φ + 1.8706 φ²,

then the Lorentzian parts subtract linearly and the Gaussian parts in quadrature
(β_L,s = β_L,obs − β_L,instr; β_G,s² = β_G,obs² − β_G,instr²), and the sample breadth is the
integral breadth of the Voigt (β_L,s, β_G,s): β = β_G / erfcx(k), k = β_L/(√π β_G)
(the Voigt integral breadth, Langford 1978).

Honest limits: when the sample breadth is not larger than ``limit_sigma`` times its uncertainty
the ring is as sharp as the instrument, and only a lower limit D > K/(β_s + limit_sigma·σ) is
reported. A sample breadth below ``RESOLUTION_FRACTION`` of the instrumental breadth is not told
apart from the instrument however precise the fit (the calibration film and the sample see the
instrument on different days, at different heights, with the standard's own grain size in it), so
the limit is at most K/(RESOLUTION_FRACTION·β_instr) (with a 0.05 nm⁻¹ Gaussian instrument:
> 250 nm). Without an instrument width nothing is removed and K/β_obs is itself a lower limit.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ringid.core.model import InstrumentProfile

K_SPHERE_DIAMETER = 4.0 / 3.0  # Langford & Wilson 1978: sphere diameter, integral breadth
# smallest sample breadth resolved, as a fraction of the instrumental breadth (common practice,
# not from a source: line-broadening sizes are not trusted where the broadening is below about a
# tenth of the instrument's)
RESOLUTION_FRACTION = 0.1
# The systematic part of a size, as a fraction of it: the line-shape model's bias measured on
# profiles of spheres of known size (+6 … +12 %, benchmarks/bench_ring_accuracy.py, synthetic);
# dense patterns of broad rings do worse (up to +28 % at FWHM 0.6 1/nm, docs/rings.md). Not in σ_D.
SIZE_SYSTEMATIC_FRACTION = 0.10
PHI_LORENTZ = 2.0 / math.pi  # FWHM/β of a Lorentzian
PHI_GAUSS = 2.0 * math.sqrt(math.log(2.0) / math.pi)  # FWHM/β of a Gaussian


@dataclass(frozen=True)
class RingSize:
    """Size from one ring. size_nm is NaN when only a lower limit is known (lower_limit_nm)."""

    size_nm: float
    size_sigma_nm: float
    lower_limit_nm: float
    breadth_sample_per_nm: float
    breadth_sample_sigma_per_nm: float
    # observed minus instrumental integral breadth (1/nm), signed, and its σ: an unbiased test
    # of "broader than the instrument" where the sample breadth itself is clipped at 0
    breadth_excess_per_nm: float = math.nan
    breadth_excess_sigma_per_nm: float = math.nan

    @property
    def is_lower_limit(self) -> bool:
        return not math.isfinite(self.size_nm) and math.isfinite(self.lower_limit_nm)


@dataclass(frozen=True)
class SizeEstimate:
    """Per-sample crystallite size (sphere diameter, K = 4/3, integral breadth).

    size_nm ± size_sigma_nm, or only lower_limit_nm when the rings are as sharp as the
    instrument (or no instrument width is known); NaN everywhere when no ring was usable.
    """

    size_nm: float
    size_sigma_nm: float
    lower_limit_nm: float
    n_rings: int
    shape_constant: float = K_SPHERE_DIAMETER
    meaning: str = "sphere diameter (K=4/3 on integral breadth, Langford & Wilson 1978)"

    @property
    def is_lower_limit(self) -> bool:
        return not math.isfinite(self.size_nm) and math.isfinite(self.lower_limit_nm)

    def text(self) -> str:
        """``"12.3 ± 1.1 nm"``, ``"> 35 nm"`` or ``""``."""
        if math.isfinite(self.size_nm):
            return f"{self.size_nm:.3g} ± {self.size_sigma_nm:.2g} nm"
        if math.isfinite(self.lower_limit_nm):
            return f"> {self.lower_limit_nm:.3g} nm"
        return ""


def voigt_breadths_from_shape(breadth, phi):
    """Lorentzian and Gaussian integral breadths (β_L, β_G) of a Voigt of breadth β and φ = FWHM/β.

    de Keijser et al. (1982); φ is clipped to the Lorentzian–Gaussian range [2/π, 2√(ln2/π)].
    """
    phi = np.clip(np.asarray(phi, dtype=float), PHI_LORENTZ, PHI_GAUSS)
    beta = np.asarray(breadth, dtype=float)
    beta_l = beta * np.clip(2.0207 - 0.4803 * phi - 1.7756 * phi**2, 0.0, 1.0)
    beta_g = beta * np.clip(0.6420 + 1.4187 * np.sqrt(phi - PHI_LORENTZ) - 2.2043 * phi + 1.8706 * phi**2, 0.0, 1.0)
    return beta_l, beta_g


def voigt_integral_breadth(beta_l, beta_g):
    """Integral breadth of a Voigt from its Lorentzian and Gaussian breadths: β_G / erfcx(β_L/(√π β_G))."""
    from scipy.special import erfcx

    beta_l = np.asarray(beta_l, dtype=float)
    beta_g = np.asarray(beta_g, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        k = beta_l / (math.sqrt(math.pi) * beta_g)
        out = beta_g / erfcx(k)
    return np.where(beta_g > 0, out, beta_l)


def pseudo_voigt_breadth(fwhm, eta):
    """Integral breadth of a pseudo-Voigt, β = (πΓ/2)/[η + (1−η)√(π ln2)] (computed: area over height).

    The same quantity as ``ringid.profile.lineshape.pseudo_voigt_integral_breadth``, written another
    way; replacing one by the other changes sizes in the 16th digit, so they stay apart until a
    change that may alter the outputs merges them."""
    return (math.pi * np.asarray(fwhm, dtype=float) / 2.0) / (eta + (1.0 - eta) * math.sqrt(math.pi * math.log(2.0)))


def sample_breadth(fwhm_obs, eta_obs, fwhm_instr, eta_instr):
    """Sample integral breadth (1/nm) after removing the instrument part (Voigt rule, module doc)."""
    beta_obs = pseudo_voigt_breadth(fwhm_obs, eta_obs)
    beta_ins = pseudo_voigt_breadth(fwhm_instr, eta_instr)
    l_obs, g_obs = voigt_breadths_from_shape(beta_obs, fwhm_obs / beta_obs)
    l_ins, g_ins = voigt_breadths_from_shape(beta_ins, fwhm_instr / beta_ins)
    beta_l = np.maximum(l_obs - l_ins, 0.0)
    beta_g = np.sqrt(np.maximum(g_obs**2 - g_ins**2, 0.0))
    return voigt_integral_breadth(beta_l, beta_g)


def ring_size(
    ring,
    instrument: InstrumentProfile | None,
    *,
    shape_constant: float = K_SPHERE_DIAMETER,
    limit_sigma: float = 2.0,
) -> RingSize:
    """Scherrer size (nm) of one fitted ring (:class:`ringid.profile.rings.FittedRing`).

    σ follows from the fitted breadth uncertainty at fixed shape. A ring whose sample breadth
    is below ``limit_sigma``·σ gives only a lower limit.
    """
    fwhm, eta = float(ring.fwhm_per_nm), float(ring.eta)
    beta_obs = float(pseudo_voigt_breadth(fwhm, eta))
    rel = float(getattr(ring, "breadth_sigma_per_nm", math.nan)) / beta_obs
    if not math.isfinite(rel):
        rel = float(ring.fwhm_sigma_per_nm) / fwhm if math.isfinite(ring.fwhm_sigma_per_nm) else 0.0
    if instrument is None:
        # nothing removed: K/β_obs is a lower limit on the size
        upper = beta_obs * (1.0 + limit_sigma * rel)
        return RingSize(math.nan, math.nan, shape_constant / upper, beta_obs, beta_obs * rel)
    f_ins = float(instrument.fwhm_per_nm(ring.g_per_nm))
    e_ins = float(instrument.eta)
    beta_s = float(sample_breadth(fwhm, eta, f_ins, e_ins))
    hi = float(sample_breadth(fwhm * (1.0 + rel), eta, f_ins, e_ins))
    lo = float(sample_breadth(fwhm * max(1.0 - rel, 1e-3), eta, f_ins, e_ins))
    sigma = 0.5 * (hi - lo)
    # a ring whose integral breadth is not above the instrument's is as sharp as the instrument,
    # whatever its shape: the Voigt split of a ring more Gaussian than the instrument would
    # otherwise find a Gaussian sample part in the shape difference alone
    beta_ins = float(pseudo_voigt_breadth(f_ins, e_ins))
    excess = (beta_obs - beta_ins, beta_obs * rel)
    if beta_obs * (1.0 - limit_sigma * rel) <= beta_ins:
        # sample breadth indistinguishable from 0, to within the ring's disagreement with the
        # instrument's breadth (a systematic, shape-borne uncertainty)
        beta_s, sigma = 0.0, max(sigma, abs(beta_ins - beta_obs))
    floor = RESOLUTION_FRACTION * beta_ins
    if beta_s <= limit_sigma * sigma or beta_s <= floor:
        upper = max(beta_s + limit_sigma * max(sigma, 0.0), floor)
        limit = shape_constant / upper if upper > 0 else math.inf
        return RingSize(math.nan, math.nan, limit, beta_s, sigma, *excess)
    size = shape_constant / beta_s
    return RingSize(size, size * sigma / beta_s, math.nan, beta_s, sigma, *excess)


def _weighted_mean(values, sigmas) -> tuple[float, float]:
    """Inverse-variance weighted mean and its σ, scaled by the Birge ratio √χ²_ν when the values
    disagree beyond their σ."""
    values, sigmas = np.asarray(values, dtype=float), np.asarray(sigmas, dtype=float)
    w = 1.0 / sigmas**2
    mean = float(np.sum(w * values) / np.sum(w))
    sigma = float(1.0 / math.sqrt(np.sum(w)))
    if values.size > 1:
        chi2_nu = float(np.sum(w * (values - mean) ** 2) / (values.size - 1))
        sigma *= math.sqrt(max(chi2_nu, 1.0))
    return mean, sigma


def sample_size(
    rings,
    instrument: InstrumentProfile | None,
    *,
    shape_constant: float = K_SPHERE_DIAMETER,
    limit_sigma: float = 2.0,
) -> tuple[SizeEstimate, tuple[RingSize, ...]]:
    """Per-sample size from all rings of kind "ring", and the per-ring sizes (all NaN for a halo
    or a band: their breadth is not a crystallite size).

    The rings are combined in breadth space (where a ring as sharp as the instrument is simply
    β_s ≈ 0 ± σ): weighted mean β̄ = Σ w β_s / Σ w, w = 1/σ², its σ scaled by the Birge ratio
    √χ²_ν when the rings disagree (size differs between hkl: shape, strain). D = K/β̄; a lower
    limit K/(β̄ + limit_sigma·σ) when β̄ is not significant, or when the rings are not
    significantly broader than the instrument: the same mean taken over the signed excess
    β_obs − β_ins (each ring's β_s is ≥ 0 by construction, so over many instrument-sharp rings
    their mean would come out positive, and "significant", from noise alone).
    """
    rings = tuple(rings)
    no_size = RingSize(math.nan, math.nan, math.nan, math.nan, math.nan)
    per_ring = tuple(
        ring_size(r, instrument, shape_constant=shape_constant, limit_sigma=limit_sigma)
        if r.kind == "ring"
        else no_size
        for r in rings
    )
    used = [
        k
        for k, s in enumerate(per_ring)
        if math.isfinite(s.breadth_sample_per_nm) and s.breadth_sample_sigma_per_nm > 0
    ]
    use = [per_ring[k] for k in used]
    if not use:
        return SizeEstimate(math.nan, math.nan, math.nan, 0, shape_constant), per_ring
    mean, sigma = _weighted_mean([s.breadth_sample_per_nm for s in use], [s.breadth_sample_sigma_per_nm for s in use])
    if instrument is None:
        return SizeEstimate(
            math.nan, math.nan, shape_constant / (mean + limit_sigma * sigma), len(use), shape_constant
        ), per_ring
    excess = [(s.breadth_excess_per_nm, s.breadth_excess_sigma_per_nm) for s in use
              if math.isfinite(s.breadth_excess_per_nm) and s.breadth_excess_sigma_per_nm > 0]
    sharp = False
    if excess:
        mean_excess, sigma_excess = _weighted_mean(*zip(*excess))
        sharp = mean_excess <= limit_sigma * sigma_excess
    g_used = np.array([rings[k].g_per_nm for k in used], dtype=float)
    floor = RESOLUTION_FRACTION * float(np.mean(pseudo_voigt_breadth(instrument.fwhm_per_nm(g_used), instrument.eta)))
    if sharp or mean <= limit_sigma * sigma or mean <= floor:
        upper = max(mean + limit_sigma * sigma, floor)
        return SizeEstimate(math.nan, math.nan, shape_constant / upper, len(use), shape_constant), per_ring
    size = shape_constant / mean
    return SizeEstimate(size, size * sigma / mean, math.nan, len(use), shape_constant), per_ring
