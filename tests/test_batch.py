"""Several samples per job (config batch_size): the cut into batches, the batch commands against
the one-sample commands, per-sample failure isolation inside a batch, and the workflow at
batch_size 1 against batch_size 3.

Check values here are the one-sample commands' own outputs (the batch must reproduce them) and
the failures' one-line errors; the physics is checked elsewhere.
"""

from __future__ import annotations

import csv
import json
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from conftest import REFERENCE_PHASES, ROOT, without_timings, write_sheet
from ringid.jobs.batch import ImageOptions, identify_batch, make_batches, manifest_text, measure_batch, read_manifest
from ringid.cli import main

K_A_PX = 125.0  # camera constant of the synthetic patterns (Å·px): Au rings at 53–123 px in 256²


def _assert_same_folder(a: Path, b: Path) -> int:
    """Same file names; JSON equal apart from ``timings_s``; every other file byte-identical."""
    names = sorted(p.name for p in a.iterdir() if not p.name.startswith("."))
    assert names == sorted(p.name for p in b.iterdir() if not p.name.startswith("."))
    for name in names:
        if name.endswith(".json"):
            ja, jb = (json.loads((d / name).read_text(encoding="utf-8")) for d in (a, b))
            assert without_timings(ja) == without_timings(jb), (a, name)
        else:
            assert (a / name).read_bytes() == (b / name).read_bytes(), (a, name)
    return len(names)


# --- the cut into batches -------------------------------------------------------------------

def test_batches_are_consecutive_chunks_of_the_sorted_ids_whatever_the_sheet_order():
    ids = [f"s{k:02d}" for k in range(11)]
    rng = np.random.default_rng(3)
    shuffled = list(rng.permutation(ids))
    batches = make_batches(shuffled, 4)
    assert batches == make_batches(ids, 4)
    assert list(batches) == ["b001", "b002", "b003"]
    assert [len(v) for v in batches.values()] == [4, 4, 3]
    assert [s for chunk in batches.values() for s in chunk] == sorted(ids)
    assert make_batches(ids, 1) == {s: [s] for s in sorted(ids)}  # a batch of one is named after its sample
    assert list(make_batches(ids, 50).values()) == [sorted(ids)]


@pytest.mark.parametrize("bad", [0, -2, 2.5])
def test_batch_size_below_one_or_fractional_is_refused(bad):
    with pytest.raises(ValueError, match="batch_size"):
        make_batches(["a", "b"], bad)


# --- the batch commands against the one-sample commands -------------------------------------

@pytest.fixture(scope="module")
def inputs(tmp_path_factory):
    """Two Au patterns, one empty file, a known-constant calibration and an Au-only library."""
    import tifffile
    from pyFAI.calibrant import get_calibrant

    from ringid.jobs.measure import make_calibration
    from ringid.jobs.sheets import CalibrationRow
    from ringid.synthetic.simulate import simulate_pattern

    base = tmp_path_factory.mktemp("batch")
    cal = get_calibrant("Au")
    d = np.asarray((getattr(cal, "dspacing", None) or cal.dSpacing)[:5])  # source: pyFAI calibrant table Au.D
    images = {}
    # rings about 4 and 5 px wide (0.3 and 0.4 1/nm at 0.08 1/nm per px), as a 256² frame records them
    for name, fwhm_per_nm, seed in (("au_fine", 0.4, 11), ("au_coarse", 0.3, 12)):
        img = simulate_pattern(d, [100, 50, 30, 30, 10], camera_constant_A_px=K_A_PX, shape=(256, 256),
                               instrument_fwhm_per_nm=fwhm_per_nm, seed=seed).image
        tifffile.imwrite(base / f"{name}.tif", img)
        images[name] = base / f"{name}.tif"
    (base / "empty.tif").write_bytes(b"")
    images["broken"] = base / "empty.tif"
    cals = base / "calibrations"
    make_calibration(CalibrationRow("known", "constant", 200.0, camera_constant_A_px=K_A_PX), cals / "known.json")
    cifs = base / "cifs"
    cifs.mkdir()
    shutil.copy(REFERENCE_PHASES / "Au.cif", cifs)
    assert main(["library", "build", str(cifs), "-o", str(base / "lib"), "--quiet"]) == 0
    return {"base": base, "images": images, "calibrations": cals, "lib": base / "lib"}


def _manifest(path: Path, inputs, samples) -> Path:
    from ringid.jobs.sheets import SampleRow

    rows = [SampleRow(s, str(inputs["images"][s]), "known", 200.0, f"note of {s}, with a comma") for s in samples]
    path.write_text(manifest_text(rows), encoding="utf-8")
    return path


def test_manifest_from_stdin_reads_as_from_a_file(inputs, tmp_path):
    import io

    manifest = _manifest(tmp_path / "m.csv", inputs, ["au_coarse", "broken"])
    from_file = read_manifest(manifest)
    assert read_manifest("-", stdin=io.StringIO(manifest.read_text(encoding="utf-8"))) == from_file
    assert [r.sample for r in from_file] == ["au_coarse", "broken"]
    assert from_file[0].note == "note of au_coarse, with a comma" and from_file[0].voltage_kv == 200.0


def _one_sample_run(inputs, sample: str, out: Path) -> None:
    """The workflow's one-sample commands (rules measure and identify) for ``sample``."""
    assert (
        main(
            [
                "measure",
                str(inputs["images"][sample]),
                "--calibration",
                str(inputs["calibrations"] / "known.json"),
                "-o",
                str(out),
                "--sample",
                sample,
                "--calibration-id",
                "known",
                "--note",
                f"note of {sample}, with a comma",
                "--voltage-kv",
                "200",
            ]
        )
        == 0
    )
    assert main(["identify", "--sample-dir", str(out), "--library", str(inputs["lib"])]) == 0


def test_batch_commands_give_the_one_sample_files_and_isolate_a_bad_image(inputs, tmp_path):
    samples = ["au_fine", "broken", "au_coarse"]
    manifest = _manifest(tmp_path / "b001.csv", inputs, samples)
    batch_out = tmp_path / "batch"
    assert main(["batch", "measure", str(manifest), "--calibrations-dir", str(inputs["calibrations"]),
                 "-o", str(batch_out)]) == 0
    assert main(["batch", "identify", *(str(batch_out / s) for s in samples), "--library", str(inputs["lib"])]) == 0
    for s in samples:
        _one_sample_run(inputs, s, tmp_path / "single" / s)
        assert _assert_same_folder(tmp_path / "single" / s, batch_out / s) == 8
    records = {s: json.loads((batch_out / s / "sample.json").read_text(encoding="utf-8")) for s in samples}
    assert records["au_fine"]["status"] == records["au_coarse"]["status"] == "ok"
    assert records["broken"]["status"] == "failed"
    assert records["broken"]["error"] == f"{inputs['images']['broken']}: empty file (0 bytes)"
    ident = json.loads((batch_out / "au_coarse" / "identification.json").read_text(encoding="utf-8"))
    assert ident["phases"][:1] == ["Au"]


def test_an_unexpected_exception_fails_only_its_sample(inputs, tmp_path, monkeypatch):
    """An exception escaping the per-sample function (here forced for one sample) is recorded
    in that sample's own files; the samples after it in the batch are measured."""
    import ringid.jobs.measure

    real = ringid.jobs.measure.measure_sample

    def failing_for_one(image, *args, sample, **kwargs):
        if sample == "au_fine":
            raise RuntimeError("disk vanished")
        return real(image, *args, sample=sample, **kwargs)

    monkeypatch.setattr(ringid.jobs.measure, "measure_sample", failing_for_one)
    manifest = _manifest(tmp_path / "b001.csv", inputs, ["au_fine", "au_coarse"])
    records = measure_batch(read_manifest(manifest), str(inputs["calibrations"]), str(tmp_path / "out"), ImageOptions())
    assert [r.status for r in records] == ["failed", "ok"]
    rec = json.loads((tmp_path / "out" / "au_fine" / "sample.json").read_text(encoding="utf-8"))
    assert rec["status"] == "failed" and rec["error"].startswith("internal error (RuntimeError: disk vanished)")
    assert rec["crystallinity"] == "" and "\n" not in rec["error"]
    for name in ("measured_rings.csv", "profile.csv", "thumbnail.npy"):
        assert (tmp_path / "out" / "au_fine" / name).is_file()
    assert json.loads((tmp_path / "out" / "au_coarse" / "sample.json").read_text(encoding="utf-8"))["status"] == "ok"


def test_identification_failures_stay_in_their_sample(inputs, tmp_path):
    """One sample with a broken rings table, one with an unreadable record: both recorded as
    failed with a one-line error naming the file, the third identified."""
    from ringid.library.store import load_library

    samples = ["au_fine", "au_coarse"]
    manifest = _manifest(tmp_path / "b001.csv", inputs, samples)
    out = tmp_path / "out"
    measure_batch(read_manifest(manifest), str(inputs["calibrations"]), str(out), ImageOptions())
    shutil.copytree(out / "au_coarse", out / "good")
    (out / "au_fine" / "measured_rings.csv").write_text("radius\n3\n", encoding="utf-8")
    (out / "au_coarse" / "sample.json").write_text("{not json", encoding="utf-8")
    dirs = [str(out / s) for s in ("au_coarse", "au_fine", "good")]
    records = identify_batch(dirs, load_library(inputs["lib"]), window_standard=0.005, window_nominal=0.03,
                             library_dir=str(inputs["lib"]))
    assert [r.get("status", "ok") for r in records] == ["failed", "failed", "ok"]
    assert records[1]["error"] == f"{out / 'au_fine' / 'measured_rings.csv'}: rings table lacks column(s) " \
                                  "g_per_nm, g_sigma_per_nm, fwhm_per_nm, area"
    assert records[0]["error"].startswith(f"{out / 'au_coarse' / 'sample.json'}: unreadable sample record file (")
    for d in dirs:
        for name in ("phases.csv", "rings.csv", "identification.json", "overview.png"):
            assert (Path(d) / name).is_file(), (d, name)
    assert records[2]["phases"][:1] == ["Au"]


# --- the workflow at batch_size 1 and 3 -----------------------------------------------------

FAST = ["blank_hole", "film_as_deposited", "np_CeO2_batch_A", "np_CeO2_batch_C", "np_Ni_NiO_core_shell"]
PHASES = ["Au", "CeO2", "Ni", "NiO", "Si"]


def _snakemake(workdir: Path, *args: str, check=True) -> subprocess.CompletedProcess:
    import os

    env = dict(os.environ, PATH=os.path.dirname(sys.executable) + os.pathsep + os.environ.get("PATH", ""))
    cmd = [sys.executable, "-m", "snakemake", "-s", str(ROOT / "Snakefile"), "--directory", str(workdir),
           "--configfile", str(workdir / "config.yaml"), "--cores", "2", *args]
    res = subprocess.run(cmd, capture_output=True, text=True, timeout=900, env=env)
    if check and res.returncode != 0:
        raise AssertionError(f"snakemake failed ({res.returncode}):\n{res.stdout[-3000:]}\n{res.stderr[-3000:]}")
    return res


@pytest.fixture(scope="module")
def workflow(tmp_path_factory):
    """The same 6-sample sheet (5 demo samples at 256², one empty image) run at batch_size 1 and
    3 into the same results path, each run's results moved aside (so recorded paths agree)."""
    import yaml

    base = tmp_path_factory.mktemp("wf_batch")
    subprocess.run([sys.executable, "-m", "ringid.cli", "demo", str(base / "demo"), "--size-px", "256", "--quiet"],
                   check=True, timeout=300)
    with open(base / "demo" / "samples.csv", newline="", encoding="utf-8") as fh:
        # without the demo's series column: these configs declare no series
        rows = [{k: v for k, v in r.items() if k != "temperature_c"} for r in csv.DictReader(fh) if r["sample"] in FAST]
    (base / "demo" / "empty.tif").write_bytes(b"")
    rows.insert(1, {**rows[0], "sample": "bad_empty", "image": "empty.tif", "note": "broken on purpose"})
    write_sheet(base / "demo" / "sheet.csv", rows)
    phases = base / "phases"
    phases.mkdir()
    for p in PHASES:
        shutil.copy(REFERENCE_PHASES / f"{p}.cif", phases)
    config = {"samples": str(base / "demo" / "sheet.csv"), "calibrations": str(base / "demo" / "calibrations.csv"),
              "phases_dir": str(phases), "results_dir": str(base / "results")}
    out = {"base": base, "config": config}
    for size in (1, 3):
        (base / "config.yaml").write_text(yaml.safe_dump({**config, "batch_size": size}), encoding="utf-8")
        _snakemake(base, "-q")
        (base / "results").rename(base / f"results_{size}")
        out[size] = base / f"results_{size}"
    return out


@pytest.mark.slow
def test_workflow_batch_size_3_gives_the_batch_size_1_results(workflow):
    one, three = workflow[1], workflow[3]
    assert (one / "summary.csv").read_bytes() == (three / "summary.csv").read_bytes()
    samples = sorted(p.name for p in (one / "samples").iterdir())
    assert samples == sorted([*FAST, "bad_empty"])
    for s in samples:
        assert _assert_same_folder(one / "samples" / s, three / "samples" / s) == 8
    # 6 samples in batches of 3 (sorted ids): two image jobs, two identification jobs
    assert sorted(p.name for p in (three / "benchmarks" / "batches").iterdir()) == [
        "measure_b001.tsv",
        "measure_b002.tsv",
    ]
    assert sorted(p.name for p in (three / "logs" / "batches").iterdir()) == [
        "identify_b001.log", "identify_b002.log", "measure_b001.log", "measure_b002.log"]


@pytest.mark.slow
def test_workflow_batch_with_a_bad_image_fails_only_that_sample(workflow):
    with open(workflow[3] / "summary.csv", newline="", encoding="utf-8") as fh:
        rows = {r["sample"]: r for r in csv.DictReader(fh)}
    bad = rows.pop("bad_empty")
    assert bad["status"] == "failed" and bad["error"].endswith("empty.tif: empty file (0 bytes)"), bad
    assert {r["status"] for r in rows.values()} == {"ok"}
    # bad_empty sorts into the first batch, with blank_hole and film_as_deposited (one log line each)
    log = (workflow[3] / "logs" / "batches" / "measure_b001.log").read_text(encoding="utf-8").splitlines()
    assert len(log) == 3 and log[0].startswith("[1/3] bad_empty: ") and "(recorded as failed)" in log[0], log
    assert log[1].startswith("[2/3] blank_hole: no_signal, 0 rings"), log
    assert log[2].startswith("[3/3] film_as_deposited: "), log


@pytest.mark.slow
def test_workflow_batches_rerun_only_where_membership_changed(workflow, tmp_path):
    """With the batch_size 3 results in place: nothing to do; a seventh sample whose id sorts
    last is a new batch: its two jobs and the report run, no other batch."""
    import yaml

    from test_workflow import job_counts

    base = workflow["base"]
    (base / "results_3").rename(base / "results")
    try:
        config = {**workflow["config"], "batch_size": 3}
        (base / "config.yaml").write_text(yaml.safe_dump(config), encoding="utf-8")
        assert "Nothing to be done" in (lambda r: r.stdout + r.stderr)(_snakemake(base, "-n"))
        sheet = Path(config["samples"])
        extra = tmp_path / "sheet_plus.csv"
        text = sheet.read_text(encoding="utf-8")
        last = text.splitlines()[2]  # blank_hole's row, under a new id that sorts after every other
        extra.write_text(text + "zz_" + last + "\n", encoding="utf-8")
        shutil.copy(extra, sheet.parent / "sheet_plus.csv")
        config["samples"] = str(sheet.parent / "sheet_plus.csv")
        (base / "config.yaml").write_text(yaml.safe_dump(config), encoding="utf-8")
        counts = job_counts(_snakemake(base, "-n").stdout)
        assert counts == {"measure_b003": 1, "identify_b003": 1, "report": 1, "all": 1}, counts
    finally:
        (base / "results").rename(base / "results_3")
