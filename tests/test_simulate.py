"""Tests of the pattern simulator (ringid.synthetic.simulate)."""

import math

import numpy as np
import pytest

from ringid.profile.lineshape import unit_pseudo_voigt as pseudo_voigt, voigt_as_pseudo_voigt as pseudo_voigt_fwhm
from ringid.synthetic.simulate import simulate_pattern

# source: pyFAI calibrant table "Au" (a = 4.0782 Å), first ring d(111)
AU_111_ANGSTROM = 2.35454987


def test_same_seed_same_image_and_different_seed_differs():
    kw = dict(camera_constant_A_px=500.0, shape=(128, 160), hot_pixel_fraction=1e-3)
    a = simulate_pattern([AU_111_ANGSTROM], [100], seed=5, **kw).image
    b = simulate_pattern([AU_111_ANGSTROM], [100], seed=5, **kw).image
    c = simulate_pattern([AU_111_ANGSTROM], [100], seed=6, **kw).image
    assert a.dtype == np.uint16 and a.shape == (128, 160)
    assert np.array_equal(a, b)
    assert not np.array_equal(a, c)


def _peak_along(image, cx, cy, angle_deg, r_lo, r_hi):
    """Sub-pixel peak radius along a ray, by bilinear sampling at 0.01 px steps."""
    from scipy import ndimage

    r = np.arange(r_lo, r_hi, 0.01)
    t = math.radians(angle_deg)
    x, y = cx + r * math.cos(t), cy + r * math.sin(t)
    v = ndimage.map_coordinates(image.astype(float), [y, x], order=3)
    return r[np.argmax(v)]


@pytest.mark.parametrize("eps,angle", [(0.0, 0.0), (0.04, 30.0)])
def test_ring_drawn_at_contract_radius_and_axes(eps, angle):
    k = 800.0
    sim = simulate_pattern([AU_111_ANGSTROM], [100], camera_constant_A_px=k, shape=(900, 900),
                           center_x_px=440.3, center_y_px=455.8, ellipticity=eps, ellipse_angle_deg=angle,
                           instrument_fwhm_per_nm=0.1, noise=False, direct_beam=False, dtype="float32",
                           background_counts=0.0, floor_counts=0.0, ring_area_counts_per_nm=1000.0)
    radius = k / AU_111_ANGSTROM  # d = K / R
    a, b = radius / math.sqrt(1 - eps), radius * math.sqrt(1 - eps)
    g = sim.geometry
    along_major = _peak_along(sim.image, g.center_x_px, g.center_y_px, angle, radius - 20, radius + 20)
    along_minor = _peak_along(sim.image, g.center_x_px, g.center_y_px, angle + 90, radius - 20, radius + 20)
    # pixel-sampled peak: within 0.1 px of the analytic semi-axes
    assert along_major == pytest.approx(a, abs=0.1)
    assert along_minor == pytest.approx(b, abs=0.1)
    assert g.camera_constant_A_px == k and g.ellipticity == eps


def test_poisson_noise_scales_with_dose():
    kw = dict(camera_constant_A_px=100.0, shape=(256, 256), direct_beam=False, ring_area_counts_per_nm=0.0,
              background_counts=0.0)
    for dose in (1.0, 0.2):
        img = simulate_pattern([AU_111_ANGSTROM], [100], floor_counts=50.0, dose=dose, seed=1, **kw).image
        x = img.astype(float)
        # source: Poisson statistics, variance = mean
        assert x.mean() == pytest.approx(50.0 * dose, rel=0.01)
        assert x.var() == pytest.approx(x.mean(), rel=0.03)


def test_direct_beam_saturates_uint16_and_float_output():
    sim = simulate_pattern([AU_111_ANGSTROM], [100], camera_constant_A_px=300.0, shape=(200, 200))
    assert sim.image.max() == 65535
    f = simulate_pattern([AU_111_ANGSTROM], [100], camera_constant_A_px=300.0, shape=(200, 200), dtype="float32",
                         saturation_level=30000.0)
    assert f.image.dtype == np.float32 and f.image.max() == 30000.0


def test_beam_stop_shadow_and_defects():
    sim = simulate_pattern([AU_111_ANGSTROM], [100], camera_constant_A_px=300.0, shape=(256, 256), beam_stop=True,
                           beam_stop_radius_px=20, beam_stop_angle_deg=0.0, hot_pixel_fraction=1e-3,
                           dead_pixel_fraction=1e-3, seed=2)
    img = sim.image.astype(float)
    assert sim.beam_stop[128, 250]  # the rod reaches the +x edge
    assert not sim.beam_stop[128, 5]
    assert np.median(img[sim.beam_stop]) < 0.05 * np.median(img[~sim.beam_stop])
    assert sim.hot_pixels.size == sim.dead_pixels.size == round(1e-3 * 256 * 256)
    assert np.all(img.reshape(-1)[sim.dead_pixels] == 0)


def test_pseudo_voigt_unit_area_and_tch_limits():
    x = np.linspace(-50, 50, 200001)
    for eta in (0.0, 0.5, 1.0):
        area = np.trapezoid(pseudo_voigt(x, 0.2, eta), x)
        assert area == pytest.approx(1.0, abs=3e-3 if eta else 1e-6)  # Lorentz tails beyond ±50 cut
    # source: Thompson, Cox & Hastings (1987): pure Gaussian / pure Lorentzian limits
    assert pseudo_voigt_fwhm(0.1, 0.0) == pytest.approx((0.1, 0.0))
    total, eta = pseudo_voigt_fwhm(0.0, 0.1)
    assert total == pytest.approx(0.1) and eta == pytest.approx(1.36603 - 0.47719 + 0.11116)


def test_spotty_and_textured_rings_are_modulated_in_azimuth():
    kw = dict(camera_constant_A_px=400.0, shape=(400, 400), noise=False, direct_beam=False, dtype="float32",
              background_counts=0.0, floor_counts=0.0)
    smooth = simulate_pattern([AU_111_ANGSTROM], [100], **kw).image
    spotty = simulate_pattern([AU_111_ANGSTROM], [100], n_grains=30, seed=3, **kw).image
    r = 400 / AU_111_ANGSTROM
    t = np.linspace(0, 2 * np.pi, 720, endpoint=False)
    yy = np.clip(np.rint(199.5 + r * np.sin(t)).astype(int), 0, 399)
    xx = np.clip(np.rint(199.5 + r * np.cos(t)).astype(int), 0, 399)
    cv_smooth = smooth[yy, xx].std() / smooth[yy, xx].mean()
    cv_spotty = spotty[yy, xx].std() / spotty[yy, xx].mean()
    assert cv_spotty > 5 * max(cv_smooth, 0.02)
    # the azimuthal mean is kept: total ring intensity about the same
    assert spotty.sum() == pytest.approx(smooth.sum(), rel=0.02)


@pytest.mark.parametrize("eps, angle", [(0.0, 0.0), (0.012, 28.0), (0.025, -35.0), (0.04, 90.0), (0.3, 61.0)])
def test_simulator_distortion_agrees_with_the_analysis_ellipse(eps, angle):
    """Two implementations of the distortion of docs/design.md ("Conventions"): the simulator's own
    forward model (simulate.true_offsets) and the analysis's map (ringid.image.ellipse)."""
    from ringid.image.ellipse import distortion_matrix, undistorted_offsets
    from ringid.synthetic.simulate import true_offsets

    shape, cx, cy = (96, 120), 57.3, 41.8
    ux, uy = true_offsets(shape, cx, cy, eps, angle)
    vx, vy = undistorted_offsets(shape, cx, cy, eps, angle)
    # float32 arithmetic on offsets up to ~100 px: agreement to a few float32 ulps (2^-23 relative)
    assert np.allclose(ux, vx, rtol=0, atol=1e-4) and np.allclose(uy, vy, rtol=0, atol=1e-4)
    # and both with the convention itself: points of the ellipse with semi-axes a = R/√(1−ε) along θ and
    # b = R·√(1−ε) across it map to true radius R; the analysis's forward matrix draws them there
    r_true, t = 40.0, math.radians(angle)
    phi = np.linspace(0, 2 * math.pi, 13)
    a, b = r_true / math.sqrt(1 - eps), r_true * math.sqrt(1 - eps)
    px = a * np.cos(phi) * math.cos(t) - b * np.sin(phi) * math.sin(t)
    py = a * np.cos(phi) * math.sin(t) + b * np.sin(phi) * math.cos(t)
    # pixel (row, col) = (cy + py, cx + px) only at integer positions: evaluate the maps on a grid shifted
    # so that each point is a pixel centre
    for x, y in zip(px, py):
        u = true_offsets((1, 1), -x, -y, eps, angle)
        assert math.hypot(float(u[0][0, 0]), float(u[1][0, 0])) == pytest.approx(r_true, abs=1e-4)
    u_pts = np.linalg.solve(distortion_matrix(eps, angle), np.vstack([px, py]))
    assert np.allclose(np.hypot(*u_pts), r_true, atol=1e-9)
