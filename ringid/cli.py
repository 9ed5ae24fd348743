"""The ``ringid`` command line.

Subcommands are listed in pipeline order. Each lives in ``ringid.commands.<name>``
and exposes ``add_parser(subparsers)`` and ``run(args)``; heavy imports happen
inside ``run`` so that ``ringid --help`` and cheap jobs start fast.

Exit status: 0 done (failures recorded in the outputs included), 1 bad input,
2 usage error.
"""

from __future__ import annotations

import argparse
import importlib
import sys

from ringid import __version__
from ringid.core.errors import RingidError

# (module under ringid.commands, one-line help) in pipeline order
COMMANDS = [
    ("demo", "write the synthetic demo patterns and sheets"),
    ("library", "build and inspect the phase library from CIF files"),
    ("simulate", "write a synthetic ring pattern of a phase as a TIFF (demo and test data)"),
    ("calibrate", "camera constant, centre and ellipse from a pattern of a standard film"),
    ("calibration", "[workflow job] one row of the calibration sheet -> its calibration record"),
    ("measure", "[workflow job] image work of one sample: pattern -> profile -> rings"),
    ("identify", "score a rings table (or a measured sample folder) against the phase library"),
    ("batch", "[workflow job] several samples in one process: image work, identification"),
    ("series", "trends across a series of samples (annealing, time, position): table and figure"),
    ("report", "summary.csv and report.html of a results folder"),
    ("analyze", "one pattern through every stage in one process (no workflow)"),
]


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="ringid",
        description="Phase identification for electron diffraction ring patterns (screening results).",
        epilog="A whole folder of patterns runs through the Snakemake workflow (snakemake -s /path/to/Snakefile "
               "--cores N --configfile my.yaml); the commands marked [workflow job] are its jobs, seldom run by "
               "hand. One pattern without the workflow: ringid analyze.",
    )
    parser.add_argument("--version", action="version", version=f"ringid {__version__}")
    parser.add_argument("--debug", action="store_true", help="show the full traceback on errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for name, help_text in COMMANDS:
        module = importlib.import_module(f"ringid.commands.{name}")
        module.add_parser(sub, name, help_text)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except RingidError as exc:
        if args.debug:
            raise
        print(f"ringid: error: {exc}", file=sys.stderr)
        return 1
    except BrokenPipeError:  # output piped into e.g. `head`
        sys.stderr.close()
        return 0
    except Exception as exc:  # noqa: BLE001 - a bug must still end in one line naming it, not a traceback
        if args.debug:
            raise
        import traceback

        last = traceback.extract_tb(exc.__traceback__)[-1] if exc.__traceback__ else None
        where = f" at {last.filename.rsplit('/', 1)[-1]}:{last.lineno}" if last else ""
        print(f"ringid: error: internal error ({type(exc).__name__}: {' '.join(str(exc).split())}){where}; "
              "run with --debug for the traceback", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("ringid: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
