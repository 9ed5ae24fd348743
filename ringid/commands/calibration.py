"""``ringid calibration``: the workflow's calibration job for one row of the calibration sheet.

Fits a standard film (``ringid calibrate`` does the same for one image by hand) or records a
known or nominal camera constant. A calibration that fails is recorded with status failed and
its reason (exit 0), and its samples fail with that reason.
"""

from __future__ import annotations


def add_parser(subparsers, name: str, help_text: str) -> None:
    p = subparsers.add_parser(name, help=help_text, description=help_text)
    p.add_argument("calibration", metavar="ID", help="calibration id in the sheet")
    p.add_argument("--calibrations-sheet", "--sheet", dest="sheet", required=True, metavar="CSV",
                   help="calibration sheet (the same option name as ringid report's)")
    p.add_argument("--library", metavar="LIB", help="phase library folder (for standard films)")
    p.add_argument("-o", "--output", required=True, metavar="CAL.json", help="calibration record to write")
    p.add_argument("--saturation-level", type=float, metavar="COUNTS",
                   help="standard film: mask pixels at or above this level (default: from the data's bit depth)")
    p.add_argument("--frame", type=int, metavar="N", help="standard film: use frame N of a stack (default: sum)")
    p.add_argument("--negative-floor", type=float, metavar="COUNTS", help="standard film: mask pixels below this")
    p.add_argument("--mask", metavar="MASK", help="standard film: user mask image (non-zero = excluded)")
    p.add_argument("--after-crash", type=int, metavar="STATUS",
                   help="do no work: record the calibration as failed when this job's first run died with shell "
                        "exit STATUS before writing it (the workflow's fallback)")
    p.add_argument("--log", default="", metavar="LOG", help="the job's log, named in that record")
    p.set_defaults(func=run)


def run(args) -> int:
    import sys

    from ringid.core.errors import RingidError
    from ringid.jobs.measure import make_calibration
    from ringid.jobs.sheets import read_calibrations

    rows = read_calibrations(args.sheet)
    if args.calibration not in rows:
        raise RingidError(args.sheet, f"no calibration {args.calibration!r} in the sheet")
    if args.after_crash is not None:
        import os

        from ringid.core.records import CalibrationRecord, write_calibration_record
        from ringid.jobs.batch import crash_reason

        if not os.path.isfile(args.output):
            row = rows[args.calibration]
            write_calibration_record(args.output, CalibrationRecord(
                row.calibration, kind=row.kind, status="failed", error=crash_reason(args.after_crash, args.log),
                voltage_kv=row.voltage_kv))
            print(f"ringid: warning: calibration {args.calibration}: the job died; recorded as failed", file=sys.stderr)
        return 0
    options = {"saturation_level": args.saturation_level, "frame": args.frame, "negative_floor": args.negative_floor,
               "user_mask_path": args.mask}
    rec = make_calibration(rows[args.calibration], args.output, library_dir=args.library, image_options=options)
    if rec.status == "ok":
        print(f"{args.calibration}: K = {rec.camera_constant_A_px:.4f} Å·px ({rec.kind})", file=sys.stderr)
    else:
        print(f"ringid: warning: calibration {args.calibration}: {rec.error} (recorded as failed)", file=sys.stderr)
    return 0
