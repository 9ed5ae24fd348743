"""Tests of ringid.sample.crystallinity on simulated profiles: crystalline, nanocrystalline (2–8 nm),
amorphous (Debye-equation halos of random dense packings), mixed and blank."""

import math

import numpy as np
import pytest
from test_size import sphere_line_profile

from ringid.synthetic import amorphous
from ringid.sample.crystallinity import CrystallinityThresholds, classify
from ringid.core.model import Profile, Ring
from ringid.profile.rings import analyze_profile, pseudo_voigt
from ringid.sample.size import InstrumentProfile

G = np.arange(1.0, 14.0, 0.01)  # 1/nm
TAIL = 500.0 * G**-2.5 + 0.5 * np.exp(-G / 5.0)
INSTRUMENT = InstrumentProfile(0.03, 0.0, 0.5)
# Au ring positions (1/d, 1/nm) and kinematic mean-profile areas 111/200/220/311/222
# source: Au kinematic mean-profile areas (Σ|F|²d², B = 0.6 Å²), computed with gemmi's StructureFactorCalculatorE (ITC
# Vol. C Table 4.3.2.2 factors), a = 4.0782 Å
AU_RINGS = [(4.247, 100.0), (4.904, 45.5), (6.935, 23.5), (8.132, 23.4), (8.494, 6.4)]


def _sharp_rings(scale):
    return sum(scale * a / 100 * pseudo_voigt(G, g0, 0.03, 0.5) for g0, a in AU_RINGS)


def _nano_rings(diameter_nm, scale):
    dx = 0.002
    x = np.arange(-6, 6 + dx / 2, dx)
    shape = np.convolve(sphere_line_profile(x, diameter_nm), pseudo_voigt(x, 0, 0.03, 0.5), mode="same") * dx
    return sum(scale * a / 100 * np.interp(G - g0, x, shape) for g0, a in AU_RINGS)


def _halo(scale, composition="Si", diameter=2.35):
    return scale * amorphous.amorphous_halo_profile(G, composition, diameter_angstrom=diameter, n_atoms=1500)


def _profile(expected, seed):
    rng = np.random.default_rng(seed)
    pixels = 20.0 * G
    counts = rng.poisson(expected * pixels)
    return Profile(G, counts / pixels, np.sqrt(np.maximum(counts, 1)) / pixels)


def _label(expected, seed=1):
    return analyze_profile(_profile(expected, seed), instrument=INSTRUMENT)


@pytest.mark.parametrize("seed", [1, 2])
def test_polycrystalline_film(seed):
    a = _label(TAIL + _sharp_rings(2.0), seed)
    assert a.crystallinity.label == "crystalline"
    assert len(a.rings) == 5
    # rings at the instrumental width: a lower limit, or at least a size far beyond nanocrystals
    assert a.size.is_lower_limit or a.size.size_nm > 100


@pytest.mark.parametrize("diameter_nm", [2.0, 3.0, 5.0, 8.0])
def test_nanocrystalline_film(diameter_nm):
    a = _label(TAIL + _nano_rings(diameter_nm, 2.0))
    assert a.crystallinity.label == "crystalline"
    assert math.isfinite(a.size.size_nm)


@pytest.mark.parametrize(
    "composition,diameter,seed",
    [("Si", 2.35, 1), ("Si", 2.35, 2), ({"Cu": 0.5, "Zr": 0.5}, 2.8, 1), ("Ge", 2.45, 3)],
)
def test_amorphous_film(composition, diameter, seed):
    a = _label(TAIL + _halo(0.3, composition, diameter), seed)
    assert a.crystallinity.label == "amorphous"
    assert all(r.kind == "halo" for r in a.rings)
    assert not math.isfinite(a.size.size_nm)


@pytest.mark.parametrize("seed", [1, 2])
def test_partly_crystallised_film(seed):
    a = _label(TAIL + _halo(0.3) + _sharp_rings(1.0), seed)
    assert a.crystallinity.label == "mixed"
    assert 0.1 < a.crystallinity.halo_area_fraction < 0.9


def test_blank_and_unusable():
    assert _label(TAIL, 4).crystallinity.label == "no_signal"
    nan = np.full(G.size, np.nan)
    a = analyze_profile(Profile(G, nan, nan), instrument=INSTRUMENT)
    assert a.crystallinity.label == "no_signal" and "unusable_profile" in a.flags


def test_thresholds_have_their_stated_meaning():
    t = CrystallinityThresholds()
    # source: K_w = 1.1067 (sphere, FWHM; Langford & Wilson, J. Appl. Cryst. 11, 102, 1978):
    # the halo threshold is the FWHM of 1.5 nm spheres
    assert t.halo_min_fwhm_per_nm == pytest.approx(1.1067 / 1.5, abs=0.005)
    ring = Ring(4.0, 0.001, 0.05, area=1.0)
    halo = Ring(5.0, 0.01, 0.9, area=1.0, kind="halo")
    assert classify([ring, halo], t).label == "mixed"
    assert classify([ring, Ring(5.0, 0.01, 0.9, area=0.01)], t).flags == ("trace_halo",)
    # halos must be clearly broader than the rings to call a sample mixed
    similar = classify([Ring(4.0, 0.01, 0.6, area=1.0), Ring(5.0, 0.01, 0.8, area=1.0)], t)
    assert similar.label == "crystalline" and similar.flags == ("near_amorphous_limit",)
    assert classify([], t).label == "no_signal"


def _nano_rings_of(calibrant, diameter_nm, scale, seed=100):
    """Size-broadened rings (sphere line profile ⊗ instrument) at the d-spacings of one of pyFAI's
    calibrant tables, areas ∝ 1/g² times a seeded random factor (intensities are not tested)."""
    from pyFAI.calibrant import get_calibrant

    d = np.asarray(get_calibrant(calibrant).dspacing, float)  # source: pyFAI calibrant tables (Å)
    g_rings = 10.0 / d
    g_rings = g_rings[(g_rings > 2.0) & (g_rings < 12.5)]
    areas = scale * (g_rings[0] / g_rings) ** 2 * np.random.default_rng(seed).uniform(0.3, 1.5, g_rings.size)
    dx = 0.002
    x = np.arange(-6, 6 + dx / 2, dx)
    shape = np.convolve(sphere_line_profile(x, diameter_nm), pseudo_voigt(x, 0, 0.03, 0.5), mode="same") * dx
    return sum(a * np.interp(G - g0, x, shape) for g0, a in zip(g_rings, areas))


def _a_tio2_halo(scale):
    return scale * amorphous.amorphous_halo_profile(G, {"Ti": 1 / 3, "O": 2 / 3}, diameter_angstrom=1.95,
                                                    packing_fraction=0.58, n_atoms=1500)


@pytest.mark.parametrize("seed", [1, 2])
def test_nanocrystals_on_an_amorphous_film_are_mixed(seed):
    """CeO2 nanocrystals (6 nm) on amorphous TiO2 whose halo scatters ≈ 45 % of the total: the
    rings' Lorentzian tails first take the halo (no halo in the residual); the hidden-halo
    trial finds it."""
    a = _label(TAIL + _nano_rings_of("CeO2", 6.0, 6.0) + _a_tio2_halo(0.8), seed)
    assert a.crystallinity.label == "mixed"
    halo = [r for r in a.rings if r.kind == "halo"]
    # the first halo of the dense packing: a-TiO2 at ≈ 6 nm⁻¹ (the as-simulated maximum)
    assert len(halo) == 1 and 5.5 < halo[0].g_per_nm < 6.5


@pytest.mark.parametrize("seed", [1, 2])
def test_nanocrystals_without_a_film_stay_crystalline(seed):
    a = _label(TAIL + _nano_rings_of("CeO2", 6.0, 6.0), seed)
    assert a.crystallinity.label == "crystalline"


@pytest.mark.parametrize("table,diameter_nm,seed", [("TiO2", 8.0, 1), ("TiO2", 4.0, 2), ("alpha_Al2O3", 5.0, 1)])
def test_dense_nanocrystal_rings_are_not_a_halo(table, diameter_nm, seed):
    """Rutile (pyFAI's TiO2 table) has 8 rings between 9.1 and 9.9 nm⁻¹, many closer than their
    width: the broad component that takes them leaves structure the smooth halo cannot describe
    (χ²_ν ≈ 11–65 under it, against ≈ 1–2 under a real halo), so it is an unresolved band."""
    a = _label(TAIL + _nano_rings_of(table, diameter_nm, 6.0), seed)
    assert a.crystallinity.label == "crystalline"
    bands = [r for r in a.rings if r.kind == "band"]
    assert bands and "unresolved_ring_band" in a.flags
    assert a.size.n_rings == sum(r.kind == "ring" for r in a.rings)  # a band gives no size


def test_a_real_halo_is_not_a_band():
    """The band test must not take a halo that the model describes: the partly crystallised
    Si + Au film and the CeO2-on-a-TiO2 film keep their halos."""
    for expected in (
        TAIL + _halo(0.3) + _sharp_rings(1.0),
        TAIL + _nano_rings_of("CeO2", 4.0, 6.0) + _a_tio2_halo(0.8),
    ):
        a = _label(expected, 1)
        assert a.crystallinity.label == "mixed"
        assert not any(r.kind == "band" for r in a.rings) and "unresolved_ring_band" not in a.flags
