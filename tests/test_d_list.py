"""Identification from a plain list of d-spacings (``ringid identify --d-angstrom``/``--d-list``),
as a microscopist has it from a hand measurement or a paper's table: no widths, often no intensities.

Outside data: pyFAI's calibrant d-spacing tables (pyFAI.calibrant; NIST SRM and literature
lattices). Note pyFAI's table named "CuO" lists cuprite, Cu2O (its d = 3.018, 2.464, 2.134 Å), so
it is not used as an outsider here. The shifts of 0.3 % are the scale of a hand measurement (common
practice, from memory).
"""

import json

import numpy as np
import pytest

from ringid.cli import main

# pyFAI calibrant -> the library phase of the same structure
IN_LIBRARY = {"Au": "Au", "Al": "Al", "CeO2": "CeO2", "NaCl": "NaCl", "Ni": "Ni", "Pt": "Pt", "Si": "Si",
              "ZnO": "ZnO", "LaB6": "LaB6", "alpha_Al2O3": "Al2O3_corundum", "TiO2": "TiO2_rutile",
              "graphite": "C_graphite"}
# pyFAI calibrants of phases that the shipped library does not hold
OUTSIDE = ["Cr2O3", "quartz", "cristobaltite", "hydrocerussite", "vanadinite", "C60", "verneite"]


def paper_list(calibrant: str, seed: int, n: int = 8) -> np.ndarray:
    """The first n d-spacings (Å, below 10 Å) of a pyFAI calibrant table, each shifted by a random 0.3 %."""
    import pyFAI.calibrant

    d = np.asarray(pyFAI.calibrant.get_calibrant(calibrant).dspacing, float)  # source: pyFAI calibrant table
    d = d[d < 10.0][:n]
    return d * (1 + np.random.default_rng(seed).normal(0.0, 0.003, d.size))


def identify_d(library, tmp_path, d, *extra) -> dict:
    out = tmp_path / "out"
    rc = main(["identify", "--d-angstrom", *(f"{x:.4f}" for x in d), "--d-accuracy-pct", "0.5",
               "--library", str(library), "-o", str(out), *extra])
    assert rc == 0
    return json.loads((out / "identification.json").read_text(encoding="utf-8"))


@pytest.mark.parametrize("calibrant", sorted(IN_LIBRARY))
def test_a_paper_list_of_a_library_phase_is_identified(reference_library, tmp_path, calibrant):
    """The right phase comes first, or, when an isostructural phase lies within the list's accuracy
    (Al and Au: a = 4.0495 and 4.0782 Å, 0.7 % apart, against 0.5 % per ring), it is named as the
    look-alike of a first phase whose confidence says the choice is open."""
    ident = identify_d(reference_library, tmp_path, paper_list(calibrant, seed=len(calibrant)))
    right = IN_LIBRARY[calibrant]
    assert ident["phases"], ident
    if ident["phases"][0] != right:
        assert right in ident["alternatives"][0] and ident["confidence"][0] < 0.9, ident
    assert ident["provenance"]["intensities"] == "unknown (no weight)"


@pytest.mark.parametrize("calibrant", OUTSIDE)
def test_a_paper_list_of_a_phase_outside_the_library_is_not_forced_onto_one(reference_library, tmp_path, calibrant):
    ident = identify_d(reference_library, tmp_path, paper_list(calibrant, seed=len(calibrant)))
    assert ident["phases"] == [], ident
    assert "unidentified_phase" in ident["flags"]


def test_a_d_list_table_with_intensities_and_its_errors(reference_library, tmp_path, capsys):
    """A CSV with d_angstrom and intensity (Au's kinematic ring areas, from the library); a table
    without d_angstrom or with an unknown column is a one-line error naming the file."""
    d = paper_list("Au", seed=3, n=6)
    table = tmp_path / "au.csv"
    table.write_text("d_angstrom,intensity\n" + "".join(f"{x:.4f},{i}\n" for x, i in
                                                        zip(d, [100, 45.5, 23.5, 23.4, 6.4, 3.0])), encoding="utf-8")
    out = tmp_path / "out"
    assert main(["identify", "--d-list", str(table), "--library", str(reference_library), "-o", str(out)]) == 0
    ident = json.loads((out / "identification.json").read_text(encoding="utf-8"))
    assert ident["phases"][:1] == ["Au"] and ident["provenance"]["intensities"] == "given"
    capsys.readouterr()
    bad = tmp_path / "bad.csv"
    bad.write_text("d,int\n2.35,100\n", encoding="utf-8")
    assert main(["identify", "--d-list", str(bad), "--library", str(reference_library), "-o", str(out)]) == 1
    assert capsys.readouterr().err.strip() == (f"ringid: error: {bad}: a d-spacing list needs a column d_angstrom "
                                               "(optional d_sigma_angstrom, intensity)")
