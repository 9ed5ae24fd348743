"""Accuracy of the ring stage on synthetic profiles (not a timed test; figures quoted in the README).

    python benchmarks/bench_ring_accuracy.py

1. The 30-ring worst case of bench_rings.py: how many rings are kept, how many are false (more
   than one FWHM from every true ring), for three noise seeds.
2. Size bias of dense broad rings: the 21 CeO2 rings of pyFAI's calibrant table between 1 and
   14.5 nm⁻¹ as pseudo-Voigts (η = 0.5) of FWHM 0.1–0.6 nm⁻¹ on a steep tail, instrument
   pV(0.06 nm⁻¹, η = 0.5): size found / size of a perfect fit (the same instrument removal), with
   the estimated background and with the true one.
3. Scherrer sizes on the four-ring profiles of tests/test_size.py (Lorentzian size broadening and
   the physical sphere line profile, each ⊗ the instrument) over ten noise seeds: mean and spread
   of D found / D − 1, and of the pulls (D found − D) / σ_D; and D found with the true background.
4. Crystallinity of nanocrystal rings (sphere line profile ⊗ instrument) at the d-spacings of
   pyFAI's CeO2, TiO2 (rutile) and alpha_Al2O3 tables, without and with an a-TiO2 halo
   (Faber–Ziman pair sum, ``ringid.synthetic.amorphous``): the labels over two seeds, and under every
   broad component (halo or unresolved band) the model's χ²_ν and residual beyond the noise as
   a fraction of the signal; the same for real halos (a-Si + Au rings, a-Si, a-CuZr).
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "benchmarks"))
sys.path.insert(0, str(ROOT / "tests"))


def thirty_rings() -> None:
    import bench_rings as b

    from ringid.profile.rings import fit_rings

    rng = np.random.default_rng(0)  # the draws of bench_rings.cases(): positions, then amplitudes
    pos = np.sort(rng.uniform(2.5, 13.0, 30))
    expected = b.cases()["worst case: 30 rings"]
    for seed in (1, 2, 3):
        fit = fit_rings(b._profile(expected, seed), instrument=b.INSTRUMENT)
        found = np.array([r.g_per_nm for r in fit.rings])
        fwhm = np.array([r.fwhm_per_nm for r in fit.rings])
        false = int((np.abs(found[:, None] - pos[None, :]).min(axis=1) > fwhm).sum())
        print(f"30 rings, seed {seed}: {found.size} kept, {false} false")


def dense_size_bias() -> None:
    from pyFAI.calibrant import get_calibrant

    from ringid.core.model import Profile
    from ringid.profile.rings import analyze_profile, fit_rings, pseudo_voigt
    from ringid.sample.size import K_SPHERE_DIAMETER, InstrumentProfile, sample_breadth, sample_size

    d = np.asarray(get_calibrant("CeO2").dspacing, float)  # source: pyFAI calibrant table CeO2 (Å)
    g = np.arange(0.5, 14.9, 0.005)
    g_rings = np.sort(10.0 / d[(10.0 / d > 1.0) & (10.0 / d < 14.5)])
    inst = InstrumentProfile(0.06, 0.0, 0.5)
    tail = 3e3 * g**-1.5 + 30.0 * np.exp(-g / 4.0) + 4.0
    areas = 20.0 * (g_rings[0] / g_rings) ** 2
    for fwhm in (0.1, 0.2, 0.3, 0.45, 0.6):
        truth = K_SPHERE_DIAMETER / float(sample_breadth(fwhm, 0.5, 0.06, 0.5))
        est, known = [], []
        for seed in range(3):
            rng = np.random.default_rng(seed)
            pixels = np.pi * 100.0 * g
            counts = rng.poisson(
                (tail + sum(pseudo_voigt(g, g0, fwhm, 0.5, a) for g0, a in zip(g_rings, areas))) * pixels
            )
            prof = Profile(g, counts / pixels, np.sqrt(np.maximum(counts, 1)) / pixels)
            est.append(analyze_profile(prof, instrument=inst).size.size_nm / truth)
            known.append(sample_size(fit_rings(prof, tail, instrument=inst).rings, inst)[0].size_nm / truth)
        print(f"CeO2 FWHM {fwhm:.2f} 1/nm (D = {truth:.2f} nm): estimated background {np.mean(est):.3f}, "
              f"true background {np.nanmean(known):.3f}")


def scherrer_bias(seeds: int = 10) -> None:
    from test_size import _lorentzian_size, _size_background, _size_profile, sphere_line_profile

    from ringid.profile.rings import analyze_profile, fit_rings
    from ringid.sample.size import InstrumentProfile, sample_size

    inst = InstrumentProfile(0.03, 0.0, 0.5)  # the profiles of tests/test_size.py
    for name, shape in (("Lorentzian", _lorentzian_size), ("sphere", sphere_line_profile)):
        for diameter in (3.0, 5.0, 10.0, 20.0, 30.0):
            ratio, pull, known = [], [], []
            for seed in range(seeds):
                profile = _size_profile(diameter, inst, np.random.default_rng(100 + seed), shape)
                size = analyze_profile(profile, instrument=inst).size
                ratio.append(size.size_nm / diameter - 1.0)
                pull.append((size.size_nm - diameter) / size.size_sigma_nm)
                fit = fit_rings(profile, _size_background(profile.g_per_nm), instrument=inst)
                known.append(sample_size(fit.rings, inst)[0].size_nm / diameter - 1.0)
            print(
                f"Scherrer, {name} {diameter:.0f} nm: D {100 * np.mean(ratio):+.1f} % "
                f"(sd {100 * np.std(ratio):.1f} %), "
                f"pull mean {np.mean(pull):+.1f}, sd {np.std(pull):.1f}; with the true background "
                f"{100 * np.mean(known):+.1f} % ({seeds} seeds)"
            )


def _broad_misfits(a, profile) -> list[str]:
    """χ²_ν and residual/signal under each broad component of an analysis (ringid.profile.rings.misfit_under)."""
    from ringid.profile.background import valid_mask
    from ringid.profile.rings import misfit_under

    ok = valid_mask(profile.intensity, profile.sigma)
    out = []
    for r in a.rings:
        if r.kind in ("halo", "band"):
            chi2, n, fraction = misfit_under(profile.g_per_nm, profile.intensity, profile.sigma, ok, a.background,
                                             a.model, r.g_per_nm, r.fwhm_per_nm)
            out.append(f"{r.kind} {r.g_per_nm:.2f}: χ²_ν {chi2 / n:.1f}, {100 * fraction:.0f} %")
    return out


def nanocrystal_labels() -> None:
    from test_crystallinity import INSTRUMENT, TAIL, _a_tio2_halo, _halo, _nano_rings_of, _profile, _sharp_rings

    from ringid.profile.rings import analyze_profile

    def run(expected, seed):
        profile = _profile(expected, seed)
        a = analyze_profile(profile, instrument=INSTRUMENT)
        return f"{a.crystallinity.label} {_broad_misfits(a, profile)}"

    halo = _a_tio2_halo(0.8)
    for table in ("CeO2", "TiO2", "alpha_Al2O3"):
        for diameter in (4.0, 6.0, 8.0):
            rings = _nano_rings_of(table, diameter, 6.0)
            for name, expected in (("no halo", TAIL + rings), ("with a-TiO2 halo", TAIL + rings + halo)):
                for seed in (1, 2):
                    print(f"{table:12s} {diameter:.0f} nm, {name}, seed {seed}: {run(expected, seed)}")
    for name, expected in (("a-Si + Au rings", TAIL + _halo(0.3) + _sharp_rings(1.0)), ("a-Si", TAIL + _halo(0.3)),
                           ("a-CuZr", TAIL + _halo(0.3, {"Cu": 0.5, "Zr": 0.5}, 2.8))):
        for seed in (1, 2):
            print(f"{name}, seed {seed}: {run(expected, seed)}")


if __name__ == "__main__":
    thirty_rings()
    scherrer_bias()
    dense_size_bias()
    nanocrystal_labels()
