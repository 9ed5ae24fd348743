"""Tests of azimuthal integration (ringid.image.integrate) against the contract geometry and pyFAI itself."""

import numpy as np
import pytest

from ringid.image.integrate import affine_corrected_corners, g_array, integrate_profile
from ringid.core.model import Geometry
from ringid.synthetic.simulate import simulate_pattern

# source: pyFAI calibrant table "Au", d(111) in Å
AU_111_ANGSTROM = 2.35454987


def _ring_centroid(profile, g0, half=0.15):
    g, y = profile.g_per_nm, profile.intensity
    sel = np.abs(g - g0) < half
    base = np.interp(g[sel], [g[sel][0], g[sel][-1]], [y[sel][0], y[sel][-1]])
    w = y[sel] - base
    return float((w * g[sel]).sum() / w.sum())


@pytest.fixture(scope="module")
def elliptical_ring():
    return simulate_pattern([AU_111_ANGSTROM], [100], camera_constant_A_px=900.0, shape=(768, 768),
                            ellipticity=0.04, ellipse_angle_deg=30.0, center_x_px=390.2, center_y_px=370.7,
                            noise=False, direct_beam=False, dtype="float32", instrument_fwhm_per_nm=0.08)


def test_elliptical_ring_integrates_to_its_true_radius(elliptical_ring):
    sim = elliptical_ring
    prof = integrate_profile(sim.image, None, sim.geometry)
    g_true = 10.0 / AU_111_ANGSTROM  # source: docs/design.md, g = 1/d in 1/nm
    # 0.01 px of radius at K = 900 Å·px is 1.1e-4 1/nm
    assert _ring_centroid(prof, g_true) == pytest.approx(g_true, abs=1.1e-4)
    # the distortion is fully undone: the ring is at the same g in every azimuth bin of the cake
    near = np.abs(prof.g_per_nm - g_true) < 0.15
    i_peak = int(np.flatnonzero(near)[np.nanargmax(prof.intensity[near])])
    row = prof.cake[:, i_peak]
    assert np.nanstd(row) / np.nanmean(row) < 0.01
    assert prof.cake.shape == (72, prof.g_per_nm.size)
    # without the distortion correction the same ring is smeared (a check that the test can fail)
    naive = integrate_profile(sim.image, None, Geometry(sim.geometry.center_x_px, sim.geometry.center_y_px,
                                                        camera_constant_A_px=900.0), with_cake=False)
    near_naive = np.abs(naive.g_per_nm - g_true) < 0.15
    assert np.nanmax(naive.intensity[near_naive]) < 0.7 * prof.intensity[i_peak]


def test_radial_route_agrees_with_pyfai_corner_detector(elliptical_ring):
    sim = elliptical_ring
    a = integrate_profile(sim.image, None, sim.geometry, with_cake=False)
    b = integrate_profile(sim.image, None, sim.geometry, with_cake=False, method="corners")
    g_true = 10.0 / AU_111_ANGSTROM
    assert _ring_centroid(b, g_true) == pytest.approx(_ring_centroid(a, g_true), abs=1.1e-4)
    n = min(a.g_per_nm.size, b.g_per_nm.size)
    assert np.allclose(a.g_per_nm[:n], b.g_per_nm[:n])


def test_corner_array_layout():
    c = affine_corrected_corners((3, 4), 1.0, 1.0, 0.0, 0.0, pixel_size_m=1.0)
    # pyFAI layout: corners (i,k), (i+1,k), (i+1,k+1), (i,k+1) of pixel [i,k], coordinates z, y, x
    assert c.shape == (3, 4, 4, 3)
    assert np.allclose(c[2, 3, :, 1], [2, 3, 3, 2]) and np.allclose(c[2, 3, :, 2], [3, 3, 4, 4])
    assert np.all(c[..., 0] == 0)


def test_poisson_uncertainty_and_mask():
    rng = np.random.default_rng(2)
    img = rng.poisson(100.0, (256, 256)).astype(np.float32)
    geom = Geometry(127.5, 127.5, camera_constant_A_px=500.0)
    mask = np.zeros(img.shape, bool)
    mask[:, :128] = True
    prof = integrate_profile(img, mask, geom, with_cake=False)
    g = g_array(img.shape, geom)
    step = prof.g_per_nm[1] - prof.g_per_nm[0]
    i = 60
    in_bin = (~mask) & (np.abs(g - prof.g_per_nm[i]) <= step / 2)
    # source: Poisson statistics, the standard error of a mean of n counts ~ sqrt(mean / n)
    assert prof.sigma[i] == pytest.approx(np.sqrt(img[in_bin].mean() / in_bin.sum()), rel=0.05)
    assert prof.intensity[i] == pytest.approx(img[in_bin].mean(), rel=1e-4)
    assert np.nanmean(prof.intensity) == pytest.approx(100.0, rel=0.01)


def test_process_image_sample_and_halo_only(tmp_path):
    import tifffile

    from ringid.image.stage import process_image

    cal = Geometry(300.0, 300.0, 0.02, 40.0, camera_constant_A_px=600.0, voltage_kv=200.0)
    # source: pyFAI calibrant table "Al" d(111), d(200), d(220), d(311)
    d_al = [2.33803, 2.0248, 1.43174, 1.22098]
    sim = simulate_pattern(d_al, [100, 50, 30, 30], shape=(768, 768), camera_constant_A_px=600.0, ellipticity=0.02,
                           ellipse_angle_deg=40.0, center_x_px=400.4, center_y_px=370.9, beam_stop=True, seed=9)
    p = tmp_path / "al.tif"
    tifffile.imwrite(p, sim.image)
    res = process_image(p, cal)
    g = res.geometry
    assert abs(g.center_x_px - 400.4) < 0.1 and abs(g.center_y_px - 370.9) < 0.1
    assert g.ellipticity == 0.02 and g.camera_constant_A_px == 600.0
    assert res.mask.n_beam_stop > 0 and set(res.timings_s) == {"load", "mask", "center", "integrate"}
    peak = res.profile.g_per_nm[np.nanargmax(np.where(res.profile.g_per_nm > 3.0, res.profile.intensity, np.nan))]
    assert peak == pytest.approx(10.0 / d_al[0], abs=0.02)
    # a broad halo only (amorphous film): no ring to centre on is not an error
    halo = simulate_pattern([2.0], [1.0], shape=(512, 512), camera_constant_A_px=400.0, center_x_px=260.0,
                            center_y_px=250.0, ring_area_counts_per_nm=0.0,
                            halo=lambda gg: 400.0 * np.exp(-0.5 * ((gg - 4.0) / 0.6) ** 2), seed=10)
    q = tmp_path / "halo.npy"
    np.save(q, halo.image)
    res2 = process_image(q, Geometry(255.5, 255.5, camera_constant_A_px=400.0, voltage_kv=200.0))
    assert abs(res2.geometry.center_x_px - 260.0) < 2.0 and abs(res2.geometry.center_y_px - 250.0) < 2.0
    assert np.nanmax(res2.profile.intensity[res2.profile.g_per_nm > 2.0]) > 100
