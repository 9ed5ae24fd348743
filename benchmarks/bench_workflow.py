"""Benchmark harness: batch-scale speed of ringid (not a timed test).

    python benchmarks/bench_workflow.py [--n 200] [--scales 50,100,200] [--batch-size 4[,1]] [--size-px 2048]
                                        [--out bench_workflow.csv]

Generates N synthetic uint16 patterns with ringid's simulator (the demo scenario, cycled with new
seeds) plus a calibration film, then measures in one run:

- t_int: one cold pyFAI ``integrate1d`` of a pattern at a known geometry (a new
  AzimuthalIntegrator; pyFAI's default method, and the no-split histogram);
- t_read: ``tifffile.imread`` of one pattern;
- each ringid stage in-process (load, mask, centre, integrate, rings, identify) over a few patterns;
- the per-job interpreter start and import cost of the image job and of the identification job;
- the whole workflow's wall time with ``snakemake --cores 2`` for each N in --scales and each
  config batch_size in --batch-size (samples per job; default: the config's own), and the slope
  per pattern from a linear fit;
- peak memory per image job (Snakemake benchmark files, max_rss; a batch job holds one image at
  a time);
- the library build and the scoring time per sample.

Prints a table and writes it as CSV. Ratios to t_int are what to compare across machines.
"""

from __future__ import annotations

import argparse
import csv
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]


def make_patterns(folder: Path, n: int, size_px: int) -> Path:
    """n sample patterns + the calibration film, and their sheets; returns the sample sheet."""
    import dataclasses

    import tifffile

    from ringid.synthetic.demo import CALIBRATION, SCENARIO, _simulate
    from ringid.library.store import build_phase

    lib = folder / "simlib"
    for ph in sorted({p for d in (*SCENARIO, CALIBRATION) for p in d.phases}):
        build_phase(ROOT / "reference_phases" / f"{ph}.cif", lib)
    images = folder / "images"
    images.mkdir(parents=True, exist_ok=True)
    shape = (size_px, size_px)
    tifffile.imwrite(images / "cal.tif", _simulate(CALIBRATION, lib, shape, 1).image)
    rows = []
    for i in range(n):
        base = SCENARIO[i % len(SCENARIO)]
        p = dataclasses.replace(base, sample=f"p{i:04d}_{base.sample}")
        tifffile.imwrite(images / f"{p.sample}.tif", _simulate(p, lib, shape, 1000 + i).image)
        rows.append(p.sample)
    with open(folder / "calibrations.csv", "w", newline="") as fh:
        fh.write("calibration,image,standard,voltage_kv\ncal,images/cal.tif,Au,200\n")
    for k in sorted({n, *SCALES}):
        with open(folder / f"samples_{k}.csv", "w", newline="") as fh:
            w = csv.writer(fh, lineterminator="\n")
            w.writerow(["sample", "image", "calibration"])
            for s in rows[:k]:
                w.writerow([s, f"images/{s}.tif", "cal"])
    return folder


def cold_integrate1d(image: np.ndarray, geometry, method) -> float:
    from pyFAI.integrator.azimuthal import AzimuthalIntegrator

    from ringid.core.units import electron_wavelength_angstrom

    pixel = 15e-6
    lam_m = electron_wavelength_angstrom(geometry.voltage_kv) * 1e-10
    dist = geometry.camera_constant_A_px * 1e-10 * pixel / lam_m  # K = λL/p
    ai = AzimuthalIntegrator(dist=dist, poni1=(geometry.center_y_px + 0.5) * pixel,
                             poni2=(geometry.center_x_px + 0.5) * pixel, pixel1=pixel, pixel2=pixel, wavelength=lam_m)
    t0 = time.perf_counter()
    ai.integrate1d(image, 1500, unit="q_nm^-1", method=method, error_model="poisson")
    return time.perf_counter() - t0


def import_cost(modules: str) -> float:
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-c", f"import {modules}"], check=True)
    return time.perf_counter() - t0


def main() -> None:
    global SCALES
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=200)
    parser.add_argument("--scales", default="50,100,200", help="comma-separated N for the scaling runs")
    parser.add_argument("--size-px", type=int, default=2048)
    parser.add_argument("--cores", type=int, default=2)
    parser.add_argument("--batch-size", default=str(config_batch_size()),
                        help="comma-separated config batch_size values to run the workflow with "
                             "(default: config/config.yaml's)")
    parser.add_argument("--out", default="bench_workflow.csv")
    parser.add_argument("--keep", metavar="DIR", help="work in DIR and keep it")
    args = parser.parse_args()
    SCALES = sorted(int(x) for x in args.scales.split(",") if x)
    SCALES = [s for s in SCALES if s <= args.n]
    batch_sizes = [int(x) for x in args.batch_size.split(",") if x]

    work = Path(args.keep) if args.keep else Path(tempfile.mkdtemp(prefix="ringid-bench-"))
    work.mkdir(parents=True, exist_ok=True)
    table: list[tuple[str, float, str]] = []

    def rec(name, value, unit):
        table.append((name, value, unit))
        print(f"{name:<52} {value:10.4f} {unit}", flush=True)

    t0 = time.perf_counter()
    make_patterns(work, args.n, args.size_px)
    rec("generate patterns (all)", time.perf_counter() - t0, "s")

    import tifffile

    from ringid.identify.score import index_library
    from ringid.library.store import load_library
    from ringid.library.store import build_library
    from ringid.core.records import read_calibration_record
    from ringid.jobs.measure import identify_sample, make_calibration, measure_sample
    from ringid.jobs.sheets import read_calibrations

    t0 = time.perf_counter()
    build_library(ROOT / "reference_phases", work / "lib")
    rec("library build, 29 phases (in-process)", time.perf_counter() - t0, "s")
    make_calibration(read_calibrations(work / "calibrations.csv")["cal"], work / "cal.json", library_dir=work / "lib")
    geometry = read_calibration_record(work / "cal.json").geometry
    first = sorted((work / "images").glob("p0000_*.tif"))[0]
    t0 = time.perf_counter()
    image = tifffile.imread(first)
    t_read = time.perf_counter() - t0
    t_int = cold_integrate1d(image, geometry, ("bbox", "csr", "cython"))
    t_int_hist = cold_integrate1d(image, geometry, ("no", "histogram", "cython"))
    rec("t_read: tifffile.imread", t_read, "s")
    rec("t_int: cold integrate1d (pyFAI default, bbox csr)", t_int, "s")
    rec("cold integrate1d (no-split histogram)", t_int_hist, "s")

    stage_times: dict[str, list[float]] = {}
    library = index_library(load_library(work / "lib"))
    for k, img in enumerate(sorted((work / "images").glob("p00*.tif"))[:13]):
        out = work / "inproc" / img.stem
        r = measure_sample(img, work / "cal.json", out, sample=img.stem)
        for key, val in r.timings_s.items():
            stage_times.setdefault(key, []).append(val)
        t0 = time.perf_counter()
        identify_sample(out, library)
        stage_times.setdefault("identify (with overview figure)", []).append(time.perf_counter() - t0)
    for key, vals in stage_times.items():
        rec(f"in-process {key} (median of {len(vals)})", statistics.median(vals), "s")
    image_work = statistics.median(stage_times.get("total", [np.nan]))
    rec("in-process image work / t_int (target <= 2)", image_work / t_int, "ratio")

    rec(
        "image job imports (interpreter + ringid.jobs.measure, integrate, rings)",
        import_cost(
            "ringid.cli, ringid.jobs.measure, ringid.image.integrate, ringid.profile.rings, "
            "pyFAI.ext.histogram, scipy.optimize"
        ),
        "s",
    )
    rec("identify job imports (interpreter + identify, figures, pyplot)",
        import_cost("ringid.cli, ringid.identify, ringid.report.figures, matplotlib.pyplot"), "s")

    env = dict(os.environ, PATH=os.path.dirname(sys.executable) + os.pathsep + os.environ.get("PATH", ""))
    for bs in batch_sizes:
        rec("batch_size (samples per image / identification job)", bs, "")
        walls = {}
        for n in SCALES:
            results = work / f"results_{n}_b{bs}"
            cmd = [sys.executable, "-m", "snakemake", "--cores", str(args.cores), "-q", "--config",
                   f"samples={work / f'samples_{n}.csv'}", f"calibrations={work / 'calibrations.csv'}",
                   f"results_dir={results}", f"batch_size={bs}"]
            t0 = time.perf_counter()
            subprocess.run(cmd, cwd=ROOT, check=True, env=env, capture_output=True)
            walls[n] = time.perf_counter() - t0
            rec(f"workflow wall time, N = {n}, --cores {args.cores}, batch_size {bs}", walls[n], "s")
            rss = []
            for tsv in [
                *(results / "benchmarks" / "samples").glob("*.tsv"),
                *(results / "benchmarks" / "batches").glob("*.tsv"),
            ]:
                with open(tsv) as fh:
                    row = list(csv.DictReader(fh, delimiter="\t"))[0]
                rss.append(float(row["max_rss"]))
            if rss:
                rec(f"peak RSS per image job, N = {n}, batch_size {bs} (max of {len(rss)} jobs)", max(rss), "MB")
        if len(walls) >= 2:
            ns = np.array(sorted(walls))
            ts = np.array([walls[n] for n in ns])
            slope, intercept = np.polyfit(ns, ts, 1)
            resid = ts - (slope * ns + intercept)
            rec(f"workflow slope per pattern, batch_size {bs}", slope, "s")
            rec(f"workflow intercept (fixed cost), batch_size {bs}", intercept, "s")
            rec(f"largest deviation from the linear fit, batch_size {bs}", float(np.max(np.abs(resid))), "s")
        if walls:
            n_max = max(walls)
            target = 3 * n_max * t_int / args.cores
            rec(f"workflow N = {n_max} / (3 × N × t_int / cores), batch_size {bs} (target <= 1)",
                walls[n_max] / target, "ratio")
    with open(args.out, "w", newline="") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(["quantity", "value", "unit"])
        for name, value, unit in table:
            w.writerow([name, f"{value:.6g}", unit])
    print(f"\nwritten {args.out}; work folder {work}")


SCALES: list[int] = []


def config_batch_size() -> int:
    import yaml

    return int(yaml.safe_load((ROOT / "config" / "config.yaml").read_text(encoding="utf-8")).get("batch_size", 1))

if __name__ == "__main__":
    main()
