"""Series: trends across an annealing, time or position series of samples (``series/{name}.csv``
and ``series/{name}.png``).

A series is declared in the config (``series: [{name, variable, group_by}]``): ``variable`` is a
numeric sample-sheet column with its unit in its name (e.g. ``temperature_c``), ``group_by`` an
optional text column that splits the samples into several lines (e.g. one film each). Its members
are the samples with a value of the variable, in order of it. Per member the table gives what the
image and identification jobs found: crystallinity, the amorphous share (the halos' share of the
scattered area), each phase's share of the crystalline part (rough: from ring areas), the crystallite
size with its σ or lower limit, and each phase's refined lattice parameters with σ. A failed or
unidentified member keeps its row, with empty values: the figure shows it as a gap marked at the
bottom, never drops it.
"""

from __future__ import annotations

import json
import math
import os
from pathlib import Path

from ringid.core.atomic import format_cell, write_csv
from ringid.core.errors import RingidError
from ringid.core.records import read_sample_record


def series_members(samples, variable: str, group_by: str | None = None) -> list[tuple[str, str, float]]:
    """``(group, sample id, value)`` of the sheet rows (``SampleRow``) that give the variable,
    ordered by group, then value, then id."""
    out = []
    for row in samples:
        text = row.value(variable)
        if text == "":
            continue
        out.append((row.value(group_by) if group_by else "", row.sample, float(text)))
    return sorted(out, key=lambda m: (m[0], m[2], m[1]))


def _load(path: Path) -> dict:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}


def series_rows(results_dir: str | os.PathLike, members, variable: str) -> tuple[list[str], list[dict]]:
    """The series table: ``(columns, rows)`` for ``members`` (from :func:`series_members`)."""
    results = Path(results_dir)
    rows, phases, uniaxial = [], [], set()
    for group, sample, value in members:
        d = results / "samples" / sample
        try:
            rec = read_sample_record(d / "sample.json")
        except RingidError as exc:
            rows.append({"group": group, "sample": sample, variable: value, "status": "failed", "error": str(exc)})
            continue
        ident = _load(d / "identification.json")
        status = "failed" if rec.status != "ok" or ident.get("status") == "failed" or not ident else "ok"
        row = {"group": group, "sample": sample, variable: value, "status": status,
               "error": (rec.error or ident.get("error", "")) if status == "failed" else "",
               "crystallinity": rec.crystallinity}
        if status == "ok":
            row.update(amorphous_share=rec.halo_area_fraction, crystallite_size_nm=rec.crystallite_size_nm,
                       crystallite_size_sigma_nm=rec.crystallite_size_sigma_nm,
                       crystallite_size_lower_limit_nm=rec.crystallite_size_lower_limit_nm,
                       phases=";".join(ident.get("phases", [])))
            for phase, frac, lat in zip(ident.get("phases", []), ident.get("fractions_rough", []),
                                        ident.get("refined_lattice", [])):
                if phase not in phases:
                    phases.append(phase)
                row[f"fraction_{phase}"] = frac
                row[f"a_{phase}_angstrom"] = lat.get("a_angstrom")
                row[f"a_{phase}_sigma_angstrom"] = lat.get("a_sigma_angstrom")
                if lat.get("c_angstrom") is not None:
                    uniaxial.add(phase)
                    row[f"c_{phase}_angstrom"] = lat.get("c_angstrom")
                    row[f"c_{phase}_sigma_angstrom"] = lat.get("c_sigma_angstrom")
        rows.append(row)
    columns = ["group", "sample", variable, "status", "crystallinity", "amorphous_share", "phases"]
    columns += [f"fraction_{p}" for p in phases]
    columns += ["crystallite_size_nm", "crystallite_size_sigma_nm", "crystallite_size_lower_limit_nm"]
    for p in phases:
        columns += [f"a_{p}_angstrom", f"a_{p}_sigma_angstrom"]
        if p in uniaxial:
            columns += [f"c_{p}_angstrom", f"c_{p}_sigma_angstrom"]
    return columns + ["error"], rows


def add_vegard(results_dir: str | os.PathLike, columns: list[str], rows: list[dict],
               end_members: tuple[str, str]) -> list[str]:
    """The composition of a solid solution between two library phases A and B of the same structure
    by Vegard's law (Vegard, Z. Phys. 5, 17, 1921): x_B = (a − a_A)/(a_B − a_A) from the refined a
    of whichever end member a sample was identified as, with σ = σ_a/|a_B − a_A|. An estimate: real
    solid solutions deviate from the linear law. Adds the columns ``vegard_x_B`` and its σ."""
    from ringid.library.store import read_phase_record

    lib = Path(results_dir) / "library"
    a_end = []
    for phase in end_members:
        try:
            a_end.append(float(read_phase_record(lib, phase)["cell"]["a_angstrom"]))
        except (RingidError, KeyError, TypeError, ValueError):
            raise RingidError(lib, f"end member {phase!r} of the series has no cell in the library") from None
    (phase_a, phase_b), (a_a, a_b) = end_members, a_end
    if a_a == a_b:
        raise RingidError(None, f"end members {phase_a} and {phase_b} have the same a: no composition by Vegard's law")
    x_col = f"vegard_x_{phase_b}"
    for row in rows:
        for phase in end_members:
            a, sa = row.get(f"a_{phase}_angstrom"), row.get(f"a_{phase}_sigma_angstrom")
            if isinstance(a, (int, float)) and a is not None:
                row[x_col] = (a - a_a) / (a_b - a_a)
                row[f"{x_col}_sigma"] = sa / abs(a_b - a_a) if isinstance(sa, (int, float)) else None
                break
    return columns[:-1] + [x_col, f"{x_col}_sigma", columns[-1]]


def write_series(results_dir: str | os.PathLike, name: str, samples, variable: str, group_by: str | None = None,
                 end_members: tuple[str, str] | None = None) -> tuple[Path, Path]:
    """Write ``series/{name}.csv`` and ``series/{name}.png``; return their paths (``end_members``:
    two library phases of a solid solution, for the composition by Vegard's law)."""
    members = series_members(samples, variable, group_by)
    columns, rows = series_rows(results_dir, members, variable)
    if end_members:
        columns = add_vegard(results_dir, columns, rows, tuple(end_members))
    out = Path(results_dir) / "series"
    out.mkdir(parents=True, exist_ok=True)
    table = out / f"{name}.csv"
    write_csv(table, columns, ([_cell(r.get(c)) for c in columns] for r in rows))
    figure = out / f"{name}.png"
    from ringid.report.figures import message_png, series_png

    try:
        series_png(figure, title=f"series {name}", variable=variable, columns=columns, rows=rows)
    except (ValueError, RuntimeError, TypeError) as exc:  # the table stands; the figure says why it is missing
        message_png(figure, f"series {name}: the figure could not be drawn ({type(exc).__name__}: {exc}); "
                            f"the table is series/{name}.csv")
    return table, figure


def _cell(x) -> str:
    if isinstance(x, float):
        return format_cell(x, ".6g") if math.isfinite(x) else ""
    return format_cell(x)
