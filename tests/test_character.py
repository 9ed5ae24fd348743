"""Tests of ringid.sample.character on synthetic cakes: continuous, spotty (grain count), textured, single crystal."""

import math

import numpy as np
import pytest

from ringid.sample.character import CharacterThresholds, pattern_character, ring_character
from ringid.core.model import Profile
from ringid.profile.rings import FittedRing, analyze_profile, pseudo_voigt

G = np.arange(2.0, 9.0, 0.01)  # 1/nm
N_AZ = 360
PHI_DEG = (np.arange(N_AZ) + 0.5) * 360.0 / N_AZ
TAIL = 300.0 * G**-2.5 + 0.5
RINGS = [(4.247, 0.04, 2.0), (4.904, 0.04, 1.0), (6.935, 0.045, 0.6)]  # g, FWHM, area


def _spots(n_grains, ring, rng):
    """Azimuthal weight (mean 1) of n equal spots at random azimuths; spot width ≈ FWHM_g/g."""
    g0, fwhm, _ = ring
    sigma = math.degrees(fwhm / g0) / 2.3548
    return _binned_spots(rng.uniform(0.0, 360.0, n_grains), sigma)


def _binned_spots(centers_deg, sigma_deg):
    """Gaussian spots integrated over each 1° azimuthal bin (as a detector bins them)."""
    from scipy.special import erf

    lo = (PHI_DEG[:, None] - 0.5 - centers_deg[None, :] + 180.0) % 360.0 - 180.0
    w = 0.5 * (erf((lo + 1.0) / (np.sqrt(2) * sigma_deg)) - erf(lo / (np.sqrt(2) * sigma_deg)))
    w = w.sum(axis=1)
    return w / w.mean()


def _cake_profile(weights, rng, pixels_per_bin=2.0):
    """Cake (azimuth, g) with Poisson counts, and its azimuthal-mean profile with σ."""
    cake_mean = np.tile(TAIL, (N_AZ, 1))
    for (g0, fwhm, area), w in zip(RINGS, weights):
        cake_mean += w[:, None] * pseudo_voigt(G, g0, fwhm, 0.5, area)[None, :]
    pixels = pixels_per_bin * G[None, :] * np.ones((N_AZ, 1))
    counts = rng.poisson(cake_mean * pixels)
    cake = counts / pixels
    total = pixels.sum(axis=0)
    return Profile(G, counts.sum(axis=0) / total, np.sqrt(np.maximum(counts.sum(axis=0), 1)) / total, cake, PHI_DEG)


def _characters(profile):
    a = analyze_profile(profile, instrument=0.035)
    assert len(a.rings) == len(RINGS)
    return a


def test_continuous_rings():
    rng = np.random.default_rng(1)
    a = _characters(_cake_profile([np.ones(N_AZ)] * 3, rng))
    assert [c.character for c in a.characters] == ["continuous"] * 3
    assert "single_crystal_pattern" not in a.flags


@pytest.mark.parametrize("n_grains", [30, 100, 300])
def test_spotty_rings_and_the_grain_count(n_grains):
    """Monte Carlo check of N = M_eff/V (module docstring): equal spots at random azimuths."""
    rng = np.random.default_rng(n_grains)
    estimates = []
    for _ in range(4):
        weights = [_spots(n_grains, r, rng) for r in RINGS]
        a = _characters(_cake_profile(weights, rng, pixels_per_bin=20.0))
        assert all(c.character == "spotty" for c in a.characters)
        estimates += [c.n_grains for c in a.characters]
    ratio = np.median(estimates) / n_grains
    assert 0.7 < ratio < 1.4, ratio


def test_textured_ring_and_its_direction():
    rng = np.random.default_rng(3)
    arc = 1.0 + 0.5 * np.cos(2 * np.deg2rad(PHI_DEG - 30.0))
    a = _characters(_cake_profile([arc, arc, np.ones(N_AZ)], rng))
    chars = a.characters
    assert chars[0].character == "textured" and chars[1].character == "textured"
    assert chars[2].character == "continuous"
    assert chars[0].texture_order == 2
    assert chars[0].texture_amplitude == pytest.approx(0.5, abs=0.05)
    assert abs((chars[0].texture_direction_deg - 30.0 + 90) % 180 - 90) < 3.0


def test_single_crystal_spot_pattern_is_flagged():
    rng = np.random.default_rng(4)
    # a zone-axis pattern: 4 or 6 symmetry-related spots per ring
    weights = []
    for (g0, fwhm, _), n in zip(RINGS, (4, 4, 6)):
        sigma = math.degrees(fwhm / g0) / 2.3548
        weights.append(_binned_spots(17.0 + np.arange(n) * 360.0 / n, sigma))
    a = _characters(_cake_profile(weights, rng, pixels_per_bin=20.0))
    assert "single_crystal_pattern" in a.flags


def test_no_cake_and_masked_azimuths():
    rng = np.random.default_rng(5)
    p = _cake_profile([np.ones(N_AZ)] * 3, rng)
    bare = Profile(p.g_per_nm, p.intensity, p.sigma)
    assert {c.character for c in analyze_profile(bare, instrument=0.035).characters} == {"unknown"}
    cake = p.cake.copy()
    cake[80:120] = np.nan  # a beam-stop shadow
    ring = FittedRing(4.247, 1e-4, 0.04, 1e-3, 0.5, 2.0, 0.01)
    c = ring_character(cake, PHI_DEG, G, p.sigma, TAIL, ring, CharacterThresholds())
    assert c.character == "continuous" and c.coverage == pytest.approx(320 / 360)
    with pytest.raises(ValueError, match="cake shape"):
        pattern_character(Profile(G, p.intensity, p.sigma, cake[:, :10], PHI_DEG), [ring], TAIL)
