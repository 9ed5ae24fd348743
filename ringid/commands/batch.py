"""``ringid batch``: several samples in one process (the workflow's jobs when batch_size > 1).

    ringid batch measure MANIFEST|- --calibrations-dir DIR -o SAMPLES_DIR [image options]
    ringid batch identify SAMPLE_DIR [SAMPLE_DIR ...] --library LIB

``measure`` runs the image job of every row of MANIFEST (a sample sheet: sample, image,
calibration[, voltage_kv, note, elements]; ``-``: read it from stdin) into SAMPLES_DIR/{sample}/;
``identify`` identifies measured sample folders against one loaded library. Each sample's files
are those of ``ringid measure`` and ``ringid identify --sample-dir``; a sample that fails is
recorded as failed and the others go on. Exit 0 when every sample's files were written (failed samples included).
"""

from __future__ import annotations

import sys

from ringid.identify.windows import FALSE_IDENTIFICATION_RATE, WINDOW_NOMINAL, WINDOW_STANDARD


def add_parser(subparsers, name: str, help_text: str) -> None:
    from .measure import add_image_options

    parser = subparsers.add_parser(name, help=help_text, description=help_text)
    sub = parser.add_subparsers(dest="batch_command", metavar="ACTION", required=True)

    p = sub.add_parser("measure", help="image job of every sample of a manifest (a sample sheet)")
    p.add_argument(
        "manifest",
        metavar="MANIFEST",
        help="sample sheet CSV: sample,image,calibration[,voltage_kv,note,elements]; - reads it from stdin",
    )
    p.add_argument("--calibrations-dir", required=True, metavar="DIR",
                   help="folder of the calibration records, DIR/{calibration}.json (ringid calibration)")
    p.add_argument(
        "-o", "--output", required=True, metavar="SAMPLES_DIR", help="each sample goes to SAMPLES_DIR/{sample}"
    )
    add_image_options(p)
    _add_after_crash(p)
    p.set_defaults(func=run_measure)

    p = sub.add_parser("identify", help="identification of several measured sample folders")
    p.add_argument("sample_dirs", nargs="+", metavar="SAMPLE_DIR", help="measured sample folders (ringid measure)")
    p.add_argument("--library", required=True, metavar="LIB", help="phase library folder")
    p.add_argument("--window-standard", type=float, default=WINDOW_STANDARD, metavar="REL",
                   help="dilation window for standard/constant calibrations (default %(default)s)")
    p.add_argument("--window-nominal", type=float, default=WINDOW_NOMINAL, metavar="REL",
                   help="dilation window for nominal calibrations (default %(default)s)")
    p.add_argument("--false-identification-rate", type=float, default=FALSE_IDENTIFICATION_RATE, metavar="RATE",
                   help="report a phase only when the chance that an absent phase scores as well is below RATE, "
                        "controlled over the phases of a sample (default %(default)s)")
    _add_after_crash(p)
    p.set_defaults(func=run_identify)


def _add_after_crash(p) -> None:
    p.add_argument("--after-crash", type=int, metavar="STATUS",
                   help="do no work: record every sample this job's first run left unwritten as failed, that run "
                        "having died with shell exit STATUS (the workflow's fallback, so one crash never stops the "
                        "report)")
    p.add_argument("--log", default="", metavar="LOG", help="the job's log, named in those records")


def run_measure(args) -> int:
    from ringid.jobs.batch import ImageOptions, measure_batch, read_manifest

    options = ImageOptions(max_pixels=args.max_pixels, saturation_level=args.saturation_level, user_mask=args.mask,
                           frame=args.frame, negative_floor=args.negative_floor,
                           min_ring_g_per_nm=args.min_ring_g_per_nm)
    if args.after_crash is not None:
        from ringid.jobs.batch import crash_reason, record_unfinished_measurements

        done = record_unfinished_measurements(read_manifest(args.manifest), args.output,
                                              crash_reason(args.after_crash, args.log))
        print(f"ringid: warning: the image job died; {len(done)} sample(s) recorded as failed: {', '.join(done)}",
              file=sys.stderr)
        return 0
    records = measure_batch(read_manifest(args.manifest), args.calibrations_dir, args.output, options)
    return 1 if any(r.status == "unwritten" for r in records) else 0


def run_identify(args) -> int:
    from ringid.jobs.batch import identify_batch
    from .identify import check_rate
    from ringid.library.store import load_library

    if args.after_crash is not None:
        from ringid.jobs.batch import crash_reason, record_unfinished_identifications

        done = record_unfinished_identifications(args.sample_dirs, crash_reason(args.after_crash, args.log))
        print(f"ringid: warning: the identification job died; {len(done)} sample(s) recorded as failed",
              file=sys.stderr)
        return 0
    from ringid.core.memory import reuse_freed_arrays

    reuse_freed_arrays()
    library = load_library(args.library)
    records = identify_batch(args.sample_dirs, library, window_standard=args.window_standard,
                             window_nominal=args.window_nominal, library_dir=str(args.library),
                             false_identification_rate=check_rate(args.false_identification_rate))
    return 1 if any(r.get("status") == "unwritten" for r in records) else 0
