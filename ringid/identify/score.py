"""Phase identification: score observed rings against the phase library.

What this stage does: for every library phase, search the lattice dilation α (d_obs = α·d_lib:
camera-constant error plus strain) inside a window set by the calibration, score how well the
phase explains the observed rings, measure how well phases that are absent would score on the same
rings, choose the smallest set of phases (up to three) that explains them and that absent phases
would not match as well, attach a confidence and alternatives, refine lattice parameters, and label
every ring with (phase, hkl) or leave it unexplained. What it does not do: read images or fit
profiles.

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
default), ŝ_p the matched rings' summed observed area over their summed predicted intensity, and
P_det,j = P_max·(1 − exp(−ŝ_p I_j / A_lim)) the chance that ring j would have been detected
(A_lim the detection-limit area; P_max = 0.9 because dynamical scattering and texture can hide
any single ring). "Visible" means inside the observed g range. w_I = 0.5 and σ_I = ln 3 make
intensity the weakest term. This adapts the figures of merit of de Wolff (M20: positional error
against the number of possible lines, J. Appl. Cryst. 1, 108, 1968) and Smith & Snyder (F_N:
accuracy × completeness N/N_poss, J. Appl. Cryst. 12, 60, 1979) to patterns with few rings,
working in g (not 2θ) so scores are comparable across voltages.

Selection. Phases are added greedily (up to three) while S grows by more than κ = ln 10 and the
new phase explains rings the others do not. A phase may enter only if alone it scores at least
``accept_score``, matches ``min_matched_rings`` rings, misses at most one of its strong rings
(intensity ≥ a fifth of its strongest visible ring, and detectable at its scale ŝ_p, the matched
rings' observed area over their predicted intensity), and fits with a dilation inside the window:
a least-squares dilation more than 2σ outside it is a ``lattice_mismatch`` (another phase of the
same structure type, or a calibration that is off), never a match.

The null: how high does an absent phase score on this sample's rings? Every library phase has
decoys: copies with each ring moved by an independent random factor exp(±s), s beyond any window
searched, so a decoy keeps its phase's number of rings, ring density and intensities but no lattice
(target-decoy estimation, Elias & Gygi, Nature Methods 4, 207, 2007). The decoys are searched and
scored exactly as the phases are. A proposed phase's gain in S is compared with the decoys' gains
over the same phases already chosen: counted where the decoys reach, an exponential tail beyond
(its scale never below one chance ring's worth of score, so that it errs towards larger
probabilities); the chance that any of the n library phases does as well by chance is
1 − (1 − p)^n (Šidák), the false-identification probability. The phases kept are the longest
prefix of the greedy order whose false-identification rate stays below
``false_identification_rate`` (ForwardStop, G'Sell et al., J. R. Stat. Soc. B 78, 423, 2016).
When library phases explain only part of the rings and one cell indexes all of them (cubic, or a
hexagonal or tetragonal one with de Wolff's M ≥ 10), the simpler answer is that phase, absent from
the library: nothing is reported (``one_lattice_fits_all``; bcc(a) rings are among those of
fcc(a·√2), a wurtzite-type cell holds the rings of a diamond-type one).

Confidence of phase p: its closed-world posterior (equal priors, against every other library
phase in its place and against leaving it out, 1/(1 + Σ_q e^{S(P−p+q)−S(P)} + e^{S(P−p)−S(P)})), times
1/(1 + B) with B = −e·p_f·ln p_f the smallest Bayes factor for "a chance match" that the
false-identification probability p_f allows (Sellke, Bayarri & Berger, Am. Stat. 55, 62, 2001),
times the share of the ring area the answer explains (left-over rings may belong to an absent
phase of which the match is only a part). Phases within ln 10 of p are listed as alternatives.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, fields, replace

import numpy as np

from ringid.core.errors import RingidError
from ringid.core.model import PhaseRings
from ringid.identify.windows import FALSE_IDENTIFICATION_RATE, WINDOW_NOMINAL, WINDOW_STANDARD

LN2 = math.log(2.0)


@dataclass(frozen=True)
class IdentifySettings:
    """Scoring parameters (config keys of the ``identify`` section; meanings in the module doc)."""

    dilation_window: float = WINDOW_STANDARD  # ± relative lattice scale searched (WINDOW_NOMINAL without a standard)
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
    false_identification_rate: float = FALSE_IDENTIFICATION_RATE  # report a phase below this probability of a false one
    lattice_mismatch_sigma: float = 2.0  # free dilation this many σ outside the window: a different lattice
    strong_ring_fraction: float = 0.2  # of a phase's visible rings with at least this share of its strongest …
    max_missing_strong: int = 1  # … at most this many may be missing though detectable (dynamical scattering, texture)
    unidentified_share: float = 0.05  # unexplained share of the ring area that flags unidentified_phase …
    unidentified_rings: int = 3  # … or this many unexplained rings


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
class RefinedLattice:
    """A reported phase's lattice as the sample's rings place it: the isotropic dilation (1 = the
    library's cell) with its σ; the cubic a, or tetragonal/hexagonal a and c (Å) with σ, when the
    library gives the cell (None: not refined; NaN σ: not determined)."""

    dilation: float
    dilation_sigma: float
    a_angstrom: float | None = None
    a_sigma_angstrom: float | None = None
    c_angstrom: float | None = None
    c_sigma_angstrom: float | None = None

    def to_json(self) -> dict:
        """The refined values present, rounded to 7 digits (None when not finite)."""
        return {k: (round(v, 7) if math.isfinite(v) else None) for k, v in vars(self).items() if v is not None}


@dataclass(frozen=True)
class Candidate:
    """One row of phases.csv: a library phase scoring above the floor (or in the answer).

    dilation (lattice scale in the window) and free_dilation (unconstrained least squares) with σ;
    false_identification_probability as if it were the first phase; confidence NaN unless reported.
    """

    phase: str
    score: float
    dilation: float
    dilation_sigma: float
    n_matched: int
    missing_strong_rings: str
    n_missing_strong: int
    explained_intensity_share: float
    in_answer: bool
    confidence: float
    false_identification_probability: float
    free_dilation: float
    free_dilation_sigma: float
    lattice_mismatch: bool
    n_missing_major: int


@dataclass(frozen=True)
class Identification:
    """The answer for one sample."""

    phases: tuple[str, ...]
    confidence: tuple[float, ...]
    alternatives: tuple[tuple[str, ...], ...]
    separation_sigma: tuple[float, ...]
    fractions_rough: tuple[float, ...]
    refined: tuple[RefinedLattice, ...]
    assignments: tuple[RingAssignment | None, ...]
    unexplained: tuple[int, ...]
    candidates: tuple[Candidate, ...]
    flags: tuple[str, ...] = field(default_factory=tuple)
    false_identification_probability: tuple[float, ...] = ()  # per reported phase, before the set's control
    unexplained_intensity_share: float = 0.0  # share of the sharp rings' area that no reported phase explains
    lattice_mismatches: tuple[dict, ...] = ()  # phases that fit only with a dilation outside the window
    rejected: tuple[dict, ...] = ()  # phases the greedy search proposed that the rate control dropped
    #: one lattice that indexes every ring, when it replaced the answer: system, a_angstrom[, c_angstrom], de_wolff_m
    single_lattice: dict | None = None
    elements: tuple[str, ...] = ()  # the sample's elements the search was restricted to (empty: none)
    phases_within_elements: int | None = None  # library phases made of them (None: no restriction)
    #: phases of other elements the unrestricted search reports, scoring above the restricted answer:
    #: phase, elements, score, confidence, false_identification_probability (unrestricted)
    better_match_outside_elements: tuple[dict, ...] = ()

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



# --------------------------------------------------------------------------- scoring


DEFAULT_DECOY_CLEARANCE = WINDOW_NOMINAL  # widest dilation window a default index serves


@dataclass(frozen=True)
class LibraryIndex:
    """All phases' allowed rings in one flat array sorted by (row, g), for batched scoring.

    Rows are the library phases followed by their decoys: copies whose ring positions are moved
    at random (``DECOY_JITTER_LN``), so they keep a phase's number of rings, ring density and
    intensities but no lattice. Decoys cannot be present in any sample; how well they score
    against a sample's rings is that sample's null distribution of the score.
    """

    phases: tuple[_PhaseArrays, ...]  # the library phases (rows 0 … n − 1)
    decoys: tuple[_PhaseArrays, ...]  # rows n … n + n_decoys − 1
    key: np.ndarray  # row * KEY_STRIDE + g
    g: np.ndarray
    sqrt_intensity: np.ndarray
    intensity: np.ndarray
    phase_of: np.ndarray  # row of each flat ring
    start: np.ndarray  # first flat index of each row
    stop: np.ndarray
    decoy_clearance: float = DEFAULT_DECOY_CLEARANCE  # widest dilation window the decoys stay clear of
    #: library phase of each row (a phase is its own parent; a decoy's is the phase it was made from)
    parent: np.ndarray | None = None
    #: elements of each library phase (None: unknown), from ``ringid.core.elements.phase_elements``
    elements: tuple[frozenset[str] | None, ...] = ()

    @property
    def n_rows(self) -> int:
        return len(self.phases) + len(self.decoys)

    def rows_within(self, elements) -> np.ndarray:
        """Mask over the rows: the library phases made of ``elements`` only (a phase's elements ⊆
        the given ones; a phase of unknown elements is left out) and the decoys of those phases,
        which inherit their parent's elements."""
        allowed = set(elements)
        own = np.array([e is not None and e <= allowed for e in self.elements], dtype=bool)
        return own[self.parent] if len(own) else np.zeros(self.n_rows, dtype=bool)


KEY_STRIDE = 1.0e4  # 1/nm; larger than any ring's g
#: decoys per library (spread evenly over the phases, at least MIN_DECOYS_PER_PHASE each)
DECOY_TOTAL = 512
MIN_DECOYS_PER_PHASE = 2
#: each decoy ring is moved by a factor exp(±s), s uniform in [c + 0.01, c + 0.07] for a decoy
#: clearance c (the widest dilation window searched): no dilation inside the window can put a
#: decoy ring back on the ring it came from, so no decoy keeps its phase's lattice, while the
#: density of rings along g is kept on a scale of about 10 %
DECOY_SHIFT_MIN, DECOY_SHIFT_SPAN = 0.01, 0.06


def decoys_per_phase(n_phases: int) -> int:
    return max(MIN_DECOYS_PER_PHASE, math.ceil(DECOY_TOTAL / max(n_phases, 1)))


def _decoy(ph: _PhaseArrays, k: int, clearance: float) -> _PhaseArrays:
    """Decoy k of a phase: its rings moved by independent random factors (seeded by phase id and k,
    so a phase's decoys do not depend on the rest of the library)."""
    import zlib

    rng = np.random.default_rng([zlib.crc32(ph.phase.encode("utf-8")), k])
    shift = clearance + DECOY_SHIFT_MIN + DECOY_SHIFT_SPAN * rng.random(len(ph.g))
    g = ph.g * np.exp(shift * rng.choice([-1.0, 1.0], len(ph.g)))
    order = np.argsort(g)
    return _PhaseArrays(
        f"decoy:{ph.phase}:{k}",
        g[order],
        ph.intensity[order],
        tuple(np.array(ph.hkl, dtype=object)[order]),
        np.zeros(0),
        (),
        {},
    )


def index_library(library: list[PhaseRings], decoy_clearance: float = DEFAULT_DECOY_CLEARANCE) -> LibraryIndex:
    """The library's rings, and its decoys, in flat arrays for scoring. ``decoy_clearance`` is the
    widest dilation window (relative) the index will be searched with."""
    arrays = tuple(_phase_arrays(p) for p in library)
    per = decoys_per_phase(len(arrays))
    decoys = tuple(_decoy(a, k, decoy_clearance) for a in arrays for k in range(per))
    rows = arrays + decoys
    counts = np.array([len(a.g) for a in rows], dtype=int)
    phase_of = np.repeat(np.arange(len(rows)), counts)
    g = np.concatenate([a.g for a in rows]) if rows else np.zeros(0)
    if len(g) and g.max() >= KEY_STRIDE:
        raise RingidError(None, "a library ring has g beyond 1e4 1/nm (d < 0.001 Å)")
    inten = np.concatenate([a.intensity for a in rows]) if rows else np.zeros(0)
    stop = np.cumsum(counts)
    from ringid.core.elements import phase_elements

    parent = np.concatenate([np.arange(len(arrays)), np.repeat(np.arange(len(arrays)), per)]).astype(int)
    return LibraryIndex(
        arrays,
        decoys,
        phase_of * KEY_STRIDE + g,
        g,
        np.sqrt(inten),
        inten,
        phase_of,
        stop - counts,
        stop,
        decoy_clearance,
        parent,
        tuple(phase_elements(a.meta) for a in arrays),
    )


def _interval_mask(lib: LibraryIndex, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Flat mask of rings whose library g lies in [lo[p], hi[p]] of their row p (shape (P,) or (P, M))."""
    n_ph = lib.n_rows
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


def _evidence(lib: LibraryIndex, obs_g, tau, alphas, w_norm, rho0, row_ids=None):
    """ln(ρ_p/ρ₀) of each observed ring for the index rows ``row_ids`` (default: all) and each dilation.

    alphas has shape (P, A); returns (evidence (P, A, N), nearest flat ring index (P, A, N)).
    """
    n_ph = alphas.shape[0]
    x = alphas[:, :, None] * obs_g[None, None, :]  # library frame: g_i·α
    t = alphas[:, :, None] * tau[None, None, :]
    own = (np.arange(n_ph) if row_ids is None else np.asarray(row_ids))[:, None, None]
    idx = np.searchsorted(lib.key, own * KEY_STRIDE + x)
    total = np.zeros(x.shape)
    best = np.full(x.shape, -1.0)
    nearest = np.full(x.shape, -1, dtype=int)
    norm = 1.0 / (tau[None, None, :] * math.sqrt(2 * math.pi))
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


@dataclass(frozen=True, eq=False)
class _RowScores:
    """Best single-phase fit of every row (library phases, then decoys); arrays over rows."""

    score: np.ndarray  # S({p}) − S(∅)
    dilation: np.ndarray
    dilation_sigma: np.ndarray
    free_dilation: np.ndarray  # least-squares dilation of the matched rings, not held to the window
    free_dilation_sigma: np.ndarray  # its σ from the rings' σ_g (scaled by √χ²_ν when above 1)
    evidence: np.ndarray  # (rows, N) ln(ρ_p/ρ₀) per observed ring at the best dilation
    nearest: np.ndarray  # (rows, N) flat index of the nearest library ring
    phase_terms: np.ndarray
    n_matched: np.ndarray
    missing_strong: np.ndarray  # flat mask of missing rings that would have been detected
    n_missing_top: np.ndarray  # how many of the row's strong visible rings are missing though detectable
    explained_share: np.ndarray
    scale: np.ndarray
    lattice_mismatch: np.ndarray  # free dilation significantly outside the window
    eligible: np.ndarray  # may enter an answer: enough rings, strong rings seen, inside the window


GRID_CHUNK_ELEMENTS = 2_000_000  # (rows × dilations × rings) evaluated at once: bounds the memory


def _score_rows(lib: LibraryIndex, obs, tau, v, settings, g_lo, g_hi, a_lim, alphas) -> _RowScores:
    """Best single-phase fit of every row of the index, batched over rows with numpy: the grid
    search over the window, the least-squares dilation, then the intensity and missing-ring terms."""
    n_ph, n_obs = lib.n_rows, len(obs)
    u = -settings.unexplained_ring_cost
    window = settings.dilation_window
    sigma_alpha = settings.dilation_sigma or window / 2
    a_min, a_max = alphas.min(), alphas.max()
    # mixture weights √I normalised over each row's rings that can fall in the observed range
    in_range = _interval_mask(lib, np.full(n_ph, g_lo * a_min), np.full(n_ph, g_hi * a_max))
    wsum = np.bincount(lib.phase_of[in_range], weights=lib.sqrt_intensity[in_range], minlength=n_ph)
    w_norm = lib.sqrt_intensity / np.where(wsum > 0, wsum, np.inf)[lib.phase_of]
    rho0 = 1.0 / (g_hi - g_lo)

    k, ev_k, near_k, pos_k = _grid_search(lib, obs, tau, v, u, settings, w_norm, rho0, alphas)
    fit = _refine_dilations(lib, obs, tau, v, u, window, sigma_alpha, w_norm, rho0, alphas, k, ev_k, near_k, pos_k)
    alpha, alpha_sigma, free, free_sigma, ev1, near1 = fit
    matched = ev1 >= 0
    n_m = matched.sum(axis=1)
    prior_term = -np.log(alpha) ** 2 / (2 * sigma_alpha**2)
    scale, inten_term = _intensity_terms(lib, obs, near1, matched, n_m, settings)
    missing_term, strong, n_missing_top = _missing_terms(lib, obs, tau, settings, g_lo, g_hi, a_lim, alpha, near1,
                                                         matched, n_m, scale)

    total_area = obs.area.sum()
    share = (np.where(matched, obs.area, 0.0).sum(axis=1) / total_area) if n_obs else np.zeros(n_ph)
    phase_terms = prior_term + missing_term + inten_term
    score = (v * np.maximum(u, ev1)).sum(axis=1) + phase_terms - u * v.sum()

    outside = np.abs(np.log(free)) - math.log1p(window)
    mismatch = (n_m >= 2) & (outside > 0) & (outside > settings.lattice_mismatch_sigma * free_sigma)
    eligible = ((score >= settings.accept_score) & (n_m >= settings.min_matched_rings)
                & (n_missing_top <= settings.max_missing_strong)
                & ~mismatch)
    return _RowScores(score, alpha, alpha_sigma, free, free_sigma, ev1, near1, phase_terms, n_m, strong, n_missing_top,
                      share, scale, mismatch, eligible)


def _grid_search(lib: LibraryIndex, obs, tau, v, u, settings, w_norm, rho0, alphas):
    """The best dilation of the grid ``alphas`` per row (its index, evidence, nearest rings, posterior),
    in chunks of rows. A decoy that cannot enter an answer whatever its dilation (too few rings
    within reach, or too low a score even if every one matched) only needs to be known as such."""
    n_ph, n_obs = lib.n_rows, len(obs)
    sigma_alpha = settings.dilation_sigma or settings.dilation_window / 2
    prior = -(np.log(alphas) ** 2) / (2 * sigma_alpha**2)
    k = np.full(n_ph, int(np.argmax(prior)))
    ev_k = np.full((n_ph, n_obs), -np.inf)
    near_k = np.full((n_ph, n_obs), -1, dtype=int)
    pos_k = np.full(n_ph, -np.inf)
    n_reach, bound = _reach(lib, obs.g_per_nm, tau, v, u, w_norm, rho0, alphas.min(), alphas.max())
    hopeless = (np.arange(n_ph) >= len(lib.phases)) & (
        (n_reach < settings.min_matched_rings) | (bound < settings.accept_score)
    )
    grid_rows = np.flatnonzero(~hopeless)
    chunk = max(1, GRID_CHUNK_ELEMENTS // max(1, len(alphas) * n_obs))
    for first in range(0, len(grid_rows), chunk):
        rows = grid_rows[first:first + chunk]
        grid = np.broadcast_to(alphas, (len(rows), len(alphas)))
        ev, nearest = _evidence(lib, obs.g_per_nm, tau, grid, w_norm, rho0, rows)
        pos = (v * np.maximum(u, ev)).sum(axis=2) + prior
        kk = np.argmax(pos, axis=1)
        r = np.arange(len(kk))
        k[rows], ev_k[rows], near_k[rows], pos_k[rows] = kk, ev[r, kk], nearest[r, kk], pos[r, kk]
    return k, ev_k, near_k, pos_k


def _refine_dilations(lib: LibraryIndex, obs, tau, v, u, window, sigma_alpha, w_norm, rho0, alphas, k, ev_k, near_k,
                      pos_k):
    """Weighted least-squares dilation from the rings matched at the grid's best, kept where it scores
    at least as well: (dilation, σ, free dilation, σ, evidence, nearest rings) per row."""
    matched = ev_k >= 0
    g_lib = np.where(matched, lib.g[np.clip(near_k, 0, None)], 0.0)
    n_m = matched.sum(axis=1)
    inv_alpha, inv_sigma = _fit_inverse_dilation(obs.g_per_nm, g_lib, matched, 1.0 / tau**2)
    sigma_g = np.maximum(obs.g_sigma_per_nm, 1e-5 * obs.g_per_nm)
    inv_free, inv_free_sigma = _fit_inverse_dilation(obs.g_per_nm, g_lib, matched, 1.0 / sigma_g**2)
    with np.errstate(divide="ignore", invalid="ignore"):
        refined = np.clip(1.0 / inv_alpha, 1 - window, 1 + window)
        alpha_sigma = inv_sigma / inv_alpha**2
        free = 1.0 / inv_free
        free_sigma = inv_free_sigma / inv_free**2
    refined = np.where(n_m > 0, refined, alphas[k])
    alpha_sigma = np.where(n_m > 0, alpha_sigma, np.nan)
    free = np.where(n_m > 0, free, np.nan)
    free_sigma = np.where(n_m > 1, free_sigma, np.nan)
    ev_r, near_r = _evidence(lib, obs.g_per_nm, tau, refined[:, None], w_norm, rho0)
    ev_r, near_r = ev_r[:, 0], near_r[:, 0]
    pos_r = (v * np.maximum(u, ev_r)).sum(axis=1) - np.log(refined) ** 2 / (2 * sigma_alpha**2)
    keep_grid = pos_r < pos_k
    alpha = np.where(keep_grid, alphas[k], refined)
    ev1 = np.where(keep_grid[:, None], ev_k, ev_r)
    near1 = np.where(keep_grid[:, None], near_k, near_r)
    return alpha, alpha_sigma, free, free_sigma, ev1, near1


def _intensity_terms(lib: LibraryIndex, obs, near1, matched, n_m, settings):
    """The intensity scale per row (the matched rings' observed area over their predicted intensity,
    a ratio of sums, so chance matches of a phase's weak rings cannot make its absent strong rings
    look undetectable) and the weak intensity-agreement term."""
    lib_i = lib.intensity[np.clip(near1, 0, None)]
    area_sum = np.where(matched, obs.area[None, :], 0.0).sum(axis=1)
    pred_sum = np.where(matched, lib_i, 0.0).sum(axis=1)
    any_m = n_m > 0
    with np.errstate(divide="ignore", invalid="ignore"):
        log_scale = np.where(any_m, np.log(area_sum / pred_sum), np.nan)
        ratio = np.where(matched, np.log(obs.area[None, :] / lib_i), np.nan)
    resid = (ratio - log_scale[:, None]) / settings.intensity_sigma_ln
    inten_term = np.where(n_m > 1, -0.5 * settings.intensity_weight * np.nansum(resid**2, axis=1), 0.0)
    return np.exp(log_scale), inten_term


def _missing_terms(lib: LibraryIndex, obs, tau, settings, g_lo, g_hi, a_lim, alpha, near1, matched, n_m, scale):
    """The missing-ring term per row (visible allowed rings neither matched nor hidden under a matched
    ring, weighted by how surely they would have been detected), the flat mask of the strong ones,
    and how many of each row's strong visible rings are missing."""
    n_ph = lib.n_rows
    any_m = n_m > 0
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
    n_missing_top = _missing_strong_rings(lib, visible, strong, n_ph, settings.strong_ring_fraction)
    return missing_term, strong, n_missing_top


REACH_SIGMA = 8.0  # library rings further than this many τ from an observed ring add nothing to its evidence


def _reach(lib: LibraryIndex, obs_g, tau, v, u, w_norm, rho0, a_min, a_max):
    """Per row: how many observed rings have a library ring within reach at some dilation in
    [a_min, a_max], and an upper bound of the row's score (every reachable ring at the peak of the
    sum of the mixture weights within reach; the dilation prior, missing-ring and intensity terms
    only lower it)."""
    n_rows = lib.n_rows
    base = np.arange(n_rows)[:, None] * KEY_STRIDE
    lo = base + a_min * (obs_g - REACH_SIGMA * tau)[None, :]
    hi = base + a_max * (obs_g + REACH_SIGMA * tau)[None, :]
    first = np.searchsorted(lib.key, lo, side="left")
    last = np.searchsorted(lib.key, hi, side="right")
    cum = np.r_[0.0, np.cumsum(w_norm)]
    weight = cum[last] - cum[first]  # Σ w_j of the reachable library rings
    with np.errstate(divide="ignore"):
        peak = np.log(weight / (tau[None, :] * math.sqrt(2 * math.pi)) / rho0)
    bound = (v * np.maximum(peak - u, 0.0)).sum(axis=1)
    return (last > first).sum(axis=1), bound


def _fit_inverse_dilation(obs_g, g_lib, matched, weight):
    """Weighted least squares of g_obs = (1/α)·g_lib over each row's matched rings: (1/α, σ(1/α)),
    σ scaled by √χ²_ν when that is above 1."""
    wt = np.where(matched, weight[None, :], 0.0)
    sxy = (wt * obs_g * g_lib).sum(axis=1)
    sxx = (wt * g_lib**2).sum(axis=1)
    n_m = matched.sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        inv_alpha = sxy / sxx
        resid = (wt * (obs_g - inv_alpha[:, None] * g_lib) ** 2).sum(axis=1)
        chi2 = np.where(n_m > 1, resid / np.maximum(n_m - 1, 1), 1.0)
        sigma = np.sqrt(np.maximum(chi2, 1.0) / sxx)
    return inv_alpha, sigma


def _missing_strong_rings(lib: LibraryIndex, visible, strong, n_rows: int, fraction: float) -> np.ndarray:
    """How many of each row's visible rings with at least ``fraction`` of the intensity of its strongest
    visible ring are missing although detectable (``strong``)."""
    peak = np.zeros(n_rows)
    np.maximum.at(peak, lib.phase_of[visible], lib.intensity[visible])
    big = visible & strong & (lib.intensity >= fraction * peak[lib.phase_of])
    return np.bincount(lib.phase_of[big], minlength=n_rows)


def _tail_probability(stat: np.ndarray, null: np.ndarray, quantum: float) -> np.ndarray:
    """P(a decoy's statistic ≥ stat), from the decoy statistics ``null`` (−inf for a decoy that could
    not enter an answer), with the +1 of a permutation p-value. Counted up to the largest
    TAIL_COUNT (or TAIL_SHARE) decoys; above them, an exponential tail whose scale is the decoys'
    mean excess, never less than one chance ring's worth of score (``quantum``), so the
    extrapolation errs towards larger probabilities. Only positive statistics are modelled: a
    gain ≤ 0 never enters an answer."""
    stat = np.atleast_1d(np.asarray(stat, float))
    n = len(null)
    finite = np.sort(null[np.isfinite(null)])[::-1]
    counted = (np.searchsorted(-finite, -stat, side="right") + 1.0) / (n + 1.0)
    k = min(len(finite), max(TAIL_COUNT, math.ceil(TAIL_SHARE * n)))
    t = max(float(finite[k - 1]), 0.0) if k else 0.0
    top = finite[finite >= t]
    beta = max(float(np.mean(top - t)) * len(top) / (len(top) - 1), quantum) if len(top) > 1 else quantum
    tail = (len(top) + 1.0) / (n + 1.0) * np.exp(-np.maximum(stat - t, 0.0) / beta)
    return np.where(stat > t, tail, counted)


TAIL_COUNT = 10  # decoy statistics counted before the exponential tail takes over
TAIL_SHARE = 0.02


def _family_probability(p_single: np.ndarray, n_phases: int) -> np.ndarray:
    """Chance that any of n_phases absent phases does as well: 1 − (1 − p)^n (Šidák)."""
    p = np.clip(p_single, 0.0, 1.0)
    with np.errstate(divide="ignore"):
        return -np.expm1(n_phases * np.log1p(-np.minimum(p, 1 - 1e-16)))


def null_bayes_factor(p: float) -> float:
    """Lower bound of the Bayes factor for 'not in the library' given a p-value (Sellke, Bayarri &
    Berger, Am. Stat. 55, 62, 2001): −e·p·ln p for p < 1/e, else 1."""
    if not p > 0:
        return 0.0
    return -math.e * p * math.log(p) if p < 1 / math.e else 1.0


def _set_score(members: list[PhaseMatch], v, u, kappa) -> float:
    if not members:
        return float(u * v.sum())
    ev = np.max([m.ring_evidence for m in members], axis=0)
    return float((v * np.maximum(u, ev)).sum() + sum(m.phase_terms for m in members) - kappa * len(members))


def _gains(base_ev, rows_ev, rows_terms, v, u, kappa):
    """Score gained by adding each row (evidence (R, N), terms (R,)) to a set whose best evidence
    per ring is base_ev (N,) (−inf for the empty set)."""
    before = (v * np.maximum(u, base_ev)).sum()
    return (v * np.maximum(u, np.maximum(base_ev, rows_ev))).sum(axis=1) + rows_terms - kappa - before


@dataclass(frozen=True, eq=False)
class _Sample:
    """One sample's rings scored against the library and its decoys: what the selection steps share."""

    obs: ObservedRings
    settings: IdentifySettings
    tau: np.ndarray  # positional tolerance of each ring (1/nm)
    v: np.ndarray  # ring weights √(A/⟨A⟩)
    rows: _RowScores
    matches: list[PhaseMatch]  # the library phases' own best fits (the first rows)
    arrays_by_name: dict
    quantum: float  # one chance match's worth of score in this sample

    @property
    def n(self) -> int:
        return len(self.obs)

    @property
    def n_phases(self) -> int:
        return len(self.matches)

    @property
    def u(self) -> float:
        return -self.settings.unexplained_ring_cost

    @property
    def kappa(self) -> float:
        return self.settings.phase_penalty

    def false_probability(self, gain, base_ev) -> np.ndarray:
        """Chance that an absent phase would gain as much given base_ev: the decoys' gains (only
        decoys that could enter an answer), for the whole library searched."""
        decoy = slice(self.n_phases, None)
        rows = self.rows
        null = np.where(rows.eligible[decoy],
                        _gains(base_ev, rows.evidence[decoy], rows.phase_terms[decoy], self.v, self.u, self.kappa),
                        -np.inf)
        return _family_probability(_tail_probability(gain, null, self.quantum), self.n_phases)


def identify(
    obs: ObservedRings,
    library: list[PhaseRings] | LibraryIndex,
    settings: IdentifySettings = IdentifySettings(),
    *,
    g_range_per_nm: tuple[float, float] | None = None,
    detection_limit_area: float | None = None,
    elements=None,
) -> Identification:
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
    elements : iterable of element symbols, optional
        The sample's elements: only library phases made of them (and those phases' decoys) are
        searched, so the null and the number of phases searched are those of that part of the
        library. A phase of other elements that the unrestricted search would have reported (its
        false-identification probability within the rate) and that scores more than
        ``alternative_margin`` above the restricted answer (or the restricted answer is empty) is
        named in ``better_match_outside_elements`` (flag of the same name).
    """
    lib = _index_for(library, settings)
    elements = tuple(sorted(set(elements or ())))
    if len(obs) == 0:
        within_count = int(lib.rows_within(elements)[:len(lib.phases)].sum()) if elements else None
        return Identification((), (), (), (), (), (), (), (), (), ("no_rings",), elements=elements,
                              phases_within_elements=within_count)
    ctx = _score_sample(obs, lib, settings, g_range_per_nm, detection_limit_area)
    if not elements:
        return _answer(ctx)
    within = lib.rows_within(elements)
    restricted = _answer(_restrict(ctx, within))
    # would a phase made of other elements have been reported, searched without the restriction, and
    # score so far above the restricted answer that this would not even be its alternative (more than
    # the alternatives' margin)? The rows were scored once; only the selection is redone.
    unrestricted = _answer(ctx)
    best_within = max((c.score for c in restricted.candidates if c.in_answer), default=-math.inf)
    row_of = {ph.phase: q for q, ph in enumerate(lib.phases)}
    scores = {c.phase: c.score for c in unrestricted.candidates}
    outside = [
        {"phase": ph, "elements": sorted(lib.elements[row_of[ph]] or ()), "score": scores[ph], "confidence": conf,
         "false_identification_probability": p_false}
        for ph, conf, p_false in zip(unrestricted.phases, unrestricted.confidence,
                                     unrestricted.false_identification_probability)
        if not within[row_of[ph]] and scores[ph] - best_within > settings.alternative_margin
    ]
    flags = restricted.flags + (("better_match_outside_elements",) if outside else ())
    return replace(restricted, elements=elements, phases_within_elements=int(within[:len(lib.phases)].sum()),
                   better_match_outside_elements=tuple(outside), flags=flags)


def _restrict(ctx: _Sample, rows_mask: np.ndarray) -> _Sample:
    """The sample's context with only the index rows of ``rows_mask`` (library phases and their
    decoys): the selection, the null and the number of phases searched are those of this part of
    the library. The rows keep the scores they got (a row's score does not depend on the others), and
    one chance ring's worth of score (the tail's smallest scale) stays that of all the decoys, a
    property of the sample's rings that a few kept decoys would estimate less well."""
    n_ph = ctx.n_phases
    scored = ctx.rows
    sub = {f.name: getattr(scored, f.name) for f in fields(scored)}
    for name, value in sub.items():
        if name != "missing_strong":  # a flat mask over the index's rings, used only by the matches
            sub[name] = value[rows_mask]
    keep = np.flatnonzero(rows_mask[:n_ph])
    matches = [ctx.matches[q] for q in keep]
    return replace(ctx, rows=_RowScores(**sub), matches=matches,
                   arrays_by_name={m.phase: ctx.arrays_by_name[m.phase] for m in matches})


def _answer(ctx: _Sample) -> Identification:
    """Select, control the rate, assign the rings and label the answer of a scored sample."""
    obs, settings = ctx.obs, ctx.settings
    chosen, chosen_p, rejected = _select(ctx)
    assignments = _assign_rings(chosen, ctx.arrays_by_name, obs, ctx.tau)
    unexplained = tuple(i for i in range(ctx.n) if assignments[i] is None)
    unexplained_share = float(obs.area[list(unexplained)].sum() / obs.area.sum()) if unexplained else 0.0
    confidences, alternatives, separations = _confidences(ctx, chosen, chosen_p, unexplained_share)

    # one lattice that indexes every ring is a simpler answer than library phases that explain only
    # some of them (the rings of bcc(a) are among those of fcc(a·√2); a wurtzite-type cell holds the
    # rings of a diamond-type one), unless it is a chosen phase's own lattice with a ring that only
    # double diffraction or an impurity explains
    lattice = single_lattice(obs.g_per_nm, ctx.tau) if chosen and unexplained else None
    if lattice is not None and not any(_own_lattice(c, ctx.arrays_by_name[c.phase], lattice) for c in chosen):
        rejected = list(zip(chosen, chosen_p)) + rejected
        chosen, chosen_p, confidences, alternatives, separations = [], [], [], [], []
        assignments = [None] * ctx.n
        unexplained, unexplained_share = tuple(range(ctx.n)), 1.0
    else:
        lattice = None
    mismatched = _lattice_mismatches(ctx, chosen)

    flags = []
    if not chosen:
        flags.append("no_phase_identified")
    if rejected:
        flags.append("not_significant")
    if unexplained and (
        unexplained_share >= settings.unidentified_share or len(unexplained) >= settings.unidentified_rings
    ):
        flags.append("unidentified_phase")
    if mismatched:
        flags.append("lattice_mismatch")
    if lattice is not None:
        flags.append("one_lattice_fits_all")
    if any(alternatives):
        flags.append("ambiguous_isostructural")
    return Identification(
        phases=tuple(c.phase for c in chosen),
        confidence=tuple(confidences),
        alternatives=tuple(alternatives),
        separation_sigma=tuple(separations),
        fractions_rough=_rough_fractions(chosen, ctx.arrays_by_name),
        refined=tuple(_refine_lattice(c, ctx.arrays_by_name[c.phase], obs, ctx.tau, assignments) for c in chosen),
        assignments=tuple(assignments),
        unexplained=unexplained,
        candidates=tuple(_candidates(ctx, chosen, confidences)),
        flags=tuple(flags),
        false_identification_probability=tuple(chosen_p),
        unexplained_intensity_share=unexplained_share,
        lattice_mismatches=tuple(mismatched),
        single_lattice=lattice,
        rejected=tuple(
            {"phase": c.phase, "score": c.score, "false_identification_probability": p} for c, p in rejected
        ),
    )


def _index_for(library, settings: IdentifySettings) -> LibraryIndex:
    """The library's index (with decoys clear of the window), checking one that is given."""
    if not isinstance(library, LibraryIndex):
        return index_library(library, max(settings.dilation_window, DEFAULT_DECOY_CLEARANCE))
    if settings.dilation_window > library.decoy_clearance + 1e-12:
        raise ValueError(f"dilation window {settings.dilation_window} is wider than the index's decoy clearance "
                         f"{library.decoy_clearance}: index the library with decoy_clearance ≥ the window")
    return library


def _score_sample(obs, lib: LibraryIndex, settings, g_range_per_nm, detection_limit_area) -> _Sample:
    """Score every library phase and decoy on the sample's rings over the dilation window."""
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
    step = max(float(np.min(tau / obs.g_per_nm)), 1e-5)  # one τ: the least-squares step refines α
    n_steps = int(math.ceil(settings.dilation_window / step))
    alphas = 1.0 + np.linspace(-settings.dilation_window, settings.dilation_window, 2 * n_steps + 1)

    rows = _score_rows(lib, obs, tau, v, settings, g_lo, g_hi, a_lim, alphas)
    n_ph = len(lib.phases)
    decoy = slice(n_ph, lib.n_rows)
    # one chance match's worth of score in this sample: the decoys' typical matched-ring evidence
    chance = (v * (rows.evidence[decoy] - u))[rows.evidence[decoy] >= 0]
    quantum = float(np.median(chance)) if chance.size else float(np.median(v) * (math.log(g_hi - g_lo) - u))
    return _Sample(obs=obs, settings=settings, tau=tau, v=v, rows=rows,
                   matches=[_phase_match(lib, rows, p) for p in range(n_ph)],
                   arrays_by_name={a.phase: a for a in lib.phases}, quantum=max(quantum, 1.0))


def _select(ctx: _Sample):
    """Greedy selection (each step's gain with its false-identification probability), then the rate
    control over the set; returns (chosen, their probabilities, the rejected (phase, p) pairs)."""
    v, u, kappa, settings = ctx.v, ctx.u, ctx.kappa, ctx.settings
    chosen: list[PhaseMatch] = []
    chosen_p: list[float] = []
    eligible = [m for m, ok in zip(ctx.matches, ctx.rows.eligible[:ctx.n_phases]) if ok]
    while len(chosen) < settings.max_phases:
        base_ev = np.max([c.ring_evidence for c in chosen], axis=0) if chosen else np.full(ctx.n, -np.inf)
        best, best_gain = None, 0.0
        for m in eligible:
            if any(m is c for c in chosen):
                continue
            gain = _set_score(chosen + [m], v, u, kappa) - _set_score(chosen, v, u, kappa)
            explains_new = not chosen or np.any((m.ring_evidence >= 0) & (base_ev < 0))
            if explains_new and gain > best_gain:
                best, best_gain = m, gain
        if best is None:
            break
        chosen.append(best)
        chosen_p.append(float(ctx.false_probability(best_gain, base_ev)[0]))
    n_kept = _forward_stop(chosen_p, settings.false_identification_rate)
    rejected = list(zip(chosen[n_kept:], chosen_p[n_kept:]))
    return chosen[:n_kept], chosen_p[:n_kept], rejected


def _confidences(ctx: _Sample, chosen, chosen_p, unexplained_share):
    """Confidence, alternatives and separation (σ of the dilation) of each chosen phase: swap it for
    every other library phase that could enter an answer, or leave it out; then the chance that it
    is an absent phase's chance match, and the share of the ring area the answer explains."""
    v, u, kappa, settings, rows = ctx.v, ctx.u, ctx.kappa, ctx.settings, ctx.rows
    n_ph = ctx.n_phases
    current = _set_score(chosen, v, u, kappa)
    all_ev = rows.evidence[:n_ph]
    all_terms = rows.phase_terms[:n_ph]
    chosen_ids = {id(c) for c in chosen}
    swappable = np.array([id(m) not in chosen_ids for m in ctx.matches], dtype=bool) & ~rows.lattice_mismatch[:n_ph]
    sigma_alpha = settings.dilation_sigma or settings.dilation_window / 2
    confidences, alternatives, separations = [], [], []
    for p, p_false in zip(chosen, chosen_p):
        others = [c for c in chosen if c is not p]
        s_without = _set_score(others, v, u, kappa)
        base_ev = np.max([c.ring_evidence for c in others], axis=0) if others else np.full(ctx.n, -np.inf)
        swap = (v * np.maximum(u, np.maximum(base_ev, all_ev))).sum(axis=1) + all_terms
        swap += sum(c.phase_terms for c in others) - kappa * (len(others) + 1)
        swap = np.where(swappable, swap, -np.inf)
        denom = 1.0 + math.exp(min(50.0, s_without - current)) + float(np.sum(np.exp(np.minimum(50.0, swap - current))))
        # closed world (other library phases, or none) × not a chance match × the share of the ring
        # area the answer explains (rings left over may belong to an absent phase whose lattice the
        # match is only a part of, e.g. bcc(a) rings are among those of fcc(a·√2))
        confidences.append((1.0 - unexplained_share) / denom / (1.0 + null_bayes_factor(p_false)))
        close = np.flatnonzero(current - swap < settings.alternative_margin)
        close = close[np.argsort(-swap[close], kind="stable")]
        alternatives.append(tuple(ctx.matches[q].phase for q in close))
        if swappable.any():
            q_best = ctx.matches[int(np.argmax(swap))]
            sig = math.sqrt(sigma_alpha**2 + (p.dilation_sigma if math.isfinite(p.dilation_sigma) else 0) ** 2)
            g_ratio = _lattice_ratio(ctx.arrays_by_name[p.phase], ctx.arrays_by_name[q_best.phase])
            separations.append(abs(math.log(g_ratio)) / sig if math.isfinite(g_ratio) else math.nan)
        else:
            separations.append(math.nan)
    return confidences, alternatives, separations


def _candidates(ctx: _Sample, chosen, confidences) -> list[Candidate]:
    """The phases.csv rows: every library phase scoring above the floor (or in the answer), with its
    own false-identification probability as if it were the first phase."""
    rows, settings = ctx.rows, ctx.settings
    single_p = ctx.false_probability(rows.score[:ctx.n_phases] - ctx.kappa, np.full(ctx.n, -np.inf))
    index_of = {id(m): q for q, m in enumerate(ctx.matches)}
    out = []
    for m in sorted(ctx.matches, key=lambda m: (-m.score, m.phase)):
        in_answer = any(m is c for c in chosen)
        if m.score <= settings.candidate_floor and not in_answer:
            continue
        q = index_of[id(m)]
        out.append(Candidate(
            phase=m.phase, score=m.score, dilation=m.dilation, dilation_sigma=m.dilation_sigma,
            n_matched=m.n_matched, missing_strong_rings=";".join(m.missing_strong),
            n_missing_strong=len(m.missing_strong), explained_intensity_share=m.explained_share,
            in_answer=in_answer,
            confidence=next((conf for c, conf in zip(chosen, confidences) if c is m), math.nan),
            false_identification_probability=float(single_p[q]) if rows.eligible[q] else math.nan,
            free_dilation=float(rows.free_dilation[q]), free_dilation_sigma=float(rows.free_dilation_sigma[q]),
            lattice_mismatch=bool(rows.lattice_mismatch[q]),
            n_missing_major=int(rows.n_missing_top[q]),
        ))
    return out


def _lattice_mismatches(ctx: _Sample, chosen) -> list[dict]:
    """Phases that would have matched but for a dilation outside the window: those that matter, when
    nothing is reported or when they score above the answer, best first."""
    rows, settings, n_ph = ctx.rows, ctx.settings, ctx.n_phases
    candidates = np.flatnonzero(rows.lattice_mismatch[:n_ph] & (rows.score[:n_ph] >= settings.accept_score)
                                & (rows.n_matched[:n_ph] >= settings.min_matched_rings))
    best_reported = max((c.score for c in chosen), default=-math.inf)
    out = [{"phase": ctx.matches[q].phase, "dilation": float(rows.free_dilation[q]),
            "dilation_sigma": float(rows.free_dilation_sigma[q]), "score": float(rows.score[q])}
           for q in candidates if rows.score[q] > best_reported]
    return sorted(out, key=lambda r: (-r["score"], r["phase"]))


def _own_lattice(match: PhaseMatch, ph: _PhaseArrays, lattice: dict) -> bool:
    """Whether a lattice found by ``single_lattice`` is the matched phase's own cell (at its dilation)."""
    cell = ph.meta.get("cell") or {}
    system = (ph.meta.get("crystal_system") or "").lower()
    if system == "trigonal" and abs(float(cell.get("gamma_deg") or 0) - 120.0) < 1e-3:
        system = "hexagonal"
    if system != lattice["system"] or not cell.get("a_angstrom"):
        return False
    same = abs(lattice["a_angstrom"] / (cell["a_angstrom"] * match.dilation) - 1) < OWN_LATTICE_TOLERANCE
    if lattice["system"] != "cubic":
        c0 = cell.get("c_angstrom")
        same = same and bool(c0) and abs(lattice["c_angstrom"] / (c0 * match.dilation) - 1) < OWN_LATTICE_TOLERANCE
    return same


#: N = h² + k² + l² of a cubic lattice (every integer that is a sum of three squares), up to this
MAX_CUBIC_INDEX = 48
MIN_RINGS_CUBIC = 6  # fewer rings are indexed by some cubic cell too easily
#: hexagonal (4/3)(h² + hk + k²)/a² + l²/c² and tetragonal (h² + k²)/a² + l²/c² cells: index limits,
#: the fewest rings for two free parameters, and de Wolff's figure of merit M = Q_N / (2 ε̄ N_calc)
#: (J. Appl. Cryst. 1, 108, 1968; M above 10 is the usual mark of a plausible indexing, common practice)
MAX_PLANAR_INDEX, MAX_L = 48, 8
MIN_RINGS_UNIAXIAL = 12  # seen while choosing it: 12 of 100 lattice-free lists of 8 rings indexed, 2 of 10, 0 of 12
MIN_DE_WOLFF_M = 10.0
OWN_LATTICE_TOLERANCE = 0.003
_HEX_M = np.array(sorted({h * h + h * k + k * k for h in range(8) for k in range(8)}))
_TET_M = np.array(sorted({h * h + k * k for h in range(8) for k in range(8)}))


def single_lattice(g_per_nm: np.ndarray, tau_per_nm: np.ndarray) -> dict | None:
    """One primitive cubic, hexagonal or tetragonal cell that puts every observed ring within 3 τ of one
    of its rings (cubic first, then the uniaxial cell of highest de Wolff M ≥ MIN_DE_WOLFF_M), or None.

    Returns ``{"system", "a_angstrom"[, "c_angstrom", "de_wolff_m"]}``.
    """
    a = single_cubic_lattice(g_per_nm, tau_per_nm)
    if a is not None:
        return {"system": "cubic", "a_angstrom": a}
    return single_uniaxial_lattice(g_per_nm, tau_per_nm)


def single_uniaxial_lattice(g_per_nm: np.ndarray, tau_per_nm: np.ndarray) -> dict | None:
    """The hexagonal or tetragonal P cell of highest de Wolff M that indexes every ring within 3 τ, if
    M ≥ MIN_DE_WOLFF_M (at least MIN_RINGS_UNIAXIAL rings). Trial cells take one of the three lowest
    rings as (hk0) and one of the six lowest as (hkl) with l = 1 … 3, in the way of Ito's and
    Visser's zone search in Q = 1/d² (Visser, J. Appl. Cryst. 2, 89, 1969)."""
    if len(g_per_nm) < MIN_RINGS_UNIAXIAL:
        return None
    q = g_per_nm**2
    sq = 2 * g_per_nm * tau_per_nm
    order = np.argsort(q)
    ls = np.arange(MAX_L + 1) ** 2
    best = None
    threshold = q.max() * (1 + 1e-9)
    for system, mv, factor in (("hexagonal", _HEX_M, 4.0 / 3.0), ("tetragonal", _TET_M, 1.0)):
        mv = mv[mv <= MAX_PLANAR_INDEX]
        l_trial, m_trial = (a.ravel() for a in np.meshgrid([1, 2, 3], mv[:6], indexing="ij"))
        for i in order[:3]:
            for m_i in mv[1:7]:
                a_term = q[i] / (factor * m_i)  # factor·a_term·m is the (hk) part of Q
                hk = factor * a_term * mv[:, None]
                for j in order[:6]:
                    if j == i:
                        continue
                    c_terms = (q[j] - factor * m_trial * a_term) / l_trial**2  # every (l, hk) trial for ring j
                    c_terms = c_terms[c_terms > 0]
                    if c_terms.size == 0:
                        continue
                    calc = (hk[None, :, :] + c_terms[:, None, None] * ls[None, None, :]).reshape(len(c_terms), -1)
                    calc = np.sort(np.where(calc > 0, calc, np.inf), axis=1)  # Q of every trial cell's rings
                    d = np.min(np.abs(calc[:, :, None] - q[None, None, :]), axis=1)  # nearest calculated ring
                    ok = np.all(d <= 3 * sq, axis=1)
                    if not ok.any():
                        continue
                    inside = calc <= threshold
                    n_calc = inside[:, :1].sum(axis=1) + (inside[:, 1:] & (np.diff(calc, axis=1) != 0)).sum(axis=1)
                    for t in np.flatnonzero(ok):
                        m_fom = float(q.max() / (2 * max(float(np.mean(d[t])), 1e-12) * n_calc[t]))
                        if m_fom >= MIN_DE_WOLFF_M and (best is None or m_fom > best["de_wolff_m"]):
                            best = {"system": system, "a_angstrom": 10.0 / math.sqrt(a_term),
                                    "c_angstrom": 10.0 / math.sqrt(c_terms[t]), "de_wolff_m": m_fom}
    return best


def single_cubic_lattice(g_per_nm: np.ndarray, tau_per_nm: np.ndarray) -> float | None:
    """Lattice parameter a (Å) of the smallest cubic cell whose rings, g² = N/a² with N = h² + k² + l²
    ≤ MAX_CUBIC_INDEX, put every observed ring within 3 τ; None if no such cell (or too few rings)."""
    if len(g_per_nm) < MIN_RINGS_CUBIC:
        return None
    allowed = np.array(sorted({h * h + k * k + l * l for h in range(7) for k in range(7) for l in range(7)} - {0}))
    allowed = allowed[allowed <= MAX_CUBIC_INDEX]
    q = g_per_nm**2
    sq = 2 * g_per_nm * tau_per_nm
    first = int(np.argmin(g_per_nm))
    for n_first in allowed:  # the lowest ring's N, smallest cell first
        q0 = q[first] / n_first
        n = np.round(q / q0)
        if np.any(~np.isin(n, allowed)):
            continue
        q0 = float(np.sum(n * q / sq**2) / np.sum(n * n / sq**2))  # weighted least squares of q = N·q0
        if np.all(np.abs(q - n * q0) <= 3 * sq):
            return 10.0 / math.sqrt(q0)
    return None


def _phase_match(lib: LibraryIndex, rows: _RowScores, p: int) -> PhaseMatch:
    ph = lib.phases[p]
    start, stop = lib.start[p], lib.stop[p]
    mine = np.flatnonzero(rows.missing_strong[start:stop])
    matched = rows.evidence[p] >= 0
    return PhaseMatch(
        phase=ph.phase, score=float(rows.score[p]), dilation=float(rows.dilation[p]),
        dilation_sigma=float(rows.dilation_sigma[p]), ring_evidence=rows.evidence[p],
        predicted_index=np.where(matched, rows.nearest[p] - start, -1), phase_terms=float(rows.phase_terms[p]),
        n_matched=int(rows.n_matched[p]), missing_strong=tuple(ph.hkl[j] for j in mine),
        explained_share=float(rows.explained_share[p]), scale=float(rows.scale[p]),
    )


def _forward_stop(p_values: list[float], rate: float) -> int:
    """How many of the phases, in the order the greedy search added them, are kept so that the
    expected share of false ones is at most ``rate``: ForwardStop, the largest k with
    −(1/k)·Σ_{i≤k} ln(1 − p_i) ≤ rate (G'Sell, Wager, Chouldechova & Tibshirani, J. R. Stat. Soc. B 78,
    423, 2016; the Benjamini–Hochberg idea for hypotheses tested in sequence, each given the ones
    before)."""
    kept, total = 0, 0.0
    for k, p in enumerate(p_values, start=1):
        total += -math.log1p(-min(p, 1 - 1e-16))
        if total / k <= rate:
            kept = k
    return kept


def _assign_rings(chosen, arrays_by_name, obs, tau) -> list[RingAssignment | None]:
    """(phase, hkl) of each observed ring from the chosen phases, or None if none explains it."""
    n = len(obs)
    assignments: list[RingAssignment | None] = [None] * n
    if not chosen:
        return assignments
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
    return assignments


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


def _refine_lattice(match: PhaseMatch, ph: _PhaseArrays, obs, tau, assignments) -> RefinedLattice:
    """Refined lattice: isotropic dilation always; cubic a; tetragonal/hexagonal a and c
    from linear least squares in (1/a², 1/c²) when at least three rings fix both."""
    cell = ph.meta.get("cell") or {}
    system = (ph.meta.get("crystal_system") or "").lower()
    out = {"dilation": match.dilation, "dilation_sigma": match.dilation_sigma}  # the RefinedLattice's fields
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
    return RefinedLattice(**out)
