"""Ring character from the 2D cake: continuous, spotty (with a grain count), textured.

For each ring the cake (n_azimuth, n_g) is averaged over the ring's FWHM in g and the
background is subtracted, giving the ring intensity I_k in each azimuthal bin k.

Spotty rings and the number of grains. Let N grains diffract into the ring, each giving a spot
of intensity a (mean ā, relative spread c), placed at random azimuths. If a spot is narrower
than the M_eff independent azimuthal cells of the ring, the number of spots per cell is
Poisson with mean λ = N/M_eff, so E[I] = λā and Var[I] = λ E[a²] = λā²(1 + c²). The relative
variance of the azimuthal intensity is therefore

    V = Var[I]/E[I]² = M_eff (1 + c²) / N,   i.e.  N = M_eff (1 + c²) / V.

M_eff is the number of bins, or, when spots are wider than a bin, the number of independent
spot widths around the ring: for a spot of Gaussian azimuthal profile (standard deviation
σ_φ in radians) the binned variance is that of cells of width 2√π σ_φ (the equivalent width of
the squared spot profile), so M_eff = min(M, 2π / (2√π σ_φ)). A spot is about as wide as the
ring is broad, σ_φ ≈ (FWHM_g / g) / 2.3548. Counting noise adds its own relative variance V_noise, estimated
from the profile's σ (σ_cake ≈ σ_1D·√M for an azimuthal mean); the excess V − V_noise is what
the grains give. The reported N assumes equal spots (c = 0): it is a lower bound when spot
intensities vary. A ring is ``spotty`` when the excess is significant and above
``spotty_min_excess_variance`` (default 0.1, i.e. fewer than about 10 grains per spot width
around the ring: rms fluctuation > 30 %); otherwise ``continuous``.

Texture. Friedel symmetry makes a kinematic ring centrosymmetric, so preferred orientation
shows as even azimuthal harmonics. The ring's I_k/Ī − 1 is fitted by least squares with
cos/sin of 2φ and 4φ; a ring is ``textured`` when the largest harmonic amplitude exceeds
``texture_min_amplitude`` (default 0.15: a ±15 % modulation) and is significant against the
residual scatter, which includes the random grain noise of spotty rings: the amplitude of a
harmonic of pure scatter is Rayleigh distributed, P(A > a) = exp(−a²/2σ_c²), and the
threshold is set for a false-alarm probability ``texture_false_alarm`` (default 10⁻³) over
the two harmonics. The texture direction is the azimuth of
the 2φ maximum, arctan2(b₂, a₂)/2, in degrees modulo 180.

Single-crystal warning: a zone-axis pattern puts at most about a dozen symmetry-equivalent
spots on a "ring", so when the median grain count over rings is below
``single_crystal_max_grains`` (default 12) the pattern is flagged ``single_crystal_pattern``:
ring analysis (d-spacings from azimuthal averages) is then not reliable.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class CharacterThresholds:
    """Thresholds of the ring character (future config keys); see the module docstring."""

    spotty_min_excess_variance: float = 0.1
    texture_min_amplitude: float = 0.15
    significance_sigma: float = 3.0
    texture_false_alarm: float = 1e-3
    single_crystal_max_grains: float = 12.0


@dataclass(frozen=True)
class RingCharacter:
    """Character of one ring: ``continuous``, ``spotty``, ``textured`` or ``unknown``.

    n_grains: estimated number of diffracting grains (∞ for a continuous ring without excess
    variance); relative_variance and noise_variance are V and V_noise of the module docstring;
    texture_amplitude the largest even-harmonic amplitude (relative), texture_order its order
    (2 or 4), texture_direction_deg the azimuth of maximum intensity (2φ term); coverage the
    fraction of azimuthal bins with data.
    """

    character: str
    n_grains: float = math.nan
    relative_variance: float = math.nan
    noise_variance: float = math.nan
    texture_amplitude: float = math.nan
    texture_order: int = 0
    texture_direction_deg: float = math.nan
    coverage: float = math.nan


UNKNOWN = RingCharacter("unknown")


def ring_character(
    cake: np.ndarray,
    azimuth_deg: np.ndarray,
    g_per_nm: np.ndarray,
    sigma_1d: np.ndarray,
    background_1d: np.ndarray,
    ring,
    thresholds: CharacterThresholds = CharacterThresholds(),
) -> RingCharacter:
    """Character of one ring from the cake (see module docstring for the statistics)."""
    g = np.asarray(g_per_nm, dtype=float)
    if not (
        math.isfinite(ring.g_per_nm) and ring.g_per_nm > 0 and math.isfinite(ring.fwhm_per_nm) and ring.fwhm_per_nm > 0
    ):
        return UNKNOWN
    cols = np.nonzero(np.abs(g - ring.g_per_nm) <= 0.5 * ring.fwhm_per_nm)[0]
    if cols.size == 0:
        cols = np.array([int(np.argmin(np.abs(g - ring.g_per_nm)))])
    block = np.asarray(cake, dtype=float)[:, cols] - np.asarray(background_1d, dtype=float)[cols][None, :]
    n_cols = np.sum(np.isfinite(block), axis=1)
    valid = n_cols > 0
    n_az = block.shape[0]
    m = int(valid.sum())
    if m < 8:
        return UNKNOWN
    intensity = np.nansum(block[valid], axis=1) / n_cols[valid]
    mean = float(np.mean(intensity))
    if not mean > 0:
        return UNKNOWN
    # counting noise of one cake bin from the azimuthal-mean σ: σ_cake ≈ σ_1D √M
    noise_var_bins = np.asarray(sigma_1d, dtype=float)[cols] ** 2 * m
    noise_var = float(np.mean(noise_var_bins) / np.mean(n_cols[valid]))
    v_obs = float(np.var(intensity, ddof=1)) / mean**2
    v_noise = noise_var / mean**2
    v_excess = v_obs - v_noise
    v_sigma = v_obs * math.sqrt(2.0 / (m - 1))
    sigma_phi = ring.fwhm_per_nm / ring.g_per_nm / (2.0 * math.sqrt(2.0 * math.log(2.0)))
    m_eff = min(float(n_az), 2.0 * math.pi / (2.0 * math.sqrt(math.pi) * sigma_phi))
    spotty = v_excess > thresholds.significance_sigma * v_sigma and v_excess > thresholds.spotty_min_excess_variance
    n_grains = m_eff / v_excess if v_excess > 0 else math.inf

    # even harmonics (Friedel symmetry): least squares on the valid bins
    phi = np.deg2rad(np.asarray(azimuth_deg, dtype=float)[valid])
    rel = intensity / mean - 1.0
    design = np.column_stack([np.cos(2 * phi), np.sin(2 * phi), np.cos(4 * phi), np.sin(4 * phi)])
    coef, *_ = np.linalg.lstsq(design, rel, rcond=None)
    resid = rel - design @ coef
    resid_var = float(np.sum(resid**2) / max(m - 4, 1))
    independent = min(m, m_eff * m / n_az)
    if not (math.isfinite(resid_var) and independent > 0):
        return UNKNOWN
    # σ of one harmonic amplitude from the scatter; bins within one spot width are correlated,
    # so at most M_eff·coverage of them are independent
    amp_sigma = math.sqrt(2.0 * resid_var / independent)
    amps = [math.hypot(coef[0], coef[1]), math.hypot(coef[2], coef[3])]
    best = int(np.argmax(amps))
    amp = amps[best]
    direction = (math.degrees(math.atan2(coef[1], coef[0])) / 2.0) % 180.0
    # the amplitude of a harmonic of pure scatter is Rayleigh distributed: P(A > a) = exp(−a²/2σ²)
    amp_threshold = amp_sigma * math.sqrt(-2.0 * math.log(thresholds.texture_false_alarm / 2.0))
    textured = amp > thresholds.texture_min_amplitude and amp > amp_threshold
    character = "textured" if textured else ("spotty" if spotty else "continuous")
    return RingCharacter(
        character=character,
        n_grains=float(n_grains),
        relative_variance=v_obs,
        noise_variance=v_noise,
        texture_amplitude=float(amp),
        texture_order=2 * (best + 1),
        texture_direction_deg=float(direction),
        coverage=m / n_az,
    )


def pattern_character(
    profile,
    rings,
    background: np.ndarray,
    thresholds: CharacterThresholds = CharacterThresholds(),
) -> tuple[tuple[RingCharacter, ...], tuple[str, ...]]:
    """Character of every ring of a profile with a cake, and pattern-level flags.

    Returns ``unknown`` for every ring when the profile has no cake. Halos are not characterised
    (kind "halo" → ``unknown``). Flags: ``single_crystal_pattern`` (module docstring),
    ``textured`` when most rings are textured.
    """
    if profile.cake is None or profile.azimuth_deg is None:
        return tuple(UNKNOWN for _ in rings), ()
    cake = np.asarray(profile.cake, dtype=float)
    if cake.ndim != 2 or cake.shape[1] != np.asarray(profile.g_per_nm).size:
        raise ValueError(
            f"cake shape {cake.shape} does not match the g grid ({np.asarray(profile.g_per_nm).size} bins)"
        )
    out = []
    for r in rings:
        if r.kind != "ring":
            out.append(UNKNOWN)
            continue
        out.append(
            ring_character(cake, profile.azimuth_deg, profile.g_per_nm, profile.sigma, background, r, thresholds)
        )
    flags = []
    grains = [c.n_grains for c in out if c.character != "unknown"]
    if grains and float(np.median(grains)) < thresholds.single_crystal_max_grains:
        flags.append("single_crystal_pattern")
    known = [c for c in out if c.character != "unknown"]
    if known and sum(c.character == "textured" for c in known) > len(known) / 2:
        flags.append("textured")
    return tuple(out), tuple(flags)
