"""Benchmark: report.html at 1,000 samples, figures inline vs linked (not a timed test).

    python benchmarks/bench_report.py RESULTS [--samples 1000]

RESULTS is a finished run (e.g. the demo's results/): its sample folders are copied round-robin
to make a run of --samples samples, and the report is written both ways. Prints the page size, the
time to write it, and the time headless Chromium takes to load it (`chromium --headless
--dump-dom`, which returns after the page's load event; lazy images below the first screen are
not fetched), when Chromium is installed, beside its start-up on an empty page.
"""

from __future__ import annotations

import argparse
import shutil
import subprocess
import tempfile
import time
from pathlib import Path


def chromium_load_s(page: Path) -> float | None:
    exe = shutil.which("chromium") or shutil.which("chromium-browser")
    if exe is None:
        return None
    t0 = time.perf_counter()
    subprocess.run([exe, "--headless", "--no-sandbox", "--disable-gpu", "--dump-dom", page.as_uri()],
                   capture_output=True, timeout=600, check=True)
    return time.perf_counter() - t0


def main() -> None:
    from ringid.report.html import write_report

    ap = argparse.ArgumentParser()
    ap.add_argument("results", type=Path)
    ap.add_argument("--samples", type=int, default=1000)
    args = ap.parse_args()
    sources = sorted(p for p in (args.results / "samples").iterdir() if (p / "identification.json").is_file())
    calibrations = sorted(p.stem for p in (args.results / "calibrations").glob("*.json"))
    with tempfile.TemporaryDirectory(prefix="ringid-bench-report-") as tmp:
        run = Path(tmp) / "results"
        for sub in ("calibrations", "library"):
            shutil.copytree(args.results / sub, run / sub)
        names = []
        for k in range(args.samples):
            src = sources[k % len(sources)]
            name = f"{src.name}_{k:04d}"
            shutil.copytree(src, run / "samples" / name)
            names.append(name)
        print(f"{args.samples} samples (copies of {len(sources)} from {args.results})")
        tiny = Path(tmp) / "tiny.html"
        tiny.write_text("<!DOCTYPE html><html><body>start</body></html>", encoding="utf-8")
        start = chromium_load_s(tiny)
        if start is not None:
            print(f"Chromium start-up and an empty page: {start:.2f} s (included below)")
        print("figures   page MB   write s   Chromium load s")
        for figures in ("linked", "inline"):
            t0 = time.perf_counter()
            page = write_report(run, names, calibrations, figures=figures)
            t_write = time.perf_counter() - t0
            t_load = chromium_load_s(page)
            load = f"{t_load:8.2f}" if t_load is not None else "  (no chromium)"
            print(f"{figures:8s} {page.stat().st_size / 1e6:8.2f} {t_write:9.2f}   {load}")


if __name__ == "__main__":
    main()
