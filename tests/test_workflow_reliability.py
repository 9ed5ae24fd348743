"""The Snakemake workflow under failure: isolation of bad samples, SIGKILL and rerun, determinism.

One set of inputs for every test here: 10 quick demo samples (``ringid demo --size-px 256``)
plus 6 broken images referenced from the same sheet, a calibration from the demo's Au film,
and a library of the 8 phases they need (one library job per CIF, so fewer CIFs is faster).

Documented behaviour checked here:

- a run with failed samples exits 0; ``summary.csv`` has one row per sample, the failed ones
  with ``status=failed`` and their one-line error, and ``report.html`` lists every sample;
- after SIGKILL of the whole process group, a plain rerun stops at the stale lock;
  ``snakemake --unlock`` and then the same command (the workflow's profile asks for
  ``--rerun-incomplete``) finish the run, and the results equal those of the uninterrupted run
  (CSV byte-identical; JSON identical apart from ``timings_s``), which is also the run-to-run
  determinism check;
- a single job killed by the system records its samples as failed and the run goes on;
- no output is ever half-written (every file is written to a temporary name and renamed).
"""

from __future__ import annotations

import csv
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from conftest import without_timings

ROOT = Path(__file__).resolve().parent.parent

# 10 good rows from the demo patterns that measure fastest at 256² (each under ~6 s on one core;
# film_anneal_600C takes ~40 s, 700C ~15 s, 800C ~10 s, ZnO rods ~6 s): three images appear
# twice under another id, which also checks that a result depends on the image, not the row
GOOD = {
    "blank_hole": "blank_hole",
    "film_as_deposited": "film_as_deposited",
    "np_CeO2_batch_A": "np_CeO2_batch_A",
    "np_CeO2_batch_B": "np_CeO2_batch_B",
    "np_CeO2_batch_C": "np_CeO2_batch_C",
    "film_anneal_300C": "film_anneal_300C",
    "np_Ni_NiO_core_shell": "np_Ni_NiO_core_shell",
    "np_CeO2_batch_A_again": "np_CeO2_batch_A",
    "blank_hole_again": "blank_hole",
    "film_anneal_300C_again": "film_anneal_300C",
}
PHASES = ["Au", "CeO2", "Si", "Ni", "NiO", "TiO2_anatase"]


def _bad_images(folder: Path) -> dict[str, str]:
    """Write 6 broken images; return {sample id: problem its error must name}."""
    import tifffile

    (folder / "empty.tif").write_bytes(b"")
    (folder / "notes.tif").write_text("not an image\n", encoding="utf-8")
    tifffile.imwrite(folder / "whole.tif", np.ones((256, 256), np.uint16))
    data = (folder / "whole.tif").read_bytes()
    (folder / "truncated.tif").write_bytes(data[: len(data) // 2])
    (folder / "whole.tif").unlink()
    tifffile.imwrite(folder / "colour.tif", np.random.default_rng(1).integers(0, 255, (256, 256, 3), dtype=np.uint8),
                     photometric="rgb")
    tifffile.imwrite(folder / "zeros.tif", np.zeros((256, 256), np.uint16))
    tifffile.imwrite(folder / "nan.tif", np.full((256, 256), np.nan, np.float32))
    return {"bad_empty": "empty.tif: empty file", "bad_text": "notes.tif: not an image",
            "bad_truncated": "truncated.tif: unreadable or truncated TIFF", "bad_rgb": "colour.tif: true-colour RGB",
            "bad_zeros": "zeros.tif: every pixel is 0", "bad_nan": "nan.tif: every pixel is NaN"}


@pytest.fixture(scope="module")
def inputs(tmp_path_factory):
    base = tmp_path_factory.mktemp("wf_inputs")
    subprocess.run(["ringid", "demo", str(base / "demo"), "--size-px", "256", "--quiet"], check=True, timeout=300)
    phases = base / "phases"
    phases.mkdir()
    for p in PHASES:
        shutil.copy(ROOT / "reference_phases" / f"{p}.cif", phases)
    bad_dir = base / "bad"
    bad_dir.mkdir()
    bad = _bad_images(bad_dir)
    files = {"bad_empty": "empty.tif", "bad_text": "notes.tif", "bad_truncated": "truncated.tif",
             "bad_rgb": "colour.tif", "bad_zeros": "zeros.tif", "bad_nan": "nan.tif"}
    with open(base / "demo" / "samples.csv", newline="", encoding="utf-8") as fh:
        demo_rows = {r["sample"]: r for r in csv.DictReader(fh)}
    with open(base / "samples.csv", "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(["sample", "image", "calibration", "voltage_kv", "note"])
        for s, source in GOOD.items():
            r = demo_rows[source]
            w.writerow([s, f"demo/{r['image']}", r["calibration"], r["voltage_kv"], r["note"]])
        for s, f in files.items():
            w.writerow([s, f"bad/{f}", "cal_Au_film", 200, "broken on purpose"])
    shutil.copy(base / "demo" / "calibrations.csv", base / "calibrations.csv")
    with open(base / "calibrations.csv", encoding="utf-8") as fh:
        text = fh.read().replace("images/", "demo/images/")
    (base / "calibrations.csv").write_text(text, encoding="utf-8")
    return {"base": base, "bad": bad}


def _config(inputs, workdir: Path) -> Path:
    import yaml

    base = inputs["base"]
    cfg = workdir / "config.yaml"
    cfg.write_text(yaml.safe_dump({"samples": str(base / "samples.csv"), "calibrations": str(base / "calibrations.csv"),
                                   "phases_dir": str(base / "phases"), "results_dir": str(workdir / "results")}),
                   encoding="utf-8")
    return cfg


def _snakemake_cmd(workdir: Path, *extra: str) -> list[str]:
    return [sys.executable, "-m", "snakemake", "-s", str(ROOT / "Snakefile"), "--directory", str(workdir),
            "--configfile", str(workdir / "config.yaml"), "--cores", "2", "-q", *extra]


def _run(workdir: Path, *extra: str) -> subprocess.CompletedProcess:
    return subprocess.run(_snakemake_cmd(workdir, *extra), capture_output=True, text=True, timeout=600)


def _results_files(results: Path) -> dict[str, Path]:
    """Every CSV and JSON result (logs and Snakemake benchmark tables hold timings only)."""
    out = {}
    for p in sorted(results.rglob("*")):
        rel = p.relative_to(results).as_posix()
        if p.suffix in (".csv", ".json") and not rel.startswith(("logs/", "benchmarks/")):
            out[rel] = p
    return out


def _assert_same_results(a: Path, b: Path) -> int:
    fa, fb = _results_files(a), _results_files(b)
    assert sorted(fa) == sorted(fb)
    for rel in fa:
        if rel.endswith(".csv"):
            assert fa[rel].read_bytes() == fb[rel].read_bytes(), rel
        else:
            ja = json.loads(fa[rel].read_text(encoding="utf-8"))
            jb = json.loads(fb[rel].read_text(encoding="utf-8"))
            assert without_timings(ja) == without_timings(jb), rel
    return len(fa)


def _assert_nothing_half_written(results: Path) -> None:
    for p in results.rglob("*"):
        if not p.is_file() or p.name.startswith("."):
            continue
        if p.suffix == ".json":
            json.loads(p.read_text(encoding="utf-8"))  # raises on a truncated file
        elif p.suffix == ".csv":
            text = p.read_text(encoding="utf-8")
            assert text.endswith("\n"), p
            rows = list(csv.reader(text.splitlines()))
            assert rows and all(len(r) == len(rows[0]) for r in rows), p
        elif p.suffix == ".npy":
            np.load(p, allow_pickle=False)
        elif p.suffix == ".png":
            assert p.read_bytes().endswith(b"IEND\xaeB`\x82"), p  # PNG ends with its IEND chunk
        elif p.suffix == ".html":
            assert p.read_text(encoding="utf-8").rstrip().endswith("</html>"), p


@pytest.fixture(scope="module")
def reference_run(inputs, tmp_path_factory):
    """One uninterrupted run; its results are moved to ``reference/`` (same results path for every run)."""
    work = tmp_path_factory.mktemp("wf_work")
    _config(inputs, work)
    t0 = time.perf_counter()
    res = _run(work)
    elapsed = time.perf_counter() - t0
    ref = work / "reference"
    (work / "results").rename(ref)
    return {"work": work, "results": ref, "proc": res, "elapsed_s": elapsed}


@pytest.mark.slow
def test_bad_samples_are_isolated(inputs, reference_run):
    res = reference_run["proc"]
    assert res.returncode == 0, res.stdout + res.stderr  # failed samples are results, not a failed run
    results = reference_run["results"]
    with open(results / "summary.csv", newline="", encoding="utf-8") as fh:
        rows = {r["sample"]: r for r in csv.DictReader(fh)}
    assert sorted(rows) == sorted(list(GOOD) + list(inputs["bad"]))
    for s, source in GOOD.items():
        assert rows[s]["status"] == "ok" and rows[s]["error"] == "", rows[s]
        if s != source:  # the same image under another id gives the same row
            assert {**rows[s], "sample": source} == rows[source]
    for s, problem in inputs["bad"].items():
        r = rows[s]
        assert r["status"] == "failed" and problem in r["error"] and "\n" not in r["error"], r
        assert r["crystallinity"] == "" and r["phases"] == ""  # nothing measured
    page = (results / "report.html").read_text(encoding="utf-8")
    assert page.rstrip().endswith("</html>")
    assert f"{len(rows)} samples: {len(GOOD)} ok, {len(inputs['bad'])} failed" in page
    for s in rows:
        assert f'id="s-{s}"' in page
    _assert_nothing_half_written(results)


@pytest.fixture(scope="module")
def interrupted_run(inputs, reference_run):
    """A second run of the same inputs at the same results path, SIGKILLed midway and recovered."""
    work = reference_run["work"]
    results = work / "results"
    proc = subprocess.Popen(_snakemake_cmd(work), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            start_new_session=True)
    deadline = time.monotonic() + 300
    try:
        while time.monotonic() < deadline and proc.poll() is None:
            if len(list(results.glob("samples/*/sample.json"))) >= 4:
                break
            time.sleep(0.05)
        ended_early = proc.poll() is not None
        if not ended_early:
            os.killpg(proc.pid, signal.SIGKILL)  # the whole process group: Snakemake and its running jobs
    finally:
        proc.wait(timeout=60)
    state = {"results": results, "ended_early": ended_early,
             "n_done": len(list(results.glob("samples/*/sample.json"))),
             "summary_after_kill": (results / "summary.csv").exists(),
             "leftovers": [p.name for p in results.rglob(".*.tmp*")]}
    _assert_nothing_half_written(results)
    # recovery: Snakemake leaves its lock and marks the killed jobs' outputs incomplete; the
    # documented recovery is `snakemake --unlock`, then the same command with `--rerun-incomplete`
    needed, extra = [], []
    for _ in range(4):
        res = _run(work, *extra)
        text = res.stdout + res.stderr
        if res.returncode == 0:
            break
        if "cannot be locked" in text and "unlock" not in needed:
            needed.append("unlock")
            assert _run(work, "--unlock").returncode == 0
        elif "incomplete" in text.lower() and "rerun-incomplete" not in needed:
            needed.append("rerun-incomplete")
            extra = ["--rerun-incomplete"]
        else:
            break
    state.update(recovery=needed, final=res)
    print(f"SIGKILL after {state['n_done']} sample records; hidden temporaries left: {len(state['leftovers'])}; "
          f"recovery needed: {needed}")
    return state


@pytest.mark.slow
def test_sigkill_midway_then_rerun_gives_the_uninterrupted_results(inputs, reference_run, interrupted_run):
    run = interrupted_run
    assert not run["ended_early"], "the run ended before it could be interrupted"
    assert 4 <= run["n_done"] < len(GOOD) + len(inputs["bad"])
    assert not run["summary_after_kill"]
    assert run["final"].returncode == 0, run["final"].stdout + run["final"].stderr
    assert set(run["recovery"]) <= {"unlock", "rerun-incomplete"}
    n_files = _assert_same_results(reference_run["results"], run["results"])
    assert n_files > 5 * (len(GOOD) + len(inputs["bad"]))
    _assert_nothing_half_written(run["results"])


@pytest.mark.slow
def test_two_runs_give_identical_results(reference_run, interrupted_run):
    """Every output of the second run was made by new processes (the first run's results were
    moved away), so equality is run-to-run determinism: CSV bytes, JSON apart from ``timings_s``."""
    assert interrupted_run["final"].returncode == 0
    _assert_same_results(reference_run["results"], interrupted_run["results"])
    # JSON carries timings only under timings_s; CSV carries none
    rec = json.loads(
        (reference_run["results"] / "samples" / "np_CeO2_batch_A" / "sample.json").read_text(encoding="utf-8")
    )
    assert "total" in rec["timings_s"]


@pytest.mark.slow
def test_4096_float32_pattern_fits_the_declared_image_job_memory(tmp_path):
    """Peak RSS of `ringid measure` on a 4096² float32 pattern stays below resources.image_mem_mb."""
    import tifffile
    import yaml

    from ringid.jobs.measure import make_calibration
    from ringid.jobs.sheets import CalibrationRow
    from ringid.synthetic.simulate import simulate_pattern
    from pyFAI.calibrant import get_calibrant

    declared_mb = yaml.safe_load((ROOT / "config" / "config.yaml").read_text(encoding="utf-8"))["resources"][
        "image_mem_mb"
    ]
    cal = get_calibrant("Au")
    d = np.asarray((getattr(cal, "dspacing", None) or cal.dSpacing)[:5])  # source: pyFAI calibrant table Au.D
    k_a_px = 2000.0
    image = simulate_pattern(d, [100, 50, 30, 30, 10], camera_constant_A_px=k_a_px, shape=(4096, 4096), dtype="float32",
                             instrument_fwhm_per_nm=0.02, crystallite_size_nm=20.0, seed=5).image
    assert image.dtype == np.float32 and image.shape == (4096, 4096)
    tifffile.imwrite(tmp_path / "big.tif", image)
    del image
    make_calibration(CalibrationRow("known", "constant", 200.0, camera_constant_A_px=k_a_px), tmp_path / "cal.json")
    # a fresh interpreter whose only child is the job, so RUSAGE_CHILDREN is the job's own peak
    probe = ("import resource, subprocess, sys; "
             "r = subprocess.run(sys.argv[1:]); "
             "print(r.returncode, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)")
    cmd = [sys.executable, "-c", probe, "ringid", "measure", str(tmp_path / "big.tif"), "--calibration",
           str(tmp_path / "cal.json"), "-o", str(tmp_path / "out"), "--sample", "big"]
    res = subprocess.run(cmd, capture_output=True, text=True, timeout=600)
    rc, peak_kb = (int(x) for x in res.stdout.split())
    rec = json.loads((tmp_path / "out" / "sample.json").read_text(encoding="utf-8"))
    assert rc == 0 and rec["status"] == "ok" and rec["crystallinity"] == "crystalline", (res.stderr, rec.get("error"))
    peak_mb = peak_kb / 1024  # Linux reports ru_maxrss in KiB
    print(f"4096² float32: peak RSS {peak_mb:.0f} MB of {declared_mb} MB declared, {rec['timings_s']['total']:.1f} s")
    assert peak_mb < declared_mb


@pytest.mark.slow
def test_a_job_killed_for_memory_fails_its_samples_and_the_report_is_still_written(inputs, tmp_path):
    """The system killing an image job or a library job (SIGKILL, as the out-of-memory killer does)
    must not stop the run: the job's fallback records its samples (or its phase) as failed with the
    reason, the other jobs go on, and the summary and report are written (exit 0). The kills are
    simulated by a `ringid` earlier on PATH that kills itself for one chosen batch and one CIF."""
    import yaml

    base = inputs["base"]
    victim = "np_CeO2_batch_B"
    rows = [r for r in csv.DictReader(open(base / "samples.csv", newline="", encoding="utf-8"))
            if r["sample"] in ("blank_hole", victim, "np_CeO2_batch_C")]
    sheet = base / "three.csv"
    with open(sheet, "w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]), lineterminator="\n")
        w.writeheader()
        w.writerows(rows)
    shim = tmp_path / "bin"
    shim.mkdir()
    (shim / "ringid").write_text(f"""#!/bin/bash
if [[ "$1 $2" == "library phase" && "$3" == *NiO.cif && " $* " != *" --after-crash "* ]]; then
  kill -9 $$
fi
if [[ "$1 $2" == "batch measure" && " $* " != *" --after-crash "* ]]; then
  manifest=$(cat)
  if [[ "$manifest" == *{victim}* ]]; then kill -9 $$; fi
  printf '%s' "$manifest" | exec "{sys.executable}" -m ringid "$@"
fi
exec "{sys.executable}" -m ringid "$@"
""", encoding="utf-8")
    (shim / "ringid").chmod(0o755)
    work = tmp_path / "work"
    work.mkdir()
    (work / "config.yaml").write_text(yaml.safe_dump({
        "samples": str(sheet), "calibrations": str(base / "calibrations.csv"), "phases_dir": str(base / "phases"),
        "results_dir": str(work / "results"), "batch_size": 1}), encoding="utf-8")
    env = dict(os.environ, PATH=f"{shim}{os.pathsep}{os.environ['PATH']}")
    res = subprocess.run(_snakemake_cmd(work), capture_output=True, text=True, timeout=600, env=env)
    assert res.returncode == 0, res.stdout[-3000:] + res.stderr[-3000:]
    with open(work / "results" / "summary.csv", newline="", encoding="utf-8") as fh:
        summary = {r["sample"]: r for r in csv.DictReader(fh)}
    assert summary[victim]["status"] == "failed", summary[victim]
    assert "killed by SIGKILL (e.g. by the system for lack of memory)" in summary[victim]["error"]
    assert f"logs/batches/measure_{victim}.log" in summary[victim]["error"]
    assert summary["np_CeO2_batch_C"]["status"] == "ok" and summary["np_CeO2_batch_C"]["phases"] == "CeO2"
    assert (work / "results" / "report.html").is_file()
    assert f"failed: {victim}: the job stopped before this item was written" in res.stderr
    with open(work / "results" / "library" / "index.csv", newline="", encoding="utf-8") as fh:
        nio = next(r for r in csv.DictReader(fh) if r["phase"] == "NiO")
    assert nio["status"] == "failed" and "killed by SIGKILL" in nio["error"], nio
    assert "NiO: the job stopped before this item was written" in res.stderr
    _assert_nothing_half_written(work / "results")
