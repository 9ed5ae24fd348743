"""Tests of ringid.synthetic.amorphous: scattering factors, Debye equation, random dense packing halos."""

import numpy as np
import pytest

from ringid.synthetic import amorphous


def test_scattering_factor_matches_gemmi_calculator():
    import gemmi

    g = np.array([0.0, 2.0, 5.0, 10.0, 20.0, 35.0])  # 1/nm, s = g/20 in 1/Å
    for sym in ("C", "Si", "Cu", "Zr", "Au"):
        ours = amorphous.electron_scattering_factor_angstrom(sym, g)
        # source: gemmi's own evaluator of ITC C Table 4.3.2.2, called with stol2 = s²
        ref = [gemmi.Element(sym).c4322.calculate_sf(stol2=(x / 20.0) ** 2) for x in g]
        np.testing.assert_allclose(ours, ref, rtol=1e-5)


def test_scattering_factor_at_zero_is_sum_of_published_carbon_coefficients():
    # source: Peng, Ren, Dudarev & Whelan, Acta Cryst. A52, 257 (1996), as ITC Vol. C Table 4.3.2.2:
    # carbon a_i = .0893 .2563 .757 1.0487 .3575
    f0 = amorphous.electron_scattering_factor_angstrom("C", [0.0])[0]
    assert f0 == pytest.approx(0.0893 + 0.2563 + 0.757 + 1.0487 + 0.3575, abs=2e-4)


def test_debye_equation_against_uniform_sphere_form_factor():
    """For N points uniform in a sphere, E[I(g)] = N + N(N−1)Φ(2πgR)² (Rayleigh 1911 form factor)."""
    rng = np.random.default_rng(3)
    n, radius = 1500, 20.0  # atoms, Å
    g = np.linspace(0.05, 0.6, 12)  # 1/nm; x = 2πgR/10 up to 7.5
    total = np.zeros_like(g)
    trials = 6
    for _ in range(trials):
        pts = rng.normal(size=(4 * n, 3))
        pts = pts / np.linalg.norm(pts, axis=1)[:, None] * radius * rng.uniform(size=(4 * n, 1)) ** (1 / 3)
        total += amorphous.debye_intensity(pts[:n], g, np.ones_like(g))
    mean = total / trials
    x = 2 * np.pi * (g / 10.0) * radius
    expected = n + n * (n - 1) * amorphous.sphere_form_factor(x) ** 2
    # fluctuation of a random-point cluster about its mean is of order N per trial
    assert np.all(np.abs(mean - expected) < 4.0 * n / np.sqrt(trials) + 0.02 * expected)


def test_sphere_form_factor_limits():
    # source: analytic, Φ(x) = 3(sin x − x cos x)/x³ → 1 − x²/10 for small x; first zero at tan x = x, x = 4.4934
    assert amorphous.sphere_form_factor(np.array([1e-4]))[0] == pytest.approx(1.0)
    assert abs(amorphous.sphere_form_factor(np.array([4.493409]))[0]) < 1e-5


def test_random_dense_packing_has_no_overlaps_and_its_density():
    pos, box = amorphous.random_dense_packing(600, 2.5, 0.55, seed=1)
    from scipy.spatial import cKDTree

    d, _ = cKDTree(pos, boxsize=box).query(pos, k=2)
    assert d[:, 1].min() > 0.98 * 2.5
    assert 600 * np.pi * 2.5**3 / 6 / box**3 == pytest.approx(0.55, rel=1e-9)


def test_first_halo_position_follows_contact_distance():
    """Dense-packing halo: Q1·r1 ≈ 7.7 (Ehrenfest relation, r1 ≈ 1.23·d_halo, from memory)."""
    g = np.linspace(1.0, 15.0, 700)
    for diameter in (2.35, 2.8):
        intensity = amorphous.amorphous_halo_profile(g, "Si", diameter_angstrom=diameter, n_atoms=1200)
        s_of_g = intensity / amorphous.electron_scattering_factor_angstrom("Si", g) ** 2
        g1 = g[np.argmax(s_of_g)]
        q1_times_r1 = 2 * np.pi * g1 / 10.0 * diameter
        # source: Ehrenfest (1915) relation, from memory; a 5 % band
        assert q1_times_r1 == pytest.approx(7.725, rel=0.05)
        # the structure factor oscillates about 1 at large g (I/N → f², the self term)
        assert np.mean(s_of_g[g > 10.0]) == pytest.approx(1.0, abs=0.1)
        # dense packings are nearly incompressible: S(g) ≪ 1 below the first peak
        assert np.all(s_of_g[(g > 1.0) & (g < 2.0)] < 0.3)


def test_halo_width_is_amorphous_like():
    """First halo FWHM of S(g) of order 1 nm⁻¹ in g (common practice, from memory: first halos have
    Δ(1/d) ≈ 0.5–1 nm⁻¹)."""
    g = np.linspace(2.0, 8.0, 601)
    s_of_g = (
        amorphous.amorphous_halo_profile(g, "Si", n_atoms=1200)
        / amorphous.electron_scattering_factor_angstrom("Si", g) ** 2
    )
    i = int(np.argmax(s_of_g))
    half = 1.0 + 0.5 * (s_of_g[i] - 1.0)
    above = np.nonzero(s_of_g > half)[0]
    width = g[above[-1]] - g[above[0]]
    assert 0.4 < width < 1.5


def test_two_element_glass_and_bad_input():
    g = np.linspace(2.0, 10.0, 50)
    intensity = amorphous.amorphous_halo_profile(g, {"Cu": 0.5, "Zr": 0.5}, diameter_angstrom=2.8, n_atoms=800)
    assert np.all(np.isfinite(intensity)) and intensity.max() > 0
    with pytest.raises(ValueError):
        amorphous.random_dense_packing(100, 2.5, 0.7)
    with pytest.raises(ValueError):
        amorphous.amorphous_halo_profile(g, {"Cu": -1.0})


def test_extended_film_has_no_small_angle_oscillations():
    """The periodic (Faber–Ziman) pair sum has no outer surface: below the first halo the
    scattering of a-TiO2 falls smoothly with g (a cluster cut from the box, even with the
    continuum-sphere term subtracted, shows bumps of its rough surface there)."""
    g = np.linspace(0.2, 3.5, 200)
    comp = {"Ti": 1 / 3, "O": 2 / 3}
    intensity = amorphous.amorphous_halo_profile(g, comp, diameter_angstrom=1.95, packing_fraction=0.58, seed=3)
    assert np.all(np.diff(intensity) < 1e-3 * intensity.max())
    # and S(g) = I/⟨f⟩² − (⟨f²⟩ − ⟨f⟩²)/⟨f⟩² stays far below 1 there (dense packings are nearly
    # incompressible)
    f_ti = amorphous.electron_scattering_factor_angstrom("Ti", g)
    f_o = amorphous.electron_scattering_factor_angstrom("O", g)
    mean_f, mean_f2 = (f_ti + 2 * f_o) / 3, (f_ti**2 + 2 * f_o**2) / 3
    s_of_g = (intensity - (mean_f2 - mean_f**2)) / mean_f**2
    assert np.all(s_of_g[g > 0.5] < 0.3)


def test_periodic_sum_of_an_ideal_gas_is_the_self_term():
    """Uniform random points (no correlations): S(g) = 1, so I/N = f² within the noise."""
    rng = np.random.default_rng(5)
    box, n = 30.0, 3000
    g = np.linspace(3.0, 12.0, 10)
    intensity = amorphous.periodic_structure_intensity(rng.uniform(0, box, (n, 3)), box, g, np.ones_like(g))
    assert np.all(np.abs(intensity - 1.0) < 0.1)
