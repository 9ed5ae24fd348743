"""``ringid measure``: the image job of one sample (pattern -> profile -> rings)."""

from __future__ import annotations


def add_parser(subparsers, name: str, help_text: str) -> None:
    p = subparsers.add_parser(name, help=help_text, description=help_text)
    p.add_argument("image", metavar="IMAGE", help="the pattern (TIFF, MRC or .npy)")
    p.add_argument("--calibration", required=True, metavar="CAL.json", help="calibration record (ringid calibration)")
    p.add_argument("-o", "--output", required=True, metavar="DIR", help="the sample's output folder")
    p.add_argument("--sample", metavar="ID", help="sample id (default: the image's stem)")
    p.add_argument("--calibration-id", default="", metavar="ID", help="calibration id, for the record")
    p.add_argument("--note", default="", help="free text carried into the report")
    p.add_argument("--elements", default="", metavar="SYMBOLS",
                   help="the sample's elements, e.g. 'Ti O' (recorded; identification then considers only "
                        "library phases made of them)")
    p.add_argument(
        "--voltage-kv",
        type=float,
        default=float("nan"),
        metavar="V",
        help="the sample's voltage (checked against the calibration)",
    )
    add_image_options(p)
    p.set_defaults(func=run)


def add_image_options(p) -> None:
    """The image-job options, shared with ``ringid batch measure``."""
    p.add_argument("--max-pixels", type=int, metavar="N", help="refuse larger images")
    p.add_argument("--saturation-level", type=float, metavar="COUNTS",
                   help="mask pixels at or above this level (per frame; default: from the data's bit depth)")
    p.add_argument("--frame", type=int, metavar="N",
                   help="use frame N (from 0) of a frame stack (default: sum the frames)")
    p.add_argument("--negative-floor", type=float, metavar="COUNTS",
                   help="mask pixels below this value (default: keep every negative value of dark-subtracted data)")
    p.add_argument("--mask", metavar="MASK", help="user mask image (non-zero = excluded)")
    p.add_argument(
        "--min-ring-g-per-nm",
        type=float,
        default=1.0,
        metavar="G",
        help="search rings from this g outwards (default 1.0 1/nm, d <= 10 Å; the direct-beam tail is inside)",
    )


def run(args) -> int:
    import sys
    from pathlib import Path

    from ringid.jobs.measure import measure_sample

    rec = measure_sample(args.image, args.calibration, args.output, sample=args.sample or Path(args.image).stem,
                         calibration_id=args.calibration_id, note=args.note, voltage_kv=args.voltage_kv,
                         max_pixels=args.max_pixels, saturation_level=args.saturation_level, user_mask=args.mask,
                         frame=args.frame, negative_floor=args.negative_floor, min_ring_g_per_nm=args.min_ring_g_per_nm,
                         elements=_elements(args.elements))
    if rec.status == "ok":
        print(f"{args.image}: {rec.crystallinity}, {rec.n_rings} rings ({rec.timings_s['total']:.2f} s)",
              file=sys.stderr)
    else:
        print(f"ringid: warning: {rec.error} (recorded as failed)", file=sys.stderr)
    return 0


def _elements(text: str) -> tuple[str, ...]:
    """The element symbols of ``--elements``, or a one-line error."""
    from ringid.core.elements import parse_elements
    from ringid.core.errors import RingidError

    try:
        return parse_elements(text)
    except ValueError as exc:
        raise RingidError(None, f"--elements {text!r}: {exc}") from None
