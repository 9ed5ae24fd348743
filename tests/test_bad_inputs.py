"""A corpus of bad inputs, made at test time, each checked for its one-line error.

Where the user meets each problem:

- images: ``ringid measure`` records the sample as ``status: failed`` with the error (exit 0, so
  the other samples of a run go on); a pattern without rings is not an error but a result
  (``status: ok``, ``crystallinity: no_signal``);
- CIFs: ``ringid library build`` lists each failed CIF as ``ringid: warning: FILE: problem`` and
  in ``library/index.csv`` (status, error), and builds the others;
- sheets and config: checked when the workflow starts (``ringid.jobs.sheets.read_sheets`` and the
  JSON schema), every problem at once, before any job runs.

Decisions: an image with no usable pixel (all zero, all saturated, all NaN) is an error (the
recording failed; nothing can be measured), a pattern with counts but no ring is a result
(``no_signal``); a pattern whose rings are arcs about a centre outside the image is an error (a
centre from point symmetry is wrong there; the centre of the intensity falloff tells it).
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from cifgen import cif_text, write_cif
from ringid.cli import main

ROOT = Path(__file__).resolve().parent.parent
K_A_PX = 125.0  # camera constant of the synthetic patterns (Å·px): rings of Au at 53–123 px


def au_d_spacings_angstrom() -> np.ndarray:
    """Au ring d-spacings (Å) from pyFAI's calibrant table (outside the project)."""
    from pyFAI.calibrant import get_calibrant

    cal = get_calibrant("Au")
    d = getattr(cal, "dspacing", None) or cal.dSpacing  # source: pyFAI calibrant table Au.D
    return np.asarray(d[:5], float)


def ring_pattern(**kw) -> np.ndarray:
    from ringid.synthetic.simulate import simulate_pattern

    d = au_d_spacings_angstrom()
    # rings about 4 px wide (0.3 1/nm at 0.08 1/nm per px), as a 256² frame records them
    kw.setdefault("instrument_fwhm_per_nm", 0.3)
    return simulate_pattern(d, [100, 50, 30, 30, 10], camera_constant_A_px=K_A_PX, shape=(256, 256), seed=1, **kw).image


@pytest.fixture(scope="module")
def calibration(tmp_path_factory) -> Path:
    """A known-camera-constant calibration record, as the workflow's calibration job writes it."""
    from ringid.jobs.measure import make_calibration
    from ringid.jobs.sheets import CalibrationRow

    path = tmp_path_factory.mktemp("cal") / "known.json"
    rec = make_calibration(CalibrationRow("known", "constant", 200.0, camera_constant_A_px=K_A_PX), path)
    assert rec.status == "ok"
    return path


def run_measure(image: Path, calibration: Path, out: Path, capsys, *extra: str) -> tuple[int, dict, str]:
    rc = main(
        ["measure", str(image), "--calibration", str(calibration), "-o", str(out), "--sample", image.stem, *extra]
    )
    err = capsys.readouterr().err
    return rc, json.loads((out / "sample.json").read_text(encoding="utf-8")), err


# --------------------------------------------------------------------------- images


def _tiff(path, data, **kw):
    import tifffile

    tifffile.imwrite(path, data, **kw)
    return path


def _zero_byte(p):
    p.write_bytes(b"")
    return p


def _truncated(p):
    _tiff(p, ring_pattern())
    data = p.read_bytes()
    p.write_bytes(data[: len(data) // 2])
    return p


def _text(p):
    p.write_text("sample notes, not an image\n", encoding="utf-8")
    return p


def _rgb(p):
    rgb = np.random.default_rng(0).integers(0, 255, (256, 256, 3), dtype=np.uint8)
    return _tiff(p, rgb, photometric="rgb")


def _volume_npy(p):
    np.save(p, np.random.default_rng(0).integers(0, 100, (256, 256, 20), dtype=np.uint16))
    return p


def _volume_4d(p):
    data = np.random.default_rng(0).integers(0, 100, (2, 3, 256, 256), dtype=np.uint16)
    return _tiff(p, data, photometric="minisblack")


# (case, file name, writer, problem text the error must contain, extra measure options)
FAILING_IMAGES = [
    ("zero-byte file", "empty.tif", _zero_byte, "empty file (0 bytes)", ()),
    ("truncated TIFF", "truncated.tif", _truncated, "unreadable or truncated TIFF", ()),
    ("text file named .tif", "notes.tif", _text, "not an image: neither a TIFF, an MRC nor a .npy file", ()),
    (
        "1×1 image",
        "one.tif",
        lambda p: _tiff(p, np.ones((1, 1), np.uint16)),
        "image of 1×1 px is smaller than 64×64",
        (),
    ),
    (
        "10×3000 image",
        "strip.tif",
        lambda p: _tiff(p, np.ones((10, 3000), np.uint16)),
        "image of 3000×10 px is smaller than 64×64",
        (),
    ),
    ("true-colour RGB", "colour.tif", _rgb, "true-colour RGB image", ()),
    (
        "all-zero",
        "zeros.tif",
        lambda p: _tiff(p, np.zeros((256, 256), np.uint16)),
        "every pixel is 0: no counts recorded",
        (),
    ),
    (
        "all-saturated",
        "saturated.tif",
        lambda p: _tiff(p, np.full((256, 256), 65535, np.uint16)),
        "every pixel is saturated (at or above 65535 counts)",
        (),
    ),
    (
        "all-NaN float",
        "nan.tif",
        lambda p: _tiff(p, np.full((256, 256), np.nan, np.float32)),
        "every pixel is NaN or infinite",
        (),
    ),
    (
        "over --max-pixels",
        "large.tif",
        lambda p: _tiff(p, ring_pattern()),
        "image of 65536 pixels exceeds the limit of 50000 pixels",
        ("--max-pixels", "50000"),
    ),
    (
        "3-D volume (.npy)",
        "volume.npy",
        _volume_npy,
        "3-D data of shape (256, 256, 20) is not a single image or a frame stack",
        (),
    ),
    (
        "4-D TIFF",
        "volume4d.tif",
        _volume_4d,
        "4-D data of shape (2, 3, 256, 256) is not a single image or a frame stack",
        (),
    ),
]


@pytest.mark.parametrize("case,name,write,problem,extra", FAILING_IMAGES, ids=[c[0] for c in FAILING_IMAGES])
def test_bad_image_is_a_failed_sample_with_its_error(tmp_path, calibration, capsys, case, name, write, problem, extra):
    image = write(tmp_path / name)
    out = tmp_path / "out"
    rc, rec, err = run_measure(image, calibration, out, capsys, *extra)
    assert rc == 0  # a failed sample is a result: the run goes on
    # nothing was measured: no crystallinity (no_signal is a measurement: a pattern without rings)
    assert rec["status"] == "failed" and rec["crystallinity"] == "" and rec["n_rings"] == 0
    error = rec["error"]
    assert "\n" not in error and error.startswith(f"{image}: "), error
    assert problem in error, error
    assert "internal error" not in error
    assert f"ringid: warning: {error} (recorded as failed)" in err
    # every output the workflow rule declares exists, so Snakemake sees a finished job
    for f in ("measured_rings.csv", "profile.csv", "thumbnail.npy", "sample.json"):
        assert (out / f).is_file()
    assert not list(out.glob(".*.tmp*"))  # no temporary left behind


def test_size_limit_checked_before_the_pixels_are_read(tmp_path, calibration, capsys):
    """A truncated file over the limit is refused for its size, so no pixel was read."""
    image = tmp_path / "large_truncated.tif"
    _tiff(image, np.zeros((512, 512), np.uint16))
    image.write_bytes(image.read_bytes()[:4096])
    _, rec, _ = run_measure(image, calibration, tmp_path / "out", capsys, "--max-pixels", "100000")
    assert rec["error"] == f"{image}: image of 262144 pixels exceeds the limit of 100000 pixels"


def test_blank_pattern_is_no_signal_not_an_error(tmp_path, calibration, capsys):
    """Counts but no ring (an exposure through a hole): a result, centre from point symmetry."""
    from ringid.synthetic.simulate import simulate_pattern

    image = _tiff(
        tmp_path / "blank.tif", simulate_pattern([], [], camera_constant_A_px=K_A_PX, shape=(256, 256), seed=2).image
    )
    rc, rec, _ = run_measure(image, calibration, tmp_path / "out", capsys)
    assert rc == 0 and rec["status"] == "ok" and rec["error"] == ""
    assert rec["crystallinity"] == "no_signal" and rec["n_rings"] == 0
    assert "center_from_symmetry" in rec["flags"]


def _offcentre(p):
    return _tiff(p, ring_pattern(center_x_px=-60.0, center_y_px=100.0))


def test_centre_outside_the_image_is_flagged(tmp_path, calibration, capsys):
    """Ring arcs about a centre outside the frame: never an unflagged result."""
    image = _offcentre(tmp_path / "offcentre.tif")
    rc, rec, _ = run_measure(image, calibration, tmp_path / "out", capsys)
    assert rc == 0
    assert rec["status"] == "failed" or "center_from_symmetry" in rec["flags"], rec


def test_centre_outside_the_image_is_an_error(tmp_path, calibration, capsys):
    image = _offcentre(tmp_path / "offcentre.tif")
    _, rec, _ = run_measure(image, calibration, tmp_path / "out", capsys)
    assert rec["status"] == "failed" and rec["error"].startswith(f"{image}: "), rec
    assert "centre is outside the image" in rec["error"], rec


@pytest.mark.parametrize("centre", [(-60.0, 100.0), (300.0, 128.0), (128.0, -10.0)])
def test_falloff_centre_found_outside_the_frame(centre):
    """The falloff centre is where the simulated direct beam is, also off the frame."""
    from ringid.image.center import falloff_center

    fc = falloff_center(ring_pattern(center_x_px=centre[0], center_y_px=centre[1]))
    assert fc.agreement > 0.9
    assert abs(fc.center_x_px - centre[0]) < 5.0 and abs(fc.center_y_px - centre[1]) < 5.0, fc


def test_falloff_centre_of_noise_does_not_agree():
    """Poisson noise on a flat level has no falloff: its gradients agree on no centre."""
    from ringid.image.center import falloff_center
    from ringid.image.stage import FALLOFF_AGREEMENT_MIN

    for seed in range(5):
        data = np.random.default_rng(seed).poisson(100.0, (256, 256)).astype(float)
        assert falloff_center(data).agreement < FALLOFF_AGREEMENT_MIN


def test_ring_pattern_control_is_measured(tmp_path, calibration, capsys):
    """The same synthetic rings centred in the frame are measured (the refusals are not over-broad)."""
    image = _tiff(tmp_path / "good.tif", ring_pattern())
    rc, rec, _ = run_measure(image, calibration, tmp_path / "out", capsys)
    assert rc == 0 and rec["status"] == "ok" and rec["crystallinity"] == "crystalline" and rec["n_rings"] >= 3
    g = rec["geometry"]
    assert (
        abs(g["center_x_px"] - 127.5) < 0.5 and abs(g["center_y_px"] - 127.5) < 0.5
    )  # simulator default: image centre


# --------------------------------------------------------------------------- CIFs

ATOM_HEADER = (
    "loop_\n_atom_site_label\n_atom_site_type_symbol\n_atom_site_fract_x\n_atom_site_fract_y\n_atom_site_fract_z\n"
)
SCRIPT_TITLE = """<script>alert("x")</script> O'Neil & "co" <b>bold</b>"""


def _bad_cifs(folder: Path) -> dict[str, str]:
    """Write the bad CIFs; return {phase id: problem text the error must contain}."""
    write_cif(folder, "empty", "")
    (folder / "binary.cif").write_bytes(bytes(range(256)) * 4)
    write_cif(folder, "no_cell", "data_x\n_space_group_name_H-M_alt 'F m -3 m'\n" + ATOM_HEADER + "Au1 Au 0 0 0\n")
    write_cif(folder, "no_atoms", cif_text().split("loop_")[0])
    write_cif(folder, "unknown_element", cif_text(atoms=(("Xx1", "Xx", 0, 0, 0, 1, 0.0076),)))
    write_cif(folder, "occupancy_over_1", cif_text(atoms=(("Au1", "Au", 0, 0, 0, 1.5, 0.0076),)))
    write_cif(folder, "negative_u", cif_text(atoms=(("Au1", "Au", 0, 0, 0, 1, -0.01),)))
    write_cif(
        folder,
        "duplicated_site",
        cif_text(atoms=(("Au1", "Au", 0, 0, 0, 1, 0.0076), ("Au2", "Au", 0, 0, 0, 1, 0.0076))),
    )
    write_cif(folder, "duplicated_label",
              cif_text(atoms=(("Au1", "Au", 0, 0, 0, 1, 0.0076), ("Au1", "Au", 0.5, 0.5, 0.5, 1, 0.0076))))
    write_cif(folder, "unknown_space_group", cif_text(symmetry="_space_group_name_H-M_alt 'Q 9 z'\n"))
    return {
        "empty": "empty file",
        "binary": "not a CIF file (binary data)",
        "no_cell": "no unit cell",
        "no_atoms": "no atom sites",
        "unknown_element": "unknown element symbol 'Xx' at site Xx1",
        "occupancy_over_1": "occupancy 1.5 > 1 at site Au1",
        "negative_u": "negative displacement parameter U=-0.01 Å² at site Au1",
        "duplicated_site": "duplicated atom sites: Au1 and Au2 are 0.000 Å apart",
        "duplicated_label": "duplicated atom site label(s) Au1",
        "unknown_space_group": "the space group cannot be resolved: unknown H-M symbol 'Q 9 z'",
    }


def _script_title_cif(folder: Path) -> Path:
    # a CIF text field (semicolon-delimited) may hold any characters
    return write_cif(folder, "Au_script", cif_text(extra=f"_chemical_name_common\n;\n{SCRIPT_TITLE}\n;\n"))


def test_bad_cifs_are_listed_with_their_errors_and_the_rest_built(tmp_path, capsys):
    import csv

    cifs = tmp_path / "cifs"
    cifs.mkdir()
    expected = _bad_cifs(cifs)
    write_cif(cifs, "Au", cif_text())
    _script_title_cif(cifs)
    rc = main(["library", "build", str(cifs), "-o", str(tmp_path / "lib"), "--quiet"])
    err = capsys.readouterr().err
    assert rc == 0
    with open(tmp_path / "lib" / "index.csv", newline="", encoding="utf-8") as fh:
        index = {r["phase"]: r for r in csv.DictReader(fh)}
    for phase, problem in expected.items():
        row = index[phase]
        assert row["status"] == "failed" and problem in row["error"], (phase, row["error"])
        line = f"ringid: warning: {cifs / (phase + '.cif')}: {row['error']}"
        assert line in err.splitlines(), (phase, err)
    assert index["Au"]["status"] == "ok" and int(index["Au"]["n_rings"]) > 5
    assert index["Au_script"]["status"] == "ok" and index["Au_script"]["title"] == SCRIPT_TITLE
    assert f"built 2 of {len(expected) + 2} phases" in err


def test_untrusted_text_is_escaped_in_the_report(tmp_path, calibration, capsys):
    """CIF title, sample note and image file name with markup appear as text in report.html."""
    import html

    results = tmp_path / "results"
    cifs = tmp_path / "cifs"
    cifs.mkdir()
    _script_title_cif(cifs)
    assert main(["library", "build", str(cifs), "-o", str(results / "library"), "--quiet"]) == 0
    images = tmp_path / "images"
    images.mkdir()
    bad_name = images / "x<script>alert('f')<"
    bad_name = _text(bad_name.with_name(bad_name.name + ".tif"))  # error text carries the file name
    from ringid.synthetic.simulate import simulate_pattern

    blank = _tiff(
        images / "blank.tif", simulate_pattern([], [], camera_constant_A_px=K_A_PX, shape=(256, 256), seed=3).image
    )
    note = """<script>alert("note")</script> 'single' "double" & <i>"""
    (tmp_path / "cal.csv").write_text(
        f"calibration,camera_constant_A_px,voltage_kv\nknown,{K_A_PX},200\n", encoding="utf-8"
    )
    with open(tmp_path / "samples.csv", "w", newline="", encoding="utf-8") as fh:
        import csv

        w = csv.writer(fh)
        w.writerows([["sample", "image", "calibration", "note"], ["s_blank", "images/blank.tif", "known", note],
                     ["s_badname", f"images/{bad_name.name}", "known", ""]])
    main(
        [
            "calibration",
            "known",
            "--sheet",
            str(tmp_path / "cal.csv"),
            "-o",
            str(results / "calibrations" / "known.json"),
        ]
    )
    for sample, image in (("s_blank", blank), ("s_badname", bad_name)):
        out = results / "samples" / sample
        main(["measure", str(image), "--calibration", str(results / "calibrations" / "known.json"), "-o", str(out),
              "--sample", sample, "--note", note if sample == "s_blank" else ""])
        main(["identify", "--sample-dir", str(out), "--library", str(results / "library")])
    assert main(["report", str(results), "--samples-sheet", str(tmp_path / "samples.csv"),
                 "--calibrations-sheet", str(tmp_path / "cal.csv")]) == 0
    capsys.readouterr()
    page = (results / "report.html").read_text(encoding="utf-8")
    for text in (SCRIPT_TITLE, note, str(bad_name)):
        assert html.escape(text, quote=True) in page, text
    # the page's own script block is the only one; no input-controlled tag survives
    assert page.count("<script>") == 1
    assert "<script>alert" not in page and "<b>bold" not in page and "<i>" not in page


# --------------------------------------------------------------------------- sheets and config


def _write(path: Path, text: str) -> Path:
    path.write_text(text.strip() + "\n", encoding="utf-8")
    return path


@pytest.fixture()
def sheet_folder(tmp_path):
    (tmp_path / "phases").mkdir()
    write_cif(tmp_path / "phases", "Au", cif_text())
    for name in ("a.tif", "cal.tif"):
        _tiff(tmp_path / name, np.zeros((64, 64), np.uint16))
    return tmp_path


# (case, sample sheet row, problem text of its line)
BAD_SAMPLE_ROWS = [
    ("duplicate sample id", "s1,a.tif,film,200", "duplicate sample id 's1'"),
    ("id with /", "x/y,a.tif,film,200", "sample 'x/y' is not a safe file name"),
    ("id ..", "..,a.tif,film,200", "sample '..' is not a safe file name"),
    ("id with ../", "../up,a.tif,film,200", "sample '../up' is not a safe file name"),
    ("id with a space", "with space,a.tif,film,200", "sample 'with space' is not a safe file name"),
    ("missing image path", "s2,,film,200", "missing image"),
    ("image not found", "s3,nothere.tif,film,200", "image not found"),
    ("unknown calibration id", "s4,a.tif,nocal,200", "unknown calibration id 'nocal'"),
    ("non-numeric voltage", "s5,a.tif,film,two hundred", "voltage_kv 'two hundred' is not a number"),
    ("negative voltage", "s6,a.tif,film,-200", "voltage_kv must be a positive number, got -200"),
]
BAD_CALIBRATION_ROWS = [
    ("standard not in the library", "film2,cal.tif,Pt,200", "standard 'Pt' is not a phase in"),
    ("calibration voltage not numeric", "film3,cal.tif,Au,abc", "voltage_kv 'abc' is not a number"),
]


def test_sheet_problems_are_all_reported_together(sheet_folder):
    from ringid.jobs.sheets import SheetError, read_sheets

    cal = _write(sheet_folder / "cal.csv", "calibration,image,standard,voltage_kv\nfilm,cal.tif,Au,200\n"
                 + "\n".join(r for _, r, _ in BAD_CALIBRATION_ROWS))
    samples = _write(sheet_folder / "samples.csv", "sample,image,calibration,voltage_kv\ns1,a.tif,film,200\n"
                     + "\n".join(r for _, r, _ in BAD_SAMPLE_ROWS))
    with pytest.raises(SheetError) as info:
        read_sheets(samples, cal, sheet_folder / "phases")
    lines = info.value.lines
    assert len(lines) == len(BAD_SAMPLE_ROWS) + len(BAD_CALIBRATION_ROWS)
    for k, (case, _, problem) in enumerate(BAD_CALIBRATION_ROWS):
        assert any(ln.startswith(f"{cal}:{k + 3}: ") and problem in ln for ln in lines), (case, lines)
    for k, (case, _, problem) in enumerate(BAD_SAMPLE_ROWS):
        assert any(ln.startswith(f"{samples}:{k + 3}: ") and problem in ln for ln in lines), (case, lines)


def test_missing_columns_of_both_sheets_reported_together(sheet_folder):
    from ringid.jobs.sheets import SheetError, read_sheets

    cal = _write(sheet_folder / "cal.csv", "calibration,image,standard\nfilm,cal.tif,Au")
    samples = _write(sheet_folder / "samples.csv", "sample,image\ns1,a.tif")
    with pytest.raises(SheetError) as info:
        read_sheets(samples, cal, sheet_folder / "phases")
    lines = info.value.lines
    assert f"{cal}: missing column(s) voltage_kv" in lines
    assert f"{samples}: missing column(s) calibration" in lines


def test_accepted_ids_stay_inside_the_results_folder():
    """Any id the sheet checker accepts names a folder directly under results/samples."""
    from hypothesis import given, settings, strategies as st

    from ringid.jobs.sheets import Problems, _check_id

    root = Path("/results/samples")

    tokens = st.sampled_from(list("aZ09._-/ \\~$:*?\"'<>|\t\n") + ["..", "../", "/.."])

    @settings(max_examples=300, deadline=None)
    @given(st.lists(tokens, min_size=1, max_size=8).map("".join) | st.text(min_size=1, max_size=12))
    def check(sid):
        if _check_id("s.csv", 2, "sample", sid, Problems()):
            target = (root / sid).resolve()
            assert target.parent == root and target.name == sid

    check()


def _snakemake_dry_run(workdir: Path, config: dict, *overrides: str) -> subprocess.CompletedProcess:
    import yaml

    cfg = workdir / "config.yaml"
    cfg.write_text(yaml.safe_dump(config), encoding="utf-8")
    cmd = [sys.executable, "-m", "snakemake", "-s", str(ROOT / "Snakefile"), "--directory", str(workdir),
           "--configfile", str(cfg), "-n", "-q", "--cores", "1"]
    if overrides:
        cmd += ["--config", *overrides]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=120)


def _workflow_config(folder: Path) -> dict:
    return {"samples": str(folder / "samples.csv"), "calibrations": str(folder / "cal.csv"),
            "phases_dir": str(folder / "phases"), "results_dir": str(folder / "results")}


def test_workflow_start_lists_every_sheet_problem_and_runs_no_job(sheet_folder):
    cal = _write(sheet_folder / "cal.csv", "calibration,image,standard,voltage_kv\nfilm,cal.tif,Au,200\n"
                 + "\n".join(r for _, r, _ in BAD_CALIBRATION_ROWS))
    samples = _write(sheet_folder / "samples.csv", "sample,image,calibration,voltage_kv\ns1,a.tif,film,200\n"
                     + "\n".join(r for _, r, _ in BAD_SAMPLE_ROWS))
    res = _snakemake_dry_run(sheet_folder, _workflow_config(sheet_folder))
    assert res.returncode != 0
    errors = [ln for ln in res.stderr.splitlines() if ln.startswith("ringid: error: ")]
    assert len(errors) == len(BAD_SAMPLE_ROWS) + len(BAD_CALIBRATION_ROWS), res.stderr
    for _, _, problem in BAD_SAMPLE_ROWS + BAD_CALIBRATION_ROWS:
        assert any(problem in ln for ln in errors), problem
    assert any(ln.startswith(f"ringid: error: {samples}:") for ln in errors)
    assert any(ln.startswith(f"ringid: error: {cal}:") for ln in errors)
    assert not (sheet_folder / "results").exists()


@pytest.mark.parametrize("config,override,line", [
    ({}, "unknown_key=1", "config: unknown_key: unknown key"),
    ({}, "image={max_pixels: lots}", "config: image.max_pixels: 'lots' is not of type 'integer'"),
    ({"results_dir": 5}, None, "config: results_dir: 5 is not of type 'string'"),
    ({"resources": {"image_mem_mb": 10}}, None, "config: resources.image_mem_mb: 10 is less than the minimum of 100"),
    ({}, "batch_size=0", "config: batch_size: 0 is less than the minimum of 1"),
    ({}, "batch_size=abc", "config: batch_size: 'abc' is not of type 'integer'"),
    ({"batch_size": 2.5}, None, "config: batch_size: 2.5 is not of type 'integer'"),
    ({"batch_size": 500}, None, "config: batch_size: 500 is greater than the maximum of 200"),
], ids=["unknown key", "wrong type (--config)", "wrong type (config file)", "out of range", "batch_size 0",
        "batch_size text", "batch_size fraction", "batch_size too large"])
def test_bad_config_is_refused_naming_the_key(sheet_folder, config, override, line):
    _write(sheet_folder / "cal.csv", "calibration,image,standard,voltage_kv\nfilm,cal.tif,Au,200")
    _write(sheet_folder / "samples.csv", "sample,image,calibration\ns1,a.tif,film")
    res = _snakemake_dry_run(
        sheet_folder, {**_workflow_config(sheet_folder), **config}, *([override] if override else [])
    )
    assert res.returncode != 0
    assert f"ringid: error: {line}" in (res.stdout + res.stderr).splitlines(), res.stdout + res.stderr
    assert not (sheet_folder / "results").exists()


def test_every_config_problem_is_reported_together(sheet_folder):
    _write(sheet_folder / "cal.csv", "calibration,image,standard,voltage_kv\nfilm,cal.tif,Au,200")
    _write(sheet_folder / "samples.csv", "sample,image,calibration\ns1,a.tif,film")
    config = {**_workflow_config(sheet_folder), "results_dir": 5, "resources": {"image_mem_mb": 10}, "unknown_key": 1}
    res = _snakemake_dry_run(sheet_folder, config)
    errors = [ln for ln in (res.stdout + res.stderr).splitlines() if ln.startswith("ringid: error: config: ")]
    assert res.returncode != 0 and len(errors) == 3, res.stdout + res.stderr


def test_python_tags_in_a_config_file_are_refused(sheet_folder):
    """Snakemake reads a config file with PyYAML's FullLoader, which refuses object-constructing tags."""
    _write(sheet_folder / "cal.csv", "calibration,image,standard,voltage_kv\nfilm,cal.tif,Au,200")
    _write(sheet_folder / "samples.csv", "sample,image,calibration\ns1,a.tif,film")
    marker = sheet_folder / "executed"
    cfg = sheet_folder / "evil.yaml"
    cfg.write_text(f'note: !!python/object/apply:os.system ["touch {marker}"]\n', encoding="utf-8")
    cmd = [sys.executable, "-m", "snakemake", "-s", str(ROOT / "Snakefile"), "--directory", str(sheet_folder),
           "--configfile", str(cfg), "-n", "-q", "--cores", "1"]
    res = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    assert res.returncode != 0 and not marker.exists()


def test_a_broken_cif_is_named_in_every_identification_and_at_the_end_of_the_run(tmp_path, capsys):
    """An answer is only as complete as the library it was searched in: each identification lists
    the phases whose CIF did not build, the report says so at the top, and the end-of-run text
    names them. A phase record left behind by a CIF that was removed is not searched."""
    from ringid.library.store import load_library, unavailable_phases
    from ringid.report.summary import run_summary_text

    cifs = tmp_path / "cifs"
    cifs.mkdir()
    write_cif(cifs, "Au", cif_text())
    write_cif(cifs, "Cu", cif_text(name="Cu", formula="Cu", cell=(3.6149, 3.6149, 3.6149, 90, 90, 90),
                                   atoms=(("Cu1", "Cu", 0, 0, 0, 1, 0.0076),)))
    (cifs / "Broken.cif").write_text("data_broken\n_cell_length_a 4\n", encoding="utf-8")
    lib = tmp_path / "results" / "library"
    assert main(["library", "build", str(cifs), "-o", str(lib), "--quiet"]) == 0
    capsys.readouterr()
    assert unavailable_phases(lib) == [("Broken", "no atom sites (no _atom_site_fract_x loop)")]
    # Cu removed from the folder, the index rebuilt: its record stays behind but is not loaded
    assert main(["library", "index", str(lib), "--phases", "Au", "Broken"]) == 0
    assert [p.phase for p in load_library(lib)] == ["Au"]
    text = run_summary_text(tmp_path / "results")
    assert "ringid: 1 CIF(s) did not build; no sample was compared with them:" in text
    assert "  Broken: no atom sites (no _atom_site_fract_x loop)" in text.splitlines()
    # an identification (the rings of Au's own list) records the incomplete library
    au = load_library(lib)[0]
    rings = tmp_path / "rings.csv"
    rings.write_text("g_per_nm,g_sigma_per_nm,fwhm_per_nm,area\n" + "".join(
        f"{g:.6f},{g * 2e-4:.3g},0.05,{a:.4g}\n" for g, a in zip(au.g_per_nm[:6], au.intensity[:6])), encoding="utf-8")
    assert main(["identify", str(rings), "--library", str(lib), "-o", str(tmp_path / "ident")]) == 0
    ident = json.loads((tmp_path / "ident" / "identification.json").read_text(encoding="utf-8"))
    assert ident["unavailable_phases"] == [{"phase": "Broken", "error": "no atom sites (no _atom_site_fract_x loop)"}]
    assert "library_incomplete" in ident["flags"]


def test_a_cif_folder_given_as_library_says_how_to_build_one(tmp_path, capsys):
    write_cif(tmp_path, "Au", cif_text())
    (tmp_path / "rings.csv").write_text("g_per_nm,g_sigma_per_nm,fwhm_per_nm,area\n4.247,0.001,0.05,100\n")
    rc = main(["identify", str(tmp_path / "rings.csv"), "--library", str(tmp_path), "-o", str(tmp_path / "out")])
    err = capsys.readouterr().err
    assert rc == 1 and err.strip() == (f"ringid: error: {tmp_path}: this is a folder of CIF files, not a built phase "
                                       f"library: build one with `ringid library build {tmp_path} -o LIB` and pass LIB")


def test_phases_option_does_not_swallow_the_rings_table(tmp_path):
    """`ringid identify --phases CeO2,Au rings.csv`: the list is one comma-separated argument."""
    from ringid.cli import build_parser

    args = build_parser().parse_args(["identify", "--phases", "CeO2,Au", "rings.csv", "--library", "LIB"])
    assert args.phases == ["CeO2", "Au"] and args.rings == "rings.csv"


def test_analyze_takes_a_nominal_camera_length_and_the_image_options(tmp_path, capsys):
    """`ringid analyze` has the nominal-camera-length route and the image options of `measure`."""
    from ringid.core.units import electron_wavelength_angstrom

    (tmp_path / "cifs").mkdir()
    write_cif(tmp_path / "cifs", "Au", cif_text())
    assert main(["library", "build", str(tmp_path / "cifs"), "-o", str(tmp_path / "lib"), "--quiet"]) == 0
    image = _tiff(tmp_path / "au.tif", ring_pattern())
    # K = λL/p (λ and K in Å, L and p in m): the camera length giving the patterns' K at 15 µm pixels, 1 % off
    length_mm = 1.01 * K_A_PX * 15e-6 / electron_wavelength_angstrom(200.0) * 1e3
    rc = main(["analyze", str(image), "--camera-length-mm", f"{length_mm:.3f}", "--pixel-size-um", "15",
               "--voltage-kv", "200", "--library", str(tmp_path / "lib"), "-o", str(tmp_path / "out"),
               "--saturation-level", "60000", "--min-ring-g-per-nm", "1.0"])
    err = capsys.readouterr().err
    assert rc == 0, err
    ident = json.loads((tmp_path / "out" / "identification.json").read_text(encoding="utf-8"))
    assert ident["phases"] == ["Au"], err
    rec = json.loads((tmp_path / "out" / "sample.json").read_text(encoding="utf-8"))
    assert rec["calibration_kind"] == "nominal"
