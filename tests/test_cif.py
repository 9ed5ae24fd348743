"""Reading CIFs: space-group sources, settings, displacement parameters, bad input."""

import math

import numpy as np
import pytest

from cifgen import cif_text, write_cif
from ringid.library.cif import DEFAULT_U_ISO_ANGSTROM2, read_crystal
from ringid.core.errors import RingidError

FCC_OPS = """loop_
_space_group_symop_operation_xyz
'x,y,z'
'x,y+1/2,z+1/2'
'x+1/2,y,z+1/2'
'x+1/2,y+1/2,z'
"""


def test_hm_symbol_fcc(tmp_path):
    c = read_crystal(write_cif(tmp_path, "Au", cif_text()))
    # source: International Tables A, Fm-3m 4a has 4 atoms per cell; Au formula Z = 4
    assert len(c.fract) == 4
    assert c.space_group_number == 225
    assert c.formula_units_z == 4
    # source: handbook density of gold 19.30 g/cm³ (CRC Handbook, from memory)
    assert c.density_g_cm3 == pytest.approx(19.30, rel=0.005)


def test_symop_loop_defines_the_group(tmp_path):
    # Only the four centring translations: the operators define F 1 (not Fm-3m); an
    # inconsistent H-M symbol is overruled by the operators with a warning.
    text = cif_text(symmetry="_space_group_name_H-M_alt 'P m -3 m'\n" + FCC_OPS)
    c = read_crystal(write_cif(tmp_path, "Au", text))
    assert len(c.fract) == 4
    assert len(c.centring_vectors) == 4
    assert any("disagrees" in w for w in c.warnings)


def test_old_symmetry_tags_and_hall(tmp_path):
    text = cif_text(symmetry="_symmetry_space_group_name_Hall '-F 4 2 3'\n")
    c = read_crystal(write_cif(tmp_path, "Au", text))
    assert c.space_group_number == 225 and len(c.fract) == 4
    text = cif_text(symmetry="_symmetry_space_group_name_H-M 'F m -3 m'\n")
    assert len(read_crystal(write_cif(tmp_path, "Au2", text)).fract) == 4
    text = cif_text(symmetry="loop_\n_symmetry_equiv_pos_as_xyz\nx,y,z\n-x,-y,-z\n")
    c = read_crystal(write_cif(tmp_path, "Au3", text))
    assert c.space_group_number == 2 and len(c.fract) == 1


FCC_SYMMETRY_ALIASES = {
    # source: International Tables A, No. 225 F m -3 m, full symbol F 4/m -3 2/m; Hall symbol
    # -F 4 2 3 (International Tables B, Table A1.4.2.7); tag names from cif_core.dic, cif_sym.dic
    # and mmcif_std.dic (from memory)
    "ref": "_space_group_name_H-M_ref 'F m -3 m'\n",
    "ref_ddlm": "_space_group.name_H-M_ref 'F m -3 m'\n",
    "full": "_space_group_name_H-M_full 'F 4/m -3 2/m'\n",
    "full_ddlm": "_space_group.name_H-M_full 'F 4/m -3 2/m'\n",
    "alt_ddlm": "_space_group.name_H-M_alt 'F m -3 m'\n",
    "mmcif_hm": "_symmetry.space_group_name_H-M 'F m -3 m'\n",
    "hall_ddlm": "_space_group.name_Hall '-F 4 2 3'\n",
    "mmcif_hall": "_symmetry.space_group_name_Hall '-F 4 2 3'\n",
    "number_ddlm": "_space_group.IT_number 225\n",
    "mmcif_number": "_symmetry.Int_Tables_number 225\n",
}


@pytest.mark.parametrize("name", sorted(FCC_SYMMETRY_ALIASES))
def test_space_group_from_any_symmetry_tag(tmp_path, name):
    c = read_crystal(write_cif(tmp_path, name, cif_text(symmetry=FCC_SYMMETRY_ALIASES[name])))
    assert c.space_group_number == 225 and len(c.fract) == 4  # Fm-3m 4a: 4 atoms (International Tables A)


def test_symop_loop_with_ddlm_tag(tmp_path):
    text = cif_text(symmetry=FCC_OPS.replace("_space_group_symop_operation_xyz", "_space_group_symop.operation_xyz"))
    c = read_crystal(write_cif(tmp_path, "ddlm", text))
    assert len(c.fract) == 4 and len(c.centring_vectors) == 4


# Full H-M symbols (only tag) -> IT number and general-position multiplicity.
# source: International Tables A (full symbols and Wyckoff tables; from memory)
FULL_SYMBOLS = [
    ("P 21/n 21/m 21/a", 62, 8, (5.0, 6.0, 7.0, 90, 90, 90)),
    ("C 2/m 2/c 21/m", 63, 16, (5.0, 6.0, 7.0, 90, 90, 90)),
    ("P 42/m 21/n 2/m", 136, 16, (6.0, 6.0, 4.0, 90, 90, 90)),
    ("P 63/m 2/m 2/c", 194, 24, (5.0, 5.0, 8.0, 90, 90, 120)),
    ("P -3 2/m 1", 164, 12, (5.0, 5.0, 8.0, 90, 90, 120)),
    ("I 41/a -3 2/d", 230, 96, (12.0, 12.0, 12.0, 90, 90, 90)),
    ("P 1 21/c 1", 14, 4, (5.0, 6.0, 7.0, 90, 100, 90)),
]


@pytest.mark.parametrize("symbol, number, multiplicity, cell", FULL_SYMBOLS)
def test_full_hm_symbol(tmp_path, symbol, number, multiplicity, cell):
    text = cif_text(cell=cell, symmetry=f"_space_group_name_H-M_full '{symbol}'\n",
                    atoms=(("Au1", "Au", 0.13, 0.31, 0.27, 1, 0.01),))  # a general position
    c = read_crystal(write_cif(tmp_path, "full", text))
    assert c.space_group_number == number and len(c.fract) == multiplicity


def test_r_symbol_on_rhombohedral_axes(tmp_path):
    # corundum on rhombohedral axes, a = 5.128 Å, alpha = 55.28° (R -3 c, Al 4c at x,x,x and
    # O 6e at x,1/2-x,1/4): 4 Al + 6 O per rhombohedral cell (International Tables A, R-3c
    # rhombohedral axes; cell and coordinates from memory); hexagonal-axes operators would
    # put 3 times as many atoms in it
    text = cif_text(formula="Al2 O3", cell=(5.128, 5.128, 5.128, 55.28, 55.28, 55.28),
                    symmetry="_space_group_name_H-M_ref 'R -3 c'\n",
                    atoms=(("Al1", "Al", 0.3523, 0.3523, 0.3523, 1, 0.003),
                           ("O1", "O", 0.5561, -0.0561, 0.25, 1, 0.004)))
    c = read_crystal(write_cif(tmp_path, "corundum_rh", text))
    assert c.space_group_symbol == "R -3 c:R"
    assert sorted(c.elements).count("Al") == 4 and sorted(c.elements).count("O") == 6
    # source: corundum density 3.99 g/cm³ (CRC Handbook, from memory; as in test_reference_phases)
    assert c.density_g_cm3 == pytest.approx(3.99, rel=0.01)


def test_hm_symbols_that_disagree_are_reported(tmp_path):
    text = cif_text(symmetry="_space_group_name_H-M_alt 'F m -3 m'\n_space_group_name_H-M_ref 'P m -3 m'\n")
    c = read_crystal(write_cif(tmp_path, "two", text))
    assert c.space_group_number == 225
    assert any("name different space groups" in w for w in c.warnings)


def test_operators_without_identity_are_completed_with_a_warning(tmp_path):
    text = cif_text(symmetry="loop_\n_symmetry_equiv_pos_as_xyz\n-x,-y,-z\n",
                    atoms=(("Au1", "Au", 0.1, 0.2, 0.3, 1, 0.01),))
    c = read_crystal(write_cif(tmp_path, "inversion_only", text))
    # the inversion generates P -1 (International Tables A, No. 2): 2 atoms at a general position
    assert c.space_group_number == 2 and len(c.fract) == 2
    assert any("the 1 distinct symmetry operator listed is not a group" in w for w in c.warnings)


def test_number_only_uses_reference_setting_with_warning(tmp_path):
    c = read_crystal(write_cif(tmp_path, "Au", cif_text(symmetry="_space_group_IT_number 225\n")))
    assert len(c.fract) == 4
    assert any("number" in w for w in c.warnings)


def test_origin_choice_of_diamond_is_found(tmp_path):
    # Si at 8a: (1/8,1/8,1/8) in origin choice 2 and (0,0,0) in choice 1 (ITA, Fd-3m).
    si = dict(formula="Si", cell=(5.431, 5.431, 5.431, 90, 90, 90), extra="_cell_formula_units_Z 8\n")
    c2 = read_crystal(write_cif(tmp_path, "a", cif_text(symmetry="_space_group_name_H-M_alt 'F d -3 m'\n",
                                                         atoms=(("Si1", "Si", 0.125, 0.125, 0.125, 1, 0.005),), **si)))
    c1 = read_crystal(write_cif(tmp_path, "b", cif_text(symmetry="_space_group_name_H-M_alt 'F d -3 m'\n",
                                                         atoms=(("Si1", "Si", 0, 0, 0, 1, 0.005),), **si)))
    assert len(c1.fract) == len(c2.fract) == 8
    assert c2.space_group_symbol.endswith(":2") and c1.space_group_symbol.endswith(":1")
    # the two descriptions are the same structure: the same nearest-neighbour distance
    # source: Si nearest-neighbour distance a·√3/4 = 2.3517 Å (diamond structure geometry)
    for c in (c1, c2):
        orth = np.array([[5.431, 0, 0], [0, 5.431, 0], [0, 0, 5.431]])
        diff = c.fract[1:] - c.fract[0]
        diff -= np.round(diff)
        assert np.min(np.linalg.norm(diff @ orth, axis=1)) == pytest.approx(5.431 * math.sqrt(3) / 4, rel=1e-6)


def test_displacement_parameters(tmp_path):
    b_text = cif_text(atoms=(("Au1", "Au", 0, 0, 0, 1),)).replace(
        "_atom_site_U_iso_or_equiv", "_atom_site_B_iso_or_equiv"
    )
    b_text = b_text.replace("Au1 Au 0 0 0 1\n", "Au1 Au 0 0 0 1 0.6\n")
    c = read_crystal(write_cif(tmp_path, "B", b_text))
    assert c.u_iso_angstrom2[0] == pytest.approx(0.6 / (8 * math.pi**2), rel=1e-6)
    no_u = cif_text(atoms=(("Au1", "Au", 0, 0, 0, 1, "?"),))
    c = read_crystal(write_cif(tmp_path, "none", no_u))
    assert c.u_iso_angstrom2[0] == DEFAULT_U_ISO_ANGSTROM2
    assert any("default U" in w for w in c.warnings)
    aniso = (
        cif_text()
        + "loop_\n_atom_site_aniso_label\n_atom_site_aniso_U_11\n_atom_site_aniso_U_22\n_atom_site_aniso_U_33\n"
    )
    aniso += "_atom_site_aniso_U_12\n_atom_site_aniso_U_13\n_atom_site_aniso_U_23\nAu1 0.01 0.012 0.014 0.001 0 0\n"
    c = read_crystal(write_cif(tmp_path, "aniso", aniso))
    # U_eq = trace/3 for a cubic cell (Fischer & Tillmanns 1988, Acta Cryst. C44, 775)
    assert c.u_iso_angstrom2[0] == pytest.approx(0.012, rel=1e-5)


def test_partial_and_mixed_occupancy_and_ions(tmp_path):
    # a Cu3Au-like disordered fcc alloy: one site shared 0.75 Cu / 0.25 Au
    text = cif_text(formula="Cu0.75 Au0.25", cell=(3.75, 3.75, 3.75, 90, 90, 90),
                    atoms=(("Cu1", "Cu2+", 0, 0, 0, 0.75, 0.008), ("Au1", "Au", 0, 0, 0, 0.25, 0.008)))
    c = read_crystal(write_cif(tmp_path, "alloy", text))
    assert len(c.fract) == 8 and sorted(set(c.elements)) == ["Au", "Cu"]
    assert np.sum(c.occupancy) == pytest.approx(4.0)
    assert any("neutral" in w for w in c.warnings)


def _components(crystal, label):
    """{element: occupancy} of one site (the first image of each element under that label)."""
    out = {}
    for lab, el, occ in zip(crystal.labels, crystal.elements, crystal.occupancy):
        if lab == label:
            out.setdefault(el, float(occ))
    return out


@pytest.mark.parametrize(
    "symbol, site_occupancy, expected",
    [
        # expected: fraction × _atom_site_occupancy per element (arithmetic on the written values;
        # standard uncertainties in parentheses dropped)
        ("0.8Nb + 0.2Zr", 1, {"Nb": 0.8, "Zr": 0.2}),
        ("0.56(4)Mg + 0.29(3)Ta + 0.15(5)Zr", 0.9, {"Mg": 0.504, "Ta": 0.261, "Zr": 0.135}),
        ("0.5Ga + 0.26Zn + 0.24Mn", 1, {"Ga": 0.5, "Zn": 0.26, "Mn": 0.24}),
        # two valence states of one element: one neutral-atom scatterer with the summed fraction
        ("0.4Fe2+ + 0.6Fe3+", 0.5, {"Fe": 0.5}),
    ],
)
def test_mixed_site_type_symbols(tmp_path, symbol, site_occupancy, expected):
    text = cif_text(formula="Nb", atoms=(("M1", f"'{symbol}'", 0, 0, 0, site_occupancy, 0.01),))
    c = read_crystal(write_cif(tmp_path, "mixed", text))
    assert _components(c, "M1") == pytest.approx(expected, rel=1e-12)
    # Fm-3m 4a: 4 positions per cell (International Tables A), each shared by every element
    assert len(c.fract) == 4 * len(expected)
    assert sum(c.occupancy) == pytest.approx(4 * sum(expected.values()))


def test_mixed_site_with_charges_vacancy_and_rounding(tmp_path):
    text = cif_text(atoms=(("M1", "'0.5Fe2+ + 0.3Ni2+'", 0, 0, 0, 1, 0.01), ("O1", "O2-", 0.5, 0.5, 0.5, 1, 0.01)))
    c = read_crystal(write_cif(tmp_path, "vacant", text))
    assert _components(c, "M1") == pytest.approx({"Fe": 0.5, "Ni": 0.3})
    assert any("ionic" in w and "M1 (0.5Fe2+ + 0.3Ni2+)" in w and "O1 (O2-)" in w for w in c.warnings)
    assert any("less than 1" in w and "M1" in w for w in c.warnings)
    # 0.34 + 0.34 + 0.33 = 1.01 is within the rounding of three two-decimal fractions (±0.015)
    text = cif_text(atoms=(("M1", "'0.34Nb + 0.34Zr + 0.33Ti'", 0, 0, 0, 1, 0.01),))
    c = read_crystal(write_cif(tmp_path, "rounded", text))
    assert sum(_components(c, "M1").values()) == pytest.approx(1.0)


def test_ionic_type_symbols_keep_working(tmp_path):
    text = cif_text(formula="Fe3 O4", atoms=(("Fe1", "Fe3+", 0, 0, 0, 1, 0.01), ("O1", "O2-", 0.5, 0.5, 0.5, 1, 0.01),
                                             ("Nb1", "Nb+5", 0.25, 0.25, 0.25, 0.5, 0.01)))
    c = read_crystal(write_cif(tmp_path, "ions", text))
    assert sorted(set(c.elements)) == ["Fe", "Nb", "O"]
    assert any("neutral" in w and "Nb1 (Nb+5)" in w for w in c.warnings)


def test_dot_coordinates_read_as_zero_when_the_file_writes_no_zero(tmp_path):
    # CsCl type (Pm-3m, 1a + 1b; International Tables A) with the zeros of 1a written '.'
    text = cif_text(formula="Cs Cl", cell=(4.12, 4.12, 4.12, 90, 90, 90),
                    symmetry="_space_group_name_H-M_alt 'P m -3 m'\n",
                    atoms=(("Cs1", "Cs", ".", ".", ".", 1, 0.02), ("Cl1", "Cl", 0.5, 0.5, 0.5, 1, 0.02)))
    c = read_crystal(write_cif(tmp_path, "dots", text))
    assert c.fract.tolist() == [[0, 0, 0], [0.5, 0.5, 0.5]]
    assert any("'.' read as 0" in w and "Cs1 (x y z)" in w for w in c.warnings)


def test_cif2_text(tmp_path):
    text = "#\\#CIF_2.0\n" + cif_text(extra="_publ_section_title\n'''Gold, film standard (Å)'''\n")
    c = read_crystal(write_cif(tmp_path, "cif2", text))
    assert len(c.fract) == 4 and "Gold" in c.title


BAD = {
    "empty": ("", "empty file"),
    "binary": (b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR", "binary"),
    "not_cif": ("this is not a crystal structure\njust words\n", "not a valid CIF"),
    "no_cell": (cif_text().replace("_cell_length_a 4.0782\n", ""), "no unit cell"),
    "no_atoms": (cif_text().split("loop_")[0], "no atom sites"),
    "unknown_element": (cif_text(atoms=(("Qq1", "Qq", 0, 0, 0, 1, 0.01),)), "unknown element"),
    "occupancy": (cif_text(atoms=(("Au1", "Au", 0, 0, 0, 1.5, 0.01),)), "occupancy 1.5 > 1"),
    "negative_u": (cif_text(atoms=(("Au1", "Au", 0, 0, 0, 1, -0.01),)), "negative displacement"),
    "duplicate_sites": (
        cif_text(atoms=(("Au1", "Au", 0, 0, 0, 1, 0.01), ("Au2", "Au", 0, 0, 0, 1, 0.01))),
        "duplicated atom sites",
    ),
    "duplicate_labels": (
        cif_text(atoms=(("Au1", "Au", 0, 0, 0, 1, 0.01), ("Au1", "Au", 0.5, 0.5, 0.5, 1, 0.01))),
        "duplicated atom site label",
    ),
    "angles": (cif_text(cell=(4, 4, 4, 120, 120, 120)), "impossible cell angles"),
    "angle_range": (cif_text(cell=(4, 4, 4, 90, 190, 90)), "impossible cell angles"),
    "mixed_without_fractions": (cif_text(atoms=(("M1", "'Nb + Zr'", 0, 0, 0, 1, 0.01),)),
                                "cannot read type symbol 'Nb + Zr' at site M1"),
    "mixed_as_formula": (cif_text(atoms=(("M1", "Nb0.8Zr0.2", 0, 0, 0, 1, 0.01),)), "cannot read type symbol"),
    "two_valences": (cif_text(atoms=(("M1", "Fe2+/Fe3+", 0, 0, 0, 1, 0.01),)), "cannot read type symbol"),
    "mixed_over_one": (cif_text(atoms=(("M1", "'0.8Nb + 0.4Zr'", 0, 0, 0, 1, 0.01),)), "sum to 1.2 > 1"),
    "mixed_unknown": (cif_text(atoms=(("M1", "'0.8Nb + 0.2Qq'", 0, 0, 0, 1, 0.01),)), "unknown element symbol 'Qq'"),
    "mixed_overlap": (cif_text(atoms=(("M1", "'0.8Nb + 0.2Zr'", 0, 0, 0, 1, 0.01), ("O1", "O", 0, 0, 0, 0.1, 0.01))),
                      "duplicated atom sites: M1 and O1"),
    # CIF 1.1 syntax: '?' is an unknown value (from memory)
    "unknown_coordinate": (cif_text(atoms=(("Au1", "Au", 0.5, 0.5, "?", 1, 0.01),)),
                           "site Au1 has an unknown fractional coordinate (_atom_site_fract_z is '?')"),
    "dot_and_zero": (cif_text(atoms=(("Au1", "Au", 0, 0, 0, 1, 0.01), ("O1", "O", 0.5, 0.5, ".", 1, 0.01))),
                     "site O1 has '.' for _atom_site_fract_z"),
    "text_coordinate": (cif_text(atoms=(("Au1", "Au", "half", 0, 0, 1, 0.01),)),
                        "not a number (_atom_site_fract_x half)"),
    "space_group": (cif_text(symmetry="_space_group_name_H-M_alt 'Q 9 z'\n"), "space group cannot be resolved"),
    "space_group_ref": (cif_text(symmetry="_space_group_name_H-M_ref 'F m 9 m'\n"), "unknown H-M symbol 'F m 9 m'"),
    "no_space_group": (cif_text(symmetry=""), "space group cannot be resolved"),
}


@pytest.mark.parametrize("name", sorted(BAD))
def test_bad_cif_gives_one_line_error_naming_the_file(tmp_path, name):
    content, expected = BAD[name]
    path = tmp_path / f"{name}.cif"
    path.write_bytes(content if isinstance(content, bytes) else content.encode())
    with pytest.raises(RingidError) as err:
        read_crystal(path)
    message = str(err.value)
    assert message.startswith(str(path) + ": ")
    assert expected in message
    assert "\n" not in message


def test_untrusted_title_is_kept_as_text(tmp_path):
    text = cif_text(extra="_chemical_name_common '<script>alert(\"x\")</script>'\n")
    c = read_crystal(write_cif(tmp_path, "evil", text))
    assert c.title == '<script>alert("x")</script>'  # escaping is the report's job
