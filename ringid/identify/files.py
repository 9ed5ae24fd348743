"""Identification files: the rings table read in, phases.csv, rings.csv and identification.json written out."""

from __future__ import annotations

import math
import os
from pathlib import Path

import numpy as np

from ringid.core.errors import RingidError
from ringid.identify.score import Identification, IdentifySettings, ObservedRings


def _read_table(path: Path, what: str) -> list[dict]:
    """The rows of a CSV table (a byte-order mark is dropped); unreadable raises RingidError."""
    import csv

    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            return list(csv.DictReader(fh))
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise RingidError(path, f"cannot read {what} ({getattr(exc, 'strerror', None) or exc})") from None


def read_observed_rings(path: str | os.PathLike) -> tuple[ObservedRings, list[dict]]:
    """Read a rings CSV (columns g_per_nm, g_sigma_per_nm, fwhm_per_nm, area, optional kind);
    halos (kind = halo) are left out of the returned rings but kept in the rows."""
    path = Path(path)
    rows = _read_table(path, "rings table")
    need = ("g_per_nm", "g_sigma_per_nm", "fwhm_per_nm", "area")
    if rows and any(k not in rows[0] for k in need):
        raise RingidError(path, f"rings table lacks column(s) {', '.join(k for k in need if k not in rows[0])}")
    sharp_rows = [i for i, r in enumerate(rows) if (r.get("kind") or "ring") == "ring"]
    sharp = [rows[i] for i in sharp_rows]
    try:
        arr = {k: np.array([float(r[k]) for r in sharp], dtype=float) for k in need}
    except ValueError as exc:
        raise RingidError(path, f"non-numeric value in rings table ({exc})") from None
    good = np.isfinite(arr["g_per_nm"]) & (arr["g_per_nm"] > 0) & np.isfinite(arr["area"]) & (arr["area"] > 0)
    arr["g_sigma_per_nm"] = np.where(np.isfinite(arr["g_sigma_per_nm"]), arr["g_sigma_per_nm"], 0.0)
    arr["fwhm_per_nm"] = np.where(np.isfinite(arr["fwhm_per_nm"]), arr["fwhm_per_nm"], 0.0)
    obs = ObservedRings(
        *(arr[k][good] for k in need), source=str(path), row_index=np.array(sharp_rows, dtype=int)[good]
    )
    return obs, rows


D_LIST_COLUMNS = ("d_angstrom", "d_sigma_angstrom", "intensity")


def d_list_rings(d_angstrom, *, d_sigma_angstrom=None, intensity=None, accuracy: float = 0.01,
                 source: str = "") -> tuple[ObservedRings, list[dict], bool]:
    """Rings from a plain list of d-spacings (Å), as measured by hand or read from a table:
    ``(ObservedRings, rows, intensities known)``.

    σ of each d is ``d_sigma_angstrom`` where given, else ``accuracy`` × d (the stated relative
    accuracy, taken as one standard deviation). Without intensities every ring gets the same area
    and the caller should give intensities no weight (unknown, not equal); the width is unknown (0).
    """
    d = np.asarray(d_angstrom, dtype=float)
    if d.ndim != 1 or d.size == 0 or not np.all(np.isfinite(d) & (d > 0)):
        raise RingidError(source or None, "d-spacings must be positive numbers (Å)")
    if not 0 < accuracy < 0.2:
        raise RingidError(None, f"the d accuracy must be between 0 and 20 %, got {accuracy * 100:g} %")
    sig = np.full(d.size, np.nan) if d_sigma_angstrom is None else np.asarray(d_sigma_angstrom, dtype=float)
    sig = np.where(np.isfinite(sig) & (sig > 0), sig, accuracy * d)
    known = intensity is not None and np.all(np.isfinite(np.asarray(intensity, float)))
    area = np.asarray(intensity, dtype=float) if known else np.ones(d.size)
    if known and not np.all(area > 0):
        raise RingidError(source or None, "intensities must be positive numbers")
    order = np.argsort(-d)  # ascending g
    g = 10.0 / d[order]
    obs = ObservedRings(g, g * sig[order] / d[order], np.zeros(d.size), area[order], source=source,
                        row_index=np.arange(d.size))
    rows = [{"g_per_nm": f"{gi:.8g}", "g_sigma_per_nm": f"{si:.3g}", "d_angstrom": f"{di:.7g}",
             "d_sigma_angstrom": f"{ds:.3g}", "fwhm_per_nm": "", "area": f"{ai:.6g}" if known else "",
             "kind": "ring"}
            for gi, si, di, ds, ai in zip(g, obs.g_sigma_per_nm, d[order], sig[order], area[order])]
    return obs, rows, bool(known)


def read_d_list(path: str | os.PathLike, accuracy: float = 0.01) -> tuple[ObservedRings, list[dict], bool]:
    """A CSV of d-spacings (column ``d_angstrom``; optional ``d_sigma_angstrom``, ``intensity``),
    as :func:`d_list_rings`."""
    path = Path(path)
    rows = _read_table(path, "d-spacing list")
    if not rows or "d_angstrom" not in rows[0]:
        raise RingidError(path, "a d-spacing list needs a column d_angstrom (optional d_sigma_angstrom, intensity)")
    unknown = [c for c in rows[0] if c and c not in D_LIST_COLUMNS]
    if unknown:
        raise RingidError(path, f"unknown column(s) {', '.join(unknown)}; the columns are {', '.join(D_LIST_COLUMNS)}")

    def column(name):
        if name not in rows[0]:
            return None
        try:
            return [float(r[name]) if (r[name] or "").strip() else np.nan for r in rows]
        except ValueError as exc:
            raise RingidError(path, f"non-numeric value in column {name} ({exc})") from None

    return d_list_rings(column("d_angstrom"), d_sigma_angstrom=column("d_sigma_angstrom"),
                        intensity=column("intensity"), accuracy=accuracy, source=str(path))


PHASES_COLUMNS = [
    "rank", "phase", "score", "confidence", "in_answer", "dilation", "dilation_sigma", "n_matched",
    "n_missing_strong", "missing_strong_rings", "explained_intensity_share", "false_identification_probability",
    "free_dilation", "free_dilation_sigma", "lattice_mismatch",
]
ASSIGNMENT_COLUMNS = ["phase", "hkl", "double_diffraction", "d_calc_angstrom"]


def _round_sig(x: float, digits: int = 4) -> float | None:
    """x to ``digits`` significant digits for JSON (None when not finite)."""
    return float(f"{x:.{digits}g}") if math.isfinite(x) else None


def write_results(out_dir: str | os.PathLike, rows: list[dict], obs: ObservedRings, result: Identification,
                  settings: IdentifySettings, provenance: dict | None = None,
                  unavailable: list[tuple[str, str]] = ()) -> None:
    """Write ``phases.csv``, ``rings.csv`` (input rows + assignment) and ``identification.json``.

    ``unavailable``: (phase id, reason) of the library's phases whose CIF did not build, recorded
    because an answer is only as complete as the library it was searched in.
    """
    from ringid.core.atomic import format_cell, write_csv, write_json

    out = Path(out_dir)
    write_csv(out / "phases.csv", PHASES_COLUMNS, (
        [format_cell(r + 1), c.phase, format_cell(c.score, ".5g"), format_cell(c.confidence, ".4g"),
         format_cell(c.in_answer), format_cell(c.dilation, ".7g"), format_cell(c.dilation_sigma, ".3g"),
         format_cell(c.n_matched), format_cell(c.n_missing_strong), c.missing_strong_rings,
         format_cell(c.explained_intensity_share, ".4g"), format_cell(c.false_identification_probability, ".3g"),
         format_cell(c.free_dilation, ".7g"), format_cell(c.free_dilation_sigma, ".3g"),
         format_cell(c.lattice_mismatch)]
        for r, c in enumerate(result.candidates)
    ))
    # rings.csv: every input row (halos too) with its assignment; sharp rings in input order
    if rows:
        header = list(rows[0].keys())
    else:
        from ringid.profile.rings import RINGS_CSV_COLUMNS

        header = list(RINGS_CSV_COLUMNS)
    header = [h for h in header if h not in ASSIGNMENT_COLUMNS] + ASSIGNMENT_COLUMNS
    row_of = obs.row_index if obs.row_index is not None else np.arange(len(obs))
    by_row = {int(r): a for r, a in zip(row_of, result.assignments)}
    out_rows = []
    for k, r in enumerate(rows):
        asg = by_row.get(k)
        extra = (
            [asg.phase, asg.hkl, format_cell(asg.double_diffraction), format_cell(asg.d_calc_angstrom, ".7g")]
            if asg
            else ["", "", "", ""]
        )
        out_rows.append([r.get(h, "") for h in header[: -len(ASSIGNMENT_COLUMNS)]] + extra)
    write_csv(out / "rings.csv", header, out_rows)
    record = {
        "phases": list(result.phases),
        "confidence": [round(c, 6) for c in result.confidence],
        "alternatives": [list(a) for a in result.alternatives],
        "separation_sigma": [round(s, 3) if math.isfinite(s) else None for s in result.separation_sigma],
        "fractions_rough": [round(f, 4) if math.isfinite(f) else None for f in result.fractions_rough],
        "refined_lattice": [r.to_json() for r in result.refined],
        "false_identification_probability": [_round_sig(p) for p in result.false_identification_probability],
        "unexplained_rings": result.unexplained_rings,
        "unexplained_intensity_share": round(result.unexplained_intensity_share, 4),
        "single_lattice": (
            {k: (_round_sig(v, 6) if isinstance(v, float) else v) for k, v in result.single_lattice.items()}
            if result.single_lattice
            else None
        ),
        "lattice_mismatch": [
            {k: (_round_sig(v) if isinstance(v, float) else v) for k, v in m.items()} for m in result.lattice_mismatches
        ],
        "not_significant": [
            {k: (_round_sig(v) if isinstance(v, float) else v) for k, v in m.items()} for m in result.rejected
        ],
        "unexplained": [
            {
                "g_per_nm": round(float(obs.g_per_nm[i]), 6),
                "d_angstrom": round(10.0 / float(obs.g_per_nm[i]), 6),
                "area": float(obs.area[i]),
            }
            for i in result.unexplained
        ],
        "elements": list(result.elements),
        "phases_within_elements": result.phases_within_elements,
        "better_match_outside_elements": [
            {k: (_round_sig(v) if isinstance(v, float) else v) for k, v in m.items()}
            for m in result.better_match_outside_elements
        ],
        "flags": list(result.flags) + (["library_incomplete"] if unavailable else []),
        "unavailable_phases": [{"phase": p, "error": e} for p, e in unavailable],
        "settings": {k: getattr(settings, k) for k in settings.__dataclass_fields__},
        "screening_note": (
            "Phase identification is a screening result; confirm critical assignments by independent means."
        ),
    }
    if provenance:
        record["provenance"] = provenance
    write_json(out / "identification.json", record)
