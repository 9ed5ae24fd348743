"""Write small CIF texts for tests (structures from International Tables Vol. A settings)."""

from __future__ import annotations

from pathlib import Path

HEADER = """data_{name}
_chemical_formula_sum '{formula}'
_cell_length_a {a}
_cell_length_b {b}
_cell_length_c {c}
_cell_angle_alpha {alpha}
_cell_angle_beta {beta}
_cell_angle_gamma {gamma}
"""

ATOM_LOOP = """loop_
_atom_site_label
_atom_site_type_symbol
_atom_site_fract_x
_atom_site_fract_y
_atom_site_fract_z
_atom_site_occupancy
_atom_site_U_iso_or_equiv
"""


def cif_text(
    name="X",
    formula="Au",
    cell=(4.0782, 4.0782, 4.0782, 90, 90, 90),
    symmetry="_space_group_name_H-M_alt 'F m -3 m'\n",
    atoms=(("Au1", "Au", 0, 0, 0, 1, 0.0076),),
    extra="",
) -> str:
    a, b, c, al, be, ga = cell
    text = HEADER.format(name=name, formula=formula, a=a, b=b, c=c, alpha=al, beta=be, gamma=ga)
    text += symmetry + extra + ATOM_LOOP
    for row in atoms:
        text += " ".join(str(x) for x in row) + "\n"
    return text


def write_cif(folder: Path, stem: str, text: str) -> Path:
    path = Path(folder) / f"{stem}.cif"
    path.write_text(text, encoding="utf-8")
    return path
