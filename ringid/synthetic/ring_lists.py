"""Synthetic ring lists for testing and benchmarking identification (no image, no profile).

Three kinds of list, all made here at run time from a seeded generator:

- ``random_ring_list``: positions uniform in g, no lattice at all (the null of the
  false-identification claim);
- ``random_crystal``: a crystal of a common structure type (fcc, bcc, hcp, rocksalt, fluorite,
  zincblende, wurtzite, rutile, perovskite, CsCl) or a random low-symmetry cell with random atoms,
  with random lattice parameters and elements, built through ringid's own CIF reader so its
  rings carry kinematic electron intensities: a phase that is not in the library;
- ``observe``: what a pattern of a phase shows: rings above a detection limit in a g range,
  positions with their σ, areas scattered (texture, dynamical scattering), occasionally one strong
  ring lost, rings closer than the resolution merged.

Structure types are written in their International Tables (Vol. A) settings.
"""

from __future__ import annotations

import math
import tempfile
from pathlib import Path

import numpy as np

from ringid.core.model import PhaseRings

# name, space group (H-M), sites (element slot, x, y, z), a range (Å), c/a range or None
STRUCTURE_TYPES = (
    ("fcc", "F m -3 m", ((0, 0, 0, 0),), (3.3, 4.6), None),
    ("bcc", "I m -3 m", ((0, 0, 0, 0),), (2.7, 3.6), None),
    ("hcp", "P 63/m m c", ((0, 1 / 3, 2 / 3, 0.25),), (2.4, 3.6), (1.52, 1.68)),
    ("rocksalt", "F m -3 m", ((0, 0, 0, 0), (1, 0.5, 0.5, 0.5)), (3.9, 6.0), None),
    ("cesium_chloride", "P m -3 m", ((0, 0, 0, 0), (1, 0.5, 0.5, 0.5)), (2.8, 4.2), None),
    ("zincblende", "F -4 3 m", ((0, 0, 0, 0), (1, 0.25, 0.25, 0.25)), (5.0, 6.6), None),
    ("fluorite", "F m -3 m", ((0, 0, 0, 0), (1, 0.25, 0.25, 0.25)), (4.9, 6.0), None),
    ("wurtzite", "P 63 m c", ((0, 1 / 3, 2 / 3, 0), (1, 1 / 3, 2 / 3, 0.38)), (2.9, 3.9), (1.58, 1.66)),
    ("rutile", "P 42/m n m", ((0, 0, 0, 0), (1, 0.305, 0.305, 0)), (4.3, 4.9), (0.60, 0.70)),
    ("perovskite", "P m -3 m", ((0, 0, 0, 0), (1, 0.5, 0.5, 0.5), (2, 0.5, 0.5, 0)), (3.7, 4.2), None),
)
LOW_SYMMETRY_GROUPS = ("P 1 21/c 1", "P n m a", "P 4/m m m", "I 4/m m m", "P 6/m m m", "C 1 2/m 1")
METALS = ("Mg", "Al", "Ti", "V", "Cr", "Mn", "Fe", "Co", "Ni", "Cu", "Zn", "Ga", "Zr", "Nb", "Mo", "Ru", "Rh",
          "Sn", "Ta", "Hf", "W", "Ir", "Ba", "Sr", "La", "Ce", "Y", "In")
ANIONS = ("O", "N", "C", "S", "F", "Cl", "Se", "P", "B")


def random_ring_list(rng: np.random.Generator, n_rings: int, g_range_per_nm=(2.5, 14.0), rel_sigma: float = 5e-4,
                     fwhm_per_nm: float = 0.05):
    """``n_rings`` rings with g uniform in ``g_range_per_nm`` (1/nm), σ_g = rel_sigma·g and
    log-normal areas (σ of ln area 1): rings that no lattice explains."""
    from ringid.identify.score import ObservedRings

    g = np.sort(rng.uniform(*g_range_per_nm, n_rings))
    area = np.exp(rng.normal(0.0, 1.0, n_rings))
    return ObservedRings(g, rel_sigma * g, np.full(n_rings, fwhm_per_nm), area)


def _cif(name, group, cell, sites, u_iso) -> str:
    a, b, c, al, be, ga = cell
    lines = [f"data_{name}", f"_cell_length_a {a:.5f}", f"_cell_length_b {b:.5f}", f"_cell_length_c {c:.5f}",
             f"_cell_angle_alpha {al:.3f}", f"_cell_angle_beta {be:.3f}", f"_cell_angle_gamma {ga:.3f}",
             f"_space_group_name_H-M_alt '{group}'", "loop_", "_atom_site_label", "_atom_site_type_symbol",
             "_atom_site_fract_x", "_atom_site_fract_y", "_atom_site_fract_z", "_atom_site_occupancy",
             "_atom_site_U_iso_or_equiv"]
    for k, (el, x, y, z) in enumerate(sites):
        lines.append(f"{el}{k + 1} {el} {x:.5f} {y:.5f} {z:.5f} 1 {u_iso:.4f}")
    return "\n".join(lines) + "\n"


def random_crystal(rng: np.random.Generator, *, low_symmetry_share: float = 0.3, d_min_angstrom: float = 0.6,
                   name: str = "unknown") -> PhaseRings:
    """The kinematic ring list of a random crystal (a structure type with random cell and
    elements, or with probability ``low_symmetry_share`` a low-symmetry cell with 2-5 random atoms)."""
    from ringid.library.cif import read_crystal
    from ringid.core.errors import RingidError
    from ringid.library.structure import ring_list

    for _ in range(50):
        if rng.random() < low_symmetry_share:
            group = str(rng.choice(LOW_SYMMETRY_GROUPS))
            a, b, c = rng.uniform(3.5, 9.0, 3)
            beta = 90.0
            if group.startswith("P 4") or group.startswith("I 4"):
                b = a
            if group.startswith("P 6"):
                b, gamma = a, 120.0
            else:
                gamma = 90.0
            if group.endswith(" 1") and "2" in group:
                beta = float(rng.uniform(92.0, 112.0))
            cell = (a, b, c, 90.0, beta, gamma)
            n_atoms = int(rng.integers(2, 6))
            sites = [(str(rng.choice(METALS if k % 2 == 0 else ANIONS)), *rng.uniform(0, 1, 3)) for k in range(n_atoms)]
            kind = f"random {group}"
        else:
            kind, group, slots, a_range, c_over_a = STRUCTURE_TYPES[int(rng.integers(len(STRUCTURE_TYPES)))]
            a = float(rng.uniform(*a_range))
            c = a * float(rng.uniform(*c_over_a)) if c_over_a else a
            gamma = 120.0 if "6" in group.split()[1] else 90.0
            cell = (a, a, c, 90.0, 90.0, gamma)
            second = str(rng.choice(METALS if kind == "perovskite" else ANIONS))
            elements = [str(rng.choice(METALS)), second, "O"]
            sites = [(elements[slot], x, y, z) for slot, x, y, z in slots]
        text = _cif(name, group, cell, sites, float(rng.uniform(0.004, 0.015)))
        with tempfile.TemporaryDirectory() as tmp:
            path = Path(tmp) / f"{name}.cif"
            path.write_text(text, encoding="utf-8")
            try:
                rings, _, _ = ring_list(read_crystal(path), d_min_angstrom)
            except RingidError:  # e.g. random atoms too close: draw again
                continue
        meta = dict(rings.meta, structure_type=kind, space_group=group, cell=cell)
        return PhaseRings(name, rings.d_angstrom, rings.intensity, rings.multiplicity, rings.hkl,
                          rings.double_diffraction, meta)
    raise RuntimeError("no valid random crystal in 50 draws")


def observe(rings: PhaseRings, rng: np.random.Generator, *, dilation: float = 1.0, g_range_per_nm=(2.5, 14.0),
            detection_fraction: float = 0.01, area_scatter_ln: float = 0.4, lose_strong_ring: float = 0.2,
            rel_sigma: float = 5e-4, resolution_rel: float = 0.004, scale: float = 1.0, max_rings: int = 60):
    """The rings a pattern of ``rings`` shows, lattice scaled by ``dilation`` (d_obs = α·d).

    Rings with intensity ≥ ``detection_fraction`` of the strongest in range are seen, their
    areas scattered log-normally by ``area_scatter_ln``; with probability ``lose_strong_ring``
    one of the three strongest is lost (dynamical scattering, texture); rings closer than
    ``resolution_rel``·g merge; at most ``max_rings`` strongest are kept. Returns
    (g_per_nm, area) arrays, sorted by g.
    """
    keep = ~rings.double_diffraction & (rings.intensity > 0)
    g = rings.g_per_nm[keep] / dilation
    inten = rings.intensity[keep] * scale
    inside = (g >= g_range_per_nm[0]) & (g <= g_range_per_nm[1])
    g, inten = g[inside], inten[inside]
    if len(g) == 0:
        return np.zeros(0), np.zeros(0)
    order = np.argsort(g)
    g, inten = g[order], inten[order]
    merged_g, merged_a = [g[0]], [inten[0]]
    for gi, ai in zip(g[1:], inten[1:]):
        if gi - merged_g[-1] < resolution_rel * gi:
            total = merged_a[-1] + ai
            merged_g[-1] = (merged_g[-1] * merged_a[-1] + gi * ai) / total if total > 0 else gi
            merged_a[-1] = total
        else:
            merged_g.append(gi)
            merged_a.append(ai)
    g, area = np.array(merged_g), np.array(merged_a)
    area = area * np.exp(rng.normal(0.0, area_scatter_ln, len(area)))
    seen = area >= detection_fraction * area.max()
    if rng.random() < lose_strong_ring and seen.sum() > 3:
        strongest = np.argsort(-np.where(seen, area, -np.inf))[:3]
        seen[int(rng.choice(strongest))] = False
    g, area = g[seen], area[seen]
    if len(g) > max_rings:
        top = np.sort(np.argsort(-area)[:max_rings])
        g, area = g[top], area[top]
    g = g * (1.0 + rel_sigma * rng.standard_normal(len(g)))
    order = np.argsort(g)
    return g[order], area[order]


def as_observed(g, area, rel_sigma: float = 5e-4, fwhm_per_nm: float = 0.05):
    """ObservedRings from (g, area) arrays with σ_g = rel_sigma·g."""
    from ringid.identify.score import ObservedRings

    g, area = np.asarray(g, float), np.asarray(area, float)
    order = np.argsort(g)
    return ObservedRings(g[order], rel_sigma * g[order], np.full(len(g), fwhm_per_nm), area[order])


def lattice_distance(a: PhaseRings, b: PhaseRings, n_strong: int = 6, g_range_per_nm=(2.5, 14.0)) -> float:
    """Smallest relative scale |ln α| at which the ``n_strong`` strongest rings of ``a`` in
    ``g_range_per_nm`` all lie within 0.3 % of rings of ``b`` (inf if no scale does): how close
    ``a`` comes to a look-alike of ``b``, or to ``b`` with extra rings."""
    keep_a = (
        ~a.double_diffraction
        & (a.intensity > 0)
        & (a.g_per_nm >= g_range_per_nm[0])
        & (a.g_per_nm <= g_range_per_nm[1])
    )
    ga, ia = a.g_per_nm[keep_a], a.intensity[keep_a]
    gb = np.sort(b.g_per_nm[~b.double_diffraction & (b.intensity > 0)])
    if len(ga) == 0 or len(gb) == 0:
        return math.inf
    strong = ga[np.argsort(-ia)[:n_strong]]
    best = math.inf
    for ref in gb:  # the strongest ring of a put on each ring of b
        alpha = strong[0] / ref
        x = strong / alpha
        k = np.clip(np.searchsorted(gb, x), 1, len(gb) - 1)
        near = np.minimum(np.abs(gb[k] - x), np.abs(gb[k - 1] - x)) / x
        if np.all(near < 0.003):
            best = min(best, abs(math.log(alpha)))
    return best
