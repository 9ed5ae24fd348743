"""The known failures of README's "Cautions", pinned so that a fix shows up (xfail strict: a case that
starts to pass fails the suite until its pin is removed and the Cautions are corrected).

Each case is built with the simulator the way the demo builds its patterns (ringid/synthetic/demo.py:
library ring lists, the demo's camera constant, ellipticity and a-TiO2 halo of ringid/synthetic/amorphous.py),
at 512² so that it runs in about a second, and goes through process_image at the true geometry,
analyze_profile with the simulator's instrument and, where phases are asked for, identify. Each test
asserts the right answer; its reason says what is measured today.
"""

import numpy as np
import pytest

SHAPE = (512, 512)
# source: the simulator's instrumental ring profile, a Gaussian of FWHM 0.05 1/nm (simulate_pattern's default)
INSTRUMENT_FWHM_PER_NM = 0.05
G_TABLE = np.linspace(0.0, 20.0, 801)


@pytest.fixture(scope="module")
def library_index(reference_library):
    from ringid.jobs.measure import library_index
    from ringid.library.store import load_library

    return library_index(load_library(reference_library))


def _camera_constant():
    from ringid.synthetic import demo

    return demo.CAMERA_CONSTANT_A_PX * SHAPE[1] / 2048.0  # the demo's scaling with the image size


def _chain(tmp_path, sim, library_index=None):
    from ringid.core.model import InstrumentProfile
    from ringid.identify.score import ObservedRings, identify
    from ringid.image.stage import process_image
    from ringid.jobs.measure import trim_profile
    from ringid.profile.rings import analyze_profile

    path = tmp_path / "pattern.npy"
    np.save(path, sim.image)
    res = process_image(path, sim.geometry)
    profile = trim_profile(res.profile, 1.0)
    analysis = analyze_profile(profile, instrument=InstrumentProfile(INSTRUMENT_FWHM_PER_NM, 0.0, 0.0))
    if library_index is None:
        return analysis, None
    rings = [r for r in analysis.rings if r.kind == "ring"]
    obs = ObservedRings(*(np.array([getattr(r, k) for r in rings]) for k in
                          ("g_per_nm", "g_sigma_per_nm", "fwhm_per_nm", "area")))
    return analysis, identify(obs, library_index, g_range_per_nm=(float(profile.g_per_nm.min()),
                                                                  float(profile.g_per_nm.max())))


def _nanocrystals_on_a_halo(library_dir, phase, size_nm, halo_share, seed):
    """The phase's library rings at ``size_nm`` on the demo's a-TiO2 halo, the halo scaled to scatter
    ``halo_share`` of the summed area (halo + rings) inside the profile's g range (1 nm⁻¹ to the edge)."""
    from ringid.library.store import read_phase_rings
    from ringid.synthetic import demo
    from ringid.synthetic.amorphous import amorphous_halo_profile
    from ringid.synthetic.simulate import simulate_pattern

    rings = read_phase_rings(library_dir, phase)
    keep = ~rings.double_diffraction & (rings.intensity > 0)
    d, inten = rings.d_angstrom[keep], rings.intensity[keep]
    k = _camera_constant()
    g_edge = 10.0 * (SHAPE[1] / 2) / k
    g = 10.0 / d
    inside = (g > 1.0) & (g < g_edge)
    ring_area = 60.0 * inten[inside].sum() / inten.max()  # simulate_pattern's ring_area_counts_per_nm = 60
    halo_kw = {key: v for key, v in demo.AMORPHOUS_TIO2.items() if key != "counts"}
    table = np.clip(amorphous_halo_profile(G_TABLE, **halo_kw, seed=seed), 0.0, None)
    table /= table.max()
    window = (G_TABLE > 1.0) & (G_TABLE < g_edge)
    halo_area = np.trapezoid(table[window], G_TABLE[window])
    halo_counts = halo_share / (1.0 - halo_share) * ring_area / halo_area
    return simulate_pattern(d, inten, camera_constant_A_px=k, shape=SHAPE, ellipticity=demo.ELLIPTICITY,
                            ellipse_angle_deg=demo.ELLIPSE_ANGLE_DEG, crystallite_size_nm=size_nm,
                            halo=lambda x: np.interp(x, G_TABLE, table), halo_counts=halo_counts, seed=seed,
                            hot_pixel_fraction=2e-6, dead_pixel_fraction=2e-6)


@pytest.mark.xfail(strict=True, reason=(
    "measured: at 512² (demo seed 2032, and seeds 1 and 2) rutile alone is reported, flagged "
    "unidentified_phase; the 25 % anatase is not picked up"), raises=AssertionError)
def test_minor_anatase_under_rutile_is_found(tmp_path, reference_library, library_index):
    from ringid.synthetic import demo

    pattern = next(p for p in demo.SCENARIO if p.sample == "film_anneal_700C")
    k = [p.sample for p in demo.SCENARIO].index(pattern.sample) + 1  # write_demo's seed: seed + position
    sim = demo._simulate(pattern, reference_library, SHAPE, 2026 + k)
    _, result = _chain(tmp_path, sim, library_index)
    # source: the phases that went into the simulator (ringid/synthetic/demo.py, film_anneal_700C)
    assert set(result.phases) == {"TiO2_rutile", "TiO2_anatase"}


HALO_MISSED = [
    # (phase, size nm, halo share, seed, what is measured today); one case per claim of the Cautions
    ("TiO2_rutile", 6.0, 0.45, 1, "crystalline, no halo fitted; the same at 4 and 8 nm, seeds 1 and 2"),
    ("Al2O3_corundum", 4.0, 0.45, 1, "crystalline, no halo fitted; the same at 8 nm (seeds 1, 2) and 6 nm seed "
                                     "2; 6 nm seed 1: mixed, halo 17 % of the area"),
    ("CeO2", 4.0, 0.45, 2, "crystalline, no halo fitted (seed 1: mixed; 6 and 8 nm CeO2 are mixed in both "
                           "seeds at 512²)"),
    ("TiO2_rutile", 6.0, 0.25, 1, "weak halo: crystalline, no halo fitted (seed 2 and a 15 % halo the same)"),
    ("CeO2", 6.0, 0.15, 1, "weak halo: crystalline, no halo fitted (seed 2: mixed; a 25 % halo is found in "
                           "both seeds)"),
]


@pytest.mark.parametrize("phase, size_nm, share, seed", [
    pytest.param(*case[:4], marks=pytest.mark.xfail(strict=True, raises=AssertionError,
                                                       reason=f"measured: {case[4]}"),
                 id=f"{case[0]}-{case[1]:g}nm-halo{case[2]:g}-seed{case[3]}")
    for case in HALO_MISSED
])
def test_halo_under_nanocrystal_rings_is_found(tmp_path, reference_library, phase, size_nm, share, seed):
    analysis, _ = _chain(tmp_path, _nanocrystals_on_a_halo(reference_library, phase, size_nm, share, seed))
    # source: the simulator was given rings and an amorphous halo: a partly crystalline film, which
    # docs/design.md ("Amorphous, nanocrystalline, crystalline") calls mixed
    assert analysis.crystallinity.label == "mixed"


@pytest.mark.parametrize("size_nm", [2.0])
def test_size_of_dense_broad_ring_pattern_from_an_image(tmp_path, reference_library, size_nm):
    """CeO2 at 2 nm (ring FWHM 0.45 1/nm, its rings overlapping): measured +5.6 % at 512² (seed 2: +6.3 %;
    2.5 and 3 nm: +1.3 … +6.2 %), within the target."""
    analysis, _ = _chain(tmp_path, _nanocrystals_on_a_halo(reference_library, "CeO2", size_nm, 0.0, 1))
    # source: the simulated diameter; target: Scherrer sizes within 10 % (docs/design.md, Targets)
    assert analysis.size.size_nm == pytest.approx(size_nm, rel=0.10)


@pytest.mark.xfail(strict=True, reason=(
    "measured: the size comes out 20 % high (D = 1.83 nm; seed 0, seeds 1 and 2: +34 % and +31 %, mean +28 % "
    "as in benchmarks/bench_ring_accuracy.py dense_size_bias), against the 10 % target"), raises=AssertionError)
def test_size_of_dense_broad_ring_profile():
    """The profile of benchmarks/bench_ring_accuracy.py (dense_size_bias) at its broadest rings: pyFAI's
    CeO2 lines with FWHM 0.6 1/nm (the rings run into each other) on a steep tail. The image-level
    cases above (2–3 nm) are within the target; the high sizes of README's Cautions are those of such
    blended profiles."""
    from pyFAI.calibrant import get_calibrant

    from ringid.core.model import Profile
    from ringid.profile.lineshape import pseudo_voigt
    from ringid.profile.rings import analyze_profile
    from ringid.sample.size import K_SPHERE_DIAMETER, InstrumentProfile, sample_breadth

    d = np.asarray(get_calibrant("CeO2").dspacing, float)  # source: pyFAI calibrant table CeO2 (Å)
    g = np.arange(0.5, 14.9, 0.005)
    g_rings = np.sort(10.0 / d[(10.0 / d > 1.0) & (10.0 / d < 14.5)])
    inst = InstrumentProfile(0.06, 0.0, 0.5)
    fwhm = 0.6
    # the diameter of those rings: Scherrer K = 4/3 on the integral breadth left after the instrument
    # (Langford & Wilson 1978; Langford 1978), D = 1.83 nm
    truth = K_SPHERE_DIAMETER / float(sample_breadth(fwhm, 0.5, 0.06, 0.5))
    tail = 3e3 * g**-1.5 + 30.0 * np.exp(-g / 4.0) + 4.0
    areas = 20.0 * (g_rings[0] / g_rings) ** 2
    pixels = np.pi * 100.0 * g
    rng = np.random.default_rng(0)
    counts = rng.poisson((tail + sum(pseudo_voigt(g, g0, fwhm, 0.5, a) for g0, a in zip(g_rings, areas))) * pixels)
    profile = Profile(g, counts / pixels, np.sqrt(np.maximum(counts, 1)) / pixels)
    size = analyze_profile(profile, instrument=inst).size.size_nm
    # source: target of docs/design.md, Scherrer sizes within 10 %
    assert size == pytest.approx(truth, rel=0.10)
