"""Benchmark: identification in an open world (not a timed test).

    python benchmarks/bench_open_world.py [--n 200] [--seed 1] [--phases 29]

Synthetic ring lists made at run time by ringid.synthetic.ring_lists, scored against the shipped
library (or, with --phases 1000, the library expanded with random dilations as in
bench_identify.py), at both dilation windows (±0.5 % standard film, ±3 % nominal):

- random lists: 5-60 rings uniform in g = 2.5-14 1/nm (no lattice): share with any phase;
- unknown crystals: random structure types / low-symmetry cells, none within 1.5 % of a library
  lattice (by their strongest rings): share rejected (empty answer);
- look-alikes: a library phase with its lattice 0.6-1.0 % off (standard window only): share rejected;
- in-library: one library phase (or two), dilation inside half the window, areas scattered,
  sometimes a strong ring lost: share whose first phase (set) is right;
- known + unknown: a library phase beside an unknown crystal: known phase reported and
  ``unidentified_phase`` flagged;
- reliability: reported phases binned by confidence, the share right per bin.

With --rate-only: the lattice-free lists alone (share with a phase, distribution of the smallest
false-identification probability) and how often one cell indexes such a list, by ring count.
"""

from __future__ import annotations

import argparse
import dataclasses
import math
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(Path(__file__).parent))

WINDOWS = {"standard": 0.005, "nominal": 0.03}


def make_cases(library, n, seed, windows=WINDOWS):
    """Every synthetic case: (kind, window name, ObservedRings, set of right phases[, what made it])."""
    from ringid.synthetic.ring_lists import as_observed, lattice_distance, observe, random_crystal, random_ring_list

    rng = np.random.default_rng(seed)
    cases = []
    base = [p for p in library if "_x" not in p.phase]

    def distance(x):  # nearest library lattice, either ring list within the other (6 strongest rings)
        return min(min(lattice_distance(x, p), lattice_distance(p, x)) for p in base)

    for wname, w in windows.items():
        unknowns = []
        while len(unknowns) < n:  # unknowns at least 1 % beyond the window from every library lattice
            u = random_crystal(rng, name=f"unknown{len(unknowns)}")
            if distance(u) > w + 0.01:
                unknowns.append(u)
        for k in range(n):
            cases.append(("random", wname, random_ring_list(rng, int(rng.integers(5, 61))), set()))
            g, a = observe(unknowns[k], rng, dilation=1.0)
            if len(g):
                cases.append(("unknown", wname, as_observed(g, a), set(), unknowns[k].meta))
            p = base[int(rng.integers(len(base)))]
            g, a = observe(p, rng, dilation=float(np.exp(rng.uniform(-w / 2, w / 2))))
            cases.append(("library", wname, as_observed(g, a), {p.phase}))
            if k % 2 == 0:
                p, q = (base[i] for i in rng.choice(len(base), 2, replace=False))
                g1, a1 = observe(p, rng, dilation=float(np.exp(rng.uniform(-w / 2, w / 2))))
                g2, a2 = observe(q, rng, dilation=float(np.exp(rng.uniform(-w / 2, w / 2))), scale=0.7)
                cases.append(("mixture", wname, as_observed(np.r_[g1, g2], np.r_[a1, a2]), {p.phase, q.phase}))
                g2, a2 = observe(unknowns[(k + 1) % n], rng, scale=float(rng.uniform(0.5, 2.0)))
                cases.append(("known+unknown", wname, as_observed(np.r_[g1, g2], np.r_[a1, a2]), {p.phase},
                              unknowns[(k + 1) % n].meta))
            if wname == "standard":  # a library lattice 0.6-1 % off, not near any other library phase
                while True:
                    p = base[int(rng.integers(len(base)))]
                    off = float(rng.uniform(0.006, 0.010)) * float(rng.choice([-1, 1]))
                    look = dataclasses.replace(p, phase="look-alike", d_angstrom=p.d_angstrom * math.exp(off))
                    if distance(look) >= 0.006:
                        break
                g, a = observe(look, rng)
                cases.append(("look-alike", wname, as_observed(g, a), set(), {"of": p.phase, "off": off}))
    return cases


def run(library_phases, cases, settings_for):
    from ringid.identify.score import identify, index_library

    index = index_library(library_phases)
    out = []
    t0 = time.perf_counter()
    for kind, wname, obs, truth, *_ in cases:
        res = identify(obs, index, settings_for(wname))
        out.append((kind, wname, truth, res))
    return out, (time.perf_counter() - t0) / max(len(cases), 1)


def summarize(results):
    rows = {}
    reliability = []
    for kind, wname, truth, res in results:
        key = (kind, wname)
        r = rows.setdefault(key, {"n": 0, "ok": 0})
        r["n"] += 1
        got = set(res.phases)
        if kind in ("random", "unknown", "look-alike"):
            r["ok"] += not got
        elif kind == "library":
            r["ok"] += bool(res.phases) and res.phases[0] in truth
        elif kind == "mixture":
            r["ok"] += got == truth
        else:  # known + unknown
            r["ok"] += got == truth and "unidentified_phase" in res.flags
        for ph, c in zip(res.phases, res.confidence):
            reliability.append((c, ph in truth))
    return rows, reliability


def reliability_table(reliability, edges=(0.0, 0.5, 0.8, 0.9, 0.95, 0.99, 1.0001)):
    c = np.array([x[0] for x in reliability])
    right = np.array([x[1] for x in reliability], bool)
    table = []
    for lo, hi in zip(edges[:-1], edges[1:]):
        sel = (c >= lo) & (c < hi)
        if sel.any():
            table.append((lo, min(hi, 1.0), int(sel.sum()), float(right[sel].mean()), float(c[sel].mean())))
    return table


def rate_figures(library, n, seed):
    """Lattice-free lists at both windows: how many get a phase, and how the smallest
    false-identification probability of a list is distributed (uniform would be calibrated)."""
    from ringid.identify.score import IdentifySettings, identify, index_library
    from ringid.synthetic.ring_lists import random_ring_list

    index = index_library(library)
    print(f"library: {len(library)} phases, {len(index.decoys)} decoys; {n} lists per window")
    for wname, w in WINDOWS.items():
        rng = np.random.default_rng(seed)
        hits, smallest = 0, []
        t0 = time.perf_counter()
        for _ in range(n):
            res = identify(random_ring_list(rng, int(rng.integers(5, 61))), index, IdentifySettings(dilation_window=w))
            hits += bool(res.phases)
            p = [c.false_identification_probability for c in res.candidates]
            smallest.append(min([x for x in p if math.isfinite(x)], default=1.0))
        smallest = np.array(smallest)
        shares = ", ".join(f"p<{q}: {np.mean(smallest < q):.3f}" for q in (0.01, 0.05, 0.1, 0.3))
        print(f"{wname:<9} reported {hits}/{n}; {shares}; {1000 * (time.perf_counter() - t0) / n:.0f} ms per list")


def indexing_figures(n, seed):
    """How often one cell (single_lattice) indexes a lattice-free list, by number of rings."""
    from ringid.identify.score import single_lattice
    from ringid.synthetic.ring_lists import random_ring_list

    rng = np.random.default_rng(seed)
    print(f"lattice-free lists indexed by one cell ({n} lists each):")
    for n_rings in (6, 7, 8, 10, 12, 14, 20, 40):
        hits = {"cubic": 0, "hexagonal": 0, "tetragonal": 0}
        for _ in range(n):
            obs = random_ring_list(rng, n_rings)
            found = single_lattice(obs.g_per_nm, np.hypot(obs.g_sigma_per_nm, 1e-3 * obs.g_per_nm))
            if found:
                hits[found["system"]] += 1
        print(f"  {n_rings:>2} rings: " + ", ".join(f"{k} {v}" for k, v in hits.items()))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=100, help="cases of each kind and window")
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--phases", type=int, default=29)
    parser.add_argument("--rate-only", action="store_true",
                        help="only the lattice-free lists: share with a phase, and the smallest false-identification "
                             "probabilities (the figures of the rate claim)")
    args = parser.parse_args()

    from bench_identify import expanded_library
    from ringid.identify.score import IdentifySettings
    from ringid.library.store import load_library
    from ringid.library.store import build_library

    with tempfile.TemporaryDirectory() as tmp:
        build_library(ROOT / "reference_phases", tmp)
        library = load_library(tmp)
    if args.phases > len(library):
        library = expanded_library(library, args.phases)
    if args.rate_only:
        rate_figures(library, args.n, args.seed)
        if len(library) <= 100:
            indexing_figures(100, args.seed)
        return
    cases = make_cases(library, args.n, args.seed)
    results, per_case = run(library, cases, lambda w: IdentifySettings(dilation_window=WINDOWS[w]))
    rows, reliability = summarize(results)
    print(f"library: {len(library)} phases; {len(cases)} cases; {1000 * per_case:.1f} ms per case")
    print(f"{'kind':<15} {'window':<9} {'n':>4}  {'right':>6}")
    for (kind, wname), r in sorted(rows.items()):
        print(f"{kind:<15} {wname:<9} {r['n']:>4}  {r['ok'] / r['n']:>6.3f}")
    print("reliability: confidence bin, reported phases, share right, mean confidence")
    for lo, hi, n, share, mean_c in reliability_table(reliability):
        print(f"  [{lo:.2f}, {hi:.2f})  {n:>5}  {share:.3f}  {mean_c:.3f}")


if __name__ == "__main__":
    main()
