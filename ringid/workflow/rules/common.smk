# Reads and checks the sheets once, before any job starts (every problem at once), and
# holds the input functions. Nothing else here touches the data.

import os
import sys
from pathlib import Path

from ringid.jobs.sheets import SheetError, read_sheets, series_columns

RESULTS = config["results_dir"].rstrip("/")
LIB = f"{RESULTS}/library"
PHASES_DIR = config["phases_dir"]

if not Path(PHASES_DIR).is_dir():
    sys.exit(f"ringid: error: {PHASES_DIR}: phases_dir is not a folder")
if not Path(config["samples"]).exists() and config["samples"] == "demo/samples.csv":
    sys.exit("ringid: error: demo/samples.csv: the demo data are not there yet; run `ringid demo` first")
try:
    SAMPLES, CALIBRATIONS = read_sheets(config["samples"], config["calibrations"], PHASES_DIR,
                                        series_columns(config["series"]))
except SheetError as exc:
    sys.exit("\n".join(f"ringid: error: {line}" for line in exc.lines))

PHASES = sorted(p.stem for p in Path(PHASES_DIR).glob("*.cif"))
if not PHASES:
    sys.exit(f"ringid: error: {PHASES_DIR}: no *.cif files")


wildcard_constraints:
    sample=r"[A-Za-z0-9][A-Za-z0-9._-]*",
    calibration=r"[A-Za-z0-9][A-Za-z0-9._-]*",
    phase=r"[^/]+",


def calibration_inputs(wildcards):
    row = CALIBRATIONS[wildcards.calibration]
    if row.kind == "standard":
        return {"image": row.image, "rings": f"{LIB}/rings/{row.standard}.csv"}
    return {}


def mem(kind):
    """Memory (MB) declared per job of kind image or cheap (config section resources)."""
    return config["resources"][f"{kind}_mem_mb"]


def runtime(kind):
    """Run time (min) declared per job of kind image or cheap (config section resources)."""
    return config["resources"][f"{kind}_runtime_min"]


def image_options(ring_search=True):
    """The image-job options from the config's image section, shell-quoted (the same for every sample;
    without the ring search's g range, the options of a standard film's calibration)."""
    import shlex

    opts = config["image"]
    out = [f"--min-ring-g-per-nm {float(opts['min_ring_g_per_nm'])}"] if ring_search else []
    if opts["saturation_level"] is not None:
        out.append(f"--saturation-level {float(opts['saturation_level'])}")
    if opts["frame"] is not None:
        out.append(f"--frame {int(opts['frame'])}")
    if opts["negative_floor"] is not None:
        out.append(f"--negative-floor {float(opts['negative_floor'])}")
    if opts["user_mask"]:
        out.append(f"--mask {shlex.quote(str(opts['user_mask']))}")
    return " ".join(out)
