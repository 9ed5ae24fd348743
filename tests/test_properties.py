"""Property tests (hypothesis) of the geometry and fitting code on random valid inputs.

The documented exceptions are ``RingidError`` (bad input, one line) and ``ValueError`` (a value
outside its stated range); anything else on valid input is a bug. Outside checks: numpy's SVD
for the distortion map's semi-axes, gemmi's ``UnitCell.calculate_d`` for d-spacings.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, event, given, settings, strategies as st

from cifgen import cif_text, write_cif
from ringid.core.errors import RingidError

SETTINGS = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])

ellipticities = st.floats(0.0, 0.3)
angles_deg = st.floats(-360.0, 360.0)


# --------------------------------------------------------------------------- image/ellipse.py


@SETTINGS
@given(ellipticities, angles_deg)
def test_distortion_map_preserves_area_and_has_the_stated_semi_axes(eps, ang):
    from ringid.image.ellipse import distortion_matrix, undistortion_matrix

    a = distortion_matrix(eps, ang)
    assert abs(np.linalg.det(a) - 1.0) < 1e-12  # area-preserving (docs/design.md convention)
    sv = np.linalg.svd(a, compute_uv=False)  # outside check: numpy's SVD gives the semi-axes of a unit circle
    assert np.allclose(sv, [1 / math.sqrt(1 - eps), math.sqrt(1 - eps)], rtol=1e-12)
    assert np.allclose(undistortion_matrix(eps, ang) @ a, np.eye(2), atol=1e-12)


@SETTINGS
@given(st.floats(1e-3, 0.3), angles_deg)
def test_ellipse_from_matrix_recovers_the_map(eps, ang):
    from ringid.image.ellipse import compose_distortion, distortion_matrix, ellipse_from_matrix

    e, t = ellipse_from_matrix(distortion_matrix(eps, ang))
    assert abs(e - eps) < 1e-9
    assert -90.0 < t <= 90.0
    diff = (t - ang + 90.0) % 180.0 - 90.0  # the major axis is an undirected line: angle mod 180°
    assert abs(diff) < 1e-6 / eps
    e0, t0 = compose_distortion(eps, ang, 0.0, 0.0)
    assert abs(e0 - eps) < 1e-9 and abs((t0 - t + 90.0) % 180.0 - 90.0) < 1e-6 / eps


@SETTINGS
@given(st.one_of(st.floats(max_value=-1e-9), st.floats(min_value=1.0)), angles_deg)
def test_ellipticity_out_of_range_is_a_value_error(eps, ang):
    from ringid.image.ellipse import distortion_matrix

    with pytest.raises(ValueError):
        distortion_matrix(eps, ang)


@SETTINGS
@given(st.lists(st.floats(20.0, 500.0), min_size=1, max_size=5, unique=True),
       st.integers(8, 36), st.floats(-3, 3), st.floats(-3, 3), st.floats(0.01, 1.0), st.integers(0, 2**31 - 1))
def test_sector_fit_recovers_a_centre_offset(radii, n_sectors, dx, dy, sigma, seed):
    """Positions drawn from the fit's own linear model (centre only) are fitted back within their errors."""
    from ringid.image.ellipse import fit_sector_positions

    rng = np.random.default_rng(seed)
    psi = np.tile(np.linspace(0, 2 * np.pi, n_sectors, endpoint=False), len(radii))
    ring = np.repeat(np.arange(len(radii)), n_sectors)
    r = np.asarray(radii)[ring] + dx * np.cos(psi) + dy * np.sin(psi)
    noisy = r + rng.normal(0, sigma, r.size)
    fit = fit_sector_positions(ring, psi, noisy, np.full(r.size, sigma), len(radii), fit_distortion=False)
    s = math.sqrt(max(fit.covariance[0, 0], fit.covariance[1, 1]))
    assert math.isfinite(fit.delta_x_px) and math.isfinite(fit.rms_px) and np.all(np.isfinite(fit.ring_radius_px))
    # 6σ: the Huber reweighting may down-weight a few honest points; σ from the covariance
    assert abs(fit.delta_x_px - dx) < 6 * s + 1e-9 and abs(fit.delta_y_px - dy) < 6 * s + 1e-9
    exact = fit_sector_positions(ring, psi, r, np.full(r.size, sigma), len(radii), fit_distortion=False)
    assert abs(exact.delta_x_px - dx) < 1e-6 and abs(exact.delta_y_px - dy) < 1e-6
    assert np.allclose(exact.ring_radius_px, radii, atol=1e-6)


@SETTINGS
@given(st.lists(st.floats(30.0, 400.0), min_size=2, max_size=5, unique=True), st.floats(-2, 2), st.floats(-2, 2),
       st.floats(-0.01, 0.01), st.floats(-0.01, 0.01), st.integers(0, 2**31 - 1))
def test_sector_fit_with_distortion_never_raises_and_stays_finite(radii, dx, dy, e1, e2, seed):
    from ringid.image.ellipse import fit_sector_positions

    assume(min(abs(a - b) for i, a in enumerate(radii) for b in radii[i + 1:]) > 1.0)
    rng = np.random.default_rng(seed)
    psi = np.tile(np.linspace(0, 2 * np.pi, 24, endpoint=False), len(radii))
    ring = np.repeat(np.arange(len(radii)), 24)
    rk = np.asarray(radii)[ring]
    r = rk * (1 + e1 * np.cos(2 * psi) + e2 * np.sin(2 * psi)) + dx * np.cos(psi) + dy * np.sin(psi)
    r += rng.normal(0, 0.05, r.size)
    fit = fit_sector_positions(ring, psi, r, np.full(r.size, 0.05), len(radii), fit_distortion=True)
    assert all(math.isfinite(x) for x in (fit.delta_x_px, fit.delta_y_px, fit.e1, fit.e2, fit.rms_px))
    assert abs(fit.e1 - e1) < 1e-3 and abs(fit.e2 - e2) < 1e-3  # 0.05 px noise on radii ≥ 30 px


# --------------------------------------------------------------------------- library/structure.py

cubic_like = st.tuples(st.floats(2.0, 9.0), st.floats(2.0, 9.0), st.floats(2.0, 9.0),
                       st.floats(60.0, 120.0), st.floats(60.0, 120.0), st.floats(60.0, 120.0))


def _valid_cell(cell) -> bool:
    a, b, c, al, be, ga = cell
    ca, cb, cg = (math.cos(math.radians(x)) for x in (al, be, ga))
    return 1 - ca * ca - cb * cb - cg * cg + 2 * ca * cb * cg > 0.05


@SETTINGS
@given(cubic_like, st.floats(0.9, 2.5))
def test_enumerate_hkl_is_complete_and_agrees_with_gemmi(cell, d_min):
    import gemmi

    from ringid.library.structure import enumerate_hkl

    assume(_valid_cell(cell))
    hkl, d = enumerate_hkl(cell, d_min)
    assert len(hkl) == len(d) and np.all(d >= d_min * (1 - 1e-9))
    uc = gemmi.UnitCell(*cell)  # outside check: gemmi's d-spacing calculator
    for i in range(0, len(hkl), max(1, len(hkl) // 50)):
        assert abs(uc.calculate_d(hkl[i].tolist()) - d[i]) < 1e-9 * d[i]
    got = {tuple(h) for h in hkl.tolist()}
    assert all((-h, -k, -l) in got for h, k, l in got)  # Friedel mates
    # completeness: every hkl of a wider box with d ≥ d_min is listed
    lim = int(np.ceil(max(cell[:3]) / d_min / 0.5)) + 1
    lim = min(lim, 14)
    axes = np.arange(-lim, lim + 1)
    box = np.stack(np.meshgrid(axes, axes, axes, indexing="ij"), -1).reshape(-1, 3)
    box = box[np.any(box != 0, axis=1)]
    from ringid.library.structure import reciprocal_metric

    inv_d2 = np.einsum("ni,ij,nj->n", box, reciprocal_metric(cell), box)
    wanted = {tuple(h) for h in box[inv_d2 <= (1 / d_min) ** 2 * (1 - 1e-9)].tolist()}
    assert wanted <= got


ELEMENTS = ["H", "C", "O", "Na", "Al", "Si", "Ti", "Fe", "Ni", "Zr", "Ag", "Ce", "Au", "U"]


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(cubic_like,
       st.lists(st.tuples(st.sampled_from(ELEMENTS), st.floats(0, 0.999), st.floats(0, 0.999), st.floats(0, 0.999),
                          st.floats(0.05, 1.0), st.floats(0.0, 0.05)), min_size=1, max_size=4),
       st.sampled_from(["P 1", "P -1", "P 21/c", "C 2/m", "P m m m", "I m m m", "F m -3 m", "P 63/m m c"]),
       st.floats(0.9, 2.0), st.sampled_from([1e-5, 1e-4, 1e-3]))
def test_ring_list_of_random_structures(tmp_path, cell, atoms, space_group, d_min, tol):
    """Random structures: either a one-line RingidError or a consistent ring list."""
    from ringid.library.cif import read_crystal
    from ringid.library.structure import compute_reflections, ring_list

    assume(_valid_cell(cell))
    a, b, c, al, be, ga = cell
    if space_group in ("F m -3 m",):
        b = c = a
        al = be = ga = 90.0
    elif space_group == "P 63/m m c":
        b, al, be, ga = a, 90.0, 90.0, 120.0
    elif space_group in ("P m m m", "I m m m"):
        al = be = ga = 90.0
    elif space_group in ("P 21/c", "C 2/m"):
        al = ga = 90.0
    rows = tuple((f"{el}{i}", el, round(x, 4), round(y, 4), round(z, 4), round(o, 3), round(u, 4))
                 for i, (el, x, y, z, o, u) in enumerate(atoms))
    path = write_cif(tmp_path, "random", cif_text(cell=(a, b, c, al, be, ga), formula="X",
                                                  symmetry=f"_space_group_name_H-M_alt '{space_group}'\n", atoms=rows))
    try:
        crystal = read_crystal(path)
        rings, refl, ring_of = ring_list(crystal, d_min, tol)
    except RingidError as exc:
        assert "\n" not in str(exc) and str(exc).startswith(f"{path}: ")
        event(f"refused: {exc.problem.split(':')[0][:40]}")
        return
    event("ring list made")
    d = rings.d_angstrom
    assert len(d) >= 1 and np.all(np.diff(d) < 0)  # one ring per d, strongest d first
    assert np.all(d >= d_min * (1 - 1e-9))
    # a ring starts where d falls more than the tolerance below the previous ring's first (largest) d
    listed = ring_of >= 0
    first = np.array([refl.d_angstrom[listed][ring_of[listed] == k].max() for k in range(len(d))])
    assert np.all(np.diff(first) < -tol * first[:-1] * 0.999)
    assert np.isclose(rings.intensity.max(), 100.0) and np.all(rings.intensity >= 0)
    assert np.all(rings.intensity[rings.double_diffraction] == 0)
    assert np.all(rings.multiplicity >= 1)
    # every listed reflection belongs to exactly one ring with its d within the tolerance
    listed = ring_of >= 0
    assert np.all(np.abs(refl.d_angstrom[listed] - d[ring_of[listed]]) <= tol * refl.d_angstrom[listed] * 1.01 + 1e-12)
    assert len(compute_reflections(crystal, d_min).d_angstrom) == len(refl.d_angstrom)


# --------------------------------------------------------------------------- identify/score.py


@pytest.fixture(scope="module")
def library_rings(reference_library):
    from ringid.identify.score import index_library
    from ringid.library.store import load_library

    phases = load_library(reference_library)
    return phases, index_library(phases)


observed = st.lists(st.tuples(st.floats(1.0, 15.0), st.floats(1e-4, 0.05), st.floats(0.01, 1.5), st.floats(1e-3, 1e4)),
                    min_size=0, max_size=25)


@SETTINGS
@given(observed, st.sampled_from([0.005, 0.03]))
def test_identify_random_rings(library_rings, rings, window):
    from ringid.identify.score import IdentifySettings, ObservedRings, identify

    phases, index = library_rings
    arr = np.array(rings, float).reshape(-1, 4)
    obs = ObservedRings(arr[:, 0], arr[:, 1], arr[:, 2], arr[:, 3])
    res = identify(obs, index, IdentifySettings(dilation_window=window))
    names = {p.phase for p in phases}
    assert set(res.phases) <= names and len(set(res.phases)) == len(res.phases) <= 3
    assert len(res.confidence) == len(res.phases) == len(res.alternatives)
    assert all(0.0 <= c <= 1.0 for c in res.confidence)
    assert len(res.assignments) == len(obs)
    assert set(res.unexplained) <= set(range(len(obs)))
    assert all((a is None) == (i in res.unexplained) for i, a in enumerate(res.assignments))
    for a in res.assignments:
        if a is not None:
            assert a.phase in res.phases and a.d_calc_angstrom > 0
    if not res.phases:
        assert "no_phase_identified" in res.flags or "no_rings" in res.flags


@SETTINGS
@given(st.data())
def test_identify_finds_a_planted_phase(library_rings, data):
    """The strongest rings of a library phase, scaled within the window, are identified as it
    (or as a phase the result names as indistinguishable from it)."""
    from ringid.identify.score import IdentifySettings, ObservedRings, identify

    phases, index = library_rings
    ph = data.draw(st.sampled_from(phases))
    allowed = ~ph.double_diffraction & (ph.intensity > 0)
    g = ph.g_per_nm[allowed]
    inten = ph.intensity[allowed]
    inside = (g > 2.0) & (g < 12.0)
    assume(inside.sum() >= 5)
    order = np.argsort(-inten[inside])[:8]
    g, inten = g[inside][order], inten[inside][order]
    alpha = data.draw(st.floats(0.997, 1.003))
    obs = ObservedRings(g / alpha, np.full(g.size, 2e-4 * g.mean()), np.full(g.size, 0.05), inten)
    res = identify(obs, index, IdentifySettings(dilation_window=0.005), g_range_per_nm=(2.0, 12.0))
    named = set(res.phases) | {a for group in res.alternatives for a in group}
    assert ph.phase in named, (ph.phase, res.phases, res.alternatives)
