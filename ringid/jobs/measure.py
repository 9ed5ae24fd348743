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
from pathlib import Path

import numpy as np

from ringid import __version__
from ringid.core.atomic import atomic_path, write_json
from ringid.core.errors import RingidError
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


def instrument_from_record(rec: dict):
    """The instrumental ring profile of a calibration, or None when it was not measured (η 0.5
    when the record predates its measurement)."""
    from ringid.sample.size import InstrumentProfile

    inst = rec.get("instrument_fwhm") or {}
    c0, c1, eta = inst.get("c0_per_nm"), inst.get("c1"), inst.get("eta", 0.5)
    if c0 is None or c1 is None or not math.isfinite(float(c0)):
        return None
    eta = float(eta) if eta is not None and math.isfinite(float(eta)) else 0.5
    return InstrumentProfile(float(c0), float(c1), min(max(eta, 0.0), 1.0))


def measure_sample(image: str | os.PathLike, calibration_path: str | os.PathLike, out_dir: str | os.PathLike, *,
                   sample: str, calibration_id: str = "", note: str = "", voltage_kv: float = math.nan,
                   max_pixels: int | None = None, saturation_level: float | None = None, user_mask=None,
                   min_ring_g_per_nm: float = DEFAULT_MIN_RING_G_PER_NM) -> dict:
    """Run the image half and the ring stage for one sample; write its folder; return the record.

    Rings are searched from ``min_ring_g_per_nm`` outwards (default 1 nm⁻¹, d ≤ 10 Å): inside it
    the direct beam's tail dominates a SAED profile. Lower it for phases with larger d-spacings.
    """
    from ringid.report.figures import make_thumbnail
    from ringid.profile.rings import analyze_profile, write_profile_csv, write_rings_csv

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    t_start = time.perf_counter()
    record = _base_record(sample, image, calibration_id, note)
    try:
        from ringid.calibration.record import read_calibration_record

        cal_geom, cal_rec = read_calibration_record(calibration_path)
        if (
            math.isfinite(voltage_kv)
            and math.isfinite(cal_geom.voltage_kv)
            and abs(voltage_kv - cal_geom.voltage_kv) > 1e-6
        ):
            raise RingidError(
                image, f"recorded at {voltage_kv:g} kV but its calibration is for {cal_geom.voltage_kv:g} kV"
            )
        from ringid.image.stage import process_image

        measured_distortion = cal_rec.get("kind", "standard") == "standard"
        res = process_image(image, cal_geom, fit_ellipse=not measured_distortion, max_pixels=max_pixels,
                            saturation_level=saturation_level, user_mask_path=user_mask)
        t0 = time.perf_counter()
        profile = trim_profile(res.profile, min_ring_g_per_nm)
        analysis = analyze_profile(profile, instrument=instrument_from_record(cal_rec))
        t_rings = time.perf_counter() - t0
        write_rings_csv(out / "measured_rings.csv", analysis)
        write_profile_csv(out / "profile.csv", profile, analysis)
        thumb, bin_px = make_thumbnail(res.data, res.mask.mask)
        with atomic_path(out / "thumbnail.npy", suffix=".npy") as tmp:
            np.save(tmp, thumb)
        g = res.geometry
        size = analysis.size
        sharp = [r for r in analysis.rings if r.kind == "ring"]
        characters = sorted({c.character for c in analysis.characters if c and c.character})
        record.update(
            {
                "geometry": {
                    "center_x_px": g.center_x_px,
                    "center_y_px": g.center_y_px,
                    "center_sigma_px": g.center_sigma_px,
                    "ellipticity": g.ellipticity,
                    "ellipse_angle_deg": g.ellipse_angle_deg,
                    "camera_constant_A_px": g.camera_constant_A_px,
                    "voltage_kv": g.voltage_kv,
                },
                "calibration_kind": cal_rec.get("kind", "standard"),
                "thumbnail_bin_px": bin_px,
                "crystallinity": analysis.crystallinity.label,
                "halo_area_fraction": analysis.crystallinity.halo_area_fraction,
                "n_rings": len(sharp),
                "n_halos": analysis.crystallinity.n_halos,
                "crystallite_size_nm": size.size_nm if math.isfinite(size.size_nm) else None,
                "crystallite_size_sigma_nm": size.size_sigma_nm if math.isfinite(size.size_sigma_nm) else None,
                "crystallite_size_lower_limit_nm": size.lower_limit_nm if math.isfinite(size.lower_limit_nm) else None,
                "crystallite_size_meaning": size.meaning,
                "ring_character": ";".join(characters),
                "g_range_per_nm": [float(np.nanmin(profile.g_per_nm)), float(np.nanmax(profile.g_per_nm))],
                "detection_threshold_sigma": analysis.threshold_sigma,
                "false_alarm_probability": analysis.false_alarm_probability,
                "chi2_reduced": analysis.chi2_reduced,
                "masked_fraction": res.mask.fraction_masked,
                "flags": sorted(set(res.flags) | set(analysis.flags)),
                "notes": list(res.notes),
                "warnings": list(res.warnings),
            }
        )
        record["timings_s"] = {**{k: round(v, 4) for k, v in res.timings_s.items()}, "rings": round(t_rings, 4)}
    except Exception as exc:  # noqa: BLE001 - a failure is a result, recorded with its reason
        _mark_failed(out, record, exc)
    record.setdefault("timings_s", {})
    record["timings_s"]["total"] = round(time.perf_counter() - t_start, 4)
    write_json(out / "sample.json", record)  # written last: its presence means the job finished
    return record


def _base_record(sample: str, image, calibration_id: str, note: str) -> dict:
    return {"sample": sample, "status": "ok", "error": "", "image": str(image), "calibration": calibration_id,
            "note": note, "ringid_version": __version__}


def _mark_failed(out: Path, record: dict, exc: BaseException) -> None:
    """Record ``exc`` as the sample's failure and write its empty tables and thumbnail."""
    record.update(status="failed", error=_error_text(exc), crystallinity="no_signal", n_rings=0, flags=[])
    for name in ("measured_rings.csv", "profile.csv"):
        _write_empty_table(out / name)
    with atomic_path(out / "thumbnail.npy", suffix=".npy") as tmp:
        np.save(tmp, np.zeros((0, 0), np.uint8))


def write_failed_sample(out_dir: str | os.PathLike, exc: BaseException, *, sample: str, image, calibration_id: str = "",
                        note: str = "", elapsed_s: float = 0.0) -> dict:
    """The sample folder of a sample whose image job broke outside ``measure_sample``'s own
    handling (e.g. while writing its record): the same failed record and empty files."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    record = _base_record(sample, image, calibration_id, note)
    _mark_failed(out, record, exc)
    record["timings_s"] = {"total": round(elapsed_s, 4)}
    write_json(out / "sample.json", record)
    return record


def _write_empty_table(path: Path) -> None:
    from ringid.core.atomic import write_csv
    from ringid.profile.rings import PROFILE_CSV_COLUMNS, RINGS_CSV_COLUMNS

    write_csv(path, RINGS_CSV_COLUMNS if "rings" in path.name else PROFILE_CSV_COLUMNS, [])


def make_calibration(row, out_path: str | os.PathLike, *, library_dir: str | os.PathLike | None = None) -> dict:
    """Write ``calibrations/{id}.json`` for one calibration sheet row; return the record."""
    from ringid.core.units import electron_wavelength_angstrom, nominal_camera_constant_a_px

    base = {"calibration": row.calibration, "kind": row.kind, "status": "ok", "error": "", "voltage_kv": row.voltage_kv}
    try:
        if row.kind == "standard":
            from ringid.calibration.calibrate import calibrate_image
            from ringid.library.store import read_phase_rings

            rings = read_phase_rings(library_dir, row.standard)
            cal = calibrate_image(
                row.image,
                rings.d_angstrom,
                voltage_kv=row.voltage_kv,
                standard_intensity=rings.intensity,
                standard_hkl=rings.hkl,
                standard=row.standard,
                standard_source=f"phase library {library_dir}",
            )
            record = {**base, **cal.to_record()}
        else:
            if row.kind == "constant":
                k, note = row.camera_constant_A_px, "known camera constant from the sheet"
            else:
                k = nominal_camera_constant_a_px(row.camera_length_mm, row.pixel_size_um, row.voltage_kv)
                note = f"nominal: L = {row.camera_length_mm:g} mm, pixel {row.pixel_size_um:g} µm (a few % uncertain)"
            record = {**base, "camera_constant_A_px": k, "camera_constant_sigma_A_px": None, "center_x_px": None,
                      "center_y_px": None, "ellipticity": 0.0, "ellipse_angle_deg": 0.0,
                      "wavelength_angstrom": electron_wavelength_angstrom(row.voltage_kv),
                      "camera_length_mm": None if row.kind == "constant" else row.camera_length_mm,
                      "pixel_size_um": None if row.kind == "constant" else row.pixel_size_um,
                      "rings": [], "instrument_fwhm": None, "notes": [note],
                      "flags": ["distortion_not_measured", "instrument_width_unknown"]}
    except Exception as exc:  # noqa: BLE001 - recorded; its samples fail with this reason
        record = {**base, "status": "failed", "error": _error_text(exc)}
    write_json(out_path, record)
    if record["status"] == "ok" and record.get("rings"):
        from ringid.report.figures import calibration_png

        try:
            calibration_png(Path(out_path).with_suffix(".png"), title=f"{row.calibration}: residuals",
                            residuals=record["rings"])
        except (OSError, ValueError):
            pass
    return record


def identify_sample(sample_dir: str | os.PathLike, library, *, window_standard: float = WINDOW_STANDARD,
                    window_nominal: float = WINDOW_NOMINAL,
                    false_identification_rate: float = FALSE_IDENTIFICATION_RATE, library_dir: str = "") -> dict:
    """Identification job of one measured sample: phases.csv, rings.csv, identification.json, overview.png.

    ``library`` is a list of PhaseRings or a LibraryIndex (index it once, with
    ``library_index(library, window_standard, window_nominal)``, when identifying many samples).
    A sample whose image job failed gets empty tables and a failed identification record
    carrying the same error.
    """
    import json

    from ringid.identify.score import IdentifySettings, LibraryIndex, identify
    from ringid.identify.files import read_observed_rings, write_results

    d = Path(sample_dir)
    rec = json.loads((d / "sample.json").read_text(encoding="utf-8"))
    if rec.get("status") != "ok":
        return _write_failed_identification(d, rec.get("sample", d.name), rec.get("error", ""))
    kind = rec.get("calibration_kind", "standard")
    settings = IdentifySettings(dilation_window=window_for(kind, window_standard, window_nominal),
                                false_identification_rate=false_identification_rate)
    if not isinstance(library, LibraryIndex):
        library = library_index(library, window_standard, window_nominal)
    obs, rows = read_observed_rings(d / "measured_rings.csv")
    g_range = tuple(rec["g_range_per_nm"]) if rec.get("g_range_per_nm") else None
    result = identify(obs, library, settings, g_range_per_nm=g_range)
    write_results(d, rows, obs, result, settings, provenance={"library": library_dir})
    _overview(d, rec, rows, result, library)
    return json.loads((d / "identification.json").read_text(encoding="utf-8"))


def library_index(library, window_standard: float = WINDOW_STANDARD, window_nominal: float = WINDOW_NOMINAL):
    """The LibraryIndex of a loaded library (with its decoys) for identifying samples at either window."""
    from ringid.identify.score import index_library

    return index_library(library, decoy_clearance=max(window_standard, window_nominal))


def identification_summary(out: dict) -> str:
    """One line of an identification record: the phases, the failure, or that none was found."""
    if out.get("phases"):
        return "; ".join(out["phases"])
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
                 thumbnail=None, bin_px=1, geometry={}, profile=None, rings=[], references=[])
    return out


def _overview(d: Path, rec: dict, rows, result, library) -> None:
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
            refs.append((phase, ph, refined.get("dilation", 1.0)))
        else:  # _PhaseArrays of a LibraryIndex: rebuild a minimal PhaseRings view
            from ringid.core.model import PhaseRings

            refs.append((phase, PhaseRings(phase, 10.0 / ph.g, ph.intensity, np.ones(len(ph.g), int), ph.hkl,
                                           np.zeros(len(ph.g), bool)), refined.get("dilation", 1.0)))
    try:
        thumb = np.load(d / "thumbnail.npy")
    except (OSError, ValueError):
        thumb = None
    ring_rows = []
    with open(d / "rings.csv", newline="", encoding="utf-8") as fh:
        ring_rows = list(csv.DictReader(fh))
    label = "; ".join(result.phases) or "no phase identified"
    overview_png(d / "overview.png", title=f"{rec['sample']}: {rec.get('crystallinity', '')} · {label}",
                 thumbnail=thumb, bin_px=int(rec.get("thumbnail_bin_px", 1)), geometry=rec.get("geometry", {}),
                 profile=profile, rings=ring_rows, references=refs)
