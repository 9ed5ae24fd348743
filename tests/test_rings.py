"""Tests of ringid.profile.rings: detection with a false-alarm level, joint pseudo-Voigt fitting, writers."""

import csv
import math

import numpy as np
import pytest

from ringid.synthetic import amorphous
from ringid.core.errors import RingidError
from ringid.core.model import Profile
from ringid.profile.rings import (
    RINGS_CSV_COLUMNS,
    analyze_profile,
    detection_threshold,
    fit_rings,
    pseudo_voigt,
    pseudo_voigt_integral_breadth,
    write_profile_csv,
    write_rings_csv,
)

G = np.arange(2.0, 8.0, 0.01)  # 1/nm
TAIL = 300.0 * G**-2.5 + 1.0 * np.exp(-G / 6.0)
PIXELS = 20.0 * G  # pixels averaged per bin, ∝ circumference
RINGS = [(4.247, 0.05, 0.5, 1.0), (4.904, 0.05, 0.5, 0.5), (5.15, 0.06, 0.5, 0.3)]  # g, FWHM, η, area


def _poisson_profile(expected, rng, pixels=PIXELS, g=G):
    counts = rng.poisson(expected * pixels)
    return Profile(g, counts / pixels, np.sqrt(np.maximum(counts, 1)) / pixels)


def _expected(rings=RINGS, tail=TAIL, g=G):
    y = tail.copy()
    for r in rings:
        y = y + pseudo_voigt(g, *r)
    return y


def test_integral_breadths_of_the_limits():
    # source: analytic: Gaussian β = √(π/(4 ln 2))·FWHM = 1.0645·FWHM, Lorentzian β = (π/2)·FWHM
    assert pseudo_voigt_integral_breadth(1.0, 0.0) == pytest.approx(math.sqrt(math.pi / (4 * math.log(2))))
    assert pseudo_voigt_integral_breadth(1.0, 0.0) == pytest.approx(1.0645, abs=1e-4)
    assert pseudo_voigt_integral_breadth(1.0, 1.0) == pytest.approx(math.pi / 2)
    x = np.linspace(-200, 200, 400001)
    for eta in (0.0, 0.3, 1.0):
        shape = pseudo_voigt(x, 0.0, 0.1, eta)
        area = np.trapezoid(shape, x)
        assert area == pytest.approx(1.0, abs=2e-4)  # Lorentzian tails beyond ±200 carry 1.6e-4
        assert area / shape.max() == pytest.approx(pseudo_voigt_integral_breadth(0.1, eta), rel=2e-4)


def test_detection_threshold_is_bonferroni():
    from scipy.stats import norm

    z = detection_threshold(0.01, 1000)
    assert norm.sf(z) * 1000 == pytest.approx(0.01)


def _pulls(rng, n_trials, background=None):
    pulls = []
    for _ in range(n_trials):
        fit = fit_rings(_poisson_profile(_expected(), rng), instrument=0.04, background=background)
        row = []
        for g0, fwhm, _eta, area in RINGS:
            match = [r for r in fit.rings if abs(r.g_per_nm - g0) < 0.02]
            assert len(match) == 1
            r = match[0]
            row += [
                (r.g_per_nm - g0) / r.g_sigma_per_nm,
                (r.fwhm_per_nm - fwhm) / r.fwhm_sigma_per_nm,
                (r.area - area) / r.area_sigma,
            ]
        pulls.append(row)
    return np.array(pulls).reshape(n_trials, len(RINGS), 3)


def test_pulls_with_known_background():
    """The fit's own covariance (scaled by χ²_ν): pull widths ≈ 1 when the background is known."""
    p = _pulls(np.random.default_rng(7), 120, background=TAIL)
    std = p.std(axis=0)
    mean = p.mean(axis=0)
    assert np.all((std > 0.8) & (std < 1.25)), std
    assert np.all(np.abs(mean) < 0.3), mean


def test_pulls_with_estimated_background():
    """Full detection + background + fit. Position and FWHM pulls ≈ 1. The area σ does not carry
    the uncertainty of the clipped background, which widens the area pulls (measured ≈ 1.2)."""
    p = _pulls(np.random.default_rng(8), 200)
    std = p.std(axis=0)
    mean = p.mean(axis=0)
    assert np.all((std[:, :2] > 0.8) & (std[:, :2] < 1.25)), std
    assert np.all((std[:, 2] > 0.8) & (std[:, 2] < 1.45)), std
    assert np.all(np.abs(mean[:, :2]) < 0.3), mean
    assert np.all(np.abs(mean[:, 2]) < 0.6), mean


def test_false_alarm_rate_on_pure_noise():
    rng = np.random.default_rng(11)
    g = np.arange(1.0, 12.0, 0.01)
    tail = 300.0 * g**-2.5 + np.exp(-g / 6.0)
    n, hits = 60, 0
    for _ in range(n):
        fit = fit_rings(_poisson_profile(tail, rng, 20.0 * g, g), instrument=0.04, false_alarm_probability=0.01)
        hits += bool(fit.rings)
    # α = 0.01 per profile (Bonferroni, conservative): P(≥ 3 hits in 60) < 0.003
    assert hits <= 2


def test_close_rings_resolved_at_the_instrumental_width():
    rng = np.random.default_rng(2)
    fwhm = 0.04
    rings = [(5.0, fwhm, 0.0, 0.3), (5.0 + 1.0 * fwhm, fwhm, 0.0, 0.3)]
    fit = fit_rings(_poisson_profile(_expected(rings), rng, 200.0 * G), instrument=fwhm)
    found = sorted(r.g_per_nm for r in fit.rings)
    assert len(found) == 2
    for (g0, *_), r in zip(rings, sorted(fit.rings, key=lambda r: r.g_per_nm)):
        assert abs(r.g_per_nm - g0) < 4 * r.g_sigma_per_nm


def _halo_and_ring_profile():
    """An a-Si halo (Debye pair sum) with one sharp ring on a steep tail, Poisson noise (seed 4)."""
    g = np.arange(1.5, 12.0, 0.01)
    halo = 3.0 * amorphous.amorphous_halo_profile(g, "Si", n_atoms=1200)
    expected = 300.0 * g**-2.5 + halo + pseudo_voigt(g, 3.2, 0.05, 0.5, 0.5)
    return g, halo, _poisson_profile(expected, np.random.default_rng(4), 20.0 * g, g)


def test_halo_fitted_as_its_own_component():
    g, halo, profile = _halo_and_ring_profile()
    fit = fit_rings(profile, instrument=0.04)
    kinds = {r.kind for r in fit.rings}
    assert kinds == {"ring", "halo"}
    halo_fit = max((r for r in fit.rings if r.kind == "halo"), key=lambda r: r.area)
    g_peak = g[np.argmax(np.where((g > 4) & (g < 6.5), halo, 0))]
    assert abs(halo_fit.g_per_nm - g_peak) < 0.3 * halo_fit.fwhm_per_nm


def test_bad_profiles_raise_one_line_errors():
    with pytest.raises(RingidError, match="uniform"):
        fit_rings(Profile(np.array([1.0, 2.0, 2.5, 4.0, 5, 6, 7, 8, 9]), np.ones(9), np.ones(9)))
    with pytest.raises(RingidError, match="1D"):
        fit_rings(Profile(np.arange(5.0), np.ones(5), np.ones(5)))
    blank = Profile(G, np.full(G.size, np.nan), np.full(G.size, np.nan))
    assert fit_rings(blank).flags == ("no_valid_bins",)


def test_writers(tmp_path):
    rng = np.random.default_rng(1)
    profile = _poisson_profile(_expected(), rng)
    analysis = analyze_profile(profile, instrument=0.03)
    assert len(analysis.rings) == 3
    path = tmp_path / "rings.csv"
    write_rings_csv(path, analysis, assignments=[("Au", "111"), None, ("Au", "200")])
    rows = list(csv.DictReader(open(path)))
    assert list(rows[0].keys()) == RINGS_CSV_COLUMNS
    assert rows[0]["phase"] == "Au" and rows[1]["phase"] == "" and rows[2]["hkl"] == "200"
    assert float(rows[0]["d_angstrom"]) == pytest.approx(10.0 / float(rows[0]["g_per_nm"]))
    with pytest.raises(RingidError, match="assignments"):
        write_rings_csv(path, analysis, assignments=[None])
    ppath = tmp_path / "profile.csv"
    write_profile_csv(ppath, profile, analysis)
    prow = list(csv.DictReader(open(ppath)))
    assert len(prow) == G.size and set(prow[0]) == {"g_per_nm", "intensity", "sigma", "background", "model"}


def test_realistic_size_profile_with_the_ceo2_rings():
    """A profile of the size the image stage gives for 2048² (0.1–14.9 nm⁻¹ in 0.005 nm⁻¹ bins,
    2960 bins, about π·100 g pixels per bin at K ≈ 1000 Å·px and ½ px per bin), with the
    steep central-beam tail and every CeO2 ring in range: each ring is found once, at its
    position within its uncertainty, and no extra ring is reported."""
    from pyFAI.calibrant import get_calibrant

    # source: pyFAI's calibrant table for CeO2 (d-spacings in Å), converted to g = 10/d
    d = np.asarray(get_calibrant("CeO2").dspacing, dtype=float)
    g = np.arange(0.1, 14.9, 0.005)
    g_rings = np.sort(10.0 / d[(10.0 / d > 1.0) & (10.0 / d < 14.5)])
    rng = np.random.default_rng(5)
    fwhm = 0.06 + 0.002 * g_rings
    area = 20.0 * (g_rings[0] / g_rings) ** 2 * rng.uniform(0.5, 1.5, g_rings.size)
    tail = 3.0e3 * g**-1.5 + 30.0 * np.exp(-g / 4.0) + 4.0
    expected = tail + sum(pseudo_voigt(g, g0, w, 0.5, a) for g0, w, a in zip(g_rings, fwhm, area))
    profile = _poisson_profile(expected, rng, np.pi * 100.0 * g, g)
    analysis = analyze_profile(profile, instrument=0.06)
    rings = [r for r in analysis.rings if r.kind == "ring"]
    found = np.array([r.g_per_nm for r in rings])
    for g0 in g_rings:
        match = [r for r in rings if abs(r.g_per_nm - g0) < 0.5 * 0.06]
        assert len(match) == 1, (g0, found)
        assert abs(match[0].g_per_nm - g0) < 5.0 * match[0].g_sigma_per_nm + 1e-4, (g0, match[0])
    assert len(rings) == g_rings.size, found
    assert analysis.crystallinity.label == "crystalline"


def test_a_halo_has_no_size_in_rings_csv(tmp_path):
    """K/β of an amorphous halo is not a crystallite size (it would read as a 0.7 nm crystal)."""
    analysis = analyze_profile(_halo_and_ring_profile()[2], instrument=0.04)
    path = tmp_path / "rings.csv"
    write_rings_csv(path, analysis)
    rows = list(csv.DictReader(open(path)))
    assert {r["kind"] for r in rows} == {"ring", "halo"}
    for r in rows:
        assert (r["size_nm"] == "" and r["size_lower_limit_nm"] == "") == (r["kind"] == "halo")
