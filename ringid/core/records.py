"""The two JSON records that travel between workflow jobs, as types with one writer and one reader each.

``CalibrationRecord`` is ``calibrations/{id}.json`` (and the file ``ringid calibrate`` writes);
``SampleRecord`` is ``samples/{id}/sample.json``. Each has ``to_json`` (the key order of the file)
and ``from_json`` (with the checks), and the module has ``write_*`` / ``read_*`` for files. A
failed record carries only who it is and why it failed. Units are in the field names
(docs/design.md, "File contracts").
"""

from __future__ import annotations

import json
import math
import os
from dataclasses import dataclass, field, fields
from pathlib import Path

from ringid.core.errors import RingidError
from ringid.core.model import Geometry, InstrumentProfile

INSTRUMENT_MODEL = ("fwhm_per_nm = c0_per_nm + c1 * g_per_nm (pseudo-Voigt FWHM of the standard's rings); "
                    "eta: their median pseudo-Voigt mixing")
STATUSES = ("ok", "failed")


def _read_object(path: str | os.PathLike, what: str) -> dict:
    try:
        obj = json.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise RingidError(path, f"{what} file not found") from None
    except (OSError, ValueError) as exc:
        raise RingidError(path, f"unreadable {what} file ({exc})") from None
    if not isinstance(obj, dict):
        raise RingidError(path, f"{what} file does not hold a JSON object")
    return obj


def _float(obj: dict, key: str, default: float = math.nan, path=None) -> float:
    v = obj.get(key)
    if v is None:
        return default
    try:
        return float(v)
    except (TypeError, ValueError):
        raise RingidError(path, f"{key} is not a number: {v!r}") from None


def _optional(v):
    return None if v is None else float(v)


# ------------------------------------------------------------------------------------------ calibration


@dataclass(frozen=True)
class CalibrationRing:
    """One standard ring used by a calibration: calculated and observed positions, residual (%), FWHM (1/nm)."""

    hkl: str
    d_calc_angstrom: float
    g_calc_per_nm: float
    g_obs_per_nm: float
    g_sigma_per_nm: float
    d_obs_angstrom: float
    residual_percent: float
    fwhm_per_nm: float


@dataclass(frozen=True)
class CalibrationRecord:
    """A calibration: camera constant K (Å·px), centre (px), ellipse ε and angle (°), third-order radial
    distortion k₃ (1/px², :mod:`ringid.image.radial`), voltage (kV), the standard's rings with residuals
    and the instrumental ring width; or a failure and its reason.

    ``kind`` is ``standard`` (fitted on a film of a known phase), ``constant`` (a known K) or
    ``nominal`` (from a nominal camera length and pixel size). Quantities a kind does not measure are None.
    k₃ is 0 when it was not significant (its σ is recorded all the same) or not measured (σ None); a
    record written before k₃ was fitted reads as k₃ = 0, σ None.
    """

    calibration: str = ""
    kind: str = "standard"
    status: str = "ok"
    error: str = ""
    voltage_kv: float = math.nan
    camera_constant_A_px: float = math.nan
    camera_constant_sigma_A_px: float | None = None
    center_x_px: float | None = None
    center_y_px: float | None = None
    center_sigma_px: float | None = None
    ellipticity: float = 0.0
    ellipticity_sigma: float | None = None
    ellipse_angle_deg: float = 0.0
    ellipse_angle_sigma_deg: float | None = None
    radial_distortion_k3_per_px2: float = 0.0
    radial_distortion_k3_sigma_per_px2: float | None = None
    wavelength_angstrom: float = math.nan
    standard: str = ""
    standard_source: str = ""
    image: str = ""
    nominal_camera_constant_A_px: float | None = None
    camera_length_mm: float | None = None
    pixel_size_um: float | None = None
    n_rings_assigned: int = 0
    rms_residual_percent: float | None = None
    rings: tuple[CalibrationRing, ...] = ()
    instrument: InstrumentProfile | None = None
    unassigned_rings_g_per_nm: tuple[float, ...] = ()
    flags: tuple[str, ...] = ()
    notes: tuple[str, ...] = ()

    _FAILED_KEYS = ("calibration", "kind", "status", "error", "voltage_kv")

    @property
    def geometry(self) -> Geometry:
        """The pattern geometry this calibration gives (NaN where it does not measure the centre)."""
        nan = math.nan
        return Geometry(
            center_x_px=nan if self.center_x_px is None else self.center_x_px,
            center_y_px=nan if self.center_y_px is None else self.center_y_px,
            ellipticity=self.ellipticity,
            ellipse_angle_deg=self.ellipse_angle_deg,
            camera_constant_A_px=self.camera_constant_A_px,
            voltage_kv=self.voltage_kv,
            center_sigma_px=nan if self.center_sigma_px is None else self.center_sigma_px,
            radial_distortion_k3_per_px2=self.radial_distortion_k3_per_px2,
        )

    def to_json(self) -> dict:
        """The file's content: every key of a successful calibration, or who failed and why."""
        if self.status != "ok":
            return {k: getattr(self, k) for k in self._FAILED_KEYS}
        out = {}
        for f in fields(self):
            v = getattr(self, f.name)
            if f.name == "rings":
                out["rings"] = [vars(r).copy() for r in v]
            elif f.name == "instrument":
                out["instrument_fwhm"] = None if v is None else {
                    "model": INSTRUMENT_MODEL, "c0_per_nm": v.fwhm_c0_per_nm, "c1": v.fwhm_c1, "eta": v.eta,
                    "g_min_per_nm": v.g_min_per_nm, "g_max_per_nm": v.g_max_per_nm}
            elif isinstance(v, tuple):
                out[f.name] = list(v)
            else:
                out[f.name] = v
        return out

    @classmethod
    def from_json(cls, obj: dict, path: str | os.PathLike | None = None) -> CalibrationRecord:
        """The record of a file's content; a malformed one raises RingidError naming ``path``."""
        status = obj.get("status", "ok")
        if status not in STATUSES:
            raise RingidError(path, f"calibration status must be one of {', '.join(STATUSES)}, got {status!r}")
        base = dict(calibration=str(obj.get("calibration", "")), kind=str(obj.get("kind", "standard")),
                    status=status, error=str(obj.get("error", "")), voltage_kv=_float(obj, "voltage_kv", path=path))
        if status != "ok":
            return cls(**base)
        try:
            rings = tuple(CalibrationRing(**{f.name: r[f.name] for f in fields(CalibrationRing)})
                          for r in obj.get("rings") or ())
        except (KeyError, TypeError):
            raise RingidError(path, "a calibration ring lacks one of its fields") from None
        optional = {k: _optional(obj.get(k)) for k in (
            "camera_constant_sigma_A_px", "center_x_px", "center_y_px", "center_sigma_px", "ellipticity_sigma",
            "ellipse_angle_sigma_deg", "radial_distortion_k3_sigma_per_px2", "nominal_camera_constant_A_px",
            "camera_length_mm", "pixel_size_um", "rms_residual_percent")}
        return cls(
            **base, **optional,
            camera_constant_A_px=_float(obj, "camera_constant_A_px", path=path),
            ellipticity=_float(obj, "ellipticity", 0.0, path),
            ellipse_angle_deg=_float(obj, "ellipse_angle_deg", 0.0, path),
            radial_distortion_k3_per_px2=_float(obj, "radial_distortion_k3_per_px2", 0.0, path),
            wavelength_angstrom=_float(obj, "wavelength_angstrom", path=path),
            standard=str(obj.get("standard", "")), standard_source=str(obj.get("standard_source", "")),
            image=str(obj.get("image", "")), n_rings_assigned=int(obj.get("n_rings_assigned", len(rings)) or 0),
            rings=rings, instrument=_instrument(obj.get("instrument_fwhm")),
            unassigned_rings_g_per_nm=tuple(float(g) for g in obj.get("unassigned_rings_g_per_nm") or ()),
            flags=tuple(obj.get("flags") or ()), notes=tuple(obj.get("notes") or ()),
        )


def _instrument(obj) -> InstrumentProfile | None:
    """The instrumental ring profile of a record's ``instrument_fwhm``, or None when it was not measured
    (η 0.5 when the record predates its measurement)."""
    obj = obj or {}
    c0, c1, eta = obj.get("c0_per_nm"), obj.get("c1"), obj.get("eta", 0.5)
    if c0 is None or c1 is None or not math.isfinite(float(c0)):
        return None
    eta = float(eta) if eta is not None and math.isfinite(float(eta)) else 0.5
    g_min, g_max = obj.get("g_min_per_nm"), obj.get("g_max_per_nm")
    return InstrumentProfile(float(c0), float(c1), min(max(eta, 0.0), 1.0),
                             math.nan if g_min is None else float(g_min), math.nan if g_max is None else float(g_max))


def write_calibration_record(path: str | os.PathLike, record: CalibrationRecord) -> None:
    """Write a calibration record atomically."""
    from ringid.core.atomic import write_json

    write_json(path, record.to_json())


def read_calibration_record(path: str | os.PathLike, *, require_ok: bool = True) -> CalibrationRecord:
    """The calibration record of a file. With ``require_ok`` (what a sample needs), a failed
    calibration or one without a positive camera constant raises RingidError naming the file."""
    rec = CalibrationRecord.from_json(_read_object(path, "calibration"), path)
    if require_ok:
        if rec.status != "ok":
            raise RingidError(path, f"calibration failed: {rec.error or 'no reason recorded'}")
        if not rec.camera_constant_A_px > 0:
            raise RingidError(path, "calibration gives no positive camera_constant_A_px")
    return rec


# ------------------------------------------------------------------------------------------ sample


@dataclass(frozen=True)
class SampleRecord:
    """What the image job measured on one sample (``sample.json``), or why it failed.

    geometry: centre (px), ε, angle (°), K (Å·px), kV of this pattern; sizes in nm (None when not
    measured; a lower limit when the rings are not broader than the instrument); g_range_per_nm the
    profile's g range (1/nm) searched for rings; timings_s the only non-deterministic field;
    elements the sample sheet's element symbols (the last key, added after the others).
    """

    sample: str
    status: str = "ok"
    error: str = ""
    image: str = ""
    calibration: str = ""
    note: str = ""
    ringid_version: str = ""
    geometry: Geometry | None = None
    calibration_kind: str = "standard"
    thumbnail_bin_px: int = 1
    crystallinity: str = ""
    halo_area_fraction: float | None = None
    n_rings: int = 0
    n_halos: int = 0
    crystallite_size_nm: float | None = None
    crystallite_size_sigma_nm: float | None = None
    crystallite_size_lower_limit_nm: float | None = None
    crystallite_size_meaning: str = ""
    ring_character: str = ""
    g_range_per_nm: tuple[float, float] | None = None
    detection_threshold_sigma: float | None = None
    false_alarm_probability: float | None = None
    chi2_reduced: float | None = None
    masked_fraction: float | None = None
    flags: tuple[str, ...] = ()
    notes: tuple[str, ...] = ()
    warnings: tuple[str, ...] = ()
    timings_s: dict = field(default_factory=dict, compare=False)
    elements: tuple[str, ...] = ()  # the sheet's element symbols: only phases made of them are candidates

    _IDENTITY_KEYS = ("sample", "status", "error", "image", "calibration", "note", "ringid_version")
    _FAILED_KEYS = _IDENTITY_KEYS + ("crystallinity", "n_rings", "flags", "timings_s")
    _GEOMETRY_KEYS = ("center_x_px", "center_y_px", "center_sigma_px", "ellipticity", "ellipse_angle_deg",
                      "camera_constant_A_px", "voltage_kv")

    def to_json(self) -> dict:
        """The file's content (a failed sample: who it is, why it failed, and its timing)."""
        keys = self._FAILED_KEYS if self.status != "ok" else [f.name for f in fields(self)]
        out = {}
        for k in keys:
            v = getattr(self, k)
            if k == "geometry":
                v = None if v is None else {g: getattr(v, g) for g in self._GEOMETRY_KEYS}
            elif isinstance(v, tuple):
                v = list(v)
            out[k] = v
        return out

    @classmethod
    def from_json(cls, obj: dict, path: str | os.PathLike | None = None) -> SampleRecord:
        """The record of a file's content; a malformed one raises RingidError naming ``path``."""
        status = obj.get("status")
        if status not in STATUSES or not isinstance(obj.get("sample"), str):
            raise RingidError(path, "not a sample record (no sample id, or status not ok/failed)")
        known = {f.name for f in fields(cls)}
        kw = {k: v for k, v in obj.items() if k in known}
        for k in ("flags", "notes", "warnings", "elements"):
            kw[k] = tuple(kw.get(k) or ())
        if not all(isinstance(e, str) for e in kw["elements"]):
            raise RingidError(path, "elements of a sample record must be element symbols (strings)")
        if kw.get("geometry") is not None:
            geo = kw["geometry"]
            kw["geometry"] = Geometry(**{g: _float(geo, g, path=path) for g in cls._GEOMETRY_KEYS})
        if kw.get("g_range_per_nm") is not None:
            kw["g_range_per_nm"] = tuple(float(g) for g in kw["g_range_per_nm"])
        if status == "ok":
            missing = [k for k in ("geometry", "crystallinity", "g_range_per_nm") if kw.get(k) is None]
            if missing:
                raise RingidError(path, f"sample record lacks {', '.join(missing)}")
        return cls(**kw)


def write_sample_record(path: str | os.PathLike, record: SampleRecord) -> None:
    """Write a sample record atomically (written last by the image job: its presence means the job finished)."""
    from ringid.core.atomic import write_json

    write_json(path, record.to_json())


def read_sample_record(path: str | os.PathLike) -> SampleRecord:
    """The sample record of a file; missing, unreadable or malformed raises RingidError naming the file."""
    return SampleRecord.from_json(_read_object(path, "sample record"), path)
