"""Benchmark: building the phase library (not a timed test).

    python benchmarks/bench_library.py [--repeat 3]

Prints the in-process computation time per phase of ``reference_phases/`` (CIF reading,
symmetry expansion, structure factors, ring merging, file writing; interpreter start
excluded), the mean per phase, and Fe3O4 alone at d_min = 0.5 Å. Targets (docs/design.md): mean
< 0.2 s per phase, Fe3O4 < 0.5 s, on one core.
"""

from __future__ import annotations

import argparse
import statistics
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()

    import gemmi  # noqa: F401  (import cost is not part of the per-phase figure)

    from ringid.library.store import build_phase

    cifs = sorted((ROOT / "reference_phases").glob("*.cif"))
    build_phase(cifs[0], tempfile.mkdtemp())  # warm up imports and caches
    per_phase = {}
    for cif in cifs:
        times = []
        for _ in range(args.repeat):
            with tempfile.TemporaryDirectory() as out:
                t0 = time.perf_counter()
                rec = build_phase(cif, out)
                times.append(time.perf_counter() - t0)
        per_phase[cif.stem] = (min(times), rec.get("n_rings", 0), rec.get("n_reflections", 0))
    print(f"{'phase':<18} {'time_s':>8} {'rings':>6} {'reflections':>12}")
    for phase, (t, n, m) in sorted(per_phase.items(), key=lambda kv: -kv[1][0]):
        print(f"{phase:<18} {t:8.4f} {n:6d} {m:12d}")
    mean = statistics.mean(t for t, _, _ in per_phase.values())
    print(f"\nmean per phase: {mean:.4f} s over {len(per_phase)} phases (target < 0.2 s)")
    print(f"Fe3O4, d_min 0.5 Å: {per_phase['Fe3O4'][0]:.4f} s (target < 0.5 s)")


if __name__ == "__main__":
    main()
