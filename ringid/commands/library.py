"""``ringid library``: build and inspect the phase library.

    ringid library build CIF_DIR -o LIB        every CIF of a folder, then the index
    ringid library phase CIF -o LIB            one CIF (the workflow's per-CIF job)
    ringid library index LIB                   rewrite LIB/index.csv from the phase records
    ringid library show PHASE --library LIB    print a phase's ring table

A CIF that cannot be used is recorded as ``status=failed`` with its reason and the
command still exits 0; ``build`` exits 1 only when no phase at all could be built.
"""

from __future__ import annotations

import argparse
import sys

D_MIN_HELP = "smallest d-spacing to list, in Å (default 0.5)"
TOL_HELP = "relative d difference below which reflections share a ring (default 1e-4)"
MAX_REFL_HELP = ("refuse a phase whose estimated reflection count to d_min, (4π/3)·V/d_min³, exceeds N "
                 "(default {:,}; memory grows by about 200 bytes per reflection)")


def add_parser(subparsers, name: str, help_text: str) -> None:
    parser = subparsers.add_parser(name, help=help_text, description=help_text)
    sub = parser.add_subparsers(dest="library_command", metavar="ACTION", required=True)

    p = sub.add_parser("build", help="build every *.cif in a folder and write the index")
    p.add_argument("cif_dir", metavar="CIF_DIR", help="folder of CIF files; a file's stem is its phase id")
    p.add_argument("-o", "--output", required=True, metavar="LIB", help="library folder to write")
    _add_physics(p)
    p.add_argument("--quiet", action="store_true", help="no progress lines")
    p.set_defaults(func=run_build)

    p = sub.add_parser("phase", help="build one phase from its CIF (no index)")
    p.add_argument("cif", metavar="CIF", help="the CIF file; its stem is the phase id")
    p.add_argument("-o", "--output", required=True, metavar="LIB", help="library folder to write into")
    _add_physics(p)
    p.add_argument("--after-crash", type=int, metavar="STATUS",
                   help="do no work: record the phase as failed when this job's first run died with shell exit "
                        "STATUS before writing its record (the workflow's fallback)")
    p.add_argument("--log", default="", metavar="LOG", help="the job's log, named in that record")
    p.set_defaults(func=run_phase)

    p = sub.add_parser("index", help="write LIB/index.csv from the phase records in LIB")
    p.add_argument("library", metavar="LIB", help="library folder")
    p.add_argument("--phases", nargs="*", metavar="PHASE", help="only these phases (default: every record in LIB)")
    p.set_defaults(func=run_index)

    p = sub.add_parser("show", help="print the ring table of a phase")
    p.add_argument("phase", metavar="PHASE", help="phase id")
    p.add_argument("--library", required=True, metavar="LIB", help="library folder")
    p.add_argument("--all", action="store_true", help="show every ring (default: the first 30)")
    p.set_defaults(func=run_show)


def _add_physics(p: argparse.ArgumentParser) -> None:
    from ringid.library.structure import DEFAULT_MAX_REFLECTIONS

    p.add_argument("--d-min-angstrom", type=float, default=0.5, metavar="D", help=D_MIN_HELP)
    p.add_argument("--merge-tolerance", type=float, default=1e-4, metavar="REL", help=TOL_HELP)
    p.add_argument("--max-reflections", type=_positive_int, default=DEFAULT_MAX_REFLECTIONS, metavar="N",
                   help=MAX_REFL_HELP.format(DEFAULT_MAX_REFLECTIONS))


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a whole number: {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be at least 1: {text!r}")
    return value


def run_build(args) -> int:
    from ringid.core.errors import RingidError
    from ringid.library.store import build_library

    def progress(i, n, rec):
        if not args.quiet:
            state = f"{rec.get('n_rings', 0)} rings" if rec["status"] == "ok" else f"FAILED: {rec['error']}"
            print(f"[{i}/{n}] {rec['phase']}: {state}", file=sys.stderr)

    records = build_library(args.cif_dir, args.output, d_min_angstrom=args.d_min_angstrom,
                            merge_tolerance=args.merge_tolerance, max_reflections=args.max_reflections,
                            progress=progress)
    failed = [r for r in records if r["status"] != "ok"]
    for r in failed:
        print(f"ringid: warning: {r['cif_path']}: {r['error']}", file=sys.stderr)
    print(f"built {len(records) - len(failed)} of {len(records)} phases into {args.output}", file=sys.stderr)
    if len(failed) == len(records):
        raise RingidError(args.cif_dir, "no phase could be built")
    return 0


def run_phase(args) -> int:
    from ringid.library.store import build_phase

    if args.after_crash is not None:
        from ringid.jobs.batch import crash_reason
        from ringid.library.store import record_crashed_phase

        rec = record_crashed_phase(args.cif, args.output, crash_reason(args.after_crash, args.log),
                                   d_min_angstrom=args.d_min_angstrom, merge_tolerance=args.merge_tolerance)
        if rec is not None:
            print(f"ringid: warning: {args.cif}: the job died; recorded as failed", file=sys.stderr)
        return 0

    rec = build_phase(args.cif, args.output, d_min_angstrom=args.d_min_angstrom, merge_tolerance=args.merge_tolerance,
                      max_reflections=args.max_reflections)
    if rec["status"] != "ok":
        print(f"ringid: warning: {rec['cif_path']}: {rec['error']} (recorded as failed)", file=sys.stderr)
    return 0


def run_index(args) -> int:
    from ringid.library.store import write_index

    rows = write_index(args.library, args.phases)
    n_ok = sum(r["status"] == "ok" for r in rows)
    print(f"indexed {len(rows)} phases ({n_ok} ok) in {args.library}", file=sys.stderr)
    return 0


def run_show(args) -> int:
    from ringid.library.store import read_phase_record, read_phase_rings

    rec = read_phase_record(args.library, args.phase)
    rings = read_phase_rings(args.library, args.phase)
    cell = rec["cell"]
    print(f"{args.phase}  {rec['formula']}  {rec['space_group_symbol']} (No. {rec['space_group_number']})  "
          f"a={cell['a_angstrom']:g} b={cell['b_angstrom']:g} c={cell['c_angstrom']:g} Å  "
          f"alpha={cell['alpha_deg']:g} beta={cell['beta_deg']:g} gamma={cell['gamma_deg']:g}")
    for w in rec.get("warnings", []):
        print(f"  warning: {w}")
    print(f"{'d (Å)':>9} {'g (1/nm)':>9} {'I':>8} {'mult':>5}  hkl")
    n = len(rings.d_angstrom) if args.all else min(30, len(rings.d_angstrom))
    for i in range(n):
        dd = "  (double diffraction only)" if rings.double_diffraction[i] else ""
        print(f"{rings.d_angstrom[i]:9.4f} {rings.g_per_nm[i]:9.4f} {rings.intensity[i]:8.2f} "
              f"{rings.multiplicity[i]:5d}  {rings.hkl[i]}{dd}")
    if n < len(rings.d_angstrom):
        print(f"... {len(rings.d_angstrom) - n} more rings (--all shows them)")
    return 0
