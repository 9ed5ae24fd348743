"""End-to-end: the Snakemake workflow on a small synthetic set, its contracts, the science, and
the incremental behaviour (dry runs)."""

import csv
import json
import re
import shutil
import subprocess
import sys

import pytest

from conftest import REFERENCE_PHASES, ROOT, write_sheet

pytestmark = pytest.mark.slow

SUBSET = ["np_CeO2_batch_C", "np_Ni_NiO_core_shell", "film_as_deposited", "blank_hole"]

SUMMARY_CONTRACT = [
    "sample",
    "status",
    "crystallinity",
    "phases",
    "alternatives",
    "confidence",
    "center_x_px",
    "center_y_px",
    "ellipticity",
    "crystallite_size_nm",
    "n_rings",
    "unexplained_rings",
    "flags",
    "error",
]


def snakemake(*args, cwd=ROOT, check=True, timeout=900):
    """Run Snakemake with this interpreter; its rules find `ringid` beside it on PATH."""
    import os

    env = dict(os.environ, PATH=os.path.dirname(sys.executable) + os.pathsep + os.environ.get("PATH", ""))
    cmd = [sys.executable, "-m", "snakemake", *args]
    res = subprocess.run(cmd, cwd=cwd, capture_output=True, text=True, timeout=timeout, env=env)
    if check and res.returncode != 0:
        raise AssertionError(f"snakemake failed ({res.returncode}):\n{res.stdout[-3000:]}\n{res.stderr[-3000:]}")
    return res


def job_counts(dry_run_output: str) -> dict[str, int]:
    """The 'Job stats' table of a dry run as {rule: count}."""
    counts = {}
    block = dry_run_output.split("Job stats:", 1)
    if len(block) < 2:
        return counts
    for line in block[1].splitlines()[3:]:
        m = re.match(r"^(\w+)\s+(\d+)$", line.strip())
        if not m:
            break
        counts[m.group(1)] = int(m.group(2))
    counts.pop("total", None)
    return counts


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    base = tmp_path_factory.mktemp("wf")
    subprocess.run(
        [sys.executable, "-m", "ringid.cli", "demo", str(base / "demo"), "--size-px", "512", "--quiet"], check=True
    )
    with open(base / "demo" / "samples.csv", newline="") as fh:
        rows = [r for r in csv.DictReader(fh)]
    write_sheet(base / "demo" / "subset.csv", [r for r in rows if r["sample"] in SUBSET], fieldnames=list(rows[0]))
    phases = base / "phases"
    shutil.copytree(REFERENCE_PHASES, phases)
    # batch_size 1: batches of one sample, named after it (the job counts below); larger: tests/test_batch.py
    config = [f"samples={base / 'demo' / 'subset.csv'}", f"calibrations={base / 'demo' / 'calibrations.csv'}",
              f"results_dir={base / 'results'}", f"phases_dir={phases}", "batch_size=1"]
    snakemake("--cores", "2", "--config", *config)
    return {"base": base, "results": base / "results", "config": config, "phases": phases}


def read_csv(path):
    with open(path, newline="") as fh:
        return list(csv.DictReader(fh))


def test_contract_files_and_columns(run):
    results = run["results"]
    summary = read_csv(results / "summary.csv")
    assert list(summary[0])[: len(SUMMARY_CONTRACT)] == SUMMARY_CONTRACT
    assert sorted(r["sample"] for r in summary) == sorted(SUBSET)
    for s in SUBSET:
        d = results / "samples" / s
        for name in ("rings.csv", "profile.csv", "phases.csv", "sample.json", "overview.png"):
            assert (d / name).is_file(), (s, name)
        header = (d / "rings.csv").read_text().splitlines()[0].split(",")
        for col in ("g_per_nm", "d_angstrom", "d_sigma_angstrom", "fwhm_per_nm", "area", "phase", "hkl"):
            assert col in header
        assert (d / "profile.csv").read_text().splitlines()[0].split(",")[:3] == ["g_per_nm", "intensity", "sigma"]
        rec = json.loads((d / "sample.json").read_text())
        assert {"geometry", "crystallinity", "flags", "timings_s"} <= set(rec)
    cal = json.loads((results / "calibrations" / "cal_Au_film.json").read_text())
    for key in (
        "camera_constant_A_px",
        "center_x_px",
        "center_y_px",
        "ellipticity",
        "ellipse_angle_deg",
        "voltage_kv",
        "rings",
    ):
        assert key in cal
    # source: the demo's true camera constant (ringid.synthetic.demo, scaled to 512 px) — the simulator's own truth
    from ringid.synthetic.demo import CAMERA_CONSTANT_A_PX

    assert cal["camera_constant_A_px"] == pytest.approx(CAMERA_CONSTANT_A_PX * 512 / 2048, rel=5e-4)
    index = read_csv(results / "library" / "index.csv")
    assert len(index) == len(list(run["phases"].glob("*.cif")))
    for log in ("report.log", "library/index.log", f"batches/measure_{SUBSET[0]}.log",
                f"batches/identify_{SUBSET[0]}.log"):
        assert (results / "logs" / log).is_file()
    assert (results / "benchmarks" / "batches" / f"measure_{SUBSET[0]}.tsv").is_file()
    html = (results / "report.html").read_text()
    assert "screening result" in html.lower() and html.count('class="sample"') == len(SUBSET)


def test_science_of_the_demo_subset(run):
    from ringid.synthetic.demo import expected_answers

    rows = {r["sample"]: r for r in read_csv(run["results"] / "summary.csv")}
    truth = expected_answers()
    for s in ("np_CeO2_batch_C", "np_Ni_NiO_core_shell"):
        assert rows[s]["status"] == "ok"
        assert rows[s]["crystallinity"] == "crystalline"
        found = set(rows[s]["phases"].split(";")) | set(filter(None, rows[s]["alternatives"].split(";")))
        assert set(truth[s]) <= found, (s, rows[s]["phases"], rows[s]["alternatives"])
    assert rows["film_as_deposited"]["crystallinity"] == "amorphous"
    assert rows["film_as_deposited"]["phases"] == ""
    assert rows["blank_hole"]["crystallinity"] == "no_signal"
    assert rows["blank_hole"]["phases"] == ""


def test_nothing_to_do_after_a_complete_run(run):
    res = snakemake("-n", "--config", *run["config"])
    assert "Nothing to be done" in res.stdout + res.stderr


def test_new_cif_reruns_library_identify_and_report_only(run):
    new = run["phases"] / "Au_copy.cif"
    shutil.copy(run["phases"] / "Au.cif", new)
    try:
        res = snakemake("-n", "--config", *run["config"])
        counts = job_counts(res.stdout)
        assert counts.get("library_phase") == 1 and counts.get("library_index") == 1
        assert counts.get("report") == 1 and "calibration" not in counts
        assert {rule for rule in counts if rule.startswith(("identify_", "measure_"))} == {
            f"identify_{s}" for s in SUBSET}
    finally:
        new.unlink()


def test_new_sample_runs_only_that_sample_and_the_report(run):
    base = run["base"]
    rows = read_csv(base / "demo" / "samples.csv")
    extra = [r for r in rows if r["sample"] == "np_CeO2_batch_A"]
    sheet = base / "demo" / "subset_plus.csv"
    write_sheet(sheet, [r for r in rows if r["sample"] in SUBSET] + extra, fieldnames=list(rows[0]))
    config = [c if not c.startswith("samples=") else f"samples={sheet}" for c in run["config"]]
    counts = job_counts(snakemake("-n", "--config", *config).stdout)
    # the annealing series (config/config.yaml) reads the sheet, which changed
    assert counts == {"measure_np_CeO2_batch_A": 1, "identify_np_CeO2_batch_A": 1, "series_annealing": 1,
                      "report": 1, "all": 1}


def test_bad_config_key_stops_at_start(run):
    res = snakemake("-n", "--config", *run["config"], "no_such_key=1", check=False)
    assert res.returncode != 0
    assert "no_such_key" in res.stdout + res.stderr
