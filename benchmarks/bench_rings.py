"""Benchmark of the ring stage: background + detection + fitting of one 1D profile.

Targets (docs/design.md): < 50 ms typical, < 200 ms worst case with 30 rings. Prints the median and
the maximum over repeated runs of :func:`ringid.profile.rings.fit_rings` and of the whole
:func:`ringid.profile.rings.analyze_profile` on synthetic profiles (Poisson noise on a power-law +
exponential tail; pseudo-Voigt rings; a Debye-equation halo from :mod:`ringid.synthetic.amorphous`).

    python benchmarks/bench_rings.py [--repeats N]
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np

from ringid.synthetic import amorphous
from ringid.core.model import Profile
from ringid.profile.rings import analyze_profile, fit_rings, pseudo_voigt
from ringid.sample.size import InstrumentProfile

G = np.arange(1.0, 14.0, 0.01)  # 1/nm, 1300 bins
TAIL = 500.0 * G**-2.5 + 0.5 * np.exp(-G / 5.0)
AU = [(4.247, 1.0), (4.904, 0.455), (6.935, 0.235), (8.132, 0.234), (8.494, 0.064)]
INSTRUMENT = InstrumentProfile(0.03, 0.0, 0.5)


def _profile(expected, seed, pixels_per_g=20.0):
    rng = np.random.default_rng(seed)
    pixels = pixels_per_g * G
    counts = rng.poisson(expected * pixels)
    return Profile(G, counts / pixels, np.sqrt(np.maximum(counts, 1)) / pixels)


def cases():
    halo = amorphous.amorphous_halo_profile(G, "Si", n_atoms=1500)
    rings = sum(2 * a * pseudo_voigt(G, g0, 0.03, 0.5) for g0, a in AU)
    nano = sum(2 * a * pseudo_voigt(G, g0, 0.25, 0.5) for g0, a in AU)
    rng = np.random.default_rng(0)
    thirty = sum(
        rng.uniform(0.3, 2.0) * pseudo_voigt(G, g0, 0.03 + 0.002 * g0, 0.5)
        for g0 in np.sort(rng.uniform(2.5, 13.0, 30))
    )
    return {
        "crystalline (5 Au rings)": TAIL + rings,
        "nanocrystalline (5 rings, FWHM 0.25)": TAIL + nano,
        "amorphous (Debye halo)": TAIL + 0.3 * halo,
        "mixed (halo + 5 rings)": TAIL + 0.3 * halo + rings,
        "blank": TAIL,
        "worst case: 30 rings": TAIL + thirty,
    }


def realistic_profiles(repeats):
    """Profiles of the size the image stage gives for a 2048² pattern: 0.1–14.9 nm⁻¹ in
    0.005 nm⁻¹ bins (2960 bins), ≈ π·100·g pixels per bin, steep central-beam tail, and the 21
    CeO2 rings of pyFAI's calibrant table between 1 and 14.5 nm⁻¹."""
    from pyFAI.calibrant import get_calibrant

    d = np.asarray(get_calibrant("CeO2").dspacing, dtype=float)
    g = np.arange(0.1, 14.9, 0.005)
    g_rings = np.sort(10.0 / d[(10.0 / d > 1.0) & (10.0 / d < 14.5)])
    out = {}
    for seed in range(repeats + 1):
        rng = np.random.default_rng(seed)
        area = 20.0 * (g_rings[0] / g_rings) ** 2 * rng.uniform(0.5, 1.5, g_rings.size)
        expected = 3.0e3 * g**-1.5 + 30.0 * np.exp(-g / 4.0) + 4.0
        expected = expected + sum(pseudo_voigt(g, g0, 0.06 + 0.002 * g0, 0.5, a) for g0, a in zip(g_rings, area))
        pixels = np.pi * 100.0 * g
        counts = rng.poisson(expected * pixels)
        out[seed] = Profile(g, counts / pixels, np.sqrt(np.maximum(counts, 1)) / pixels)
    return out


def _time(fn, repeats):
    fn(0)  # warm imports and caches
    times = []
    for seed in range(1, repeats + 1):
        t = time.perf_counter()
        fn(seed)
        times.append(1e3 * (time.perf_counter() - t))
    return statistics.median(times), max(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=10)
    args = parser.parse_args()
    print(f"{'case':40s} {'fit median':>11s} {'fit max':>9s} {'full median':>12s} {'full max':>9s}  rings")
    for name, expected in cases().items():
        profiles = {s: _profile(expected, s) for s in range(args.repeats + 1)}
        fit_med, fit_max = _time(lambda s: fit_rings(profiles[s], instrument=INSTRUMENT), args.repeats)
        full_med, full_max = _time(lambda s: analyze_profile(profiles[s], instrument=INSTRUMENT), args.repeats)
        n = len(fit_rings(profiles[1], instrument=INSTRUMENT).rings)
        print(f"{name:40s} {fit_med:9.1f}ms {fit_max:7.1f}ms {full_med:10.1f}ms {full_max:7.1f}ms  {n}")
    profiles = realistic_profiles(args.repeats)
    inst = InstrumentProfile(0.06, 0.0, 0.5)
    fit_med, fit_max = _time(lambda s: fit_rings(profiles[s], instrument=inst), args.repeats)
    full_med, full_max = _time(lambda s: analyze_profile(profiles[s], instrument=inst), args.repeats)
    n = len(fit_rings(profiles[1], instrument=inst).rings)
    name = "2960 bins, 21 CeO2 rings (2048² size)"
    print(f"{name:40s} {fit_med:9.1f}ms {fit_max:7.1f}ms {full_med:10.1f}ms {full_max:7.1f}ms  {n}")


if __name__ == "__main__":
    main()
