"""The phase library: kinematic electron ring lists computed from CIF files.

What this stage does: for one crystal (``ringid.library.cif.Crystal``) enumerate every reflection
with d ≥ d_min, compute its kinematic electron structure factor

    F(hkl) = Σ_j occ_j · f_j(s) · exp(−B_j s²) · exp(2πi (h x_j + k y_j + l z_j)),
    s = sinθ/λ = 1/(2d),  B_j = 8π² U_j,

over every atom of the unit cell, with the five-Gaussian electron scattering factors
f(s) = Σ_{i=1..5} a_i exp(−b_i s²) of International Tables for Crystallography Vol. C
(2011), Table 4.3.2.2 (Peng, Ren, Dudarev & Whelan 1996, Acta Cryst. A52, 257), taken
from gemmi's ``Element.c4322``; merge reflections of equal d into rings; and give each
ring the intensity Σ|F|²·d² (its integrated area over g in an azimuthal-mean profile:
Vainshtein 1964, Structure Analysis by Electron Diffraction) normalised so that the
strongest ring is 100.

Kinematically forbidden reflections that are the sum of two allowed reflections of the
same phase (glide, screw and special-position absences; never lattice-centring absences)
can appear by double diffraction; rings made only of them are kept with intensity 0 and
``double_diffraction = True``.

What it does not do: dynamical intensities, texture or absorption.

The library's files are written and read by ``ringid.library.store``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ringid.core.errors import RingidError
from ringid.core.model import PhaseRings

DEFAULT_D_MIN_ANGSTROM = 0.5
DEFAULT_MERGE_TOLERANCE = 1e-4  # relative difference in d below which reflections share a ring

#: Most reflections (the full sphere d ≥ d_min, Friedel mates included, as estimated by
#: estimated_reflections) a phase may have; the config key library.max_reflections. Measured
#: (benchmarks/bench_library_memory.py): building a phase of about 1.0 million reflections peaks
#: at 174-206 MB (a 33 MB interpreter + 140-180 bytes per reflection), under half the 500 MB
#: declared for a cheap workflow job.
DEFAULT_MAX_REFLECTIONS = 1_000_000

#: Reflections with |F|² below this fraction of the strongest are kinematically forbidden.
FORBIDDEN_F2_FRACTION = 1e-10

SCATTERING_TABLE = "ITC Vol. C Table 4.3.2.2 (Peng et al. 1996), gemmi Element.c4322"


@dataclass(frozen=True)
class Reflections:
    """Every reflection of a phase with d ≥ d_min (Friedel mates included).

    hkl has shape (n, 3); d_angstrom and f_squared (|F|², Å²) shape (n,).
    """

    hkl: np.ndarray
    d_angstrom: np.ndarray
    f_squared: np.ndarray


# --------------------------------------------------------------------------- physics


def electron_scattering_factors(elements, s2_per_angstrom2: np.ndarray) -> np.ndarray:
    """Electron scattering factors f_e(s) in Å for each element at s² = (sinθ/λ)² (1/Å²).

    Five-Gaussian fit of ITC Vol. C Table 4.3.2.2 (gemmi ``Element.c4322``), valid for
    s ≤ 2 Å⁻¹, neutral atoms, without the relativistic factor γ. Returns shape
    (len(s2), len(elements)).
    """
    import gemmi

    out = np.empty((len(s2_per_angstrom2), len(elements)))
    for j, symbol in enumerate(elements):
        coefs = np.asarray(gemmi.Element(symbol).c4322.get_coefs(), dtype=float)
        a, b = coefs[:5], coefs[5:]
        out[:, j] = np.exp(-np.multiply.outer(s2_per_angstrom2, b)) @ a
    return out


def reciprocal_metric(cell) -> np.ndarray:
    """Reciprocal metric tensor G* (1/Å²) so that 1/d² = hᵀ G* h."""
    a, b, c, al, be, ga = cell
    ca, cb, cg = (math.cos(math.radians(x)) for x in (al, be, ga))
    g = np.array([[a * a, a * b * cg, a * c * cb], [a * b * cg, b * b, b * c * ca], [a * c * cb, b * c * ca, c * c]])
    return np.linalg.inv(g)


def estimated_reflections(cell, d_min_angstrom: float) -> float:
    """Reflections with d ≥ d_min (full sphere, Friedel mates included), estimated as (4π/3)·V/d_min³.

    The reciprocal lattice points inside the sphere |g| ≤ 1/d_min: the sphere's volume
    (4π/3)/d_min³ divided by the reciprocal cell's volume 1/V (V in Å³). Centring absences are
    not taken off: every index is enumerated before they are.
    """
    import gemmi

    return 4.0 * math.pi / 3.0 * gemmi.UnitCell(*cell).volume / d_min_angstrom**3


def check_reflection_count(crystal, d_min_angstrom: float, max_reflections: int) -> None:
    """Refuse, before any enumeration, a phase whose estimated reflection count exceeds max_reflections."""
    n = estimated_reflections(crystal.cell, d_min_angstrom)
    if n > max_reflections:
        raise RingidError(
            crystal.path,
            f"cell volume {crystal.volume_angstrom3:,.0f} Å³ would have ~{n:,.0f} reflections to d_min = "
            f"{d_min_angstrom:g} Å, more than library.max_reflections = {max_reflections:,}; raise d_min, or "
            "library.max_reflections (--max-reflections) if the memory allows (about 200 bytes per reflection)",
        )


def enumerate_hkl(cell, d_min_angstrom: float) -> tuple[np.ndarray, np.ndarray]:
    """All integer hkl ≠ 000 with d ≥ d_min; returns (hkl (n, 3) int, d (n,) Å).

    Ordered by h, then k, then l. One h at a time, so the work arrays hold one (k, l) plane of
    the index box, not the whole box.
    """
    gstar = reciprocal_metric(cell)
    g_max = 1.0 / d_min_angstrom
    # |h| = |g · a| ≤ g_max |a|, likewise k, l
    lim = np.floor(np.array(cell[:3]) * g_max).astype(int)
    k_axis, l_axis = (np.arange(-n, n + 1) for n in lim[1:])
    plane = np.stack(np.meshgrid(np.zeros(1, dtype=k_axis.dtype), k_axis, l_axis, indexing="ij"), axis=-1)
    plane = plane.reshape(-1, 3)
    hkl_parts, d_parts = [], []
    for h in range(-lim[0], lim[0] + 1):
        plane[:, 0] = h
        inv_d2 = np.einsum("ni,ij,nj->n", plane, gstar, plane)
        keep = (inv_d2 > 0) & (inv_d2 <= g_max**2 * (1 + 1e-12))
        hkl_parts.append(plane[keep])
        d_parts.append(1.0 / np.sqrt(inv_d2[keep]))
    return np.concatenate(hkl_parts), np.concatenate(d_parts)


def centring_absent(hkl: np.ndarray, centring_vectors) -> np.ndarray:
    """True where the lattice centring extinguishes hkl (h·t not an integer for some t)."""
    absent = np.zeros(len(hkl), dtype=bool)
    for t in centring_vectors:
        if any(t):
            phase = hkl @ np.asarray(t)
            absent |= np.abs(phase - np.round(phase)) > 1e-6
    return absent


def structure_factors(crystal, hkl: np.ndarray, d_angstrom: np.ndarray) -> np.ndarray:
    """Kinematic electron structure factors F(hkl) (complex, Å) of every reflection.

    Vectorised over reflections × atoms; the element scattering factors are evaluated
    once per element and reflection.
    """
    s2 = 0.25 / d_angstrom**2
    unique = sorted(set(crystal.elements))
    col = np.array([unique.index(e) for e in crystal.elements])
    b_iso = 8.0 * math.pi**2 * crystal.u_iso_angstrom2  # (n_at,)
    F = np.empty(len(hkl), dtype=complex)
    # reflections per chunk: each (reflections × atoms) work array holds 2^20 numbers (8 MB)
    chunk = max(1, 2**20 // max(1, len(crystal.elements)))
    for start in range(0, len(hkl), chunk):
        sl = slice(start, start + chunk)
        f_el = electron_scattering_factors(unique, s2[sl])  # (chunk, n_el)
        weight = f_el[:, col] * crystal.occupancy * np.exp(-np.multiply.outer(s2[sl], b_iso))
        phase = 2.0 * math.pi * (hkl[sl].astype(float) @ crystal.fract.T)
        F[sl] = (weight * np.cos(phase)).sum(axis=1) + 1j * (weight * np.sin(phase)).sum(axis=1)
    return F


def compute_reflections(crystal, d_min_angstrom: float = DEFAULT_D_MIN_ANGSTROM,
                        max_reflections: int = DEFAULT_MAX_REFLECTIONS) -> Reflections:
    """Every reflection not extinguished by the lattice centring, with its |F|².

    Raises RingidError before enumerating when the estimate exceeds max_reflections.
    """
    check_reflection_count(crystal, d_min_angstrom, max_reflections)
    hkl, d = enumerate_hkl(crystal.cell, d_min_angstrom)
    keep = ~centring_absent(hkl, crystal.centring_vectors)
    hkl, d = hkl[keep], d[keep]
    f2 = np.abs(structure_factors(crystal, hkl, d)) ** 2
    return Reflections(hkl=hkl, d_angstrom=d, f_squared=f2)


#: Forbidden reflections tried together against one block of 64 partners in
#: double_diffraction_possible (bounds its work arrays to about 50 MB).
_DD_CANDIDATE_CHUNK = 16384


def double_diffraction_possible(hkl: np.ndarray, forbidden: np.ndarray) -> np.ndarray:
    """For each forbidden reflection, whether it is the sum of two allowed reflections.

    Both partners must lie in the enumerated set (d ≥ d_min). A sum of allowed reflections
    lies in the integer lattice they generate, so forbidden reflections outside it (a hidden
    lattice centring, as in a P1 description of a centred structure) are settled at once;
    for the others low-order partners are tried first, which settles nearly every case after
    one pass.
    """
    allowed = hkl[~forbidden]
    cand_idx = np.flatnonzero(forbidden)
    result = np.zeros(len(hkl), dtype=bool)
    if len(cand_idx) == 0 or len(allowed) == 0:
        return result
    off = int(np.abs(hkl).max()) * 2 + 1
    base = 2 * off + 1

    def key(v):
        v = v + off
        return (v[..., 0] * base + v[..., 1]) * base + v[..., 2]

    allowed_keys = np.sort(key(allowed))
    order = np.argsort(np.einsum("ni,ni->n", allowed, allowed))  # crude |h| order for speed
    partners = allowed[order]
    cand_idx = cand_idx[_in_lattice(hkl[cand_idx], _lattice_basis(partners))]
    for chunk in range(0, len(cand_idx), _DD_CANDIDATE_CHUNK):
        todo = cand_idx[chunk : chunk + _DD_CANDIDATE_CHUNK]
        for start in range(0, len(partners), 64):
            if len(todo) == 0:
                break
            p = partners[start : start + 64]
            rest = hkl[todo][:, None, :] - p[None, :, :]  # (n_todo, n_p, 3)
            k = key(rest)
            pos = np.searchsorted(allowed_keys, k)
            pos = np.clip(pos, 0, len(allowed_keys) - 1)
            hit = (allowed_keys[pos] == k).any(axis=1)
            result[todo[hit]] = True
            todo = todo[~hit]
    return result


def _lattice_basis(vectors: np.ndarray) -> list:
    """Echelon basis of the integer lattice the integer 3-vectors generate.

    Slot c holds the basis row whose first non-zero entry (positive) is in column c, or None.
    Rows are combined by unimodular steps (extended Euclid), so the lattice is exactly theirs.
    The first vectors are inserted, then every vector is tested and the ones outside are
    inserted until none is (each insertion makes the lattice strictly finer, so this ends).
    """
    basis: list = [None, None, None]
    pending = vectors[:64]
    while len(pending):
        for v in pending:
            _insert_lattice_vector(basis, [int(x) for x in v])
        pending = vectors[~_in_lattice(vectors, basis)][:64]
    return basis


def _insert_lattice_vector(basis: list, v: list[int]) -> None:
    for c in range(3):
        if v[c] == 0:
            continue
        row = basis[c]
        if row is None:
            basis[c] = v if v[c] > 0 else [-x for x in v]
            return
        g, x, y = _extended_gcd(row[c], v[c])  # x·row[c] + y·v[c] = g > 0
        a, b = row[c] // g, v[c] // g
        basis[c] = [x * r + y * w for r, w in zip(row, v)]
        v = [b * r - a * w for r, w in zip(row, v)]  # column c is now 0; det [[x, y], [b, -a]] = -1


def _extended_gcd(a: int, b: int) -> tuple[int, int, int]:
    """(g, x, y) with x·a + y·b = g = gcd(a, b) > 0, for a > 0."""
    x0, y0, x1, y1 = 1, 0, 0, 1
    while b:
        q, a, b = a // b, b, a % b
        x0, x1 = x1, x0 - q * x1
        y0, y1 = y1, y0 - q * y1
    return (a, x0, y0) if a > 0 else (-a, -x0, -y0)


def _in_lattice(vectors: np.ndarray, basis: list) -> np.ndarray:
    """Whether each integer 3-vector is an integer combination of the echelon basis rows."""
    v = np.array(vectors, dtype=np.int64)
    inside = np.ones(len(v), dtype=bool)
    for c, row in enumerate(basis):
        if row is None:
            inside &= v[:, c] == 0
            continue
        inside &= v[:, c] % row[c] == 0
        v -= np.outer(v[:, c] // row[c], np.asarray(row, dtype=np.int64))
    return inside & ~v.any(axis=1)


def hkl_label(hkl, hexagonal: bool) -> str:
    """Index label, four-index (h k i l) with i = −(h+k) on hexagonal axes."""
    h, k, l = (int(x) for x in hkl)
    if hexagonal:
        return f"{h} {k} {-(h + k)} {l}"
    return f"{h} {k} {l}"


def _representative(hkl: np.ndarray, f2: np.ndarray) -> np.ndarray:
    """The index that names a ring: strongest family, most non-negative indices, then largest."""
    strength = np.round(f2 / max(f2.max(), 1e-300), 3)  # robust to rounded coordinates (0.3333)
    nonneg = (hkl >= 0).sum(axis=1)
    order = np.lexsort((hkl[:, 2], hkl[:, 1], hkl[:, 0], nonneg, strength))
    return hkl[order[-1]]


def ring_list(
    crystal, d_min_angstrom: float = DEFAULT_D_MIN_ANGSTROM, merge_tolerance: float = DEFAULT_MERGE_TOLERANCE,
    max_reflections: int = DEFAULT_MAX_REFLECTIONS,
):
    """Compute the ring list of a crystal (refused up front above max_reflections, see compute_reflections).

    Returns
    -------
    rings : PhaseRings
    reflections : Reflections
    ring_of_reflection : ndarray of int
        Ring index of each reflection (−1 for a forbidden reflection that no double
        diffraction can light up).
    """
    refl = compute_reflections(crystal, d_min_angstrom, max_reflections)
    if len(refl.d_angstrom) == 0:
        raise RingidError(crystal.path, f"no reflection with d ≥ {d_min_angstrom} Å")
    f2max = refl.f_squared.max()
    if not f2max > 0:
        raise RingidError(crystal.path, "every structure factor is zero")
    forbidden = refl.f_squared < FORBIDDEN_F2_FRACTION * f2max
    dd = double_diffraction_possible(refl.hkl, forbidden)
    usable = ~forbidden | dd

    order = np.argsort(-refl.d_angstrom, kind="stable")
    order = order[usable[order]]
    d_sorted = refl.d_angstrom[order]
    # merge: a new ring starts where d falls more than the tolerance below the ring's first d
    ring_id = np.empty(len(order), dtype=int)
    current, first = -1, None
    for i, d in enumerate(d_sorted):
        if first is None or (first - d) > merge_tolerance * first:
            current += 1
            first = d
        ring_id[i] = current
    n_rings = current + 1
    ring_of_reflection = np.full(len(refl.d_angstrom), -1)
    ring_of_reflection[order] = ring_id

    hexagonal = crystal.is_hexagonal_axes
    d_ring = np.zeros(n_rings)
    inten = np.zeros(n_rings)
    f2sum = np.zeros(n_rings)
    mult = np.zeros(n_rings, dtype=int)
    is_dd = np.zeros(n_rings, dtype=bool)
    labels = []
    bounds = np.flatnonzero(np.diff(ring_id)) + 1
    for r, members in enumerate(np.split(order, bounds)):
        allowed = members[~forbidden[members]]
        d_ring[r] = refl.d_angstrom[members].mean()
        mult[r] = len(allowed) if len(allowed) else len(members)
        if len(allowed):
            f2sum[r] = refl.f_squared[allowed].sum()
            inten[r] = (refl.f_squared[allowed] * refl.d_angstrom[allowed] ** 2).sum()
            labels.append(hkl_label(_representative(refl.hkl[allowed], refl.f_squared[allowed]), hexagonal))
        else:
            is_dd[r] = True
            labels.append(hkl_label(_representative(refl.hkl[members], np.ones(len(members))), hexagonal))
    inten = 100.0 * inten / inten.max()
    rings = PhaseRings(
        phase=crystal.phase,
        d_angstrom=d_ring,
        intensity=inten,
        multiplicity=mult,
        hkl=tuple(labels),
        double_diffraction=is_dd,
        meta={"f_squared_sum": f2sum},
    )
    return rings, refl, ring_of_reflection
