"""The calibration record (``calibrations/{id}.json``, or the CAL.json of ``ringid calibrate``): one reader."""

from __future__ import annotations

import math
import os
from pathlib import Path

from ringid.core.errors import RingidError
from ringid.core.model import Geometry


def read_calibration_record(path: str | os.PathLike) -> tuple[Geometry, dict]:
    """Geometry and record of a calibration file; a failed calibration raises RingidError."""
    import json

    try:
        rec = json.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise RingidError(path, "calibration file not found") from None
    except (OSError, ValueError) as exc:
        raise RingidError(path, f"unreadable calibration file ({exc})") from None
    if rec.get("status", "ok") != "ok":
        raise RingidError(path, f"calibration failed: {rec.get('error', 'no reason recorded')}")

    def num(key, default=math.nan):
        v = rec.get(key)
        return default if v is None else float(v)

    k = num("camera_constant_A_px")
    if not k > 0:
        raise RingidError(path, "calibration gives no positive camera_constant_A_px")
    geom = Geometry(
        center_x_px=num("center_x_px"),
        center_y_px=num("center_y_px"),
        ellipticity=num("ellipticity", 0.0),
        ellipse_angle_deg=num("ellipse_angle_deg", 0.0),
        camera_constant_A_px=k,
        voltage_kv=num("voltage_kv"),
        center_sigma_px=num("center_sigma_px"),
    )
    return geom, rec
