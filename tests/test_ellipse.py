"""Tests of the affine distortion map and the joint sector fit (ringid.image.ellipse)."""

import math

import numpy as np
import pytest

from ringid.image.ellipse import (
    compose_distortion,
    distortion_matrix,
    ellipse_from_matrix,
    fit_sector_positions,
    undistortion_matrix,
)


@pytest.mark.parametrize("eps,angle", [(0.0, 0.0), (0.01, 30.0), (0.04, -75.0), (0.2, 90.0)])
def test_distortion_matches_the_contract_convention(eps, angle):
    # source: docs/design.md conventions: a ring of true radius R has semi-axes a = R/sqrt(1-eps),
    # b = R*sqrt(1-eps), major axis at angle from +x towards +y, area preserved
    a_mat = distortion_matrix(eps, angle)
    assert np.linalg.det(a_mat) == pytest.approx(1.0, abs=1e-12)
    radius = 400.0
    t = math.radians(angle)
    major = a_mat @ (radius * np.array([math.cos(t), math.sin(t)]))
    minor = a_mat @ (radius * np.array([-math.sin(t), math.cos(t)]))
    assert np.hypot(*major) == pytest.approx(radius / math.sqrt(1 - eps), rel=1e-12)
    assert np.hypot(*minor) == pytest.approx(radius * math.sqrt(1 - eps), rel=1e-12)
    # major stays along the angle
    assert math.atan2(major[1], major[0]) == pytest.approx(math.atan2(math.sin(t), math.cos(t)), abs=1e-12)
    assert np.allclose(undistortion_matrix(eps, angle) @ a_mat, np.eye(2), atol=1e-12)


@pytest.mark.parametrize("eps,angle", [(0.013, 12.0), (0.04, -60.0), (0.003, 89.0)])
def test_ellipse_from_matrix_round_trip(eps, angle):
    e2, a2 = ellipse_from_matrix(distortion_matrix(eps, angle))
    assert e2 == pytest.approx(eps, abs=1e-12)
    assert a2 == pytest.approx(angle, abs=1e-9)
    # a rotation of the undistorted frame changes nothing
    r = np.array([[math.cos(1.0), -math.sin(1.0)], [math.sin(1.0), math.cos(1.0)]])
    e3, a3 = ellipse_from_matrix(distortion_matrix(eps, angle) @ r)
    assert (e3, a3) == pytest.approx((eps, angle), abs=1e-9)


def test_compose_small_residual_adds_ellipticity():
    # a residual stretch diag(1 + e1, 1 - e1) is an ellipse with b/a = (1 - e1)/(1 + e1) along x
    eps, ang = compose_distortion(0.0, 0.0, 0.005, 0.0)
    assert eps == pytest.approx(1 - 0.995 / 1.005, rel=1e-12)
    assert ang == pytest.approx(0.0, abs=1e-9)


def test_joint_fit_recovers_offset_and_ellipse_from_exact_points():
    rng = np.random.default_rng(3)
    radii = np.array([200.0, 260.0, 410.0])
    psi = np.tile(np.linspace(-np.pi, np.pi, 36, endpoint=False) + np.pi / 36, radii.size)
    ring = np.repeat(np.arange(radii.size), 36)
    dx, dy, e1, e2 = 0.7, -0.4, 0.002, -0.001
    r = radii[ring] * (1 + e1 * np.cos(2 * psi) + e2 * np.sin(2 * psi)) + dx * np.cos(psi) + dy * np.sin(psi)
    sig = np.full(r.size, 0.05)
    r_noisy = r + rng.normal(0, 0.05, r.size)
    r_noisy[5] += 30.0  # one bad sector (e.g. a lone spot) must not matter
    fit = fit_sector_positions(ring, psi, r_noisy, sig, radii.size)
    assert fit.delta_x_px == pytest.approx(dx, abs=0.03)
    assert fit.delta_y_px == pytest.approx(dy, abs=0.03)
    assert fit.e1 == pytest.approx(e1, abs=1e-4)
    assert fit.e2 == pytest.approx(e2, abs=1e-4)
    assert np.allclose(fit.ring_radius_px, radii, atol=0.03)
    assert not fit.inliers[5]
