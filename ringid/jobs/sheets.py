"""Sample and calibration sheets: read and validate, reporting every problem at once.

Sample sheet (CSV): ``sample,image,calibration`` and optional ``voltage_kv,note,elements``
(``elements``: the sample's element symbols, space- or comma-separated, e.g. ``Ti O``; only library
phases made of them are candidates; empty: no restriction).
Calibration sheet (CSV), one of three kinds per row:

- ``calibration,image,standard,voltage_kv``: a film of a known phase (``standard`` is a phase
  id in the phases folder) recorded at the same conditions;
- ``calibration,camera_constant_A_px,voltage_kv``: a known camera constant K (Å·px);
- ``calibration,camera_length_mm,pixel_size_um,voltage_kv``: a nominal camera length.

Any other column is an error (with the nearest known name as a suggestion), except columns of
the user's own, whose names start with ``x_``. Image paths are absolute or relative to the
sheet's folder. Ids must be safe file names (letters, digits, ``.``, ``_``, ``-``; not starting
with ``.``), since they name output folders.
This module imports only the standard library (it runs when the workflow starts).
"""

from __future__ import annotations

import csv
import math
import os
import re
from dataclasses import dataclass, field
from pathlib import Path

from ringid.core.errors import RingidError

SAFE_ID = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,127}$")
SAMPLE_COLUMNS = ("sample", "image", "calibration", "voltage_kv", "note", "elements")
CALIBRATION_COLUMNS = ("calibration", "voltage_kv", "image", "standard", "camera_constant_A_px", "camera_length_mm",
                       "pixel_size_um")
OWN_COLUMN_PREFIX = "x_"  # columns of the user's own (ignored by ringid) start with this


@dataclass(frozen=True)
class SampleRow:
    sample: str
    image: str  # absolute path
    calibration: str
    voltage_kv: float = math.nan
    note: str = ""
    elements: tuple[str, ...] = ()  # element symbols, sorted (empty: no restriction)
    values: tuple[tuple[str, str], ...] = ()  # the config's extra columns (series variables), as text

    def value(self, column: str) -> str:
        """The text of an extra column ("" when empty or not in the sheet)."""
        return dict(self.values).get(column, "")


@dataclass(frozen=True)
class CalibrationRow:
    calibration: str
    kind: str  # "standard" | "constant" | "nominal"
    voltage_kv: float
    image: str = ""
    standard: str = ""
    camera_constant_A_px: float = math.nan
    camera_length_mm: float = math.nan
    pixel_size_um: float = math.nan


@dataclass
class Problems:
    """Collects one-line problems; ``raise_if_any`` raises them together."""

    lines: list[str] = field(default_factory=list)

    def add(self, where, problem: str) -> None:
        self.lines.append(f"{where}: {problem}")

    def raise_if_any(self, what: str) -> None:
        if self.lines:
            raise SheetError(what, self.lines)


class SheetError(RingidError):
    """Several sheet problems, each on its own line."""

    def __init__(self, what: str, lines: list[str]):
        self.lines = list(lines)
        super().__init__(None, f"{len(lines)} problem(s) in {what}")

    def __str__(self) -> str:
        return "\n".join(self.lines)


def _read_csv(path: Path, problems: Problems) -> tuple[set[str], list[dict]] | None:
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            reader = csv.DictReader(fh)
            rows = list(reader)
            header = [h.strip() for h in (reader.fieldnames or [])]
    except FileNotFoundError:
        problems.add(path, "sheet not found")
        return None
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        problems.add(path, f"cannot read sheet ({exc})")
        return None
    if not header:
        problems.add(path, "empty sheet (no header line)")
        return None
    return set(header), [{(k or "").strip(): (v or "").strip() for k, v in r.items()} for r in rows]


def _start(path, problems: Problems | None, what: str):
    """Open a sheet: (raise-at-end?, problems, path, (header, rows) or None). A sheet that cannot
    be read raises at once when nobody else collects the problems."""
    own = problems is None
    problems = problems or Problems()
    path = Path(path)
    read = _read_csv(path, problems)
    if read is None and own:
        problems.raise_if_any(what)
    return own, problems, path, read


def _check_columns(path: Path, header: set[str], known: tuple[str, ...], problems: Problems) -> None:
    """An unknown column is a problem (a misspelt optional column would otherwise be ignored in
    silence), with the nearest known name as a suggestion."""
    import difflib

    for column in sorted(header):
        if not column or column in known or column.startswith(OWN_COLUMN_PREFIX):
            continue
        near = difflib.get_close_matches(column.lower(), known, n=1, cutoff=0.6)
        hint = f" (did you mean {near[0]!r}?)" if near else ""
        problems.add(f"{path}:1", f"unknown column {column!r}{hint}; the columns are {', '.join(known)} "
                                  f"(columns of your own: start their names with {OWN_COLUMN_PREFIX!r})")


def _check_id(path, line, column, value, problems) -> bool:
    if not value:
        problems.add(f"{path}:{line}", f"empty {column}")
        return False
    if not SAFE_ID.match(value) or ".." in value:
        problems.add(
            f"{path}:{line}",
            f"{column} {value!r} is not a safe file name (letters, digits, '.', '_', '-'; no '/', '..' or spaces)",
        )
        return False
    return True


def _number(path, line, column, value, problems, *, required=True) -> float:
    if value == "":
        if required:
            problems.add(f"{path}:{line}", f"missing {column}")
        return math.nan
    try:
        x = float(value)
    except ValueError:
        problems.add(f"{path}:{line}", f"{column} {value!r} is not a number")
        return math.nan
    if not math.isfinite(x) or x <= 0:
        problems.add(f"{path}:{line}", f"{column} must be a positive number, got {value}")
        return math.nan
    return x


def _image_path(sheet: Path, value: str) -> str:
    p = Path(value)
    return str(p if p.is_absolute() else (sheet.parent / p).resolve())


def read_calibrations(path: str | os.PathLike, phases_dir: str | os.PathLike | None = None,
                      problems: Problems | None = None) -> dict[str, CalibrationRow]:
    """Read and check the calibration sheet (collects problems when ``problems`` is given)."""
    own, problems, path, read = _start(path, problems, "the calibration sheet")
    out: dict[str, CalibrationRow] = {}
    if read is None:
        return out
    header, rows = read
    _check_columns(path, header, CALIBRATION_COLUMNS, problems)
    if "calibration" not in header or "voltage_kv" not in header:
        missing = [c for c in ("calibration", "voltage_kv") if c not in header]
        problems.add(path, f"missing column(s) {', '.join(missing)}")
    kinds = {
        "standard": ("image", "standard"),
        "constant": ("camera_constant_A_px",),
        "nominal": ("camera_length_mm", "pixel_size_um"),
    }
    if not any(all(c in header for c in cols) for cols in kinds.values()):
        problems.add(path, "needs the columns image,standard or camera_constant_A_px or camera_length_mm,pixel_size_um")
    phases = {p.stem for p in Path(phases_dir).glob("*.cif")} if phases_dir else None
    for n, r in enumerate(rows, start=2):
        cid = r.get("calibration", "")
        if not _check_id(path, n, "calibration", cid, problems):
            continue
        if cid in out:
            problems.add(f"{path}:{n}", f"duplicate calibration id {cid!r}")
            continue
        volt = _number(path, n, "voltage_kv", r.get("voltage_kv", ""), problems)
        filled = [k for k, cols in kinds.items() if all(r.get(c, "") for c in cols)]
        if not filled:
            problems.add(
                f"{path}:{n}",
                f"calibration {cid!r} gives neither image+standard, camera_constant_A_px, "
                "nor camera_length_mm+pixel_size_um",
            )
            continue
        kind = filled[0]
        if kind == "standard":
            image = _image_path(path, r["image"])
            if not Path(image).is_file():
                problems.add(f"{path}:{n}", f"image not found: {image}")
            std = r["standard"]
            if phases is not None and std not in phases:
                problems.add(f"{path}:{n}", f"standard {std!r} is not a phase in {phases_dir}")
            out[cid] = CalibrationRow(cid, kind, volt, image=image, standard=std)
        elif kind == "constant":
            k = _number(path, n, "camera_constant_A_px", r["camera_constant_A_px"], problems)
            out[cid] = CalibrationRow(cid, kind, volt, camera_constant_A_px=k)
        else:
            L = _number(path, n, "camera_length_mm", r["camera_length_mm"], problems)
            p = _number(path, n, "pixel_size_um", r["pixel_size_um"], problems)
            out[cid] = CalibrationRow(cid, kind, volt, camera_length_mm=L, pixel_size_um=p)
    if own:
        problems.raise_if_any("the calibration sheet")
    return out


def read_samples(path: str | os.PathLike, calibrations: dict[str, CalibrationRow] | None = None,
                 problems: Problems | None = None, extra_columns: dict[str, str] | None = None,
                 check_columns: bool = True) -> dict[str, SampleRow]:
    """Read and check the sample sheet (collects problems when ``problems`` is given).

    ``extra_columns``: further known columns (``{name: "number" | "text"}``, e.g. the series
    variables of the config); a number column may be empty, else it must be a finite number.
    ``check_columns=False`` leaves other columns alone (for jobs that only need the sample ids of a
    sheet the workflow checked when it started).
    """
    extra = dict(extra_columns or {})
    own, problems, path, read = _start(path, problems, "the sample sheet")
    out: dict[str, SampleRow] = {}
    if read is None:
        return out
    header, rows = read
    if check_columns:
        _check_columns(path, header, SAMPLE_COLUMNS + tuple(extra), problems)
    missing = [c for c in ("sample", "image", "calibration") if c not in header]
    if missing:
        problems.add(path, f"missing column(s) {', '.join(missing)}")
        if own:
            problems.raise_if_any("the sample sheet")
        return out
    if not rows:
        problems.add(path, "no samples in the sheet")
    for n, r in enumerate(rows, start=2):
        sid = r.get("sample", "")
        if not _check_id(path, n, "sample", sid, problems):
            continue
        if sid in out:
            problems.add(f"{path}:{n}", f"duplicate sample id {sid!r}")
            continue
        image = _image_path(path, r.get("image", "")) if r.get("image") else ""
        if not image:
            problems.add(f"{path}:{n}", "missing image")
        elif not Path(image).is_file():
            problems.add(f"{path}:{n}", f"image not found: {image}")
        cal = r.get("calibration", "")
        if calibrations is not None and cal not in calibrations:
            problems.add(f"{path}:{n}", f"unknown calibration id {cal!r}")
        volt = _number(path, n, "voltage_kv", r.get("voltage_kv", ""), problems, required=False)
        if calibrations is not None and cal in calibrations and math.isfinite(volt):
            cv = calibrations[cal].voltage_kv
            if math.isfinite(cv) and abs(cv - volt) > 1e-6 * cv:
                problems.add(f"{path}:{n}", f"voltage_kv {volt:g} differs from its calibration {cal!r} ({cv:g} kV)")
        elements: tuple[str, ...] = ()
        if r.get("elements"):
            from ringid.core.elements import parse_elements

            try:
                elements = parse_elements(r["elements"])
            except ValueError as exc:
                problems.add(f"{path}:{n}", f"elements {r['elements']!r}: {exc}")
        values = []
        for column, kind in extra.items():
            text = r.get(column, "")
            if text and kind == "number":
                try:
                    if not math.isfinite(float(text)):
                        raise ValueError
                except ValueError:
                    problems.add(f"{path}:{n}", f"{column} {text!r} is not a number")
            values.append((column, text))
        out[sid] = SampleRow(sid, image, cal, volt, r.get("note", ""), elements, tuple(values))
    if own:
        problems.raise_if_any("the sample sheet")
    return out


def series_columns(series) -> dict[str, str]:
    """The sample-sheet columns the config's series declare: ``{variable: "number", group_by: "text"}``."""
    out: dict[str, str] = {}
    for s in series or ():
        out[s["variable"]] = "number"
        if s.get("group_by"):
            out[s["group_by"]] = "text"
    return out


def read_sheets(samples_csv, calibrations_csv, phases_dir, extra_columns: dict[str, str] | None = None):
    """Read both sheets; raise one SheetError listing every problem of both (``extra_columns``:
    as for :func:`read_samples`)."""
    problems = Problems()
    cals = read_calibrations(calibrations_csv, phases_dir, problems)
    samples = read_samples(samples_csv, cals, problems, extra_columns)
    problems.raise_if_any("the sheets")
    return samples, cals
