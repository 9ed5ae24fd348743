"""``ringid report``: summary.csv and report.html of a results folder."""

from __future__ import annotations


def add_parser(subparsers, name: str, help_text: str) -> None:
    p = subparsers.add_parser(name, help=help_text, description=help_text)
    p.add_argument("results", metavar="RESULTS", help="results folder (samples/, calibrations/, library/)")
    p.add_argument("--samples-sheet", required=True, metavar="CSV", help="sample sheet: which samples, in which order")
    p.add_argument("--calibrations-sheet", required=True, metavar="CSV", help="calibration sheet")
    p.add_argument("--title", default="ringid report", help="page title")
    p.add_argument("--series", nargs="*", default=[], metavar="NAME",
                   help="series whose figure and table (RESULTS/series/NAME.png, .csv) the report shows")
    p.add_argument("--figures", choices=("auto", "inline", "linked"), default="auto",
                   help="figures inside the page (one file), linked beside it (loaded lazily: for large runs), or "
                        "auto: inside up to 100 samples (default)")
    p.set_defaults(func=run)


def run(args) -> int:
    import sys

    from ringid.report.html import write_report
    from ringid.jobs.sheets import read_calibrations, read_samples

    cals = read_calibrations(args.calibrations_sheet)
    samples = read_samples(args.samples_sheet, cals, check_columns=False)  # checked when the workflow started
    path = write_report(args.results, list(samples), list(cals), title=args.title, figures=args.figures,
                        series=args.series)
    print(f"wrote {path} and summary.csv for {len(samples)} samples", file=sys.stderr)
    return 0
