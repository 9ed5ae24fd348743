"""The sample's elements (sample sheet column ``elements``): only library phases made of them are
candidates, and a far better phase of other elements is named (``better_match_outside_elements``).

Outside data: pyFAI's calibrant d-spacing tables (pyFAI.calibrant: Au, CeO2). pyFAI has no silver
table; silver's lines are gold's fcc lines scaled by the ratio of the lattice parameters, a(Ag) =
4.0862 Å (Wyckoff, Crystal Structures, 1963; handbook value, from memory) over a(Au) = 4.0782 Å
(the lattice of pyFAI's Au table, d(111)·√3). The shifts of 0.3 % are the scale of a hand
measurement (common practice, from memory), stated as 0.5 %.
"""

import json
import math

import numpy as np
import pytest

from conftest import write_sheet

A_AG, A_AU = 4.0862, 4.0782  # Å; source: see the module docstring (Ag from memory; Au from pyFAI's Au table)


def pyfai_lines(calibrant: str, seed: int, n: int = 8) -> np.ndarray:
    """The first n d-spacings (Å) of a pyFAI calibrant table (silver: gold's scaled), each shifted by a random 0.3 %."""
    import pyFAI.calibrant

    name, scale = ("Au", A_AG / A_AU) if calibrant == "Ag" else (calibrant, 1.0)
    d = np.asarray(pyFAI.calibrant.get_calibrant(name).dspacing, float) * scale  # source: pyFAI calibrant table
    d = d[d < 10.0][:n]
    return d * (1 + np.random.default_rng(seed).normal(0.0, 0.003, d.size))


@pytest.fixture(scope="module")
def index(reference_library):
    from ringid.identify.score import index_library
    from ringid.library.store import load_library

    return index_library(load_library(reference_library))


def _identify(index, calibrant, seed, elements=None):
    from ringid.identify.files import d_list_rings
    from ringid.identify.score import IdentifySettings, identify

    obs, _, _ = d_list_rings(pyfai_lines(calibrant, seed), accuracy=0.005)
    return identify(obs, index, IdentifySettings(intensity_weight=0.0), elements=elements)


def test_element_symbols_are_checked():
    from ringid.core.elements import formula_elements, parse_elements

    assert parse_elements("Ti O") == ("O", "Ti") and parse_elements("Au, C") == ("Au", "C")
    assert parse_elements("  ") == () and parse_elements("D O") == ("H", "O")  # deuterium counts as hydrogen
    with pytest.raises(ValueError, match=r"'Xy'"):
        parse_elements("Ti Xy")
    with pytest.raises(ValueError, match=r"'co' \(did you mean 'Co'\?\)"):
        parse_elements("co")
    # source: the formula of CeO2 and of calcite (CaCO3), as CIFs write them
    assert formula_elements("Ce O2") == {"Ce", "O"} and formula_elements("CaCO3") == {"Ca", "C", "O"}
    assert formula_elements("") is None


def test_decoys_inherit_their_phases_elements(index):
    """The restriction is a mask over the index's rows: a phase's decoys are kept with it."""
    au = [p.phase for p in index.phases].index("Au")
    mask = index.rows_within(["Au", "C"])
    kept = {index.phases[index.parent[r]].phase for r in np.flatnonzero(mask)}
    # source: the shipped phases made of Au and C only: Au, diamond, graphite (reference_phases/)
    assert kept == {"Au", "C_diamond", "C_graphite"}
    decoys = np.flatnonzero(index.parent == au)[1:]
    assert len(decoys) >= 2 and all(index.decoys[r - len(index.phases)].phase.startswith("decoy:Au:") for r in decoys)
    assert mask[decoys].all() and mask.sum() == 3 * (1 + len(decoys))


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_gold_and_silver_lines_with_and_without_elements(index, seed):
    free = _identify(index, "Au", seed)
    assert free.phases[:1] == ("Au",) and "Ag" in free.alternatives[0], free  # Ag: the look-alike, 0.2 % away
    only_au = _identify(index, "Au", seed, ["Au"])
    assert only_au.phases == ("Au",) and only_au.alternatives == ((),) and only_au.phases_within_elements == 1
    assert not only_au.better_match_outside_elements
    silver = _identify(index, "Ag", seed, ["Ag"])
    assert silver.phases == ("Ag",) and silver.elements == ("Ag",)
    # gold's lines in a sample said to hold silver: silver, its look-alike within the elements; gold scores
    # better but not by more than the alternatives' margin, so it is not a far better match
    au_as_ag = _identify(index, "Au", seed, ["Ag"])
    assert au_as_ag.phases == ("Ag",) and not au_as_ag.better_match_outside_elements
    assert 0 <= free.candidates[0].score - next(c.score for c in au_as_ag.candidates if c.phase == "Ag") < math.log(10)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_ceria_rings_in_a_sample_said_to_be_silicon_name_ceria(index, seed):
    """Diamond-type Si (5.431 Å) has its rings among those of fluorite-type CeO2 (5.411 Å), 0.4 % away:
    restricted to Si the search reports Si, and names CeO2 as a far better match outside the elements."""
    result = _identify(index, "CeO2", seed, ["Si"])
    assert "better_match_outside_elements" in result.flags
    outside = result.better_match_outside_elements
    assert [m["phase"] for m in outside] == ["CeO2"] and outside[0]["elements"] == ["Ce", "O"]
    assert outside[0]["false_identification_probability"] <= 0.01
    right = _identify(index, "CeO2", seed, ["Ce", "O"])
    assert right.phases == ("CeO2",) and "better_match_outside_elements" not in right.flags


def test_no_phase_within_the_elements_gives_no_answer_and_names_the_outside_one(index):
    result = _identify(index, "CeO2", 0, ["Xe"])
    assert result.phases == () and result.phases_within_elements == 0
    assert [m["phase"] for m in result.better_match_outside_elements] == ["CeO2"]


def test_a_bad_element_symbol_is_a_sheet_error_naming_file_and_line(tmp_path):
    from ringid.jobs.sheets import SheetError, read_samples

    image = tmp_path / "a.tif"
    image.write_bytes(b"x")
    sheet = tmp_path / "samples.csv"
    write_sheet(sheet, [{"sample": "a", "image": "a.tif", "calibration": "c", "elements": "Ti O"},
                        {"sample": "b", "image": "a.tif", "calibration": "c", "elements": "Ti Oo"}])
    with pytest.raises(SheetError) as err:
        read_samples(sheet)
    assert err.value.lines == [f"{sheet}:3: elements 'Ti Oo': not an element symbol: 'Oo'; write symbols such as "
                               "'Ti O' or 'Au, C'"]


def _measured_folder(out, sample, elements, d):
    """A sample folder as the image job leaves it (rings table, profile, thumbnail, sample.json), for pyFAI's lines."""
    import csv

    from ringid.core.model import Geometry
    from ringid.core.records import SampleRecord, write_sample_record
    from ringid.profile.rings import PROFILE_CSV_COLUMNS, RINGS_CSV_COLUMNS

    out.mkdir(parents=True)
    g = np.sort(10.0 / d)
    with open(out / "measured_rings.csv", "w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, RINGS_CSV_COLUMNS, restval="")
        w.writeheader()
        for gi in g:
            w.writerow({"g_per_nm": f"{gi:.6f}", "g_sigma_per_nm": f"{0.005 * gi:.6f}", "fwhm_per_nm": "0.2",
                        "area": "1", "kind": "ring"})
    with open(out / "profile.csv", "w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, PROFILE_CSV_COLUMNS, restval="")
        w.writeheader()
        for x in np.linspace(g[0] - 1, g[-1] + 1, 50):
            w.writerow({"g_per_nm": f"{x:.4f}", "intensity": "1", "background": "0", "model": "1"})
    np.save(out / "thumbnail.npy", np.zeros((8, 8), np.uint8))
    geometry = Geometry(center_x_px=4.0, center_y_px=4.0, ellipticity=0.0, ellipse_angle_deg=0.0,
                        camera_constant_A_px=100.0, voltage_kv=200.0, center_sigma_px=0.1)
    write_sample_record(out / "sample.json", SampleRecord(
        sample, image="x.tif", calibration="known", geometry=geometry, calibration_kind="constant",
        crystallinity="crystalline", n_rings=len(g), g_range_per_nm=(float(g[0] - 1), float(g[-1] + 1)),
        elements=elements))


def test_the_sheets_elements_reach_the_identification(reference_library, tmp_path):
    """Sheet -> manifest -> sample.json -> identification.json and the report's sentence: gold's lines
    (pyFAI's Au table) as Au, as Ag and without elements; ceria's as Si."""
    from ringid.jobs.batch import identify_batch, manifest_text, read_manifest
    from ringid.jobs.sheets import read_samples
    from ringid.library.store import load_library
    from ringid.report.html import _identification_notes

    (tmp_path / "x.tif").write_bytes(b"x")
    sheet = tmp_path / "samples.csv"
    write_sheet(sheet, [{"sample": "gold", "image": "x.tif", "calibration": "known", "elements": "Au"},
                        {"sample": "said_silver", "image": "x.tif", "calibration": "known", "elements": "Ag"},
                        {"sample": "free", "image": "x.tif", "calibration": "known", "elements": ""},
                        {"sample": "ceria", "image": "x.tif", "calibration": "known", "elements": "Si"}])
    manifest = tmp_path / "manifest.csv"
    manifest.write_text(manifest_text(read_samples(sheet).values()), encoding="utf-8")
    rows = {r.sample: r for r in read_manifest(manifest)}
    assert rows["said_silver"].elements == ("Ag",) and rows["free"].elements == ()
    for name, row in rows.items():
        _measured_folder(tmp_path / "samples" / name, name, row.elements, pyfai_lines(
            "CeO2" if name == "ceria" else "Au", seed=4))
    sample_json = json.loads((tmp_path / "samples" / "gold" / "sample.json").read_text(encoding="utf-8"))
    assert list(sample_json)[-1] == "elements" and sample_json["elements"] == ["Au"]
    dirs = [str(tmp_path / "samples" / s) for s in sorted(rows)]
    identify_batch(dirs, load_library(reference_library), window_standard=0.005, window_nominal=0.03,
                   library_dir=str(reference_library))
    ident = {s: json.loads((tmp_path / "samples" / s / "identification.json").read_text(encoding="utf-8"))
             for s in rows}
    assert ident["gold"]["phases"] == ["Au"] and ident["gold"]["elements"] == ["Au"]
    assert ident["said_silver"]["phases"] == ["Ag"]
    assert ident["free"]["phases"][:1] == ["Au"] and "Ag" in ident["free"]["alternatives"][0]
    assert ident["free"]["elements"] == [] and ident["free"]["phases_within_elements"] is None
    assert [m["phase"] for m in ident["ceria"]["better_match_outside_elements"]] == ["CeO2"]
    assert "better_match_outside_elements" in ident["ceria"]["flags"]
    notes = " ".join(_identification_notes(ident["ceria"]))
    assert "A far better match outside the elements:</b> CeO2 (Ce O;" in notes
    assert "Searched only the phases made of Si (1 library phase)" in notes


def test_the_command_line_takes_elements_and_refuses_a_wrong_symbol(reference_library, tmp_path, capsys):
    from ringid.cli import main

    d = [f"{x:.4f}" for x in pyfai_lines("CeO2", seed=5)]
    out = tmp_path / "out"
    base = ["identify", "--d-angstrom", *d, "--d-accuracy-pct", "0.5", "--library", str(reference_library),
            "-o", str(out)]
    assert main(base + ["--elements", "Si"]) == 0
    ident = json.loads((out / "identification.json").read_text(encoding="utf-8"))
    assert ident["elements"] == ["Si"] and [m["phase"] for m in ident["better_match_outside_elements"]] == ["CeO2"]
    capsys.readouterr()
    assert main(base + ["--elements", "Si Qq"]) == 1
    assert capsys.readouterr().err.strip() == ("ringid: error: --elements 'Si Qq': not an element symbol: 'Qq'; "
                                               "write symbols such as 'Ti O' or 'Au, C'")
