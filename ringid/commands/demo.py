"""``ringid demo``: write the synthetic demo patterns and sheets (ringid's own simulator)."""

from __future__ import annotations


def add_parser(subparsers, name: str, help_text: str) -> None:
    p = subparsers.add_parser(name, help=help_text, description=help_text)
    p.add_argument("output", nargs="?", default="demo", metavar="DIR", help="folder to write (default: demo)")
    p.add_argument("--size-px", type=int, default=2048, metavar="N", help="pattern size N × N (default 2048)")
    p.add_argument("--seed", type=int, default=2026, help="random seed (default 2026)")
    p.add_argument("--quiet", action="store_true", help="no progress lines")
    p.set_defaults(func=run)


def run(args) -> int:
    import sys

    from ringid.synthetic.demo import write_demo
    from ringid.core.errors import RingidError

    if args.size_px < 256:
        raise RingidError(None, f"--size-px must be at least 256, got {args.size_px}")

    def progress(i, n, name):
        if not args.quiet:
            print(f"[{i}/{n}] simulated {name}", file=sys.stderr)

    out = write_demo(args.output, shape=(args.size_px, args.size_px), seed=args.seed, progress=progress)
    print(f"synthetic demo written to {out} (samples.csv, calibrations.csv, images/)", file=sys.stderr)
    return 0
