"""Phase library: ring positions, structure factors, absences, files and CLI."""

import csv
import dataclasses
import itertools
import json
import math
import re
import subprocess
import sys

import numpy as np
import pytest

from cifgen import cif_text, write_cif
from conftest import REFERENCE_PHASES, ROOT
from ringid.core.errors import RingidError
from ringid.library import store, structure
from ringid.library.cif import read_crystal
from ringid.library.store import INDEX_COLUMNS, RING_COLUMNS, build_library, build_phase, read_phase_rings
from ringid.library.structure import DEFAULT_MAX_REFLECTIONS, enumerate_hkl, estimated_reflections, ring_list

# ----------------------------------------------------------------- pyFAI calibrant tables

# pyFAI calibrant name -> our phase id. The calibrant files cite their sources in their
# headers (NIST SRM 640c/660c/674b, Maeland & Flanagan 1964, Witt 1967, Wyckoff 1963, ...).
CALIBRANTS = {
    "Au": "Au", "Al": "Al", "Si": "Si", "Ni": "Ni", "Pt": "Pt", "NaCl": "NaCl", "CeO2": "CeO2",
    "ZnO": "ZnO", "TiO2": "TiO2_rutile", "alpha_Al2O3": "Al2O3_corundum", "LaB6": "LaB6",
    "diamond": "C_diamond",
}


def pyfai_calibrant(name):
    """(cell, d-spacings) of a pyFAI calibrant, read from its .D resource file."""
    from pyFAI import resources

    text = open(resources.resource_filename(f"calibration/{name}.D"), encoding="utf-8").read()
    cell_line = next(line for line in text.splitlines() if line.startswith("# Cell"))
    numbers = re.findall(r"(?<![\w.])(\d+\.\d+|\d+)(?=\s|Å|°|\)|$)", cell_line.split(":", 1)[1])
    values = [float(x) for x in numbers]
    a = values[0]
    if len(values) >= 6:
        cell = tuple(values[:6])
    else:  # cubic cells given by a alone
        cell = (a, a, a, 90.0, 90.0, 90.0)
    d = np.array([float(line.split()[0]) for line in text.splitlines() if line.strip() and not line.startswith("#")])
    return cell, d


@pytest.mark.parametrize("calibrant", sorted(CALIBRANTS))
def test_d_spacings_equal_pyfai_calibrant_tables(calibrant):
    cell, d_cal = pyfai_calibrant(calibrant)
    crystal = read_crystal(REFERENCE_PHASES / f"{CALIBRANTS[calibrant]}.cif")
    # compare at the calibrant's own cell: only the ring enumeration and merging are tested
    crystal = dataclasses.replace(crystal, cell=cell)
    rings, _, _ = ring_list(crystal, d_min_angstrom=0.5)
    d_cal = d_cal[d_cal >= 0.5]
    for d in d_cal:  # every tabulated line is one of our rings (allowed or double diffraction)
        assert np.min(np.abs(rings.d_angstrom - d) / d) < 1e-4, f"{calibrant}: no ring at d = {d} Å"
    # and our five strongest rings inside the table's range are tabulated lines
    inside = (rings.d_angstrom >= d_cal.min() * (1 - 1e-4)) & (rings.intensity > 0)
    strongest = np.argsort(-np.where(inside, rings.intensity, -1))[: min(5, inside.sum())]
    for d in rings.d_angstrom[strongest]:
        assert np.min(np.abs(d_cal - d) / d) < 1e-4, f"{calibrant}: strong ring d = {d:.4f} Å not in the table"


# ----------------------------------------------------------------- gemmi's calculator

GEMMI_PHASES = ["Fe3O4", "TiO2_anatase", "Al2O3_corundum", "ZnO", "CeO2", "ZrO2_monoclinic", "C_graphite", "Si"]


def assert_rings_equal_gemmi(rings, refl, ring_of, st):
    """Our relative ring intensities Σ|F|²d² equal those from gemmi's StructureFactorCalculatorE
    on the gemmi small structure ``st`` (gemmi sums over its own operators per asymmetric-unit
    site: an independent symmetry expansion and structure-factor sum)."""
    import gemmi

    st.change_occupancies_to_crystallographic()
    calc = gemmi.StructureFactorCalculatorE(st.cell)
    weighted = np.zeros(len(rings.d_angstrom))
    for hkl, d, r in zip(refl.hkl, refl.d_angstrom, ring_of):
        if r >= 0:
            weighted[r] += abs(calc.calculate_sf_from_small_structure(st, [int(x) for x in hkl])) ** 2 * d * d
    ours = rings.intensity / 100.0
    weighted /= weighted.max()
    allowed = ~rings.double_diffraction
    np.testing.assert_allclose(ours[allowed], weighted[allowed], rtol=1e-6, atol=1e-9)
    assert np.all(weighted[~allowed] < 1e-9)


@pytest.mark.parametrize("phase", GEMMI_PHASES)
def test_ring_f_squared_equals_gemmi_structure_factor_calculator(phase):
    """Relative Σ|F|² of every ring equals gemmi's StructureFactorCalculatorE."""
    import gemmi

    path = REFERENCE_PHASES / f"{phase}.cif"
    crystal = read_crystal(path)
    rings, refl, ring_of = ring_list(crystal, d_min_angstrom=0.7)
    st = gemmi.read_small_structure(str(path))
    assert len(st.get_all_unit_cell_sites()) == len(crystal.fract)  # same expansion
    u_by_label = dict(zip(crystal.labels, crystal.u_iso_angstrom2))
    for site in st.sites:  # same U (our default where the CIF gives none); isotropic
        site.u_iso = float(u_by_label[site.label])
        site.aniso = gemmi.SMat33d(0, 0, 0, 0, 0, 0) if hasattr(site.aniso, "u11") else site.aniso
    assert_rings_equal_gemmi(rings, refl, ring_of, st)


def _gemmi_small_structure(path):
    import gemmi

    return gemmi.read_small_structure(str(path))


# A perovskite-type cell (Pm-3m: A at 1b, B at 1a, O at 3d; International Tables A) whose B
# site is shared by three elements of very different scattering power, written as the type
# symbol of one row, and the same structure written the conventional way, one row per element.
# source of the equivalence: each element's occupancy is its fraction times _atom_site_occupancy
# (0.9 here): Mg 0.56 × 0.9 = 0.504, Ta 0.29 × 0.9 = 0.261, Zr 0.15 × 0.9 = 0.135 (arithmetic).
PEROVSKITE = dict(formula="Sr Mg0.504 Ta0.261 Zr0.135 O3", cell=(4.05, 4.05, 4.05, 90, 90, 90),
                  symmetry="_space_group_name_H-M_alt 'P m -3 m'\n")
MIXED_ROW = ("M1", "'0.56(4)Mg + 0.29(3)Ta + 0.15(5)Zr'", 0, 0, 0, 0.9, 0.006)
ONE_ROW_PER_ELEMENT = (("Mg1", "Mg", 0, 0, 0, 0.504, 0.006), ("Ta1", "Ta", 0, 0, 0, 0.261, 0.006),
                       ("Zr1", "Zr", 0, 0, 0, 0.135, 0.006))
PEROVSKITE_A_AND_O = (("Sr1", "Sr2+", 0.5, 0.5, 0.5, 1, 0.008), ("O1", "O2-", 0.5, 0, 0, 1, 0.01))


def test_mixed_type_symbol_site_equals_gemmi_on_one_row_per_element(tmp_path):
    mixed = write_cif(tmp_path, "mixed", cif_text(atoms=(MIXED_ROW, *PEROVSKITE_A_AND_O), **PEROVSKITE))
    plain = write_cif(tmp_path, "plain", cif_text(atoms=(*ONE_ROW_PER_ELEMENT, *PEROVSKITE_A_AND_O), **PEROVSKITE))
    crystal = read_crystal(mixed)
    rings, refl, ring_of = ring_list(crystal, d_min_angstrom=0.6)
    assert_rings_equal_gemmi(rings, refl, ring_of, _gemmi_small_structure(plain))
    # the ring list is the library's own for the conventional file too
    rings_plain, _, _ = ring_list(read_crystal(plain), d_min_angstrom=0.6)
    np.testing.assert_allclose(rings.intensity, rings_plain.intensity, rtol=1e-9, atol=1e-12)


def test_dot_coordinates_equal_gemmi_on_the_zeros_written_out(tmp_path):
    # rutile type (P4_2/mnm: Ti 2a at 0,0,0, O 4f at x,x,0; International Tables A) with every
    # zero coordinate written '.', and the same file with the zeros written as numbers
    rutile = dict(formula="Ti O2", cell=(4.5937, 4.5937, 2.9587, 90, 90, 90),
                  symmetry="_space_group_name_H-M_alt 'P 42/m n m'\n")
    dots = (("Ti1", "Ti", ".", ".", ".", 1, 0.006), ("O1", "O", 0.3048, 0.3048, ".", 1, 0.008))
    zeros = (("Ti1", "Ti", 0, 0, 0, 1, 0.006), ("O1", "O", 0.3048, 0.3048, 0, 1, 0.008))
    crystal = read_crystal(write_cif(tmp_path, "dots", cif_text(atoms=dots, **rutile)))
    assert any("'.' read as 0" in w for w in crystal.warnings)
    rings, refl, ring_of = ring_list(crystal, d_min_angstrom=0.6)
    st = _gemmi_small_structure(write_cif(tmp_path, "zeros", cif_text(atoms=zeros, **rutile)))
    # source: International Tables A, P4_2/mnm 2a + 4f: 2 Ti + 4 O per cell
    assert len(st.get_all_unit_cell_sites()) == len(crystal.fract) == 6
    assert_rings_equal_gemmi(rings, refl, ring_of, st)


def test_operator_list_that_is_not_a_group_is_completed_with_a_warning(tmp_path):
    # 6 of the 12 operators of P6_3mc (International Tables A, No. 186): x,y,z, the 3-fold
    # -y,x-y,z, the 2_1 -x,-y,z+1/2 and three mirrors; not a group (the 3-fold's square
    # -x+y,-x,z is missing) but they generate all 12
    kept = ["'x,y,z'", "'-y,x-y,z'", "'-x,-y,z+1/2'", "'-y,-x,z'", "'x,x-y,z'", "'-x+y,y,z'"]
    text = (REFERENCE_PHASES / "ZnO.cif").read_text(encoding="utf-8")
    ops_block = text.split("_space_group_symop_operation_xyz\n", 1)[1].split("loop_", 1)[0]
    assert len(ops_block.split()) == 12 and set(kept) < set(ops_block.split())
    cifs = tmp_path / "cifs"
    cifs.mkdir()
    (cifs / "ZnO.cif").write_text(text, encoding="utf-8")
    (cifs / "ZnO_half.cif").write_text(text.replace(ops_block, "\n".join(kept) + "\n"), encoding="utf-8")
    records = {r["phase"]: r for r in build_library(cifs, tmp_path / "lib")}
    warning = "the 6 distinct symmetry operators listed are not a group; completed to the 12 operators they generate"
    assert any(w.startswith(warning) and "P 63 m c" in w for w in records["ZnO_half"]["warnings"])
    assert not any("not a group" in w for w in records["ZnO"]["warnings"])
    rings = tmp_path / "lib" / "rings"
    assert (rings / "ZnO_half.csv").read_text() == (rings / "ZnO.csv").read_text()
    with open(tmp_path / "lib" / "index.csv", newline="") as fh:
        index = {r["phase"]: r for r in csv.DictReader(fh)}
    assert warning in index["ZnO_half"]["warnings"] and "not a group" not in index["ZnO"]["warnings"]


# ----------------------------------------------------------------- absences (ITA Vol. A)


def _rings(phase, d_min=0.5):
    rings, refl, ring_of = ring_list(read_crystal(REFERENCE_PHASES / f"{phase}.cif"), d_min_angstrom=d_min)
    return rings, refl, ring_of


def _allowed_hkl(refl, ring_of):
    kinematic = ring_of >= 0
    kinematic &= refl.f_squared > 1e-10 * refl.f_squared.max()
    return refl.hkl[kinematic]


def test_fcc_unmixed_indices():
    # source: International Tables A, F-centring: h,k,l all even or all odd
    rings, refl, ring_of = _rings("Au")
    hkl = refl.hkl[ring_of >= 0]
    parity = np.mod(hkl, 2)
    assert np.all((parity == parity[:, :1]).all(axis=1))
    assert not rings.double_diffraction.any()  # centring absences never light up
    assert list(rings.hkl[:5]) == ["1 1 1", "2 0 0", "2 2 0", "3 1 1", "2 2 2"]
    assert list(rings.multiplicity[:5]) == [8, 6, 12, 24, 8]


def test_bcc_h_plus_k_plus_l_even():
    # source: International Tables A, I-centring: h+k+l = 2n
    rings, refl, ring_of = _rings("Fe")
    assert np.all(refl.hkl[ring_of >= 0].sum(axis=1) % 2 == 0)
    assert rings.hkl[0] == "1 1 0" and rings.multiplicity[0] == 12


def test_diamond_absences_and_double_diffraction():
    # source: International Tables A, Fd-3m (origin 2): F-centring, and for hkl all even
    # h+k+l = 4n (0kl: k+l = 4n from the d-glide; 222 extinguished by the 8a site)
    rings, refl, ring_of = _rings("Si")
    hkl = _allowed_hkl(refl, ring_of)
    even = (np.mod(hkl, 2) == 0).all(axis=1)
    assert np.all(hkl[even].sum(axis=1) % 4 == 0)
    labels = dict(zip(rings.hkl, rings.double_diffraction))
    # 200 = 111 + 1-1-1 and 222 = 111 + 111 light up by double diffraction (two allowed reflections that sum to a
    # forbidden one; common practice, from memory)
    assert labels["2 0 0"] and labels["2 2 2"]
    assert not labels["1 1 1"] and not labels["2 2 0"]
    i = rings.hkl.index("2 2 2")
    assert rings.intensity[i] == 0


def test_hcp_0001_forbidden_0002_allowed():
    # source: International Tables A, P6_3/mmc with atoms at 2c: 000l only l = 2n;
    # 0001 = (0 1 -1 1) + (0 -1 1 0) by double diffraction (two allowed reflections that sum to a forbidden one;
    # common practice, from memory)
    rings, _, _ = _rings("Ti")
    by_label = dict(zip(rings.hkl, zip(rings.intensity, rings.double_diffraction)))
    assert by_label["0 0 0 1"] == (0.0, True)
    assert by_label["0 0 0 2"][0] > 1 and not by_label["0 0 0 2"][1]
    # source: hcp Ti strongest X-ray/electron ring is 10-11 (common knowledge, from memory)
    assert rings.hkl[int(np.argmax(rings.intensity))] == "1 0 -1 1"


def test_rutile_h0l_with_h_plus_l_odd_absent():
    # source: International Tables A, P4_2/mnm: h0l (0kl) reflections only with h+l = 2n
    _, refl, ring_of = _rings("TiO2_rutile")
    hkl = _allowed_hkl(refl, ring_of)
    h0l = hkl[hkl[:, 1] == 0]
    assert len(h0l) and np.all((h0l[:, 0] + h0l[:, 2]) % 2 == 0)


def test_au_intensities_match_vainshtein_areas():
    # source: Au kinematic mean-profile areas (Σ|F|²d², B = 0.6 Å²), computed with gemmi's
    # StructureFactorCalculatorE (ITC Vol. C Table 4.3.2.2 factors):
    # 111/200/220/311/222 = 100/45.5/23.5/23.4/6.4
    crystal = read_crystal(REFERENCE_PHASES / "Au.cif")
    crystal = dataclasses.replace(crystal, u_iso_angstrom2=np.full(len(crystal.fract), 0.6 / (8 * np.pi**2)))
    rings, _, _ = ring_list(crystal)
    np.testing.assert_allclose(rings.intensity[:5], [100, 45.5, 23.5, 23.4, 6.4], atol=0.06)


def test_merge_tolerance_joins_equal_d():
    # cubic 333 and 511 share d = a/√27: one ring of multiplicity 8 + 24 = 32
    rings, _, _ = _rings("Au")
    i = int(np.argmin(np.abs(rings.d_angstrom - 4.0782 / np.sqrt(27))))
    assert rings.multiplicity[i] == 32


# ----------------------------------------------------------------- files and CLI


def test_reference_library_files(reference_library):
    with open(reference_library / "index.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert list(rows[0].keys()) == INDEX_COLUMNS
    phases = {r["phase"] for r in rows}
    required = {"Au", "Al", "Ag", "Cu", "Ni", "Pt", "Pd", "Fe", "W", "Si", "C_diamond", "C_graphite", "TlCl", "NaCl",
                "MgO", "NiO", "CeO2", "ZnO", "TiO2_rutile", "TiO2_anatase", "SnO2", "Al2O3_corundum", "Fe3O4", "Cu2O",
                "LaB6", "Ti", "ZrO2_monoclinic"}
    assert required <= phases
    assert all(r["status"] == "ok" for r in rows), [r for r in rows if r["status"] != "ok"]
    with open(reference_library / "rings" / "Fe3O4.csv", newline="") as fh:
        reader = csv.DictReader(fh)
        assert reader.fieldnames[:6] == [
            "d_angstrom",
            "g_per_nm",
            "intensity",
            "multiplicity",
            "hkl",
            "double_diffraction",
        ]
        assert set(RING_COLUMNS) == set(reader.fieldnames)
        ring_rows = list(reader)
    assert max(float(r["intensity"]) for r in ring_rows) == 100
    record = json.loads((reference_library / "phases" / "Fe3O4.json").read_text())
    for key in ("formula", "formula_units_z", "space_group_number", "space_group_symbol", "cell", "volume_angstrom3",
                "density_g_cm3", "cif_path", "cif_sha256", "warnings"):
        assert key in record
    assert record["space_group_number"] == 227
    # source: magnetite X-ray density 5.20 g/cm³ (handbook value, from memory), Z = 8
    assert record["density_g_cm3"] == pytest.approx(5.20, rel=0.01)
    assert record["formula_units_z"] == 8
    rings = read_phase_rings(reference_library, "Fe3O4")
    # source: magnetite strongest X-ray line 311 at 2.53 Å (ICDD-style tables, from memory);
    # in electron diffraction 311 is also the strongest ring
    assert rings.hkl[int(np.argmax(rings.intensity))] == "3 1 1"


def test_failed_cif_is_a_result_not_a_crash(tmp_path):
    cifs = tmp_path / "cifs"
    cifs.mkdir()
    write_cif(cifs, "Au", cif_text())
    write_cif(cifs, "broken", cif_text(atoms=(("Au1", "Au", 0, 0, 0, 2, 0.01),)))
    out = tmp_path / "lib"
    res = subprocess.run([sys.executable, "-m", "ringid.cli", "library", "build", str(cifs), "-o", str(out)],
                         capture_output=True, text=True)
    assert res.returncode == 0, res.stderr
    assert "broken.cif: occupancy 2 > 1 at site Au1" in res.stderr
    with open(out / "index.csv", newline="") as fh:
        rows = {r["phase"]: r for r in csv.DictReader(fh)}
    assert rows["Au"]["status"] == "ok" and rows["broken"]["status"] == "failed"
    assert "occupancy" in rows["broken"]["error"]
    assert json.loads((out / "phases" / "broken.json").read_text())["status"] == "failed"
    assert (out / "rings" / "broken.csv").read_text().startswith("d_angstrom,")


def test_nothing_built_exits_1_with_one_line(tmp_path):
    cifs = tmp_path / "cifs"
    cifs.mkdir()
    (cifs / "empty.cif").write_text("")
    res = subprocess.run(
        [sys.executable, "-m", "ringid.cli", "library", "build", str(cifs), "-o", str(tmp_path / "lib")],
        capture_output=True,
        text=True,
    )
    assert res.returncode == 1
    assert res.stderr.strip().splitlines()[-1] == f"ringid: error: {cifs}: no phase could be built"
    assert "Traceback" not in res.stderr


def test_per_cif_command_index_and_show(tmp_path):
    out = tmp_path / "lib"
    for phase in ("Au", "ZnO"):
        res = subprocess.run(
            [
                sys.executable,
                "-m",
                "ringid.cli",
                "library",
                "phase",
                str(REFERENCE_PHASES / f"{phase}.cif"),
                "-o",
                str(out),
            ],
            capture_output=True,
            text=True,
        )
        assert res.returncode == 0, res.stderr
    res = subprocess.run(
        [sys.executable, "-m", "ringid.cli", "library", "index", str(out)], capture_output=True, text=True
    )
    assert res.returncode == 0 and (out / "index.csv").exists()
    res = subprocess.run([sys.executable, "-m", "ringid.cli", "library", "show", "ZnO", "--library", str(out)],
                         capture_output=True, text=True)
    assert res.returncode == 0
    assert "1 0 -1 1" in res.stdout and "P 63 m c" in res.stdout
    res = subprocess.run([sys.executable, "-m", "ringid.cli", "library", "show", "Xx", "--library", str(out)],
                         capture_output=True, text=True)
    assert res.returncode == 1 and "phase 'Xx' is not in the library" in res.stderr


def test_build_is_deterministic(tmp_path):
    a = build_phase(REFERENCE_PHASES / "TiO2_anatase.cif", tmp_path / "a")
    b = build_phase(REFERENCE_PHASES / "TiO2_anatase.cif", tmp_path / "b")
    assert a == b
    for sub in ("rings", "phases", "reflections"):
        ext = "json" if sub == "phases" else "csv"
        assert (tmp_path / "a" / sub / f"TiO2_anatase.{ext}").read_bytes() == (
            tmp_path / "b" / sub / f"TiO2_anatase.{ext}"
        ).read_bytes()


def test_build_library_refuses_missing_folder(tmp_path):
    from ringid.core.errors import RingidError

    with pytest.raises(RingidError, match="not a folder"):
        build_library(tmp_path / "nope", tmp_path / "lib")


# ----------------------------------------------------------------- large cells, hidden centring, failures


def _p1_cif(cell, atoms=(("Au1", "Au", 0.1, 0.2, 0.3, 1, 0.005),)):
    return cif_text(formula="Au", cell=cell, symmetry="_space_group_name_H-M_alt 'P 1'\n", atoms=atoms)


@pytest.mark.parametrize("cell", [(4.0782, 4.0782, 4.0782, 90, 90, 90), (5.15, 5.21, 5.31, 90, 99.2, 90),
                                  (7.1, 8.3, 9.7, 83, 97, 104), (3.25, 3.25, 5.21, 90, 90, 120)])
def test_reflection_estimate_matches_the_enumeration(cell):
    # reciprocal lattice points in the sphere |g| ≤ 1/d_min: (4π/3)/d_min³ over the reciprocal
    # cell volume 1/V; the lattice-point count differs from it by a surface term only
    n = len(enumerate_hkl(cell, 0.3)[1])
    assert estimated_reflections(cell, 0.3) == pytest.approx(n, rel=0.02)


def test_large_cell_is_refused_before_any_enumeration(tmp_path, monkeypatch):
    path = write_cif(tmp_path, "huge", _p1_cif((120, 120, 120, 90, 90, 90)))

    def enumerate_nothing(*args):
        raise AssertionError("the enumeration must not start")

    monkeypatch.setattr(structure, "enumerate_hkl", enumerate_nothing)
    expected = 4 * math.pi / 3 * 120**3 / 0.5**3  # (4π/3)·V/d_min³, V = a³
    with pytest.raises(RingidError) as err:
        ring_list(read_crystal(path))
    assert str(err.value).startswith(f"{path}: cell volume 1,728,000 Å³ would have ~{expected:,.0f} reflections "
                                     f"to d_min = 0.5 Å, more than library.max_reflections = 1,000,000;")
    record = build_phase(path, tmp_path / "lib")
    assert record["status"] == "failed" and f"~{expected:,.0f} reflections" in record["error"]
    assert (tmp_path / "lib" / "rings" / "huge.csv").read_text().startswith("d_angstrom,")


def test_large_cell_cli_gives_one_line_and_the_bound_is_an_option(tmp_path):
    huge = write_cif(tmp_path, "huge", _p1_cif((120, 120, 120, 90, 90, 90)))
    cmd = [sys.executable, "-m", "ringid.cli", "library", "phase", str(huge), "-o", str(tmp_path / "lib")]
    res = subprocess.run(cmd, capture_output=True, text=True, timeout=60)
    assert res.returncode == 0 and "Traceback" not in res.stderr
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"ringid: warning: {huge}: cell volume 1,728,000 Å³ would have ~")
    assert lines[0].endswith("(recorded as failed)")
    # Au (a = 4.0782 Å) has ~(4π/3)·a³/0.5³ = 2,273 reflections to 0.5 Å: refused at 2,000, built at 3,000
    cifs = tmp_path / "cifs"
    cifs.mkdir()
    (cifs / "Au.cif").write_bytes((REFERENCE_PHASES / "Au.cif").read_bytes())
    for bound, status in (("2000", "failed"), ("3000", "ok")):
        lib = tmp_path / f"lib{bound}"
        subprocess.run([sys.executable, "-m", "ringid.cli", "library", "build", str(cifs), "-o", str(lib),
                        "--max-reflections", bound, "--quiet"], capture_output=True, text=True, timeout=120)
        assert json.loads((lib / "phases" / "Au.json").read_text())["status"] == status


@pytest.mark.parametrize("exc, reason", [
    (MemoryError(), "out of memory while computing the phase"),
    (ValueError("first line\nsecond line"), "unexpected ValueError while computing the phase: first line second line"),
])
def test_any_exception_of_a_phase_is_its_failed_record(tmp_path, monkeypatch, exc, reason):
    def fail(*args, **kwargs):
        raise exc

    monkeypatch.setattr(store, "ring_list", fail)
    record = build_phase(REFERENCE_PHASES / "Au.cif", tmp_path / "lib")
    assert record["status"] == "failed" and record["error"].startswith(reason) and "\n" not in record["error"]
    assert json.loads((tmp_path / "lib" / "phases" / "Au.json").read_text())["error"] == record["error"]
    assert (tmp_path / "lib" / "reflections" / "Au.csv").read_text().startswith("h,k,l,")


def test_hidden_centring_in_p1_gives_the_centred_ring_list():
    # bcc Fe written in P1 (atoms at 0,0,0 and 1/2,1/2,1/2) and in Im-3m: the same structure.
    # source: International Tables A, I-centring: h+k+l odd absent; in P1 these are forbidden
    # reflections that no sum of two allowed (h+k+l even) reflections reaches, so no ring
    fe = read_crystal(REFERENCE_PHASES / "Fe.cif")
    p1 = dataclasses.replace(fe, fract=np.array([[0, 0, 0], [0.5, 0.5, 0.5]]), elements=("Fe", "Fe"),
                             occupancy=np.ones(2), u_iso_angstrom2=np.full(2, fe.u_iso_angstrom2[0]),
                             labels=("Fe1", "Fe2"), centring_vectors=((0.0, 0.0, 0.0),))
    a, b = ring_list(fe, d_min_angstrom=0.4)[0], ring_list(p1, d_min_angstrom=0.4)[0]
    assert not b.double_diffraction.any()
    np.testing.assert_allclose(b.d_angstrom, a.d_angstrom, rtol=1e-12)
    np.testing.assert_allclose(b.intensity, a.intensity, rtol=1e-9, atol=1e-12)
    assert list(b.multiplicity) == list(a.multiplicity)


def test_lattice_of_allowed_reflections_has_the_index_of_its_minors():
    # source: the index of the lattice generated by integer vectors of rank 3 is the gcd of their
    # 3×3 minors (elementary divisors; H. Cohen, A Course in Computational Algebraic Number
    # Theory, 1993, Sect. 2.4, from memory)
    rng = np.random.default_rng(7)
    checked = 0
    while checked < 300:
        gens = rng.integers(-6, 7, size=(int(rng.integers(3, 7)), 3))
        minors = [round(abs(np.linalg.det(gens[list(c)]))) for c in itertools.combinations(range(len(gens)), 3)]
        if not any(minors):
            continue
        basis = structure._lattice_basis(gens)
        assert structure._in_lattice(gens, basis).all()
        assert basis[0][0] * basis[1][1] * basis[2][2] == math.gcd(*minors)
        checked += 1


def test_config_and_cli_share_the_reflection_bound():
    import yaml

    config = yaml.safe_load((ROOT / "config" / "config.yaml").read_text(encoding="utf-8"))
    schema = yaml.safe_load((ROOT / "config" / "config.schema.yaml").read_text(encoding="utf-8"))
    assert config["library"]["max_reflections"] == DEFAULT_MAX_REFLECTIONS
    assert schema["properties"]["library"]["properties"]["max_reflections"]["default"] == DEFAULT_MAX_REFLECTIONS
    rule = (ROOT / "ringid" / "workflow" / "rules" / "library.smk").read_text(encoding="utf-8")
    assert 'max_refl=config["library"]["max_reflections"]' in rule and "--max-reflections {params.max_refl}" in rule


@pytest.mark.slow
def test_largest_allowed_phase_fits_the_declared_cheap_job_memory(tmp_path):
    """Peak RSS of `ringid library phase` on a triclinic P1 cell just inside max_reflections stays
    below resources.cheap_mem_mb (a ring per Friedel pair: the most rings per reflection)."""
    import yaml

    declared_mb = yaml.safe_load((ROOT / "config" / "config.yaml").read_text(encoding="utf-8"))["resources"][
        "cheap_mem_mb"
    ]
    shape = (1.0, 1.07, 1.13, 83, 97, 104)
    volume = estimated_reflections(shape, 1.0) / (4 * math.pi / 3)  # of the unit-scaled cell
    scale = (0.98 * DEFAULT_MAX_REFLECTIONS * 0.5**3 / (4 * math.pi / 3) / volume) ** (1 / 3)
    cell = tuple(x * scale for x in shape[:3]) + shape[3:]
    path = write_cif(tmp_path, "big", _p1_cif(cell))
    probe = ("import resource, subprocess, sys; "
             "r = subprocess.run(sys.argv[1:]); "
             "print(r.returncode, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)")
    cmd = [sys.executable, "-c", probe, sys.executable, "-m", "ringid.cli", "library", "phase", str(path),
           "-o", str(tmp_path / "lib")]
    rc, peak_kb = subprocess.run(cmd, capture_output=True, text=True, check=True).stdout.split()
    record = json.loads((tmp_path / "lib" / "phases" / "big.json").read_text())
    assert rc == "0" and record["status"] == "ok" and record["n_reflections"] > 0.9 * DEFAULT_MAX_REFLECTIONS
    assert int(peak_kb) / 1024 < declared_mb
