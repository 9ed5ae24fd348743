"""Tests of ringid.sample.size: Voigt-aware instrument removal and Scherrer (sphere diameter, K = 4/3)."""

import math

import numpy as np
import pytest
from scipy.special import voigt_profile

from ringid.core.model import Profile
from ringid.profile.rings import FittedRing, analyze_profile, pseudo_voigt
from ringid.sample.size import (
    K_SPHERE_DIAMETER,
    InstrumentProfile,
    ring_size,
    sample_breadth,
    sample_size,
    voigt_breadths_from_shape,
    voigt_integral_breadth,
)

SQRT_2LN2 = math.sqrt(2 * math.log(2))


def sphere_line_profile(x_per_nm, diameter_nm):
    """Unit-area size-broadening profile of spheres of diameter D: the Fourier transform of the
    common-volume function V(L) = (π/12)(D − L)²(2D + L) (Stokes & Wilson 1942)."""
    length = np.linspace(0.0, diameter_nm, 3001)
    volume = (np.pi / 12) * (diameter_nm - length) ** 2 * (2 * diameter_nm + length)
    weight = np.full_like(length, length[1] - length[0])
    weight[[0, -1]] *= 0.5
    return 2 * np.cos(2 * np.pi * np.multiply.outer(x_per_nm, length)) @ (volume * weight) / volume[0]


def test_sphere_constant_from_the_common_volume_function():
    # source: Langford & Wilson 1978, J. Appl. Cryst. 11, 102, Table: sphere diameter, integral
    # breadth K = 4/3 (1/β = ¾D, Stokes & Wilson 1942); computed here from V(L)
    for diameter in (3.0, 12.0):
        x = np.linspace(-40 / diameter, 40 / diameter, 4001)
        p = sphere_line_profile(x, diameter)
        assert 1.0 / p.max() == pytest.approx(4.0 / (3.0 * diameter), rel=1e-4)
    assert K_SPHERE_DIAMETER == pytest.approx(4.0 / 3.0)


def test_de_keijser_split_at_its_limits():
    # source: de Keijser et al. 1982, J. Appl. Cryst. 15, 308: the two formulas give β_L = β at
    # φ = 2/π (Lorentzian) and β_G = β at φ = 2√(ln2/π) (Gaussian), to their fitting accuracy
    bl, bg = voigt_breadths_from_shape(1.0, 2 / math.pi)
    assert bl == pytest.approx(1.0, abs=0.01) and bg == pytest.approx(0.0, abs=0.01)
    bl, bg = voigt_breadths_from_shape(1.0, 2 * math.sqrt(math.log(2) / math.pi))
    assert bl == pytest.approx(0.0, abs=0.01) and bg == pytest.approx(1.0, abs=0.01)


def test_voigt_breadth_against_scipy_voigt():
    # source: scipy.special.voigt_profile (Faddeeva function): β = area/height = 1/V(0)
    for sigma, gamma in [(0.02, 0.0), (0.02, 0.01), (0.01, 0.03), (1e-9, 0.02)]:
        beta_g = sigma * math.sqrt(2 * math.pi)  # Gaussian integral breadth
        beta_l = math.pi * gamma  # Lorentzian integral breadth (γ = HWHM)
        assert voigt_integral_breadth(beta_l, beta_g) == pytest.approx(1 / voigt_profile(0.0, sigma, gamma), rel=1e-6)


def _tch_pseudo_voigt(fwhm_g, fwhm_l):
    """Thompson, Cox & Hastings 1987 (J. Appl. Cryst. 20, 79) pV FWHM and η of a Voigt."""
    f = (
        fwhm_g**5
        + 2.69269 * fwhm_g**4 * fwhm_l
        + 2.42843 * fwhm_g**3 * fwhm_l**2
        + 4.47163 * fwhm_g**2 * fwhm_l**3
        + 0.07842 * fwhm_g * fwhm_l**4
        + fwhm_l**5
    ) ** 0.2
    r = fwhm_l / f
    return f, 1.36603 * r - 0.47719 * r**2 + 0.11116 * r**3


def test_instrument_removal_of_voigts():
    """Voigt ⊗ Voigt is a Voigt with Lorentzian widths added and Gaussian ones in quadrature."""
    instr_g, instr_l = 0.025, 0.01  # FWHM in 1/nm
    for size_l, size_g in [(0.05, 0.0), (0.2, 0.0), (0.03, 0.02), (0.0, 0.05)]:
        obs_g, obs_l = math.hypot(instr_g, size_g), instr_l + size_l
        f_obs, e_obs = _tch_pseudo_voigt(obs_g, obs_l)
        f_ins, e_ins = _tch_pseudo_voigt(instr_g, instr_l)
        expected = voigt_integral_breadth(math.pi / 2 * size_l, size_g * math.sqrt(math.pi / (4 * math.log(2))))
        assert sample_breadth(f_obs, e_obs, f_ins, e_ins) == pytest.approx(float(expected), rel=0.04)


def _size_background(g):
    """The smooth tail under the rings of :func:`_size_profile`."""
    return 300 * g**-2.5 + 1.0


def _size_profile(diameter_nm, instrument, rng, ring_shape):
    g = np.arange(1.5, 12.0, 0.01)
    y = _size_background(g)
    dx = 0.002
    x = np.arange(-6, 6 + dx / 2, dx)
    ins = pseudo_voigt(x, 0.0, instrument.fwhm_c0_per_nm, instrument.eta)
    shape = np.convolve(ring_shape(x, diameter_nm), ins, mode="same") * dx
    for g0, area in [(4.25, 2.0), (4.9, 1.0), (6.94, 0.8), (8.13, 0.8)]:
        y = y + area * np.interp(g - g0, x, shape)
    pixels = 20.0 * g
    counts = rng.poisson(y * pixels)
    return Profile(g, counts / pixels, np.sqrt(np.maximum(counts, 1)) / pixels)


def _lorentzian_size(x, diameter_nm):
    beta = K_SPHERE_DIAMETER / diameter_nm  # Lorentzian of integral breadth K/D
    return pseudo_voigt(x, 0.0, 2 * beta / math.pi, 1.0)


@pytest.mark.parametrize("diameter_nm", [3.0, 5.0, 10.0, 20.0, 30.0])
def test_scherrer_size_back_within_10_percent(diameter_nm):
    """Size broadening of integral breadth K/D (Lorentzian), instrument pV 0.03 nm⁻¹, Poisson noise."""
    instrument = InstrumentProfile(0.03, 0.0, 0.5)
    profile = _size_profile(diameter_nm, instrument, np.random.default_rng(3), _lorentzian_size)
    size = analyze_profile(profile, instrument=instrument).size
    # the project's target (docs/design.md, Targets): within 10 %; the shape constant K = 4/3 (sphere diameter on
    # the integral
    # breadth) is from Langford & Wilson 1978, J. Appl. Cryst. 11, 102
    assert size.size_nm == pytest.approx(diameter_nm, rel=0.10)


@pytest.mark.parametrize("diameter_nm", [3.0, 5.0, 10.0, 20.0, 30.0])
def test_scherrer_on_the_sphere_size_profile(diameter_nm):
    """The physical sphere profile (1/s² tails, not a pseudo-Voigt). A pV fit misses part of the
    tails and the clipped background takes some more, so D comes back high: measured +7 … +17 %
    over 3–30 nm (the ideal noise-free pV fit alone gives +5 %). Asserted: within +20 %."""
    instrument = InstrumentProfile(0.03, 0.0, 0.5)
    profile = _size_profile(diameter_nm, instrument, np.random.default_rng(3), sphere_line_profile)
    analysis = analyze_profile(profile, instrument=instrument)
    assert analysis.crystallinity.label == "crystalline"
    assert 0.97 * diameter_nm < analysis.size.size_nm < 1.20 * diameter_nm


def _ring(fwhm, eta=0.5, rel_sigma=0.02, g=5.0):
    beta = fwhm / (eta * 2 / math.pi + (1 - eta) * 2 * math.sqrt(math.log(2) / math.pi))
    return FittedRing(
        g, 1e-4, fwhm, fwhm * rel_sigma, eta, 1.0, 0.01, "ring", 50.0, 0.01, beta, beta * rel_sigma, 1.0 / beta
    )


def test_ring_as_sharp_as_the_instrument_gives_a_lower_limit():
    instrument = InstrumentProfile(0.03, 0.0, 0.5)
    s = ring_size(_ring(0.0302), instrument)
    assert s.is_lower_limit and not math.isfinite(s.size_nm)
    assert s.lower_limit_nm > 30  # K/β with β < 2σ of a 0.03 nm⁻¹ ring
    est, _ = sample_size([_ring(0.0302), _ring(0.0299, g=7.0)], instrument)
    assert est.is_lower_limit and est.text().startswith("> ")
    # without an instrument width, K/β_obs is itself a lower limit
    est, _ = sample_size([_ring(0.1)], None)
    assert est.is_lower_limit


def test_sample_size_is_weighted_in_breadth_space():
    instrument = InstrumentProfile(0.02, 0.0, 0.0)
    rings = [_ring(0.15, rel_sigma=0.01), _ring(0.15, rel_sigma=0.05, g=7.0)]
    est, per_ring = sample_size(rings, instrument)
    assert est.n_rings == 2
    assert est.size_nm == pytest.approx(per_ring[0].size_nm, rel=1e-6)  # identical rings
    assert est.size_sigma_nm < per_ring[0].size_sigma_nm
    halo = FittedRing(3.0, 0.01, 1.0, 0.05, 0.5, 5.0, 0.1, "halo", 20.0)
    est2, per_ring2 = sample_size(rings + [halo], instrument)
    assert est2.n_rings == 2  # halos do not count
    assert math.isnan(per_ring2[2].size_nm) and math.isnan(per_ring2[2].lower_limit_nm)  # nor have a size


def test_ring_more_gaussian_than_the_instrument_at_its_width_gives_a_lower_limit():
    """A Gaussian ring of the instrument's FWHM has a smaller integral breadth than the pV(η=0.5)
    instrument (Gaussian β = √(π/(4 ln 2))·Γ = 1.0645 Γ < pV β, computed): no size, only a lower limit."""
    instrument = InstrumentProfile(0.05, 0.0, 0.5)
    s = ring_size(_ring(0.05, eta=0.0, rel_sigma=0.002), instrument)
    assert s.is_lower_limit and not math.isfinite(s.size_nm)


def test_rings_as_sharp_as_the_instrument_give_a_lower_limit():
    """Rings drawn with the instrumental profile itself (about 18 per profile, Poisson noise): the
    per-ring sample breadths are ≥ 0 by construction, so their mean over many rings would come
    out "significant" from noise alone (measured before the signed-excess test: 5 finite sizes
    in 40 such profiles). The excess β_obs − β_ins is unbiased (measured z: mean −0.2, sd 1.04),
    so at the 2σ level about 2.3 % of the profiles give a finite size: at most 3 of 40 here
    (binomial, P(> 3) ≈ 1 %)."""
    instrument = InstrumentProfile(0.05, 0.0, 0.5)
    g = np.arange(1.5, 13.0, 0.01)
    finite = 0
    for seed in range(40):
        rng = np.random.default_rng(seed)
        positions = np.sort(rng.uniform(2.5, 12.0, 30))
        positions = positions[np.concatenate([[True], np.diff(positions) > 0.15])]
        y = _size_background(g) + sum(pseudo_voigt(g, g0, 0.05, 0.5, rng.uniform(0.2, 1.0)) for g0 in positions)
        pixels = 20.0 * g
        counts = rng.poisson(y * pixels)
        size = analyze_profile(Profile(g, counts / pixels, np.sqrt(np.maximum(counts, 1)) / pixels),
                               instrument=instrument).size
        assert size.is_lower_limit or math.isfinite(size.size_nm)
        finite += math.isfinite(size.size_nm)
    assert finite <= 3


def test_lower_limit_stops_at_the_resolution_fraction():
    """Rings that are the instrument exactly (noise-free, 20 of them): however precise the fit,
    a sample breadth below a tenth of the instrument's is not claimed (RESOLUTION_FRACTION,
    common practice), so the limit is K/(0.1 β_instr)."""
    from ringid.sample.size import RESOLUTION_FRACTION, pseudo_voigt_breadth

    instrument = InstrumentProfile(0.05, 0.0, 0.0)
    rings = [_ring(0.05, eta=0.0, rel_sigma=2e-4, g=g0) for g0 in np.linspace(3.0, 12.0, 20)]
    size, per_ring = sample_size(rings, instrument)
    limit = K_SPHERE_DIAMETER / (RESOLUTION_FRACTION * float(pseudo_voigt_breadth(0.05, 0.0)))
    assert size.is_lower_limit and size.lower_limit_nm == pytest.approx(limit)  # 250 nm
    assert all(r.is_lower_limit and r.lower_limit_nm <= limit * (1 + 1e-9) for r in per_ring)
