"""Phase identification: score observed rings against the phase library.

What this stage does: for every library phase, search the lattice dilation α (d_obs = α·d_lib:
camera-constant error plus strain) inside a window set by the calibration, score how well the
phase explains the observed rings, choose the smallest set of phases (up to three) that explains
them, attach a confidence and alternatives, refine lattice parameters, and label every ring with
(phase, hkl) or leave it unexplained. What it does not do: read images or fit profiles.

The score (natural-log odds; larger is better)
-----------------------------------------------
Observed rings i have position g_i (1/nm), uncertainty σ_i, FWHM Γ_i and area A_i; only sharp
rings are used (broad halos carry no lattice). Each ring's positional tolerance is
τ_i = √(σ_i² + (δ·g_i)²), δ the residual calibration error (default 0.1 %). A phase p predicts
allowed rings j at g_j/α with kinematic intensities I_j. Within the observed g range of width G
a ring is either background (density ρ₀ = 1/G) or drawn from phase p with density

    ρ_p(g) = Σ_j w_j · N(g; g_j/α, τ_i),   w_j ∝ √I_j (normalised over the rings in range),

so a phase with hundreds of rings gains less from each chance coincidence than one with a few
(the √ softens intensities, which dynamical scattering and texture distort). A set P of phases
scores

    S(P) = Σ_i v_i · max(u, max_{p∈P} ln(ρ_p(g_i)/ρ₀))                      positions, share
         + Σ_{p∈P} [ −(ln α_p)²/(2σ_α²)                                     dilation prior
                     + Σ_{j visible, not seen} ln(1 − P_det,j)                missing rings
                     − (w_I/2) Σ_{i→j} (ln(A_i/(ŝ_p I_j)) / σ_I)² ]          intensities (weak)
         − κ·|P|                                                             complexity

with v_i = √(A_i/⟨A⟩) (strong rings weigh more, so the explained share of the observed intensity
counts), u = −ln 2 the cost of an unexplained ring, σ_α the dilation prior (half the window by
default), ŝ_p the median observed/predicted intensity ratio of the phase's matched rings, and
P_det,j = P_max·(1 − exp(−ŝ_p I_j / A_lim)) the chance that ring j would have been detected
(A_lim the detection-limit area; P_max = 0.9 because dynamical scattering and texture can hide
any single ring). "Visible" means inside the observed g range. w_I = 0.5 and σ_I = ln 3 make
intensity the weakest term. This adapts the figures of merit of de Wolff (M20: positional error
against the number of possible lines, J. Appl. Cryst. 1, 108, 1968) and Smith & Snyder (F_N:
accuracy × completeness N/N_poss, J. Appl. Cryst. 12, 60, 1979) to patterns with few rings,
working in g (not 2θ) so scores are comparable across voltages.

Selection: phases are added greedily while S grows by more than κ = ln 10 (prior odds of 10:1
against each extra phase) plus the phase's new rings must number at least one; a phase enters the
answer only if alone it scores at least ``accept_score`` above the empty explanation and matches
``min_matched_rings`` rings. An empty answer is better than a wrong one.

Confidence of phase p in the answer P: the posterior probability under equal priors that p,
rather than any other library phase q in its place, is present,
``1 / (1 + Σ_q exp(S(P−p+q) − S(P)) + exp(S(P−p) − S(P)))``. Phases within ln 10 of p are listed
as alternatives (e.g. Au and Ag, 0.17 % apart, unless the calibration separates them); the
separation from the best alternative is also given in σ of the dilation.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .errors import RingidError
from .model import PhaseRings

LN2 = math.log(2.0)


@dataclass(frozen=True)
class IdentifySettings:
    """Scoring parameters (config keys of the ``identify`` section; meanings in the module doc)."""

    dilation_window: float = 0.005  # ± relative lattice scale searched: 0.005 standard, 0.03 nominal
    dilation_sigma: float | None = None  # prior σ of the dilation; default: window / 2
    residual_calibration_error: float = 0.001  # δ, relative error of g after calibration
    unexplained_ring_cost: float = LN2  # −u
    intensity_weight: float = 0.5  # w_I
    intensity_sigma_ln: float = math.log(3.0)  # σ_I: a factor of 3 is one standard deviation
    max_detection_probability: float = 0.9  # P_max
    phase_penalty: float = math.log(10.0)  # κ
    accept_score: float = 10.0  # log-odds above the empty explanation for a phase to be reported
    min_matched_rings: int = 3
    max_phases: int = 3
    alternative_margin: float = math.log(10.0)
    candidate_floor: float = 0.0  # phases.csv lists candidates scoring above this


@dataclass(frozen=True)
class ObservedRings:
    """Observed sharp rings of one sample (arrays of equal length)."""

    g_per_nm: np.ndarray
    g_sigma_per_nm: np.ndarray
    fwhm_per_nm: np.ndarray
    area: np.ndarray
    source: str = ""
    row_index: np.ndarray | None = None  # row of each ring in the table it was read from

    def __len__(self) -> int:
        return len(self.g_per_nm)


@dataclass(frozen=True, eq=False)
class PhaseMatch:
    """The best fit of one phase on its own."""

    phase: str
    score: float  # S({p}) − S(∅)
    dilation: float
    dilation_sigma: float
    ring_evidence: np.ndarray  # ln(ρ_p/ρ₀) per observed ring at the best dilation
    predicted_index: np.ndarray  # library ring index nearest each observed ring (−1 none)
    phase_terms: float  # prior + missing + intensity terms
    n_matched: int
    missing_strong: tuple[str, ...]
    explained_share: float
    scale: float


@dataclass(frozen=True)
class RingAssignment:
    phase: str
    hkl: str
    double_diffraction: bool
    d_calc_angstrom: float


@dataclass(frozen=True)
class Identification:
    """The answer for one sample."""

    phases: tuple[str, ...]
    confidence: tuple[float, ...]
    alternatives: tuple[tuple[str, ...], ...]
    separation_sigma: tuple[float, ...]
    fractions_rough: tuple[float, ...]
    refined: tuple[dict, ...]
    assignments: tuple[RingAssignment | None, ...]
    unexplained: tuple[int, ...]
    candidates: tuple[dict, ...]
    flags: tuple[str, ...] = field(default_factory=tuple)

    @property
    def unexplained_rings(self) -> int:
        return len(self.unexplained)


# --------------------------------------------------------------------------- library arrays


@dataclass(frozen=True)
class _PhaseArrays:
    phase: str
    g: np.ndarray  # allowed rings, sorted by g (1/nm)
    intensity: np.ndarray
    hkl: tuple[str, ...]
    dd_g: np.ndarray  # double-diffraction-only rings
    dd_hkl: tuple[str, ...]
    meta: dict


def _phase_arrays(rings: PhaseRings) -> _PhaseArrays:
    g = 10.0 / rings.d_angstrom
    allowed = ~rings.double_diffraction & (rings.intensity > 0)
    order = np.argsort(g[allowed])
    dd = rings.double_diffraction
    dd_order = np.argsort(g[dd])
    hkl = np.array(rings.hkl, dtype=object)
    return _PhaseArrays(
        phase=rings.phase,
        g=g[allowed][order],
        intensity=rings.intensity[allowed][order],
        hkl=tuple(hkl[allowed][order]),
        dd_g=g[dd][dd_order],
        dd_hkl=tuple(hkl[dd][dd_order]),
        meta=dict(rings.meta, f2=np.asarray(rings.meta.get("f_squared_sum", np.full(len(g), np.nan)))[allowed][order]),
    )


def load_library(library_dir: str | os.PathLike) -> list[PhaseRings]:
    """Every phase of a library folder that built successfully (failed records are skipped)."""
    from .library import list_phases, read_phase_record, read_phase_rings

    phases = []
    for phase in list_phases(library_dir):
        if read_phase_record(library_dir, phase).get("status") == "ok":
            phases.append(read_phase_rings(library_dir, phase))
    if not phases:
        raise RingidError(library_dir, "the phase library has no usable phase")
    return phases


# --------------------------------------------------------------------------- scoring


@dataclass(frozen=True)
class LibraryIndex:
    """All phases' allowed rings in one flat array sorted by (phase, g), for batched scoring."""

    phases: tuple[_PhaseArrays, ...]
    key: np.ndarray  # phase_index * KEY_STRIDE + g
    g: np.ndarray
    sqrt_intensity: np.ndarray
    intensity: np.ndarray
    phase_of: np.ndarray
    start: np.ndarray  # first flat index of each phase
    stop: np.ndarray


KEY_STRIDE = 1.0e4  # 1/nm; larger than any ring's g


def index_library(library: list[PhaseRings]) -> LibraryIndex:
    arrays = tuple(_phase_arrays(p) for p in library)
    counts = np.array([len(a.g) for a in arrays], dtype=int)
    phase_of = np.repeat(np.arange(len(arrays)), counts)
    g = np.concatenate([a.g for a in arrays]) if arrays else np.zeros(0)
    if len(g) and g.max() >= KEY_STRIDE:
        raise RingidError(None, "a library ring has g beyond 1e4 1/nm (d < 0.001 Å)")
    inten = np.concatenate([a.intensity for a in arrays]) if arrays else np.zeros(0)
    stop = np.cumsum(counts)
    return LibraryIndex(arrays, phase_of * KEY_STRIDE + g, g, np.sqrt(inten), inten, phase_of, stop - counts, stop)


def _interval_mask(lib: LibraryIndex, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Flat mask of rings whose library g lies in [lo[p], hi[p]] of their phase p (shape (P,) or (P, M))."""
    n_ph = len(lib.phases)
    base = np.arange(n_ph) * KEY_STRIDE
    lo = np.asarray(lo).reshape(n_ph, -1)
    hi = np.asarray(hi).reshape(n_ph, -1)
    first = np.searchsorted(lib.key, base[:, None] + lo, side="left").ravel()
    last = np.searchsorted(lib.key, base[:, None] + hi, side="right").ravel()
    diff = np.zeros(len(lib.key) + 1, dtype=int)
    ok = last > first
    np.add.at(diff, first[ok], 1)
    np.add.at(diff, last[ok], -1)
    return np.cumsum(diff[:-1]) > 0


def _evidence(lib: LibraryIndex, obs_g, tau, alphas, w_norm, rho0):
    """ln(ρ_p/ρ₀) of each observed ring for each phase and dilation.

    alphas has shape (P, A); returns (evidence (P, A, N), nearest flat ring index (P, A, N)).
    """
    n_ph = len(lib.phases)
    x = alphas[:, :, None] * obs_g[None, None, :]  # library frame: g_i·α
    t = alphas[:, :, None] * tau[None, None, :]
    keys = np.arange(n_ph)[:, None, None] * KEY_STRIDE + x
    idx = np.searchsorted(lib.key, keys)
    total = np.zeros(x.shape)
    best = np.full(x.shape, -1.0)
    nearest = np.full(x.shape, -1, dtype=int)
    norm = 1.0 / (tau[None, None, :] * math.sqrt(2 * math.pi))
    own = np.arange(n_ph)[:, None, None]
    for k in (idx - 1, idx):
        kk = np.clip(k, 0, max(len(lib.key) - 1, 0))
        valid = (k >= 0) & (k < len(lib.key)) & (lib.phase_of[kk] == own)
        z = (x - lib.g[kk]) / t
        dens = np.where(valid, w_norm[kk] * np.exp(-0.5 * z * z) * norm, 0.0)
        total += dens
        better = valid & (dens > best)
        best = np.where(better, dens, best)
        nearest = np.where(better, kk, nearest)
    with np.errstate(divide="ignore"):
        return np.log(total / rho0), nearest


def _match_all(lib: LibraryIndex, obs, tau, v, settings, g_lo, g_hi, a_lim, alphas) -> list[PhaseMatch]:
    """Best single-phase fit of every library phase, batched over phases with numpy."""
    n_ph, n_obs = len(lib.phases), len(obs)
    if n_ph == 0:
        return []
    u = -settings.unexplained_ring_cost
    sigma_alpha = settings.dilation_sigma or settings.dilation_window / 2
    a_min, a_max = alphas.min(), alphas.max()
    # mixture weights √I normalised over each phase's rings that can fall in the observed range
    in_range = _interval_mask(lib, np.full(n_ph, g_lo * a_min), np.full(n_ph, g_hi * a_max))
    wsum = np.bincount(lib.phase_of[in_range], weights=lib.sqrt_intensity[in_range], minlength=n_ph)
    w_norm = lib.sqrt_intensity / np.where(wsum > 0, wsum, np.inf)[lib.phase_of]
    rho0 = 1.0 / (g_hi - g_lo)

    grid = np.broadcast_to(alphas, (n_ph, len(alphas)))
    ev, nearest = _evidence(lib, obs.g_per_nm, tau, grid, w_norm, rho0)
    prior = -(np.log(grid) ** 2) / (2 * sigma_alpha**2)
    pos = (v * np.maximum(u, ev)).sum(axis=2) + prior  # (P, A)
    k = np.argmax(pos, axis=1)
    rows = np.arange(n_ph)
    ev_k, near_k, pos_k = ev[rows, k], nearest[rows, k], pos[rows, k]

    # weighted least-squares dilation from the matched rings
    matched = ev_k >= 0
    g_lib = np.where(matched, lib.g[np.clip(near_k, 0, None)], 0.0)
    wt = np.where(matched, 1.0 / tau**2, 0.0)
    sxy = (wt * obs.g_per_nm * g_lib).sum(axis=1)
    sxx = (wt * g_lib**2).sum(axis=1)
    n_m = matched.sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        inv_alpha = sxy / sxx
        resid = (wt * (obs.g_per_nm - inv_alpha[:, None] * g_lib) ** 2).sum(axis=1)
        chi2 = np.where(n_m > 1, resid / np.maximum(n_m - 1, 1), 1.0)
        sigma_inv = np.sqrt(np.maximum(chi2, 1.0) / sxx)
        refined = np.clip(1.0 / inv_alpha, 1 - settings.dilation_window, 1 + settings.dilation_window)
        alpha_sigma = sigma_inv / inv_alpha**2
    refined = np.where(n_m > 0, refined, alphas[k])
    alpha_sigma = np.where(n_m > 0, alpha_sigma, np.nan)
    ev_r, near_r = _evidence(lib, obs.g_per_nm, tau, refined[:, None], w_norm, rho0)
    ev_r, near_r = ev_r[:, 0], near_r[:, 0]
    pos_r = (v * np.maximum(u, ev_r)).sum(axis=1) - np.log(refined) ** 2 / (2 * sigma_alpha**2)
    keep_grid = pos_r < pos_k
    alpha = np.where(keep_grid, alphas[k], refined)
    ev1 = np.where(keep_grid[:, None], ev_k, ev_r)
    near1 = np.where(keep_grid[:, None], near_k, near_r)
    matched = ev1 >= 0
    n_m = matched.sum(axis=1)
    prior_term = -np.log(alpha) ** 2 / (2 * sigma_alpha**2)

    # intensities: robust scale and the weak agreement term
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(matched, np.log(obs.area[None, :] / lib.intensity[np.clip(near1, 0, None)]), np.nan)
    any_m = n_m > 0
    log_scale = np.full(n_ph, np.nan)
    if any_m.any():
        log_scale[any_m] = np.nanmedian(ratio[any_m], axis=1)
    resid = (ratio - log_scale[:, None]) / settings.intensity_sigma_ln
    inten_term = np.where(n_m > 1, -0.5 * settings.intensity_weight * np.nansum(resid**2, axis=1), 0.0)
    scale = np.exp(log_scale)

    # missing rings: visible allowed rings neither matched nor hidden under a matched ring
    visible = _interval_mask(lib, g_lo * alpha, g_hi * alpha)
    win = np.maximum(obs.fwhm_per_nm, 3 * tau)
    lo = np.where(matched, (obs.g_per_nm - win) * alpha[:, None], np.inf)
    hi = np.where(matched, (obs.g_per_nm + win) * alpha[:, None], -np.inf)
    seen = _interval_mask(lib, lo, hi)
    seen[near1[matched]] = True
    ring_scale = scale[lib.phase_of]
    expected = np.where(np.isfinite(ring_scale), ring_scale * lib.intensity, 0.0)
    p_det = settings.max_detection_probability * (1 - np.exp(-expected / a_lim))
    miss = visible & ~seen & any_m[lib.phase_of]
    missing_term = np.bincount(lib.phase_of[miss], weights=np.log1p(-p_det[miss]), minlength=n_ph)
    strong = miss & (p_det > 0.5 * settings.max_detection_probability)

    total_area = obs.area.sum()
    share = (np.where(matched, obs.area, 0.0).sum(axis=1) / total_area) if n_obs else np.zeros(n_ph)
    phase_terms = prior_term + missing_term + inten_term
    score = (v * np.maximum(u, ev1)).sum(axis=1) + phase_terms - u * v.sum()
    strong_idx = np.flatnonzero(strong)
    out = []
    for p, ph in enumerate(lib.phases):
        mine = strong_idx[lib.phase_of[strong_idx] == p] if strong[lib.start[p]:lib.stop[p]].any() else ()
        out.append(PhaseMatch(
            phase=ph.phase, score=float(score[p]), dilation=float(alpha[p]), dilation_sigma=float(alpha_sigma[p]),
            ring_evidence=ev1[p], predicted_index=np.where(matched[p], near1[p] - lib.start[p], -1),
            phase_terms=float(phase_terms[p]), n_matched=int(n_m[p]),
            missing_strong=tuple(ph.hkl[j - lib.start[p]] for j in mine),
            explained_share=float(share[p]), scale=float(scale[p]),
        ))
    return out


def _set_score(members: list[PhaseMatch], v, u, kappa) -> float:
    if not members:
        return float(u * v.sum())
    ev = np.max([m.ring_evidence for m in members], axis=0)
    return float((v * np.maximum(u, ev)).sum() + sum(m.phase_terms for m in members) - kappa * len(members))


def identify(obs: ObservedRings, library: list[PhaseRings] | LibraryIndex, settings: IdentifySettings = IdentifySettings(), *,
             g_range_per_nm: tuple[float, float] | None = None, detection_limit_area: float | None = None) -> Identification:
    """Identify the phases of one sample.

    Parameters
    ----------
    obs : ObservedRings
        Sharp rings of the sample (halos removed), g in 1/nm.
    library : list of PhaseRings, or the LibraryIndex of one (faster when scoring many samples)
    g_range_per_nm : (float, float), optional
        g range of the profile in which rings could have been detected; default: the observed
        rings' range widened by two FWHM.
    detection_limit_area : float, optional
        Smallest ring area the profile's noise allows to detect; default: the weakest observed
        ring's area.
    """
    n = len(obs)
    lib = library if isinstance(library, LibraryIndex) else index_library(library)
    arrays = lib.phases
    empty = Identification((), (), (), (), (), (), tuple([None] * n), tuple(range(n)), (), ("no_rings",) if n == 0 else ())
    if n == 0:
        return empty
    if g_range_per_nm is None:
        g_lo = float(np.min(obs.g_per_nm - 2 * obs.fwhm_per_nm))
        g_hi = float(np.max(obs.g_per_nm + 2 * obs.fwhm_per_nm))
    else:
        g_lo, g_hi = g_range_per_nm
    g_lo = max(g_lo, 1e-3)
    a_lim = float(detection_limit_area) if detection_limit_area else float(np.min(obs.area))
    tau = np.sqrt(obs.g_sigma_per_nm**2 + (settings.residual_calibration_error * obs.g_per_nm) ** 2)
    v = np.sqrt(obs.area / np.mean(obs.area))
    v = v / v.mean()
    u = -settings.unexplained_ring_cost
    kappa = settings.phase_penalty
    step = max(float(np.min(tau / obs.g_per_nm)), 1e-5)  # one τ: the least-squares step refines α
    n_steps = int(math.ceil(settings.dilation_window / step))
    alphas = 1.0 + np.linspace(-settings.dilation_window, settings.dilation_window, 2 * n_steps + 1)

    matches = _match_all(lib, obs, tau, v, settings, g_lo, g_hi, a_lim, alphas)
    arrays_by_name = {a.phase: a for a in arrays}

    # greedy selection
    chosen: list[PhaseMatch] = []
    current = _set_score(chosen, v, u, 0.0)
    eligible = [m for m in matches if m.score >= settings.accept_score and m.n_matched >= settings.min_matched_rings]
    while len(chosen) < settings.max_phases:
        best, best_gain = None, 0.0
        for m in eligible:
            if any(m is c for c in chosen):
                continue
            gain = _set_score(chosen + [m], v, u, kappa) - _set_score(chosen, v, u, kappa)
            explains_new = not chosen or np.any((m.ring_evidence >= 0) & (np.max([c.ring_evidence for c in chosen], axis=0) < 0))
            if explains_new and gain > best_gain:
                best, best_gain = m, gain
        if best is None:
            break
        chosen.append(best)
        current = _set_score(chosen, v, u, kappa)

    # confidence and alternatives: swap each chosen phase for every other library phase
    all_ev = np.array([m.ring_evidence for m in matches])  # (P, N)
    all_terms = np.array([m.phase_terms for m in matches])
    chosen_ids = {id(c) for c in chosen}
    not_chosen = np.array([id(m) not in chosen_ids for m in matches])
    sigma_alpha = settings.dilation_sigma or settings.dilation_window / 2
    confidences, alternatives, separations = [], [], []
    for p in chosen:
        others = [c for c in chosen if c is not p]
        s_without = _set_score(others, v, u, kappa)
        base_ev = np.max([c.ring_evidence for c in others], axis=0) if others else np.full(n, -np.inf)
        swap = (v * np.maximum(u, np.maximum(base_ev, all_ev))).sum(axis=1) + all_terms
        swap += sum(c.phase_terms for c in others) - kappa * (len(others) + 1)
        swap = np.where(not_chosen, swap, -np.inf)
        denom = 1.0 + math.exp(min(50.0, s_without - current)) + float(np.sum(np.exp(np.minimum(50.0, swap - current))))
        confidences.append(1.0 / denom)
        close = np.flatnonzero(current - swap < settings.alternative_margin)
        close = close[np.argsort(-swap[close], kind="stable")]
        alternatives.append(tuple(matches[q].phase for q in close))
        if not_chosen.any():
            q_best = matches[int(np.argmax(swap))]
            sig = math.sqrt(sigma_alpha**2 + (p.dilation_sigma if math.isfinite(p.dilation_sigma) else 0) ** 2)
            g_ratio = _lattice_ratio(arrays_by_name[p.phase], arrays_by_name[q_best.phase])
            separations.append(abs(math.log(g_ratio)) / sig if math.isfinite(g_ratio) else math.nan)
        else:
            separations.append(math.nan)

    # ring assignment
    assignments: list[RingAssignment | None] = [None] * n
    if chosen:
        ev = np.array([c.ring_evidence for c in chosen])
        owner = np.argmax(ev, axis=0)
        for i in range(n):
            c = chosen[owner[i]]
            if ev[owner[i], i] >= 0 and c.predicted_index[i] >= 0:
                ph = arrays_by_name[c.phase]
                j = c.predicted_index[i]
                assignments[i] = RingAssignment(c.phase, ph.hkl[j], False, 10.0 * c.dilation / ph.g[j])
        for i in range(n):  # rings that only a double-diffraction reflection explains
            if assignments[i] is not None:
                continue
            for c in chosen:
                ph = arrays_by_name[c.phase]
                if len(ph.dd_g) == 0:
                    continue
                gm = ph.dd_g / c.dilation
                j = int(np.argmin(np.abs(gm - obs.g_per_nm[i])))
                if abs(gm[j] - obs.g_per_nm[i]) <= 3 * tau[i]:
                    assignments[i] = RingAssignment(c.phase, ph.dd_hkl[j], True, 10.0 / gm[j])
                    break
    unexplained = tuple(i for i in range(n) if assignments[i] is None)

    fractions = _rough_fractions(chosen, arrays_by_name)
    refined = tuple(_refine_lattice(c, arrays_by_name[c.phase], obs, tau, assignments) for c in chosen)

    candidates = []
    for m in sorted(matches, key=lambda m: (-m.score, m.phase)):
        in_answer = any(m is c for c in chosen)
        if m.score <= settings.candidate_floor and not in_answer:
            continue
        candidates.append({
            "phase": m.phase, "score": m.score, "dilation": m.dilation, "dilation_sigma": m.dilation_sigma,
            "n_matched": m.n_matched, "missing_strong_rings": ";".join(m.missing_strong),
            "n_missing_strong": len(m.missing_strong), "explained_intensity_share": m.explained_share,
            "in_answer": in_answer,
            "confidence": next((conf for c, conf in zip(chosen, confidences) if c is m), math.nan),
        })
    flags = []
    if not chosen:
        flags.append("no_phase_identified")
    if unexplained:
        share = float(obs.area[list(unexplained)].sum() / obs.area.sum())
        if share > 0.2:
            flags.append(f"unexplained_intensity_{share:.0%}")
    if any(alternatives):
        flags.append("ambiguous_isostructural")
    return Identification(
        phases=tuple(c.phase for c in chosen), confidence=tuple(confidences), alternatives=tuple(alternatives),
        separation_sigma=tuple(separations), fractions_rough=fractions, refined=refined,
        assignments=tuple(assignments), unexplained=unexplained, candidates=tuple(candidates), flags=tuple(flags),
    )


def _lattice_ratio(p: _PhaseArrays, q: _PhaseArrays) -> float:
    """Ratio of the strongest-ring g of two phases (their relative lattice scale)."""
    if len(p.g) == 0 or len(q.g) == 0:
        return math.nan
    gp = p.g[int(np.argmax(p.intensity))]
    gq = q.g[int(np.argmax(q.intensity))]
    return gp / gq


def _rough_fractions(chosen, arrays_by_name) -> tuple[float, ...]:
    """Rough volume fractions: observed/predicted intensity ratio per unit cell volume.

    The kinematic ring area per unit volume of phase goes as Σ|F|²d²/V_c² (Vainshtein);
    the ratio ŝ_p of observed area to normalised intensity is converted to that absolute
    scale. Rough: dynamical scattering, texture and the thickness distribution are ignored.
    """
    if not chosen:
        return ()
    weights = []
    for c in chosen:
        ph = arrays_by_name[c.phase]
        f2 = ph.meta.get("f2")
        v_c = _cell_volume(ph.meta.get("cell") or {})
        if f2 is None or not np.all(np.isfinite(f2)) or not math.isfinite(v_c) or not math.isfinite(c.scale):
            weights.append(math.nan)
            continue
        abs_max = float(np.max(f2 * (10.0 / ph.g) ** 2))  # Σ|F|²d² of the strongest ring
        weights.append(c.scale / 100.0 / (abs_max / v_c**2))
    w = np.array(weights)
    if not np.all(np.isfinite(w)) or w.sum() <= 0:
        return tuple([math.nan] * len(chosen))
    return tuple(float(x) for x in w / w.sum())


def _cell_volume(cell: dict) -> float:
    try:
        a, b, c = cell["a_angstrom"], cell["b_angstrom"], cell["c_angstrom"]
        al, be, ga = (math.radians(cell[k]) for k in ("alpha_deg", "beta_deg", "gamma_deg"))
    except (KeyError, TypeError):
        return math.nan
    ca, cb, cg = math.cos(al), math.cos(be), math.cos(ga)
    return a * b * c * math.sqrt(max(0.0, 1 - ca * ca - cb * cb - cg * cg + 2 * ca * cb * cg))


def _refine_lattice(match: PhaseMatch, ph: _PhaseArrays, obs, tau, assignments) -> dict:
    """Refined lattice: isotropic dilation always; cubic a; tetragonal/hexagonal a and c
    from linear least squares in (1/a², 1/c²) when at least three rings fix both."""
    cell = ph.meta.get("cell") or {}
    system = (ph.meta.get("crystal_system") or "").lower()
    out = {"dilation": match.dilation, "dilation_sigma": match.dilation_sigma}
    a0 = cell.get("a_angstrom")
    if a0:
        out["a_angstrom"] = a0 * match.dilation
        out["a_sigma_angstrom"] = a0 * match.dilation_sigma if math.isfinite(match.dilation_sigma) else math.nan
    if system in ("tetragonal", "hexagonal", "trigonal") and cell.get("c_angstrom"):
        rows, y, w = [], [], []
        for i, asg in enumerate(assignments):
            if asg is None or asg.phase != match.phase or asg.double_diffraction:
                continue
            idx = [int(x) for x in asg.hkl.split()]
            h, k, l = (idx[0], idx[1], idx[3]) if len(idx) == 4 else idx
            ab = (h * h + k * k) if system == "tetragonal" else 4.0 / 3.0 * (h * h + h * k + k * k)
            g = obs.g_per_nm[i] / 10.0  # 1/Å
            rows.append([ab, l * l])
            y.append(g * g)
            w.append(1.0 / (2 * g * tau[i] / 10.0) ** 2)
        if len(rows) >= 3:
            A, y, w = np.array(rows, float), np.array(y), np.array(w)
            if np.linalg.matrix_rank(A) == 2:
                sw = np.sqrt(w)
                coef, *_ = np.linalg.lstsq(A * sw[:, None], y * sw, rcond=None)
                if np.all(coef > 0):
                    cov = np.linalg.inv((A * w[:, None]).T @ A)
                    dof = len(y) - 2
                    if dof > 0:
                        chi2 = float(np.sum(w * (A @ coef - y) ** 2)) / dof
                        cov *= max(chi2, 1.0)
                    a, c = coef[0] ** -0.5, coef[1] ** -0.5
                    out["a_angstrom"], out["c_angstrom"] = float(a), float(c)
                    out["a_sigma_angstrom"] = float(0.5 * a**3 * math.sqrt(cov[0, 0]))
                    out["c_sigma_angstrom"] = float(0.5 * c**3 * math.sqrt(cov[1, 1]))
    return out


# --------------------------------------------------------------------------- files


def read_observed_rings(path: str | os.PathLike) -> tuple[ObservedRings, list[dict]]:
    """Read a rings CSV (columns g_per_nm, g_sigma_per_nm, fwhm_per_nm, area, optional kind);
    halos (kind = halo) are left out of the returned rings but kept in the rows."""
    import csv

    path = Path(path)
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            rows = list(csv.DictReader(fh))
    except OSError as exc:
        raise RingidError(path, f"cannot read rings table ({exc.strerror or exc})") from None
    need = ("g_per_nm", "g_sigma_per_nm", "fwhm_per_nm", "area")
    if rows and any(k not in rows[0] for k in need):
        raise RingidError(path, f"rings table lacks column(s) {', '.join(k for k in need if k not in rows[0])}")
    sharp_rows = [i for i, r in enumerate(rows) if (r.get("kind") or "ring") == "ring"]
    sharp = [rows[i] for i in sharp_rows]
    try:
        arr = {k: np.array([float(r[k]) for r in sharp], dtype=float) for k in need}
    except ValueError as exc:
        raise RingidError(path, f"non-numeric value in rings table ({exc})") from None
    good = np.isfinite(arr["g_per_nm"]) & (arr["g_per_nm"] > 0) & np.isfinite(arr["area"]) & (arr["area"] > 0)
    arr["g_sigma_per_nm"] = np.where(np.isfinite(arr["g_sigma_per_nm"]), arr["g_sigma_per_nm"], 0.0)
    arr["fwhm_per_nm"] = np.where(np.isfinite(arr["fwhm_per_nm"]), arr["fwhm_per_nm"], 0.0)
    obs = ObservedRings(*(arr[k][good] for k in need), source=str(path), row_index=np.array(sharp_rows, dtype=int)[good])
    return obs, rows


PHASES_COLUMNS = [
    "rank", "phase", "score", "confidence", "in_answer", "dilation", "dilation_sigma", "n_matched",
    "n_missing_strong", "missing_strong_rings", "explained_intensity_share",
]
ASSIGNMENT_COLUMNS = ["phase", "hkl", "double_diffraction", "d_calc_angstrom"]

#: dilation window by how the sample's camera constant was obtained (issue 5 defaults)
WINDOW_BY_CALIBRATION = {"standard": 0.005, "constant": 0.005, "nominal": 0.03}


def _fmt(x, digits=6) -> str:
    if isinstance(x, (bool, np.bool_)):
        return "true" if x else "false"
    if isinstance(x, (int, np.integer)):
        return str(int(x))
    if isinstance(x, float) and not math.isfinite(x):
        return ""
    if isinstance(x, (float, np.floating)):
        return f"{x:.{digits}g}"
    return str(x)


def write_results(out_dir: str | os.PathLike, rows: list[dict], obs: ObservedRings, result: Identification,
                  settings: IdentifySettings, provenance: dict | None = None) -> None:
    """Write ``phases.csv``, ``rings.csv`` (input rows + assignment) and ``identification.json``."""
    from .atomic import write_csv, write_json

    out = Path(out_dir)
    write_csv(out / "phases.csv", PHASES_COLUMNS, (
        [_fmt(r + 1), c["phase"], _fmt(c["score"], 5), _fmt(c["confidence"], 4), _fmt(c["in_answer"]),
         _fmt(c["dilation"], 7), _fmt(c["dilation_sigma"], 3), _fmt(c["n_matched"]), _fmt(c["n_missing_strong"]),
         c["missing_strong_rings"], _fmt(c["explained_intensity_share"], 4)]
        for r, c in enumerate(result.candidates)
    ))
    # rings.csv: every input row (halos too) with its assignment; sharp rings in input order
    if rows:
        header = list(rows[0].keys())
    else:
        from .rings import RINGS_CSV_COLUMNS

        header = list(RINGS_CSV_COLUMNS)
    header = [h for h in header if h not in ASSIGNMENT_COLUMNS] + ASSIGNMENT_COLUMNS
    row_of = obs.row_index if obs.row_index is not None else np.arange(len(obs))
    by_row = {int(r): a for r, a in zip(row_of, result.assignments)}
    out_rows = []
    for k, r in enumerate(rows):
        asg = by_row.get(k)
        extra = ([asg.phase, asg.hkl, _fmt(asg.double_diffraction), _fmt(asg.d_calc_angstrom, 7)] if asg else ["", "", "", ""])
        out_rows.append([r.get(h, "") for h in header[: -len(ASSIGNMENT_COLUMNS)]] + extra)
    write_csv(out / "rings.csv", header, out_rows)
    record = {
        "phases": list(result.phases),
        "confidence": [round(c, 6) for c in result.confidence],
        "alternatives": [list(a) for a in result.alternatives],
        "separation_sigma": [round(s, 3) if math.isfinite(s) else None for s in result.separation_sigma],
        "fractions_rough": [round(f, 4) if math.isfinite(f) else None for f in result.fractions_rough],
        "refined_lattice": [{k: (round(v, 7) if isinstance(v, float) and math.isfinite(v) else None) for k, v in r.items()}
                            for r in result.refined],
        "unexplained_rings": result.unexplained_rings,
        "unexplained": [{"g_per_nm": round(float(obs.g_per_nm[i]), 6), "d_angstrom": round(10.0 / float(obs.g_per_nm[i]), 6),
                         "area": float(obs.area[i])} for i in result.unexplained],
        "flags": list(result.flags),
        "settings": {k: getattr(settings, k) for k in settings.__dataclass_fields__},
        "screening_note": "Phase identification is a screening result; confirm critical assignments by independent means.",
    }
    if provenance:
        record["provenance"] = provenance
    write_json(out / "identification.json", record)
