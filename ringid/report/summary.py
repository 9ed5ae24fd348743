"""Summary table and the self-contained HTML report of a run.

What this stage does: read every sample's ``sample.json`` and ``identification.json`` (and
``rings.csv``, ``overview.png``), the calibration records and the library index, and write
``summary.csv`` (one row per sample, docs/design.md contract) and ``report.html`` (one file,
figures inlined, sortable and filterable summary table). Every text that comes from input
files (sample ids, notes, CIF titles, errors) is HTML-escaped. What it does not do: compute
anything about the patterns.

The figures are made by ``ringid.report.figures`` in the jobs that own the data; this module
only reads the records (:mod:`ringid.core.records`) and tables.
"""

from __future__ import annotations

import json
import math
import os
from pathlib import Path

from ringid.core.atomic import format_cell, write_csv
from ringid.core.errors import RingidError
from ringid.core.records import SampleRecord, read_sample_record
from ringid.sample.size import SIZE_SYSTEMATIC_FRACTION

SUMMARY_COLUMNS = [
    "sample", "status", "crystallinity", "phases", "alternatives", "confidence", "center_x_px", "center_y_px",
    "ellipticity", "crystallite_size_nm", "n_rings", "unexplained_rings", "flags", "error",
    "calibration", "fractions_rough", "crystallite_size_sigma_nm", "ring_character", "note",
    "unexplained_d_angstrom", "unexplained_intensity_share", "false_identification_probability",
    "crystallite_size_lower_limit_nm", "crystallite_size_systematic_nm",
]

SCREENING_NOTE = ("Phase identification is a screening result: ring positions fix a lattice only as well as the "
                  "calibration allows, isostructural phases can be a fraction of a percent apart, and intensities "
                  "are distorted by dynamical scattering and texture. Confirm critical assignments by independent "
                  "means (e.g. imaging, EDS/EELS, an internal standard, X-ray diffraction).")


def _load_json(path: Path) -> dict:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}


def _num(x, fmt: str) -> str:
    """A number (or a number read from a table as text) as a report cell with the format ``fmt``;
    "" when missing or not finite (the report shows no inf), text that is not a number as it is."""
    if x is None:
        return ""
    try:
        x = float(x)
    except (TypeError, ValueError):
        return str(x)
    return format_cell(x, fmt) if math.isfinite(x) else ""


def load_sample_record(sample: str, sample_dir: Path) -> SampleRecord:
    """A sample's record; a missing or unreadable one is a failed record saying why."""
    path = sample_dir / "sample.json"
    if not path.is_file():
        return SampleRecord(sample, status="failed", error="no sample record (the image job did not finish)")
    try:
        return read_sample_record(path)
    except RingidError as exc:
        return SampleRecord(sample, status="failed", error=str(exc))


def summary_row(sample: str, sample_dir: Path) -> dict:
    """One summary row from a sample's output folder (missing files make a failed row)."""
    rec = load_sample_record(sample, sample_dir)
    ident = _load_json(sample_dir / "identification.json")
    status, error = rec.status, rec.error
    if status == "ok" and not ident:
        status, error = "failed", "no identification record"
    if ident.get("status") == "failed":
        status, error = "failed", ident.get("error", "identification failed")
    geo = rec.geometry
    phases = ident.get("phases", [])
    alts = []
    for group in ident.get("alternatives", []):
        alts += [a for a in group if a not in alts and a not in phases]
    flags = list(rec.flags) + [f for f in ident.get("flags", []) if f not in rec.flags]
    return {
        "sample": sample,
        "status": status,
        "crystallinity": rec.crystallinity,
        "phases": ";".join(phases),
        "alternatives": ";".join(alts),
        "confidence": ";".join(_num(c, ".3f") for c in ident.get("confidence", [])),
        "center_x_px": _num(geo.center_x_px if geo else None, ".3f"),
        "center_y_px": _num(geo.center_y_px if geo else None, ".3f"),
        "ellipticity": _num(geo.ellipticity if geo else None, ".5f"),
        "crystallite_size_nm": _num(rec.crystallite_size_nm, ".3g"),
        "n_rings": str(rec.n_rings),
        "unexplained_rings": str(ident.get("unexplained_rings", 0 if status == "failed" else "")),
        "flags": ";".join(flags),
        "error": " ".join(str(error).split()),
        "calibration": rec.calibration,
        "fractions_rough": ";".join(_num(f, ".2f") for f in ident.get("fractions_rough", [])),
        "crystallite_size_sigma_nm": _num(rec.crystallite_size_sigma_nm, ".2g"),
        "ring_character": rec.ring_character,
        "note": rec.note,
        # rings that no reported phase explains: their d (Å) and share of the sharp rings' area
        "unexplained_d_angstrom": ";".join(_num(u.get("d_angstrom"), ".4f") for u in ident.get("unexplained", [])),
        "unexplained_intensity_share": _num(ident.get("unexplained_intensity_share"), ".3f"),
        "false_identification_probability": ";".join(
            _num(p, ".2g") for p in ident.get("false_identification_probability", [])
        ),
        # the rings are as sharp as the instrument allows: the size is at least this (crystallite_size_nm empty)
        "crystallite_size_lower_limit_nm": _num(rec.crystallite_size_lower_limit_nm, ".3g"),
        # the line-shape model's measured bias (SIZE_SYSTEMATIC_FRACTION), beside the statistical σ
        "crystallite_size_systematic_nm": _num(rec.crystallite_size_nm * SIZE_SYSTEMATIC_FRACTION
                                               if rec.crystallite_size_nm else None, ".2g"),
    }


def write_summary(results_dir: str | os.PathLike, samples: list[str]) -> list[dict]:
    results = Path(results_dir)
    rows = [summary_row(s, results / "samples" / s) for s in samples]
    write_csv(results / "summary.csv", SUMMARY_COLUMNS, ([r[c] for c in SUMMARY_COLUMNS] for r in rows))
    return rows


def run_summary_text(results_dir: str | os.PathLike, since: float | None = None) -> str:
    """What a finished run says on the terminal: samples ok and failed (with the reason), CIFs that
    did not build, and where the report is. Read from ``summary.csv`` and the library index; a
    summary older than ``since`` (a time stamp, s) is said to be from an earlier run."""
    import csv

    from ringid.library.store import unavailable_phases

    results = Path(results_dir)
    lines = []
    summary = results / "summary.csv"
    if since is not None and summary.is_file() and summary.stat().st_mtime < since:
        return (f"ringid: this run wrote no new summary; {summary} and the report are from an earlier run "
                "(rerun when the failed jobs are fixed)")
    try:
        with open(results / "summary.csv", newline="", encoding="utf-8") as fh:
            rows = list(csv.DictReader(fh))
    except (OSError, csv.Error):
        rows = None
    if rows is None:
        lines.append(f"ringid: no summary was written ({results / 'summary.csv'} is missing)")
    else:
        failed = [r for r in rows if r["status"] != "ok"]
        identified = sum(bool(r["phases"]) for r in rows)
        lines.append(f"ringid: {len(rows)} samples: {len(rows) - len(failed)} ok ({identified} with a phase "
                     f"identified), {len(failed)} failed")
        lines += [f"  failed: {r['sample']}: {r['error']}" for r in failed]
    try:
        cifs = unavailable_phases(results / "library")
    except RingidError as exc:
        cifs = []
        lines.append(f"ringid: {exc}")
    if cifs:
        lines.append(f"ringid: {len(cifs)} CIF(s) did not build; no sample was compared with them:")
        lines += [f"  {phase}: {error}" for phase, error in cifs]
    if (results / "report.html").is_file():
        lines.append(f"ringid: report: {results / 'report.html'} (a screening result: confirm critical "
                     "assignments by independent means)")
    return "\n".join(lines)
