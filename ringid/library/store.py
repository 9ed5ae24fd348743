"""The phase library's files: build every phase of a CIF folder, write and read its ring lists.

Under a library folder: ``rings/{phase}.csv``, ``phases/{phase}.json``, ``reflections/{phase}.csv``
(every reflection and its ring), and ``index.csv``. The rings themselves are computed by
``ringid.library.structure``.
"""

from __future__ import annotations

import csv
import json
import os
from collections import Counter
from pathlib import Path

import numpy as np

from ringid import __version__
from ringid.core.atomic import format_cell, write_csv, write_json
from ringid.core.errors import RingidError
from ringid.core.model import PhaseRings
from ringid.library.structure import (
    DEFAULT_D_MIN_ANGSTROM,
    DEFAULT_MAX_REFLECTIONS,
    DEFAULT_MERGE_TOLERANCE,
    SCATTERING_TABLE,
    ring_list,
)

RING_COLUMNS = ["d_angstrom", "g_per_nm", "intensity", "multiplicity", "hkl", "double_diffraction", "f_squared_sum"]
INDEX_COLUMNS = [
    "phase", "formula", "space_group", "a", "b", "c", "alpha", "beta", "gamma",
    "n_rings", "cif_sha256", "status", "error", "warnings", "title",
]
#: Separator of a phase's warnings in the one ``warnings`` field of ``index.csv``.
INDEX_WARNING_SEPARATOR = " | "


def phase_paths(library_dir: str | os.PathLike, phase: str) -> dict[str, Path]:
    lib = Path(library_dir)
    return {
        "rings": lib / "rings" / f"{phase}.csv",
        "record": lib / "phases" / f"{phase}.json",
        "reflections": lib / "reflections" / f"{phase}.csv",
    }


def build_phase(cif_path: str | os.PathLike, library_dir: str | os.PathLike, *,
                d_min_angstrom: float = DEFAULT_D_MIN_ANGSTROM,
                merge_tolerance: float = DEFAULT_MERGE_TOLERANCE,
                max_reflections: int = DEFAULT_MAX_REFLECTIONS) -> dict:
    """Compute one phase from its CIF and write its three files; return its record.

    A CIF that cannot be used is a result: the record says ``status: failed`` with the
    one-line reason, and the rings/reflections files are written with headers only, so
    that a workflow job that made them still succeeds and the index lists the failure.
    That holds for any exception of the computation, running out of memory included (its
    reason then names the exception); a phase whose estimated reflection count exceeds
    ``max_reflections`` is refused before the enumeration starts.
    """
    from ringid.library import cif as cifmod

    cif_path = Path(cif_path)
    paths = phase_paths(library_dir, cif_path.stem)
    base = _base_record(cif_path, d_min_angstrom, merge_tolerance)
    try:
        crystal = cifmod.read_crystal(cif_path)
        rings, refl, ring_of = ring_list(crystal, d_min_angstrom, merge_tolerance, max_reflections)
    except RingidError as exc:
        return _failed(paths, base, exc.problem)
    except MemoryError:
        return _failed(paths, base, "out of memory while computing the phase (lower library.max_reflections "
                                    "or raise d_min)")
    except Exception as exc:  # a phase that cannot be computed is a failed record, not a crash
        return _failed(paths, base, f"unexpected {type(exc).__name__} while computing the phase: "
                                    f"{str(exc).strip() or 'no message'}")

    a, b, c, al, be, ga = crystal.cell
    record = dict(
        base,
        title=crystal.title,
        formula=crystal.formula,
        formula_units_z=crystal.formula_units_z,
        space_group_number=crystal.space_group_number,
        space_group_symbol=crystal.space_group_symbol,
        space_group_hall=crystal.space_group_hall,
        crystal_system=crystal.crystal_system,
        cell={"a_angstrom": a, "b_angstrom": b, "c_angstrom": c, "alpha_deg": al, "beta_deg": be, "gamma_deg": ga},
        volume_angstrom3=round(crystal.volume_angstrom3, 6),
        density_g_cm3=round(crystal.density_g_cm3, 5),
        n_atoms_in_cell=len(crystal.elements),
        n_rings=len(rings.d_angstrom),
        n_double_diffraction_rings=int(rings.double_diffraction.sum()),
        n_reflections=int(len(refl.d_angstrom)),
        sites=_site_table(crystal),
        warnings=list(crystal.warnings),
    )
    write_rings_csv(paths["rings"], rings)
    keep = ring_of >= 0
    order = np.lexsort((refl.hkl[keep][:, 2], refl.hkl[keep][:, 1], refl.hkl[keep][:, 0], ring_of[keep]))
    hkl, d, f2, rid = (
        refl.hkl[keep][order],
        refl.d_angstrom[keep][order],
        refl.f_squared[keep][order],
        ring_of[keep][order],
    )
    write_csv(
        paths["reflections"],
        ["h", "k", "l", "d_angstrom", "f_squared", "ring"],
        (
            [int(x[0]), int(x[1]), int(x[2]), format_cell(di, ".6f"), format_cell(fi, ".6g"), int(ri)]
            for x, di, fi, ri in zip(hkl, d, f2, rid)
        ),
    )
    write_json(paths["record"], record)
    return record


def _base_record(cif_path: Path, d_min_angstrom: float, merge_tolerance: float) -> dict:
    """The fields of a phase record that do not depend on the computation."""
    from ringid.library import cif as cifmod

    return {
        "phase": cif_path.stem,
        "status": "ok",
        "error": "",
        "cif_path": str(cif_path),
        "cif_sha256": cifmod.sha256_file(cif_path) if cif_path.is_file() else "",
        "d_min_angstrom": d_min_angstrom,
        "merge_tolerance": merge_tolerance,
        "scattering_factors": SCATTERING_TABLE,
        "ringid_version": __version__,
    }


def record_crashed_phase(cif_path: str | os.PathLike, library_dir: str | os.PathLike, reason: str, *,
                         d_min_angstrom: float = DEFAULT_D_MIN_ANGSTROM,
                         merge_tolerance: float = DEFAULT_MERGE_TOLERANCE) -> dict | None:
    """After the job of a phase died (killed, say): its failed record with ``reason``, unless its
    record was written; returns the record written, or None."""
    cif_path = Path(cif_path)
    paths = phase_paths(library_dir, cif_path.stem)
    if paths["record"].is_file():
        return None
    return _failed(paths, _base_record(cif_path, d_min_angstrom, merge_tolerance), reason)


def _failed(paths: dict[str, Path], base: dict, problem: str) -> dict:
    """Write a failed phase's record (one-line reason) and header-only rings/reflections files."""
    record = dict(base, status="failed", error=" ".join(problem.split()))
    write_csv(paths["rings"], RING_COLUMNS, [])
    write_csv(paths["reflections"], ["h", "k", "l", "d_angstrom", "f_squared", "ring"], [])
    write_json(paths["record"], record)
    return record


def _site_table(crystal) -> list[dict]:
    """One entry per site and element (a mixed site has one per element, under its one label)."""
    keys = list(zip(crystal.labels, crystal.elements))
    counts = Counter(keys)
    seen, out = set(), []
    for key, occ, u in zip(keys, crystal.occupancy, crystal.u_iso_angstrom2):
        if key in seen:
            continue
        seen.add(key)
        out.append({"label": key[0], "element": key[1], "occupancy": float(occ), "u_iso_angstrom2": float(u),
                    "atoms_in_cell": counts[key]})
    return out


def write_rings_csv(path, rings: PhaseRings) -> None:
    f2 = rings.meta.get("f_squared_sum", np.full(len(rings.d_angstrom), np.nan))
    # f_squared_sum keeps its own format: a ring list without the sums is written "nan" there
    # (format_cell would write ""; read_phase_rings takes either as NaN)
    write_csv(
        path,
        RING_COLUMNS,
        (
            [format_cell(d, ".6f"), format_cell(10.0 / d, ".6f"), format_cell(i, ".6g"), int(m), h,
             format_cell(bool(dd)), f"{f:.6g}"]
            for d, i, m, h, dd, f in zip(
                rings.d_angstrom, rings.intensity, rings.multiplicity, rings.hkl, rings.double_diffraction, f2
            )
        ),
    )


def read_phase_record(library_dir: str | os.PathLike, phase: str) -> dict:
    path = phase_paths(library_dir, phase)["record"]
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise RingidError(path, f"phase {phase!r} is not in the library") from None
    except (OSError, ValueError) as exc:
        raise RingidError(path, f"unreadable phase record ({exc})") from None


def read_phase_rings(library_dir: str | os.PathLike, phase: str) -> PhaseRings:
    """Load a phase's ring list from a library folder.

    Raises RingidError when the phase is missing or failed to build.
    """
    record = read_phase_record(library_dir, phase)
    if record.get("status") != "ok":
        raise RingidError(
            phase_paths(library_dir, phase)["record"], f"phase {phase!r} failed to build: {record.get('error', '')}"
        )
    path = phase_paths(library_dir, phase)["rings"]
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            rows = list(csv.DictReader(fh))
    except OSError as exc:
        raise RingidError(path, f"cannot read ring list ({exc.strerror or exc})") from None
    try:
        d = np.array([float(r["d_angstrom"]) for r in rows])
        inten = np.array([float(r["intensity"]) for r in rows])
        mult = np.array([int(r["multiplicity"]) for r in rows])
        dd = np.array([r["double_diffraction"].strip().lower() == "true" for r in rows], dtype=bool)
        hkl = tuple(r["hkl"] for r in rows)
        f2 = np.array([float(r.get("f_squared_sum") or "nan") for r in rows])
    except (KeyError, ValueError) as exc:
        raise RingidError(path, f"malformed ring list ({exc})") from None
    meta = {
        k: record.get(k)
        for k in (
            "formula",
            "space_group_symbol",
            "space_group_number",
            "cell",
            "crystal_system",
            "title",
            "cif_sha256",
        )
    }
    meta["f_squared_sum"] = f2
    return PhaseRings(
        phase=phase, d_angstrom=d, intensity=inten, multiplicity=mult, hkl=hkl, double_diffraction=dd, meta=meta
    )


def list_phases(library_dir: str | os.PathLike) -> list[str]:
    """Phase ids with a record in the library folder, sorted."""
    return sorted(p.stem for p in (Path(library_dir) / "phases").glob("*.json"))


def write_index(library_dir: str | os.PathLike, phases: list[str] | None = None) -> list[dict]:
    """Write ``index.csv`` (one row per phase record) and return the rows."""
    phases = list_phases(library_dir) if phases is None else sorted(phases)
    rows = []
    for phase in phases:
        rec = read_phase_record(library_dir, phase)
        cell = rec.get("cell") or {}
        rows.append(
            {
                "phase": phase,
                "formula": rec.get("formula", ""),
                "space_group": rec.get("space_group_symbol", ""),
                "a": cell.get("a_angstrom", ""),
                "b": cell.get("b_angstrom", ""),
                "c": cell.get("c_angstrom", ""),
                "alpha": cell.get("alpha_deg", ""),
                "beta": cell.get("beta_deg", ""),
                "gamma": cell.get("gamma_deg", ""),
                "n_rings": rec.get("n_rings", 0),
                "cif_sha256": rec.get("cif_sha256", ""),
                "status": rec.get("status", "failed"),
                "error": rec.get("error", ""),
                "warnings": INDEX_WARNING_SEPARATOR.join(rec.get("warnings", [])),
                "title": rec.get("title", ""),
            }
        )
    write_csv(Path(library_dir) / "index.csv", INDEX_COLUMNS, ([r[c] for c in INDEX_COLUMNS] for r in rows))
    return rows


def build_library(cif_dir: str | os.PathLike, library_dir: str | os.PathLike, *,
                  d_min_angstrom: float = DEFAULT_D_MIN_ANGSTROM,
                  merge_tolerance: float = DEFAULT_MERGE_TOLERANCE,
                  max_reflections: int = DEFAULT_MAX_REFLECTIONS, progress=None) -> list[dict]:
    """Build every ``*.cif`` in a folder and write the index; return the phase records."""
    cif_dir = Path(cif_dir)
    if not cif_dir.is_dir():
        raise RingidError(cif_dir, "not a folder of CIF files")
    cifs = sorted(p for p in cif_dir.iterdir() if p.suffix.lower() == ".cif" and p.is_file())
    if not cifs:
        raise RingidError(cif_dir, "no *.cif files in this folder")
    records = []
    for i, path in enumerate(cifs):
        records.append(build_phase(path, library_dir, d_min_angstrom=d_min_angstrom, merge_tolerance=merge_tolerance,
                                   max_reflections=max_reflections))
        if progress:
            progress(i + 1, len(cifs), records[-1])
    write_index(library_dir, [r["phase"] for r in records])
    return records

def read_index(library_dir: str | os.PathLike) -> list[dict] | None:
    """The rows of a library's ``index.csv`` (None when there is none)."""
    import csv

    path = Path(library_dir) / "index.csv"
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            return list(csv.DictReader(fh))
    except FileNotFoundError:
        return None
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise RingidError(path, f"unreadable library index ({exc})") from None


def unavailable_phases(library_dir: str | os.PathLike) -> list[tuple[str, str]]:
    """(phase id, reason) of every phase of the library's index whose CIF did not build: the
    phases an identification against this library could not consider."""
    rows = read_index(library_dir) or []
    return [(r["phase"], r.get("error", "") or "failed") for r in rows if r.get("status") != "ok"]


def load_library(library_dir: str | os.PathLike) -> list[PhaseRings]:
    """Every phase of a library folder that built successfully (failed records are skipped).

    The phases are those of ``index.csv`` when the folder has one (so a record left behind by a
    CIF that was since removed is not searched), else every record in the folder.
    """
    index = read_index(library_dir)
    listed = list_phases(library_dir) if index is None else [r["phase"] for r in index]
    phases = []
    for phase in listed:
        if read_phase_record(library_dir, phase).get("status") == "ok":
            phases.append(read_phase_rings(library_dir, phase))
    if not phases:
        if not (Path(library_dir) / "phases").is_dir() and any(Path(library_dir).glob("*.cif")):
            raise RingidError(library_dir, "this is a folder of CIF files, not a built phase library: build one with "
                                           f"`ringid library build {library_dir} -o LIB` and pass LIB")
        raise RingidError(library_dir, "the phase library has no usable phase")
    return phases
