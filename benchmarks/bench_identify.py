"""Benchmark: scoring one sample against a 1,000-phase library (not a timed test).

    python benchmarks/bench_identify.py [--phases 1000] [--repeat 5]

The large library is the shipped reference_phases/ expanded with random lattice dilations
(0.85-1.15, seeded), so it has realistic ring lists and many near-coincidences. Target
(docs/design.md): under 100 ms per sample on one core.
"""

from __future__ import annotations

import argparse
import dataclasses
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]


def expanded_library(base, n_phases: int, seed: int = 0):
    rng = np.random.default_rng(seed)
    out = list(base)
    while len(out) < n_phases:
        p = base[int(rng.integers(len(base)))]
        s = float(rng.uniform(0.85, 1.15))
        out.append(dataclasses.replace(p, phase=f"{p.phase}_x{len(out)}", d_angstrom=p.d_angstrom * s))
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--phases", type=int, default=1000)
    parser.add_argument("--repeat", type=int, default=5)
    args = parser.parse_args()

    from ringid.core.memory import reuse_freed_arrays
    from ringid.identify.score import ObservedRings, identify, index_library

    reuse_freed_arrays()  # as the identification jobs do
    from ringid.library.store import load_library
    from ringid.library.store import build_library

    with tempfile.TemporaryDirectory() as lib_dir:
        build_library(ROOT / "reference_phases", lib_dir)
        base = load_library(lib_dir)
    library = expanded_library(base, args.phases)
    by = {p.phase: p for p in base}
    samples = {}
    for name, phases in {"Au": ["Au"], "anatase+rutile": ["TiO2_anatase", "TiO2_rutile"], "Fe3O4": ["Fe3O4"]}.items():
        g, a = [], []
        for ph in phases:
            p = by[ph]
            keep = ~p.double_diffraction & (p.intensity >= 1)
            g.append(p.g_per_nm[keep][:8])
            a.append(p.intensity[keep][:8])
        g, a = np.concatenate(g), np.concatenate(a)
        o = np.argsort(g)
        samples[name] = ObservedRings(g[o], 5e-4 * g[o], np.full(len(g), 0.05), a[o])
    t0 = time.perf_counter()
    index = index_library(library)
    print(f"library: {len(library)} phases, indexed once in {1000 * (time.perf_counter() - t0):.1f} ms")
    for name, obs in samples.items():
        times = []
        for _ in range(args.repeat):
            t0 = time.perf_counter()
            res = identify(obs, index)
            times.append(time.perf_counter() - t0)
        print(
            f"{name:<16} {len(obs):3d} rings  {min(times) * 1000:7.1f} ms (best of {args.repeat})"
            f"  -> {';'.join(res.phases)}"
        )


if __name__ == "__main__":
    main()
