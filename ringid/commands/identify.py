"""``ringid identify``: score a sample's rings against the phase library.

    ringid identify RINGS --library LIB -o DIR [--calibration-kind standard|constant|nominal]
    ringid identify --d-angstrom 3.51 2.37 1.89 ... [--d-accuracy-pct 1] --library LIB -o DIR
    ringid identify --d-list D.csv --library LIB -o DIR      (columns d_angstrom[, d_sigma_angstrom, intensity])

Writes DIR/phases.csv (ranked candidates), DIR/rings.csv (the rings with phase and hkl) and
DIR/identification.json (answer, confidence, alternatives, refined lattice, flags).
"""

from __future__ import annotations

from ringid.identify.windows import FALSE_IDENTIFICATION_RATE, WINDOW_NOMINAL, WINDOW_STANDARD


def add_parser(subparsers, name: str, help_text: str) -> None:
    p = subparsers.add_parser(name, help=help_text, description=help_text)
    p.add_argument("rings", metavar="RINGS", nargs="?",
                   help="rings table (CSV with g_per_nm, g_sigma_per_nm, fwhm_per_nm, area[, kind])")
    p.add_argument("--d-angstrom", type=float, nargs="+", metavar="D",
                   help="a plain list of d-spacings (Å) instead of RINGS, e.g. measured by hand or from a paper")
    p.add_argument("--d-list", metavar="CSV",
                   help="a CSV of d-spacings instead of RINGS: d_angstrom, optional d_sigma_angstrom and intensity")
    p.add_argument("--d-accuracy-pct", type=float, default=1.0, metavar="PCT",
                   help="with --d-angstrom/--d-list: the accuracy of each d, as one standard deviation in %% "
                        "(default %(default)s); without intensities, intensities count for nothing")
    p.add_argument("--sample-dir", metavar="DIR",
                   help="identify a measured sample folder (from ringid measure) instead of RINGS; "
                        "writes its phases.csv, rings.csv, identification.json and overview.png")
    p.add_argument("--window-standard", type=float, default=WINDOW_STANDARD, metavar="REL",
                   help="with --sample-dir: dilation window for standard/constant calibrations (default %(default)s)")
    p.add_argument("--window-nominal", type=float, default=WINDOW_NOMINAL, metavar="REL",
                   help="with --sample-dir: dilation window for nominal calibrations (default %(default)s)")
    p.add_argument("--library", required=True, metavar="LIB", help="phase library folder (ringid library build)")
    p.add_argument("-o", "--output", metavar="DIR", help="folder for phases.csv, rings.csv, identification.json")
    p.add_argument("--calibration-kind", choices=["standard", "constant", "nominal"], default="standard",
                   help="how the camera constant was obtained; sets the dilation window "
                        "(standard/constant: ±0.5 %%, nominal: ±3 %%)")
    p.add_argument("--dilation-window", type=float, metavar="REL", help="override the ± relative lattice-scale window")
    p.add_argument("--g-range-per-nm", type=float, nargs=2, metavar=("LO", "HI"),
                   help="g range of the profile in which rings could be detected (default: the observed rings)")
    p.add_argument("--phases", type=lambda text: [p for p in text.split(",") if p], metavar="PHASE,PHASE",
                   help="score only against these phases (comma-separated, e.g. CeO2,Au)")
    p.add_argument("--elements", default="", metavar="SYMBOLS",
                   help="with RINGS, --d-angstrom or --d-list: consider only library phases made of these elements "
                        "(e.g. 'Ti O'); a far better phase of other elements is named (better_match_outside_elements)")
    p.add_argument("--false-identification-rate", type=float, default=FALSE_IDENTIFICATION_RATE, metavar="RATE",
                   help="report a phase only when the chance that an absent phase scores as well is below RATE, "
                        "controlled over the phases of a sample (default %(default)s)")
    p.set_defaults(func=run)


def check_rate(rate: float) -> float:
    """The false-identification rate of the command line, or a one-line error."""
    from ringid.core.errors import RingidError

    if not 0 < rate < 1:
        raise RingidError(None, f"--false-identification-rate must be between 0 and 1, got {rate}")
    return rate


def run(args) -> int:
    import sys

    from ringid.core.errors import RingidError
    from ringid.identify.files import read_observed_rings, write_results
    from ringid.identify.windows import WINDOW_BY_CALIBRATION
    from ringid.identify.score import IdentifySettings, identify
    from ringid.library.store import load_library

    from ringid.core.memory import reuse_freed_arrays

    reuse_freed_arrays()
    library = load_library(args.library)
    if args.sample_dir:
        if args.elements:
            raise RingidError(None, "--elements does not go with --sample-dir: the sample's elements are those its "
                                    "sample.json records (ringid measure --elements, or the sheet's elements column)")
        from ringid.jobs.measure import identification_summary, identify_sample

        out = identify_sample(args.sample_dir, library, window_standard=args.window_standard,
                              window_nominal=args.window_nominal, library_dir=str(args.library),
                              false_identification_rate=check_rate(args.false_identification_rate))
        print(f"{args.sample_dir}: {identification_summary(out)}", file=sys.stderr)
        return 0
    given = [x for x in (args.rings, args.d_angstrom, args.d_list) if x]
    if len(given) != 1 or not args.output:
        raise RingidError(None, "give one of RINGS, --d-angstrom or --d-list, and -o DIR (or --sample-dir DIR)")
    intensities_known = True
    if args.rings:
        obs, rows = read_observed_rings(args.rings)
        source = str(args.rings)
    else:
        from ringid.identify.files import d_list_rings, read_d_list

        accuracy = args.d_accuracy_pct / 100.0
        if args.d_list:
            obs, rows, intensities_known = read_d_list(args.d_list, accuracy)
            source = str(args.d_list)
        else:
            obs, rows, intensities_known = d_list_rings(args.d_angstrom, accuracy=accuracy)
            source = "d-spacings " + " ".join(f"{d:g}" for d in args.d_angstrom)
    if args.phases:
        missing = sorted(set(args.phases) - {p.phase for p in library})
        if missing:
            raise RingidError(args.library, f"phase(s) not in the library: {', '.join(missing)}")
        library = [p for p in library if p.phase in set(args.phases)]
    settings = IdentifySettings(dilation_window=args.dilation_window or WINDOW_BY_CALIBRATION[args.calibration_kind],
                                false_identification_rate=check_rate(args.false_identification_rate),
                                intensity_weight=IdentifySettings.intensity_weight if intensities_known else 0.0)
    if args.dilation_window is not None and not 0 < args.dilation_window < 0.5:
        raise RingidError(None, f"--dilation-window must be between 0 and 0.5, got {args.dilation_window}")
    from ringid.commands.measure import _elements

    result = identify(
        obs, library, settings, g_range_per_nm=tuple(args.g_range_per_nm) if args.g_range_per_nm else None,
        elements=_elements(args.elements),
    )
    from ringid.library.store import unavailable_phases

    write_results(args.output, rows, obs, result, settings,
                  provenance={"rings": source, "library": str(args.library), "n_library_phases": len(library),
                              "intensities": "given" if intensities_known else "unknown (no weight)"},
                  unavailable=unavailable_phases(args.library))
    answer = "; ".join(f"{p} ({c:.2f})" for p, c in zip(result.phases, result.confidence)) or "no phase identified"
    print(f"{source}: {answer}; {result.unexplained_rings} unexplained of {len(obs)} rings", file=sys.stderr)
    return 0
