"""Identification in an open world: phases outside the library, the false-identification rate,
missing strong rings, look-alike lattices, confidence.

Outside data: pyFAI's calibrant line lists (NIST SRM certificates and literature cells, as shipped
with pyFAI) for phases that the shipped library lacks; the claim that the false-identification
rate holds is tested on ring lists with no lattice at all, generated here.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from ringid.identify.score import (
    IdentifySettings,
    _forward_stop,
    _tail_probability,
    identify,
    index_library,
    null_bayes_factor,
)
from ringid.library.store import load_library
from ringid.synthetic.ring_lists import as_observed, observe, random_crystal, random_ring_list
from test_library import pyfai_calibrant

WINDOWS = {"standard": 0.005, "nominal": 0.03}


@pytest.fixture(scope="module")
def library(reference_library):
    return load_library(reference_library)


@pytest.fixture(scope="module")
def index(library):
    return index_library(library)


def lines(name, n, rel=0.0005, seed=0):
    """The first n lines of a pyFAI calibrant table as observed rings (σ_g = rel·g, areas equal)."""
    _, d = pyfai_calibrant(name)
    g = 10.0 / d[:n]
    g = g * (1 + rel * np.random.default_rng(seed).standard_normal(len(g)))
    return g


@pytest.mark.parametrize("window", sorted(WINDOWS))
@pytest.mark.parametrize("calibrant", ["quartz", "Cr2O3", "C60", "cristobaltite", "vanadinite", "hydrocerussite"])
@pytest.mark.parametrize("n_lines", [8, 20])
def test_phases_outside_the_library_give_an_empty_answer(index, calibrant, window, n_lines):
    # source: pyFAI calibrant tables of phases that reference_phases/ does not contain
    g = lines(calibrant, n_lines)
    result = identify(as_observed(g, np.ones(len(g))), index, IdentifySettings(dilation_window=WINDOWS[window]))
    assert result.phases == ()
    assert "no_phase_identified" in result.flags and "unidentified_phase" in result.flags
    assert result.unexplained_rings == len(g)


# pyFAI calibrant tables (NIST SRMs and literature values) of library phases -> our id
INSIDE = {"Au": "Au", "Si": "Si", "CeO2": "CeO2", "ZnO": "ZnO", "TiO2": "TiO2_rutile", "alpha_Al2O3": "Al2O3_corundum",
          "NaCl": "NaCl", "LaB6": "LaB6"}


@pytest.mark.parametrize("window", sorted(WINDOWS))
@pytest.mark.parametrize("calibrant", sorted(INSIDE))
def test_library_phases_from_outside_line_lists_are_still_found(index, calibrant, window):
    """Ten lines, positions off by 0.05 % (1σ), areas all equal (no intensities): found at ±0.5 %;
    at ±3 % found, or not reported and flagged (10 lines without intensities may not be enough),
    never a wrong phase."""
    g = lines(calibrant, 10, seed=3)
    result = identify(as_observed(g, np.ones(len(g))), index, IdentifySettings(dilation_window=WINDOWS[window]))
    if window == "nominal" and not result.phases:
        assert "not_significant" in result.flags and result.candidates[0].phase == INSIDE[calibrant]
        return
    named = set(result.phases[:1]) | set(result.alternatives[0] if result.alternatives else ())
    assert INSIDE[calibrant] in named
    assert result.false_identification_probability[0] < 0.01


@pytest.mark.parametrize("window", sorted(WINDOWS))
def test_five_fcc_lines_are_not_enough_at_the_nominal_window(index, window):
    """pyFAI's Ni table has five lines (111 … 222). At ±0.5 % they identify Ni; at ±3 % every fcc
    metal within 3 % (Cu, 2.6 % larger) fits them as well, so the answer is Ni or, flagged, nothing."""
    g = lines("Ni", 5)
    result = identify(as_observed(g, np.ones(5)), index, IdentifySettings(dilation_window=WINDOWS[window]))
    assert result.candidates[0].phase == "Ni"
    if window == "standard":
        assert result.phases == ("Ni",)
    else:
        assert result.phases in ((), ("Ni",))
        if not result.phases:
            assert "not_significant" in result.flags and result.rejected[0]["phase"] == "Ni"


def test_a_lattice_just_outside_the_window_is_a_mismatch_not_a_match(library):
    # source: pyFAI's Al table (a = 4.0495 Å) against the library's Au 4.0782 and Ag 4.0857 Å, 0.7-0.9 %
    # apart (beyond the ±0.5 % window), with Al itself taken out of the library
    lib = [p for p in library if p.phase != "Al"]
    g = lines("Al", 8)
    result = identify(as_observed(g, np.ones(len(g))), lib, IdentifySettings(dilation_window=0.005))
    assert result.phases == ()
    assert "lattice_mismatch" in result.flags
    mismatch = result.lattice_mismatches[0]
    assert mismatch["phase"] in ("Au", "Ag")
    assert abs(mismatch["dilation"] - 1) > 0.005 + 2 * mismatch["dilation_sigma"]
    # bcc Fe (2.8665 Å) fits five of the eight lines: bcc(a) rings are those of fcc(a·√2) with h, k, l
    # even; one cubic cell indexes all eight, so Fe is not reported either
    assert "one_lattice_fits_all" in result.flags
    assert result.single_lattice["system"] == "cubic"
    assert result.single_lattice["a_angstrom"] == pytest.approx(4.0495, rel=1e-3)  # pyFAI's Al cell


def test_a_lattice_further_outside_the_window_is_not_matched(library):
    # source: pyFAI's Pt table (3.9231 Å) against the library's Pd (3.8907 Å), 0.83 % apart; Pt taken out
    lib = [p for p in library if p.phase != "Pt"]
    g = lines("Pt", 8)
    result = identify(as_observed(g, np.ones(len(g))), lib, IdentifySettings(dilation_window=0.005))
    assert result.phases == ()
    assert all(m["phase"] == "Pd" for m in result.lattice_mismatches)


def test_known_phase_beside_an_unknown_one_is_reported_and_the_rest_flagged(index):
    # source: pyFAI's Au table (library phase) and quartz table (not in the library), one pattern
    g_au, g_q = lines("Au", 6), lines("quartz", 10, seed=1)
    result = identify(as_observed(np.r_[g_au, g_q], np.ones(16)), index, IdentifySettings(dilation_window=0.005))
    assert result.phases[0] in ("Au", "Ag")  # Au and Ag are 0.18 % apart: alternatives of each other
    assert "unidentified_phase" in result.flags
    unexplained_g = np.sort(as_observed(np.r_[g_au, g_q], np.ones(16)).g_per_nm[list(result.unexplained)])
    assert len(unexplained_g) >= 8 and all(np.min(np.abs(g_au - x)) > 0.01 for x in unexplained_g)
    assert result.unexplained_intensity_share == pytest.approx(len(result.unexplained) / 16)
    assert result.confidence[0] <= 1 - result.unexplained_intensity_share


def test_weak_rings_that_match_do_not_excuse_missing_strong_ones(library, index):
    """Ni's weaker rings present, its three strongest (111, 200, 220) absent, among rings of no lattice."""
    ni = next(p for p in library if p.phase == "Ni")
    keep = ~ni.double_diffraction & (ni.intensity > 0) & (ni.g_per_nm < 14)
    g, inten = ni.g_per_nm[keep], ni.intensity[keep]
    strongest = np.argsort(-inten)[:3]
    weak = np.setdiff1d(np.arange(len(g)), strongest)
    other = random_ring_list(np.random.default_rng(4), 30)
    obs = as_observed(np.r_[g[weak], other.g_per_nm], np.r_[np.full(len(weak), 5.0), other.area])
    result = identify(obs, index, IdentifySettings(dilation_window=0.005))
    assert "Ni" not in result.phases
    ni_row = next(c for c in result.candidates if c.phase == "Ni")
    assert ni_row.n_missing_major >= 2


def _reported_share(index, window, n_lists, seed):
    rng = np.random.default_rng(seed)
    hits = 0
    for _ in range(n_lists):
        obs = random_ring_list(rng, int(rng.integers(5, 61)))  # 5-60 rings uniform in g = 2.5-14 1/nm
        hits += bool(identify(obs, index, IdentifySettings(dilation_window=window)).phases)
    return hits


def _binomial_upper_tail(k: int, n: int, p: float) -> float:
    """P(X ≥ k) for X ~ Binomial(n, p) (computed from the binomial sum)."""
    return float(sum(math.comb(n, j) * p**j * (1 - p) ** (n - j) for j in range(k, n + 1)))


@pytest.mark.slow
@pytest.mark.parametrize("window", sorted(WINDOWS))
def test_false_identification_rate_holds_on_ring_lists_without_a_lattice(index, window):
    """The claim itself: ≤ 1 % of lattice-free ring lists get a phase, within the binomial
    uncertainty of 300 lists (the observed count is not above the rate at the 0.1 % level)."""
    n = 300
    hits = _reported_share(index, WINDOWS[window], n, seed=2026 + int(WINDOWS[window] * 1000))
    assert _binomial_upper_tail(hits, n, 0.01) > 1e-3, f"{hits} of {n} random lists got a phase"


@pytest.mark.slow
def test_false_identification_rate_holds_with_a_thousand_phase_library(library):
    """Scores must stay comparable when the library grows: 1,000 phases (the shipped ones and
    copies at random dilations 0.85-1.15), 300 lattice-free lists at the standard window."""
    import dataclasses

    rng = np.random.default_rng(0)
    big = list(library)
    while len(big) < 1000:
        p = library[int(rng.integers(len(library)))]
        big.append(
            dataclasses.replace(p, phase=f"{p.phase}_x{len(big)}", d_angstrom=p.d_angstrom * rng.uniform(0.85, 1.15))
        )
    index = index_library(big, decoy_clearance=0.005)
    hits = _reported_share(index, 0.005, 300, seed=7)
    assert _binomial_upper_tail(hits, 300, 0.01) > 1e-3, f"{hits} of 300 random lists got a phase"


@pytest.mark.slow
def test_confidence_is_calibrated_on_a_randomised_synthetic_set(library, index):
    """Among reported phases with confidence ≥ 0.9 at least 90 % are right (one-sided, within the
    binomial uncertainty), on library phases, mixtures and phases outside the library."""
    rng = np.random.default_rng(11)
    confidences, right = [], []
    for k in range(120):
        kind = k % 3
        if kind == 0:  # a library phase, dilation inside half the window
            p = library[int(rng.integers(len(library)))]
            g, a = observe(p, rng, dilation=float(np.exp(rng.uniform(-0.0025, 0.0025))))
            truth = {p.phase}
        elif kind == 1:  # a phase that is not in the library
            g, a = observe(random_crystal(rng), rng)
            truth = set()
        else:  # a library phase beside an unknown one
            p = library[int(rng.integers(len(library)))]
            g1, a1 = observe(p, rng, dilation=float(np.exp(rng.uniform(-0.0025, 0.0025))))
            g2, a2 = observe(random_crystal(rng), rng)
            g, a, truth = np.r_[g1, g2], np.r_[a1, a2], {p.phase}
        if len(g) == 0:
            continue
        result = identify(as_observed(g, a), index, IdentifySettings(dilation_window=0.005))
        for phase, c in zip(result.phases, result.confidence):
            confidences.append(c)
            right.append(phase in truth)
    c, ok = np.array(confidences), np.array(right)
    sure = c >= 0.9
    assert sure.sum() >= 20
    n, k = int(sure.sum()), int(ok[sure].sum())
    assert k / n >= 0.9 or _binomial_upper_tail(n - k, n, 0.1) > 0.01, f"{k} of {n} right at confidence ≥ 0.9"


def test_tail_probability_of_an_exponential_null():
    """Decoy statistics drawn from an exponential law of scale 2: the estimated P(T ≥ s) follows the
    true survival function exp(−s/2) (computed) within a factor of 2 where the decoys reach and
    never falls below it by more than that factor beyond them."""
    null = np.random.default_rng(1).exponential(2.0, 2000)
    s = np.array([1.0, 4.0, 8.0, 12.0, 20.0])
    p = _tail_probability(s, null, quantum=1.0)
    truth = np.exp(-s / 2.0)
    assert np.all(p > truth / 2)
    assert np.all(p[:3] < truth[:3] * 2)


def test_forward_stop():
    # computed from the rule: the largest k with −(1/k)·Σ ln(1 − p_i) ≤ q
    assert _forward_stop([0.001, 0.015], 0.01) == 2  # (0.0010 + 0.0151) / 2 = 0.0081
    assert _forward_stop([0.006, 0.08, 0.08], 0.01) == 1  # k = 2: (0.0060 + 0.0834) / 2 = 0.045
    assert _forward_stop([0.2, 0.001], 0.01) == 0  # k = 1: 0.223; k = 2: 0.112
    assert _forward_stop([], 0.01) == 0


def test_bayes_factor_bound():
    # Sellke, Bayarri & Berger, Am. Stat. 55, 62 (2001): B ≥ −e·p·ln p; values computed from it
    assert null_bayes_factor(0.05) == pytest.approx(0.4072, abs=1e-4)
    assert null_bayes_factor(0.01) == pytest.approx(0.1252, abs=1e-4)
    assert null_bayes_factor(0.5) == 1.0


@pytest.mark.parametrize("calibrant, system, n_lines", [("ZnO", "hexagonal", 14), ("TiO2", "tetragonal", 14),
                                                        ("alpha_Al2O3", "hexagonal", 14), ("Si", "cubic", 10)])
def test_one_lattice_indexes_outside_line_lists(calibrant, system, n_lines):
    """Ten Si lines reach h² + k² + l² = 40; beyond 48 the cubic search stops and Si's cell is found as
    the equivalent tetragonal one (a/√2, a)."""
    # source: pyFAI's calibrant tables; the expected cell is the one in each table's header
    from ringid.identify.score import single_lattice

    cell, d = pyfai_calibrant(calibrant)
    g = 10.0 / d[:n_lines]
    lattice = single_lattice(g, np.hypot(5e-4 * g, 1e-3 * g))
    assert lattice["system"] == system
    assert lattice["a_angstrom"] == pytest.approx(cell[0], rel=1e-3)
    if system != "cubic":
        assert lattice["c_angstrom"] == pytest.approx(cell[2], rel=1e-3)


def test_lattice_free_lists_are_rarely_indexed():
    """About 1 % of lattice-free lists of 6-7 rings got a cubic cell while the ring minimums were chosen
    (bench_open_world.py --rate-only: 0 of 100 for every ring count); fewer than 12 rings are not tried
    for two-parameter cells."""
    from ringid.identify.score import single_lattice

    rng = np.random.default_rng(21)
    hits = 0
    for n in (6, 7, 12, 20, 40):
        for _ in range(20):
            obs = random_ring_list(rng, n)
            hits += single_lattice(obs.g_per_nm, np.hypot(obs.g_sigma_per_nm, 1e-3 * obs.g_per_nm)) is not None
    assert hits <= 3  # of 100: at most the binomial 2σ above the measured 1 %


def test_a_polytype_is_not_taken_for_the_cubic_phase(library, index, tmp_path):
    """Hexagonal (wurtzite-type) Si, a = a_Si/√2 and ideal c/a = √(8/3), shows the rings of cubic Si
    (111 = 002, 220 = 110, 311 = 112) among its own; its rings must not come back as Si.
    Worked example: the cell follows from the stacking of the same Si bilayers (computed)."""
    from cifgen import cif_text, write_cif
    from ringid.library.cif import read_crystal
    from ringid.library.structure import ring_list

    a = 5.4312 / math.sqrt(2)  # pyFAI's Si cell over √2
    text = cif_text(name="Si_hex", formula="Si", cell=(a, a, a * math.sqrt(8 / 3), 90, 90, 120),
                    symmetry="_space_group_name_H-M_alt 'P 63 m c'\n",
                    atoms=(("Si1", "Si", 1 / 3, 2 / 3, 0, 1, 0.006), ("Si2", "Si", 1 / 3, 2 / 3, 0.375, 1, 0.006)))
    rings, _, _ = ring_list(read_crystal(write_cif(tmp_path, "Si_hex", text)))
    g, area = observe(rings, np.random.default_rng(3), lose_strong_ring=0.0)
    result = identify(as_observed(g, area), index, IdentifySettings(dilation_window=0.005))
    assert "Si" not in result.phases
