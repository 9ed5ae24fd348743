"""Tests of the automatic masks (ringid.image.mask)."""

import numpy as np
import pytest
import tifffile

from ringid.core.errors import RingidError
from ringid.image.mask import border_mask, build_mask, load_user_mask, noise_gain, outlier_pixel_mask, saturated_mask
from ringid.synthetic.simulate import simulate_pattern

# source: pyFAI calibrant table "Au": d(111), d(200), d(220), d(311), d(222) in Å
AU_D = [2.35454987, 2.0391, 1.44186144, 1.22962357, 1.17727493]
# source: Au kinematic mean-profile areas 111..222 (Σ|F|²d², B = 0.6 Å²), computed with gemmi's
# StructureFactorCalculatorE (ITC Vol. C Table 4.3.2.2 factors)
AU_I = [100, 45.5, 23.5, 23.4, 6.4]


def test_noise_gain_of_poisson_counts_is_one():
    rng = np.random.default_rng(1)
    img = rng.poisson(40.0, (256, 256)).astype(np.float32)
    # source: Poisson statistics, variance = mean
    assert noise_gain(img) == pytest.approx(1.0, rel=0.05)
    assert noise_gain(img * 3) == pytest.approx(3.0, rel=0.05)


def test_saturated_grown_by_one_pixel():
    a = np.zeros((64, 64), np.float32)
    a[10, 10] = 255
    m = saturated_mask(a, 255)
    assert m.sum() == 9 and m[9:12, 9:12].all()


def test_hot_and_dead_pixels_found_but_ring_crests_kept():
    sim = simulate_pattern(AU_D, AU_I, camera_constant_A_px=400.0, shape=(512, 512), hot_pixel_fraction=5e-4,
                           instrument_fwhm_per_nm=0.04, ring_area_counts_per_nm=400.0, seed=4)
    img = sim.image.astype(np.float32)
    sat = img >= 65535
    hot, dead = outlier_pixel_mask(img, ~sat)
    truth = np.zeros(img.size, bool)
    truth[sim.hot_pixels] = True
    found = hot.reshape(-1)
    # a hot pixel next to a ring crest of similar brightness cannot be told apart: ≥ 97 % found
    assert found[truth & ~sat.reshape(-1)].mean() >= 0.97
    assert (found & ~truth).sum() <= 2  # false alarms (ring crests are sharp: about 3 px FWHM here)
    # dead pixels in a bright flat field are found
    flat = np.random.default_rng(5).poisson(500.0, (128, 128)).astype(np.float32)
    flat[50, 60] = 0
    flat[0, 0] = 0
    hot2, dead2 = outlier_pixel_mask(flat)
    assert dead2[50, 60] and dead2[0, 0] and dead2.sum() == 2 and hot2.sum() == 0


def test_border_and_constant_padding():
    a = np.random.default_rng(0).random((80, 90)).astype(np.float32)
    a[:, -5:] = 0  # zero padding on the right
    m = border_mask(a, 2)
    assert m[:, -5:].all() and m[:2].all() and m[:, :2].all()
    assert not m[40, 40] and not m[40, 84 - 2]


@pytest.mark.parametrize("angle,dose", [(300.0, 1.0), (135.0, 0.05)])
def test_beam_stop_shadow_is_masked(angle, dose):
    sim = simulate_pattern(AU_D, AU_I, camera_constant_A_px=600.0, shape=(1024, 1024), center_x_px=560.2,
                           center_y_px=470.7, beam_stop=True, beam_stop_angle_deg=angle, dose=dose, seed=7)
    res = build_mask(sim.image.astype(np.float32), saturation_level=65535.0)
    shadow = sim.beam_stop
    # all but the last few tiles where a rod leaves through an image corner
    assert res.mask[shadow].mean() > 0.995
    # the safety margin around the shadow is smaller than the shadow itself
    assert (res.beam_stop & ~shadow).sum() < shadow.sum()
    assert res.n_beam_stop > 0


def test_no_beam_stop_no_shadow():
    sim = simulate_pattern(AU_D, AU_I, camera_constant_A_px=600.0, shape=(512, 512), seed=8)
    res = build_mask(sim.image.astype(np.float32), saturation_level=65535.0)
    assert res.n_beam_stop == 0 and res.beam_stop is None
    assert res.n_saturated > 0


def test_user_mask_combined_and_checked(tmp_path):
    img = np.random.default_rng(1).poisson(20, (128, 128)).astype(np.float32)
    user = np.zeros((128, 128), np.uint8)
    user[20:30, 40:50] = 1
    p = tmp_path / "mask.tif"
    tifffile.imwrite(p, user)
    m = load_user_mask(p, img.shape)
    res = build_mask(img, user_mask=m, detect_beam_stop=False)
    assert res.mask[20:30, 40:50].all() and res.n_user == 100
    with pytest.raises(RingidError, match="does not match"):
        load_user_mask(p, (64, 64))
