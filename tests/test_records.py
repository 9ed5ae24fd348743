"""The JSON records between jobs (ringid.core.records) and the one table-cell formatter."""

import json
import math

import pytest

from ringid.core.atomic import format_cell
from ringid.core.errors import RingidError
from ringid.core.model import Geometry, InstrumentProfile
from ringid.core.records import (
    CalibrationRecord,
    CalibrationRing,
    SampleRecord,
    read_calibration_record,
    read_sample_record,
    write_calibration_record,
    write_sample_record,
)


def _sample(**kw):
    return SampleRecord("s1", image="/data/s1.tif", calibration="c1", geometry=Geometry(511.5, 512.25, 0.01, 30.0,
                        1003.2, 200.0, 0.02), crystallinity="crystalline", n_rings=7, crystallite_size_nm=12.5,
                        g_range_per_nm=(1.0, 42.5), flags=("textured",), timings_s={"total": 0.5}, **kw)


def test_sample_record_round_trip(tmp_path):
    rec = _sample()
    write_sample_record(tmp_path / "sample.json", rec)
    back = read_sample_record(tmp_path / "sample.json")
    assert back == rec and back.timings_s == {"total": 0.5}
    text = json.loads((tmp_path / "sample.json").read_text(encoding="utf-8"))
    assert list(text)[:3] == ["sample", "status", "error"] and text["geometry"]["center_sigma_px"] == 0.02
    assert text["halo_area_fraction"] is None  # not measured: null, never NaN


def test_failed_sample_record_carries_only_who_and_why(tmp_path):
    rec = SampleRecord("s2", status="failed", error="s2.tif: empty file (0 bytes)")
    write_sample_record(tmp_path / "sample.json", rec)
    text = json.loads((tmp_path / "sample.json").read_text(encoding="utf-8"))
    assert set(text) == {"sample", "status", "error", "image", "calibration", "note", "ringid_version",
                         "crystallinity", "n_rings", "flags", "timings_s"}
    assert read_sample_record(tmp_path / "sample.json") == rec


@pytest.mark.parametrize("content, problem", [
    ("{not json", "unreadable sample record file"),
    ("[1, 2]", "does not hold a JSON object"),
    ('{"sample": "s", "status": "maybe"}', "not a sample record"),
    ('{"sample": "s", "status": "ok"}', "sample record lacks geometry, crystallinity, g_range_per_nm"),
])
def test_bad_sample_records_are_one_line_errors_naming_the_file(tmp_path, content, problem):
    path = tmp_path / "sample.json"
    path.write_text(content, encoding="utf-8")
    with pytest.raises(RingidError, match=problem) as info:
        read_sample_record(path)
    assert str(info.value).startswith(f"{path}: ") and "\n" not in str(info.value)


def test_calibration_record_round_trip_and_geometry(tmp_path):
    ring = CalibrationRing("1 1 1", 2.3548, 4.2466, 4.2470, 0.0004, 2.3546, 0.0094, 0.031)
    rec = CalibrationRecord("c1", voltage_kv=200.0, camera_constant_A_px=1003.2, camera_constant_sigma_A_px=0.1,
                            center_x_px=511.5, center_y_px=512.0, center_sigma_px=0.01, ellipticity=0.004,
                            ellipse_angle_deg=31.0, wavelength_angstrom=0.025079, standard="Au", rings=(ring,),
                            n_rings_assigned=1,
                            instrument=InstrumentProfile(0.03, 0.001, 0.4, 4.2, 12.0), flags=("x",), notes=("n",))
    write_calibration_record(tmp_path / "c1.json", rec)
    back = read_calibration_record(tmp_path / "c1.json")
    assert back == rec
    assert back.geometry == Geometry(511.5, 512.0, 0.004, 31.0, 1003.2, 200.0, 0.01)
    text = json.loads((tmp_path / "c1.json").read_text(encoding="utf-8"))
    assert text["instrument_fwhm"]["c0_per_nm"] == 0.03 and text["rings"][0]["hkl"] == "1 1 1"


def test_known_constant_record_has_no_centre_and_failed_record_is_refused(tmp_path):
    rec = CalibrationRecord("k", kind="constant", voltage_kv=200.0, camera_constant_A_px=1003.2)
    write_calibration_record(tmp_path / "k.json", rec)
    geom = read_calibration_record(tmp_path / "k.json").geometry
    assert math.isnan(geom.center_x_px) and geom.camera_constant_A_px == 1003.2
    assert read_calibration_record(tmp_path / "k.json").instrument is None
    failed = CalibrationRecord("f", status="failed", error="no rings found", voltage_kv=200.0)
    write_calibration_record(tmp_path / "f.json", failed)
    assert set(json.loads((tmp_path / "f.json").read_text(encoding="utf-8"))) == {
        "calibration", "kind", "status", "error", "voltage_kv"}
    with pytest.raises(RingidError, match="calibration failed: no rings found"):
        read_calibration_record(tmp_path / "f.json")
    assert read_calibration_record(tmp_path / "f.json", require_ok=False) == failed


@pytest.mark.parametrize("value, spec, text", [
    (None, ".6g", ""), (math.nan, ".6g", ""), (math.inf, ".3g", "inf"), (-math.inf, ".3g", "-inf"),
    (True, ".6g", "true"), (12, ".3g", "12"), (1234567, ".3g", "1234567"), (0.123456789, ".4g", "0.1235"),
    (2.5, ".3f", "2.500"), ("1 1 1", ".6g", "1 1 1"),
])
def test_format_cell(value, spec, text):
    assert format_cell(value, spec) == text
