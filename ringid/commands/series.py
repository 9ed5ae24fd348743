"""``ringid series``: the trend table and figure of one series of a results folder.

    ringid series NAME RESULTS --samples-sheet CSV --variable temperature_c [--group-by film]

Writes RESULTS/series/NAME.csv (one row per sample with a value of the variable, in its order) and
RESULTS/series/NAME.png. Samples without a value are not members; failed ones keep their row.
"""

from __future__ import annotations


def add_parser(subparsers, name: str, help_text: str) -> None:
    p = subparsers.add_parser(name, help=help_text, description=help_text)
    p.add_argument("name", metavar="NAME", help="the series' name (its files are series/NAME.csv and .png)")
    p.add_argument("results", metavar="RESULTS", help="results folder (samples/)")
    p.add_argument("--samples-sheet", required=True, metavar="CSV", help="sample sheet with the variable's column")
    p.add_argument("--variable", required=True, metavar="COLUMN",
                   help="numeric sample-sheet column, its unit in its name (e.g. temperature_c)")
    p.add_argument("--group-by", metavar="COLUMN", help="text column splitting the samples into several lines")
    p.add_argument("--end-members", nargs=2, metavar=("A", "B"),
                   help="two library phases of one structure: the composition x_B by Vegard's law (an estimate)")
    p.set_defaults(func=run)


def run(args) -> int:
    import sys

    from ringid.core.errors import RingidError
    from ringid.jobs.sheets import SAFE_ID, read_samples
    from ringid.report.series import write_series

    if not SAFE_ID.match(args.name):
        raise RingidError(None, f"series name {args.name!r} is not a safe file name")
    columns = {args.variable: "number", **({args.group_by: "text"} if args.group_by else {})}
    samples = read_samples(args.samples_sheet, extra_columns=columns)
    table, _ = write_series(args.results, args.name, list(samples.values()), args.variable, args.group_by,
                            args.end_members)
    print(f"wrote {table} and its figure", file=sys.stderr)
    return 0
