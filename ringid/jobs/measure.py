"""The per-sample image job and the per-calibration job, as the workflow runs them.

``measure_sample``: image -> mask -> centre (at the calibration's ellipse) -> pyFAI profile ->
rings, crystallinity, size, ring character; writes the sample folder. ``make_calibration``:
one row of the calibration sheet -> ``calibrations/{id}.json`` (fitted from a standard film,
or a known or nominal camera constant). Both turn any failure into a record with
``status: failed`` and a one-line error, so one bad input never stops the others.

Files of a sample folder written here: ``measured_rings.csv`` (rings before identification),
``profile.csv``, ``thumbnail.npy`` (log-scaled, for the overview figure) and ``sample.json``.
Timings live under the ``timings_s`` key only (everything else is deterministic).
"""

from __future__ import annotations

import math
import os
import time
import traceback
from dataclasses import replace
from pathlib import Path

import numpy as np

from ringid import __version__
from ringid.core.atomic import atomic_path, write_json
from ringid.core.errors import RingidError
from ringid.core.records import (
    CalibrationRecord,
    SampleRecord,
    read_calibration_record,
    read_sample_record,
    write_calibration_record,
    write_sample_record,
)
from ringid.identify.windows import FALSE_IDENTIFICATION_RATE, WINDOW_NOMINAL, WINDOW_STANDARD, window_for

DEFAULT_MIN_RING_G_PER_NM = 1.0

SAMPLE_FILES = ("measured_rings.csv", "profile.csv", "thumbnail.npy", "sample.json")


def _error_text(exc: BaseException) -> str:
    if isinstance(exc, RingidError):
        return exc.problem if exc.path is None else str(exc)
    last = traceback.extract_tb(exc.__traceback__)[-1] if exc.__traceback__ else None
    where = f" at {Path(last.filename).name}:{last.lineno}" if last else ""
    return " ".join(f"internal error ({type(exc).__name__}: {exc}){where}".split())


def trim_profile(profile, min_g_per_nm: float):
    """The profile (and cake) from ``min_g_per_nm`` outwards."""
    from dataclasses import replace

    keep = profile.g_per_nm >= min_g_per_nm
    if keep.all():
        return profile
    if keep.sum() < 16:
        raise RingidError(None, f"the profile has almost no bins beyond g = {min_g_per_nm} 1/nm")
    cake = None if profile.cake is None else profile.cake[:, keep]
    return replace(profile, g_per_nm=profile.g_per_nm[keep], intensity=profile.intensity[keep],
                   sigma=profile.sigma[keep], cake=cake)


def measure_sample(image: str | os.PathLike, calibration_path: str | os.PathLike, out_dir: str | os.PathLike, *,
                   sample: str, calibration_id: str = "", note: str = "", voltage_kv: float = math.nan,
                   max_pixels: int | None = None, saturation_level: float | None = None, user_mask=None,
                   frame: int | None = None, negative_floor: float | None = None,
                   min_ring_g_per_nm: float = DEFAULT_MIN_RING_G_PER_NM, elements=()) -> dict:
    """Run the image half and the ring stage for one sample; write its folder; return the record.

    Rings are searched from ``min_ring_g_per_nm`` outwards (default 1 nm⁻¹, d ≤ 10 Å): inside it
    the direct beam's tail dominates a SAED profile. Lower it for phases with larger d-spacings.
    ``frame`` (None: sum a stack) and ``negative_floor`` (None: keep negative values) are those of
    :func:`ringid.image.stage.load_and_mask`. ``elements``: the sample's element symbols (from
    the sheet), recorded for the identification job.
    """

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    t_start = time.perf_counter()
    identity = dict(sample=sample, image=str(image), calibration=calibration_id, note=note,
                    ringid_version=__version__)
    try:
        record = _measure(image, calibration_path, out, identity, voltage_kv=voltage_kv, max_pixels=max_pixels,
                          saturation_level=saturation_level, user_mask=user_mask, frame=frame,
                          negative_floor=negative_floor, min_ring_g_per_nm=min_ring_g_per_nm)
    except Exception as exc:  # noqa: BLE001 - a failure is a result, recorded with its reason
        record = _mark_failed(out, identity, exc)
    record = replace(record, timings_s={**record.timings_s, "total": round(time.perf_counter() - t_start, 4)},
                     elements=tuple(elements))
    write_sample_record(out / "sample.json", record)  # written last: its presence means the job finished
    return record


def _measure(image, calibration_path, out: Path, identity: dict, *, voltage_kv: float, max_pixels, saturation_level,
             user_mask, min_ring_g_per_nm: float, frame: int | None = None,
             negative_floor: float | None = None) -> SampleRecord:
    """The image work of :func:`measure_sample`: writes the tables and thumbnail, returns the record."""
    from ringid.image.stage import process_image
    from ringid.profile.rings import analyze_profile, write_profile_csv, write_rings_csv
    from ringid.report.figures import make_thumbnail

    cal = read_calibration_record(calibration_path)
    cal_geom = cal.geometry
    kv = cal_geom.voltage_kv
    if math.isfinite(voltage_kv) and math.isfinite(kv) and abs(voltage_kv - kv) > 1e-6:
        raise RingidError(image, f"recorded at {voltage_kv:g} kV but its calibration is for {cal_geom.voltage_kv:g} kV")
    measured_distortion = cal.kind == "standard"
    res = process_image(image, cal_geom, fit_ellipse=not measured_distortion, max_pixels=max_pixels,
                        saturation_level=saturation_level, user_mask_path=user_mask, frame=frame,
                        negative_floor=negative_floor)
    t0 = time.perf_counter()
    profile = trim_profile(res.profile, min_ring_g_per_nm)
    analysis = analyze_profile(profile, instrument=cal.instrument)
    t_rings = time.perf_counter() - t0
    write_rings_csv(out / "measured_rings.csv", analysis)
    write_profile_csv(out / "profile.csv", profile, analysis)
    thumb, bin_px = make_thumbnail(res.data, res.mask.mask)
    with atomic_path(out / "thumbnail.npy", suffix=".npy") as tmp:
        np.save(tmp, thumb)
    size = analysis.size
    characters = sorted({c.character for c in analysis.characters if c and c.character})

    def finite(x):
        return x if math.isfinite(x) else None

    return SampleRecord(
        **identity,
        geometry=res.geometry,
        calibration_kind=cal.kind,
        thumbnail_bin_px=bin_px,
        crystallinity=analysis.crystallinity.label,
        halo_area_fraction=analysis.crystallinity.halo_area_fraction,
        n_rings=sum(r.kind == "ring" for r in analysis.rings),
        n_halos=analysis.crystallinity.n_halos,
        crystallite_size_nm=finite(size.size_nm),
        crystallite_size_sigma_nm=finite(size.size_sigma_nm),
        crystallite_size_lower_limit_nm=finite(size.lower_limit_nm),
        crystallite_size_meaning=size.meaning,
        ring_character=";".join(characters),
        g_range_per_nm=(float(np.nanmin(profile.g_per_nm)), float(np.nanmax(profile.g_per_nm))),
        detection_threshold_sigma=analysis.threshold_sigma,
        false_alarm_probability=analysis.false_alarm_probability,
        chi2_reduced=analysis.chi2_reduced,
        masked_fraction=res.mask.fraction_masked,
        flags=tuple(sorted(set(res.flags) | set(analysis.flags))),
        notes=tuple(res.notes),
        warnings=tuple(res.warnings),
        timings_s={**{k: round(v, 4) for k, v in res.timings_s.items()}, "rings": round(t_rings, 4)},
    )


def _mark_failed(out: Path, identity: dict, exc: BaseException) -> SampleRecord:
    """Write the empty tables and thumbnail of a failed sample; return its failed record."""
    for name in ("measured_rings.csv", "profile.csv"):
        _write_empty_table(out / name)
    with atomic_path(out / "thumbnail.npy", suffix=".npy") as tmp:
        np.save(tmp, np.zeros((0, 0), np.uint8))
    return SampleRecord(**identity, status="failed", error=_error_text(exc))


def write_failed_sample(out_dir: str | os.PathLike, exc: BaseException, *, sample: str, image, calibration_id: str = "",
                        note: str = "", elapsed_s: float = 0.0) -> SampleRecord:
    """The sample folder of a sample whose image job broke outside ``measure_sample``'s own
    handling (e.g. while writing its record): the same failed record and empty files."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    identity = dict(sample=sample, image=str(image), calibration=calibration_id, note=note,
                    ringid_version=__version__)
    record = replace(_mark_failed(out, identity, exc), timings_s={"total": round(elapsed_s, 4)})
    write_sample_record(out / "sample.json", record)
    return record


def _write_empty_table(path: Path) -> None:
    from ringid.core.atomic import write_csv
    from ringid.profile.rings import PROFILE_CSV_COLUMNS, RINGS_CSV_COLUMNS

    write_csv(path, RINGS_CSV_COLUMNS if "rings" in path.name else PROFILE_CSV_COLUMNS, [])


def make_calibration(row, out_path: str | os.PathLike, *, library_dir: str | os.PathLike | None = None,
                     image_options: dict | None = None) -> CalibrationRecord:
    """Write ``calibrations/{id}.json`` for one calibration sheet row; return the record.

    ``image_options``: ``saturation_level``, ``frame``, ``negative_floor``, ``user_mask_path`` for
    a standard film's image (the same as for the samples).
    """
    profile = None
    try:
        record, profile = _calibrate_row(row, library_dir, image_options or {})
    except Exception as exc:  # noqa: BLE001 - recorded; its samples fail with this reason
        record = CalibrationRecord(calibration=row.calibration, kind=row.kind, status="failed",
                                   error=_error_text(exc), voltage_kv=row.voltage_kv)
    write_calibration_record(out_path, record)
    if record.status == "ok" and record.rings:
        from ringid.report.figures import calibration_png

        try:
            calibration_png(Path(out_path).with_suffix(".png"), title=f"{row.calibration}: residuals",
                            residuals=record.rings, profile=profile)
        except (OSError, ValueError):
            pass
    return record


def _calibrate_row(row, library_dir, image_options: dict):
    """The calibration of one sheet row: fitted on a standard film, or a known or nominal camera
    constant; ``(CalibrationRecord, the standard's profile at the fitted geometry or None)``."""
    from ringid.core.units import electron_wavelength_angstrom, nominal_camera_constant_a_px

    if row.kind == "standard":
        from ringid.calibration.calibrate import calibrate_image
        from ringid.library.store import read_phase_rings

        rings = read_phase_rings(library_dir, row.standard)
        cal = calibrate_image(row.image, rings.d_angstrom, voltage_kv=row.voltage_kv,
                              standard_intensity=rings.intensity, standard_hkl=rings.hkl, standard=row.standard,
                              standard_source=f"phase library {library_dir}", **image_options)
        return cal.record(calibration=row.calibration), cal.profile
    if row.kind == "constant":
        k, note = row.camera_constant_A_px, "known camera constant from the sheet"
        length, pixel = None, None
    else:
        k = nominal_camera_constant_a_px(row.camera_length_mm, row.pixel_size_um, row.voltage_kv)
        note = f"nominal: L = {row.camera_length_mm:g} mm, pixel {row.pixel_size_um:g} µm (a few % uncertain)"
        length, pixel = row.camera_length_mm, row.pixel_size_um
    return CalibrationRecord(calibration=row.calibration, kind=row.kind, voltage_kv=row.voltage_kv,
                             camera_constant_A_px=k, wavelength_angstrom=electron_wavelength_angstrom(row.voltage_kv),
                             camera_length_mm=length, pixel_size_um=pixel, notes=(note,),
                             flags=("distortion_not_measured", "instrument_width_unknown")), None


def identify_sample(sample_dir: str | os.PathLike, library, *, window_standard: float = WINDOW_STANDARD,
                    window_nominal: float = WINDOW_NOMINAL,
                    false_identification_rate: float = FALSE_IDENTIFICATION_RATE, library_dir: str = "",
                    unavailable: list[tuple[str, str]] | None = None) -> dict:
    """Identification job of one measured sample: phases.csv, rings.csv, identification.json, overview.png.

    ``library`` is a list of PhaseRings or a LibraryIndex (index it once, with
    ``library_index(library, window_standard, window_nominal)``, when identifying many samples).
    A sample whose image job failed gets empty tables and a failed identification record
    carrying the same error. ``unavailable``: the phases of the library that failed to build
    (read from ``library_dir``'s index when None).
    """
    import json

    from ringid.identify.files import read_observed_rings, write_results
    from ringid.identify.score import IdentifySettings, LibraryIndex, identify

    d = Path(sample_dir)
    rec = read_sample_record(d / "sample.json")
    if rec.status != "ok":
        return _write_failed_identification(d, rec.sample, rec.error)
    settings = IdentifySettings(dilation_window=window_for(rec.calibration_kind, window_standard, window_nominal),
                                false_identification_rate=false_identification_rate)
    if not isinstance(library, LibraryIndex):
        library = library_index(library, window_standard, window_nominal)
    obs, rows = read_observed_rings(d / "measured_rings.csv")
    result = identify(obs, library, settings, g_range_per_nm=rec.g_range_per_nm, elements=rec.elements)
    if unavailable is None:
        from ringid.library.store import unavailable_phases

        unavailable = unavailable_phases(library_dir) if library_dir else []
    write_results(d, rows, obs, result, settings, provenance={"library": library_dir}, unavailable=unavailable)
    _overview(d, rec, rows, result, library)
    return json.loads((d / "identification.json").read_text(encoding="utf-8"))


def library_index(library, window_standard: float = WINDOW_STANDARD, window_nominal: float = WINDOW_NOMINAL):
    """The LibraryIndex of a loaded library (with its decoys) for identifying samples at either window."""
    from ringid.identify.score import index_library

    return index_library(library, decoy_clearance=max(window_standard, window_nominal))


def identification_summary(out: dict) -> str:
    """One line of an identification record: the phases, the failure, or that none was found."""
    if out.get("phases"):
        return "; ".join(f"{p} ({c:.2f})" if isinstance(c, (int, float)) else p
                         for p, c in zip(out["phases"], out.get("confidence") or [None] * len(out["phases"])))
    return "failed: " + out.get("error", "") if out.get("status") == "failed" else "no phase identified"


def write_failed_identification(sample_dir: str | os.PathLike, exc: BaseException) -> dict:
    """The identification files of a sample whose identification broke (``exc``): empty tables
    and a failed record with its one-line error, as for a sample whose image job failed."""
    d = Path(sample_dir)
    return _write_failed_identification(d, d.name, _error_text(exc))


def _write_failed_identification(d: Path, sample: str, error: str) -> dict:
    from ringid.core.atomic import write_csv
    from ringid.report.figures import overview_png
    from ringid.identify.files import PHASES_COLUMNS
    from ringid.profile.rings import RINGS_CSV_COLUMNS

    write_csv(d / "phases.csv", PHASES_COLUMNS, [])
    write_csv(d / "rings.csv", RINGS_CSV_COLUMNS + ["double_diffraction", "d_calc_angstrom"], [])
    out = {"status": "failed", "error": error, "phases": [], "confidence": [], "alternatives": [],
           "unexplained_rings": 0, "flags": []}
    write_json(d / "identification.json", out)
    overview_png(d / "overview.png", title=f"{sample}: failed: {error}"[:150],
                 thumbnail=None, bin_px=1, geometry=None, profile=None, rings=[], references=[])
    return out


def _overview(d: Path, rec: SampleRecord, rows, result, library) -> None:
    import csv

    from ringid.report.figures import overview_png
    from ringid.identify.score import LibraryIndex

    phases = library.phases if isinstance(library, LibraryIndex) else library
    by_name = {}
    for p in phases:
        by_name[p.phase] = p
    profile = {}
    with open(d / "profile.csv", newline="", encoding="utf-8") as fh:
        table = list(csv.DictReader(fh))
    for col in ("g_per_nm", "intensity", "background", "model"):
        profile[col] = np.array([float(r[col]) if r[col] else np.nan for r in table])
    refs = []
    for phase, refined in zip(result.phases, result.refined):
        ph = by_name.get(phase)
        if ph is None:
            continue
        if hasattr(ph, "d_angstrom"):
            refs.append((phase, ph, refined.dilation))
        else:  # _PhaseArrays of a LibraryIndex: rebuild a minimal PhaseRings view
            from ringid.core.model import PhaseRings

            refs.append((phase, PhaseRings(phase, 10.0 / ph.g, ph.intensity, np.ones(len(ph.g), int), ph.hkl,
                                           np.zeros(len(ph.g), bool)), refined.dilation))
    try:
        thumb = np.load(d / "thumbnail.npy")
    except (OSError, ValueError):
        thumb = None
    ring_rows = []
    with open(d / "rings.csv", newline="", encoding="utf-8") as fh:
        ring_rows = list(csv.DictReader(fh))
    label = "; ".join(result.phases) or "no phase identified"
    overview_png(d / "overview.png", title=f"{rec.sample}: {rec.crystallinity} · {label}",
                 thumbnail=thumb, bin_px=rec.thumbnail_bin_px, geometry=rec.geometry,
                 profile=profile, rings=ring_rows, references=refs)
