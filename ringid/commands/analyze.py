"""``ringid analyze``: one pattern, every stage, one process, no workflow.

    ringid analyze IMAGE --calibration CAL.json --library LIB -o DIR
    ringid analyze IMAGE --camera-constant-a-px K --voltage-kv V --library LIB -o DIR
    ringid analyze IMAGE --camera-length-mm L --pixel-size-um P --voltage-kv V --library LIB -o DIR

Writes the same per-sample files as the workflow (sample.json, profile.csv, rings.csv,
phases.csv, identification.json, overview.png) into DIR.
"""

from __future__ import annotations


def add_parser(subparsers, name: str, help_text: str) -> None:
    from .measure import add_image_options

    p = subparsers.add_parser(name, help=help_text, description=help_text)
    p.add_argument("image", metavar="IMAGE", help="the pattern (TIFF or .npy)")
    src = p.add_mutually_exclusive_group(required=True)
    src.add_argument("--calibration", metavar="CAL.json", help="calibration record (ringid calibrate / calibration)")
    src.add_argument("--camera-constant-a-px", type=float, metavar="K", help="known camera constant K in Å·px")
    src.add_argument("--camera-length-mm", type=float, metavar="L",
                     help="nominal camera length (with --pixel-size-um; a few %% uncertain: a ±3 %% window is "
                          "searched)")
    p.add_argument("--pixel-size-um", type=float, metavar="P", help="detector pixel size (with --camera-length-mm)")
    p.add_argument(
        "--voltage-kv", type=float, metavar="V",
        help="accelerating voltage (needed with --camera-constant-a-px or --camera-length-mm)"
    )
    p.add_argument("--library", required=True, metavar="LIB", help="phase library folder (ringid library build)")
    p.add_argument("-o", "--output", required=True, metavar="DIR", help="output folder")
    p.add_argument("--sample", metavar="ID", help="sample id (default: the image's stem)")
    p.add_argument("--elements", default="", metavar="SYMBOLS",
                   help="the sample's elements, e.g. 'Ti O': only library phases made of them are candidates")
    add_image_options(p)
    p.set_defaults(func=run)


def run(args) -> int:
    import sys
    import tempfile
    from pathlib import Path

    from ringid.core.errors import RingidError
    from ringid.library.store import load_library
    from ringid.commands.measure import _elements
    from ringid.jobs.measure import identify_sample, make_calibration, measure_sample
    from ringid.jobs.sheets import CalibrationRow

    out = Path(args.output)
    sample = args.sample or Path(args.image).stem

    def step(text):
        print(f"{sample}: {text}", file=sys.stderr, flush=True)

    library = load_library(args.library)
    with tempfile.TemporaryDirectory() as tmp:
        cal_path = args.calibration
        if cal_path is None:
            if not args.voltage_kv or args.voltage_kv <= 0:
                raise RingidError(None, "a camera constant or camera length needs --voltage-kv")
            cal_path = Path(tmp) / "calibration.json"
            if args.camera_length_mm is not None:
                if not args.pixel_size_um or args.pixel_size_um <= 0 or args.camera_length_mm <= 0:
                    raise RingidError(None, "--camera-length-mm needs a positive --pixel-size-um")
                row = CalibrationRow("given", "nominal", args.voltage_kv, camera_length_mm=args.camera_length_mm,
                                     pixel_size_um=args.pixel_size_um)
            else:
                row = CalibrationRow("given", "constant", args.voltage_kv,
                                     camera_constant_A_px=args.camera_constant_a_px)
            make_calibration(row, cal_path)
        step("image -> profile -> rings")
        rec = measure_sample(args.image, cal_path, out, sample=sample, max_pixels=args.max_pixels,
                             saturation_level=args.saturation_level, user_mask=args.mask, frame=args.frame,
                             negative_floor=args.negative_floor, min_ring_g_per_nm=args.min_ring_g_per_nm,
                             elements=_elements(args.elements))
    if rec.status != "ok":
        raise RingidError(None, rec.error)  # the recorded error names the file already
    step(f"{rec.crystallinity}, {rec.n_rings} rings; identifying")
    ident = identify_sample(out, library, library_dir=str(args.library))
    phases = ", ".join(f"{p} ({c:.2f})" for p, c in zip(ident["phases"], ident["confidence"])) or "no phase identified"
    step(f"{phases}; results in {out} (a screening result: confirm critical assignments independently)")
    return 0
