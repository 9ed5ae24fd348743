"""Rings of a 1D profile: significance-tested detection and joint pseudo-Voigt fitting.

Detection (:func:`detect_rings`) is a multi-scale matched filter on the background-subtracted
profile r. At each scale s (Gaussian σ of a ring, in bins, from half the instrumental FWHM to
the widest halo, steps of √2) the statistic

    T_s(i) = Σ_j k_s(j) r(i+j) / σ²(i+j)  /  √( Σ_j k_s(j)² / σ²(i+j) )

is the signal-to-noise ratio of the compensated (zero-mean) kernel
k(x) = exp(−x²/2c²) − ½ exp(−x²/8c²), c = 1.6534 s: a difference of Gaussians, blind to a
constant or linear background error, and matched to a Gaussian ring of standard deviation s.
For pure noise with the stated σ, T_s(i) is standard normal. The threshold z follows from the
false-alarm probability α per profile with a Bonferroni (look-elsewhere) correction over the M
independent resolution elements searched, M = Σ_scales (g range / FWHM_scale):
z = Φ⁻¹(1 − α/M) (z ≈ 4.4 for α = 0.01 on a 1–14 nm⁻¹ profile). Local maxima above z are
taken from the finest scale up, so close rings are separated at the smallest width that
resolves them (measured: two equal rings 1.0 FWHM apart are resolved).

Fitting (:func:`fit_rings`) is bounded least squares (scipy ``least_squares``, trust-region
reflective, analytic Jacobian, ``x_scale='jac'``) of pseudo-Voigt components
A·[η L(g; g0, Γ) + (1−η) G(g; g0, Γ)] with area A over g, done cluster by cluster so every
problem stays small: a cluster is a run of rings within ±4 FWHM of each other (rings whose
windows hold each other's cores are fitted together; measured: half the cluster fits of ±1.5
FWHM and more of the close rings kept; at most 6, split at the widest gap), fitted on its own
window of ±8 FWHM (a Lorentzian keeps 96 % of its area inside; narrower windows let the local
background trade against the tails) with a local linear correction on top of the clipped
background; the tails of all other components are held fixed in its baseline, and the clusters
are swept until no baseline changed by 0.1 σ of a bin since its cluster's last fit (block
coordinate descent). Broad windows are averaged into groups of bins (≥ 20 per FWHM).
Uncertainties are the square roots of the diagonal of (JᵀJ)⁻¹·χ²_ν of the cluster fit (local
background included). The search runs in
two stages:

A. the narrow candidates (FWHM below the halo threshold) alone; the least significant member
   of a cluster is dropped while its A/σ_A < ``confirm_sigma``, and the residual is searched
   again at the same threshold (a detection is not added when it is not resolved from a
   component already there, is weaker than ``shape_tolerance`` of a neighbour, or repeats a
   dropped one). Until the residual search is done, σ_A is not inflated by χ²_ν (rings not
   yet found sit in the windows). The background is then clipped again from the profile with
   these rings taken out (until it moves by less than 0.5 σ, at most 4 times), so the
   piled-up tails of close rings are not taken for background (or, worse, for a halo);
B. broad components (halos) are searched at the broad scales on the residual and fitted
   jointly over the whole profile with a smooth additive background correction (linear
   B-splines, knots ≥ 4 nm⁻¹ apart), the rings held fixed; then the halos are held in the
   baseline and the ring clusters refitted. When the residual holds no halo, one hidden
   under nanocrystal rings (whose Lorentzian tails took it) is tested for by a likelihood
   ratio (``hidden_halo_trial``).

A halo among rings is then tested for lack of fit: where many nanocrystal rings lie closer than
their width they merge into a broad feature that stage B fits as a halo, but they leave structure
on it that a smooth halo cannot describe. When χ² under the halo (±FWHM) is above its 1 − α
quantile and the residual beyond the noise is more than ``band_misfit_fraction`` of the signal,
the component is reported as an unresolved band of rings (kind "band"), which counts as rings.
The measured figures of these choices (χ² and residual under bands and halos, size bias of dense
broad rings) are produced by benchmarks/bench_ring_accuracy.py and quoted in docs/rings.md.

:func:`analyze_profile` runs the whole stage: background, detection, fitting, crystallite size,
crystallinity and (with a cake) ring character, returning a :class:`RingAnalysis`;
:func:`write_rings_csv` and :func:`write_profile_csv` write the contract files.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

from ringid.profile.background import DEFAULT_SMOOTH_PER_NM
from ringid.profile.lineshape import (  # noqa: F401 - pseudo_voigt is part of this stage's interface
    GAUSS_HEIGHT,
    LN2,
    LORENTZ_HEIGHT,
    pseudo_voigt,
    pseudo_voigt_integral_breadth,
)
from ringid.core.errors import RingidError
from ringid.core.model import Profile, Ring

FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * LN2)
# The kernel k_s(x) = exp(−x²/2s²) − ½exp(−x²/8s²) gives the largest SNR on a Gaussian peak of
# standard deviation σ when s = 1.6534 σ (computed numerically by maximising ⟨k_s, G_σ⟩/‖k_s‖).
DOG_MATCH = 1.6534
LSMR_ABOVE_PARAMETERS = 10**6
# a detection must stand out of its surroundings by a dip of this many σ of the matched-filter
# SNR (prominence); noise ripples on a strong feature are of order 1 σ (common practice: 3σ)
PEAK_PROMINENCE_SIGMA = 3.0
# scales are √2 apart: 4 steps = a factor 4 in width (a shoulder of a much broader feature)
SHOULDER_SCALE_STEPS = 4
# largest cluster of overlapping rings fitted as one problem (4 parameters each)
CLUSTER_MAX_MEMBERS = 6
# sampling kept in a cluster fit: bins per FWHM of its narrowest member
BINS_PER_FWHM = 20  # LSMR measured slower here even for 30 rings; kept as a switch


@dataclass(frozen=True)
class FittedRing(Ring):
    """A :class:`ringid.core.model.Ring` with the extra fitted quantities needed downstream.

    breadth_per_nm is the integral breadth β = area/height of the fitted pseudo-Voigt (1/nm),
    with its standard uncertainty from the covariance of (FWHM, η).
    """

    eta_sigma: float = math.nan
    breadth_per_nm: float = math.nan
    breadth_sigma_per_nm: float = math.nan
    height: float = math.nan


@dataclass(frozen=True)
class Candidate:
    """A detected ring before fitting: position (1/nm), FWHM estimate (1/nm), SNR, area estimate."""

    g_per_nm: float
    fwhm_per_nm: float
    snr: float
    area: float
    eta: float = 0.3


@dataclass(frozen=True)
class RingFit:
    """Result of detection + joint fitting of one profile.

    background and model are on the profile's g grid (model = background + all components);
    threshold_sigma is the detection threshold z for the false-alarm probability per profile
    ``false_alarm_probability`` over ``n_resolution_elements`` independent tests.
    """

    rings: tuple[FittedRing, ...]
    background: np.ndarray
    model: np.ndarray
    chi2_reduced: float
    threshold_sigma: float
    false_alarm_probability: float
    n_resolution_elements: float
    flags: tuple[str, ...] = ()


# ---------------------------------------------------------------- line shapes


def _components(g, params, n_comp):
    """The n_comp pseudo-Voigts of params (g0, FWHM, η, area per component) on the grid g; (n_comp, n_g)."""
    p = params.reshape(n_comp, 4)
    return pseudo_voigt(g[None, :], p[:, 0:1], p[:, 1:2], p[:, 2:3], p[:, 3:4])


def _jacobian(g, params, n_comp):
    """Derivatives of each of :func:`_components` with respect to its 4 parameters; (n_comp, 4, n_g)."""
    p = params.reshape(n_comp, 4)
    g0, fwhm, eta, area = p[:, 0:1], p[:, 1:2], p[:, 2:3], p[:, 3:4]
    x = g[None, :] - g0
    u = 4.0 * (x / fwhm) ** 2
    e = np.exp(-LN2 * u)
    gauss = GAUSS_HEIGHT / fwhm * e
    lorentz = LORENTZ_HEIGHT / fwhm / (1.0 + u)
    shape = eta * lorentz + (1.0 - eta) * gauss
    dg_dg0 = gauss * (8.0 * LN2 * x / fwhm**2)
    dl_dg0 = lorentz * (8.0 * x / fwhm**2) / (1.0 + u)
    dg_dw = gauss * (-1.0 / fwhm + 2.0 * LN2 * u / fwhm)
    dl_dw = lorentz * (-1.0 / fwhm + 2.0 * u / fwhm / (1.0 + u))
    jac = np.empty((n_comp, 4, g.size))
    jac[:, 0] = area * (eta * dl_dg0 + (1.0 - eta) * dg_dg0)
    jac[:, 1] = area * (eta * dl_dw + (1.0 - eta) * dg_dw)
    jac[:, 2] = area * (lorentz - gauss)
    jac[:, 3] = shape
    return jac


# ---------------------------------------------------------------- detection


def detection_threshold(false_alarm_probability: float, n_resolution_elements: float) -> float:
    """One-sided Gaussian threshold z with P(any of M independent N(0,1) > z) ≤ α (Bonferroni)."""
    from scipy.special import ndtri

    if not 0.0 < false_alarm_probability < 1.0:
        raise ValueError(f"false_alarm_probability must be in (0, 1), got {false_alarm_probability}")
    return float(ndtri(1.0 - false_alarm_probability / max(1.0, n_resolution_elements)))


def _scales_bins(step, fwhm_min_per_nm, fwhm_max_per_nm):
    s_min = max(fwhm_min_per_nm / step / FWHM_PER_SIGMA, 0.8)
    s_max = max(fwhm_max_per_nm / step / FWHM_PER_SIGMA, s_min)
    n = int(math.floor(math.log(s_max / s_min) / math.log(math.sqrt(2.0)))) + 1
    return s_min * math.sqrt(2.0) ** np.arange(n)


class _MatchedFilter:
    """FFT-based multi-scale compensated matched filter on a fixed weight vector."""

    def __init__(self, weight: np.ndarray, scales_bins: np.ndarray):
        n = weight.size
        self.n = n
        self.scales = scales_bins
        self.half = [int(math.ceil(6.0 * DOG_MATCH * s)) for s in scales_bins]
        self.nfft = 1 << int(math.ceil(math.log2(n + 2 * max(self.half) + 1)))
        self.kernel_ft, self.sqrt_den, self.amp_den, self.inside = [], [], [], []
        w_ft = np.fft.rfft(weight, self.nfft)
        valid_ft = np.fft.rfft((weight > 0).astype(float), self.nfft)
        idx = np.arange(n)
        for s_peak, h in zip(scales_bins, self.half):
            s = DOG_MATCH * s_peak
            x = np.arange(-h, h + 1, dtype=float)
            gauss = np.exp(-0.5 * (x / s_peak) ** 2)
            kern = np.exp(-0.5 * (x / s) ** 2) - 0.5 * np.exp(-0.125 * (x / s) ** 2)
            kft = self._kernel_ft(kern, h)
            self.kernel_ft.append(kft)
            den = self._apply(w_ft, self._kernel_ft(kern**2, h))
            self.sqrt_den.append(np.sqrt(np.clip(den, 1e-300, None)))
            self.amp_den.append(self._apply(w_ft, self._kernel_ft(kern * gauss, h)))
            # only positions whose kernel, with most of its negative lobes (±4 s), lies inside the
            # profile: nearer the ends the kernel is no longer compensated
            core = int(math.ceil(4.0 * s))  # s is the kernel scale here
            # and only where most of the kernel's weight falls on valid bins: over a masked
            # stretch the numerator and the denominator are both rounding noise
            coverage = self._apply(valid_ft, self._kernel_ft(kern**2, h)) / float(np.sum(kern**2))
            self.inside.append((idx >= core) & (idx < n - core) & (coverage > 0.2))

    def _kernel_ft(self, kern, h):
        buf = np.zeros(self.nfft)
        buf[: h + 1] = kern[h:]
        buf[-h:] = kern[:h]
        return np.fft.rfft(buf)

    def _apply(self, signal_ft, kernel_ft):
        return np.fft.irfft(signal_ft * kernel_ft, self.nfft)[: self.n]

    def snr_and_amplitude(self, weighted_residual: np.ndarray):
        r_ft = np.fft.rfft(weighted_residual, self.nfft)
        snr = np.empty((len(self.scales), self.n))
        amp = np.empty_like(snr)
        for k in range(len(self.scales)):
            num = self._apply(r_ft, self.kernel_ft[k])
            snr[k] = np.where(self.inside[k], num / self.sqrt_den[k], -np.inf)
            amp[k] = num / np.where(self.amp_den[k] > 0, self.amp_den[k], np.inf)
        return snr, amp


_FILTERS: dict = {}


def _matched_filter(weight: np.ndarray, scales_bins: np.ndarray) -> _MatchedFilter:
    """The filter bank for these weights and scales, reused across the residual rounds of one
    profile (the kernels and their normalisations depend on σ only; measured: a third of the
    detection time)."""
    import hashlib

    key = (hashlib.blake2b(np.ascontiguousarray(weight).tobytes(), digest_size=16).digest(),
           np.asarray(scales_bins, float).tobytes())
    filt = _FILTERS.get(key)
    if filt is None:
        if len(_FILTERS) >= 4:
            _FILTERS.pop(next(iter(_FILTERS)))
        filt = _FILTERS[key] = _MatchedFilter(weight, scales_bins)
    return filt


def _n_resolution_elements(g_range, step, scales_bins):
    return float(sum(g_range / max(s * step * FWHM_PER_SIGMA, step) for s in scales_bins))


def detect_rings(
    g_per_nm,
    residual,
    sigma,
    *,
    fwhm_min_per_nm: float,
    fwhm_max_per_nm: float,
    threshold_sigma: float,
    max_components: int = 60,
) -> list[Candidate]:
    """Scale-space detection of rings in a background-subtracted profile.

    At every scale the local maxima in g of the matched-filter SNR T_s above
    ``threshold_sigma`` are found. They are taken from the finest scale up, so that close rings
    are separated at the smallest width that resolves them; a maximum at a coarser scale closer
    than half its FWHM to one already taken is the same feature (or a blend of taken ones) and
    is skipped. Each taken maximum is followed up through the scales while it stays a maximum
    and its SNR grows; the scale where it stops sets the width estimate.

    Parameters
    ----------
    g_per_nm : uniform g grid (1/nm)
    residual : profile minus background (and minus any already fitted components)
    sigma : standard uncertainty per bin; bins with non-finite or non-positive σ are ignored
    fwhm_min_per_nm, fwhm_max_per_nm : range of ring widths searched (instrumental FWHM to the
        widest halo)
    threshold_sigma : detection threshold z on the matched-filter SNR (see :func:`detection_threshold`)

    Returns
    -------
    Candidates, strongest first (at most ``max_components``).
    """
    g = np.asarray(g_per_nm, dtype=float)
    step = float(np.median(np.diff(g)))
    scales = _scales_bins(step, fwhm_min_per_nm, fwhm_max_per_nm)
    snr, amp = _filter_responses(residual, sigma, scales)
    maxima, starts = _scale_maxima(snr, threshold_sigma)
    taken: list[int] = []  # positions (bins) of accepted candidates
    ends: list[tuple[int, int, int]] = []  # (start scale, end scale, end bin) of each accepted candidate
    found: list[Candidate] = []
    for k, idx in enumerate(starts):
        half = 0.5 * FWHM_PER_SIGMA * scales[k]
        for i in idx[np.argsort(-snr[k, idx])]:
            if any(abs(i - t) < half for t in taken):
                continue
            kk, ii = _followed_up(snr, maxima, scales, k, i)
            if _part_of_accepted(ends, scales, k, kk, ii):
                continue
            taken.append(i)
            ends.append((k, kk, ii))
            s = scales[kk]
            found.append(
                Candidate(
                    g_per_nm=float(g[i]),
                    fwhm_per_nm=float(s * step * FWHM_PER_SIGMA),
                    snr=float(snr[kk, ii]),
                    area=float(max(amp[kk, ii], 0.0) * s * step * math.sqrt(2.0 * math.pi)),
                )
            )
    found.sort(key=lambda c: -c.snr)
    return found[:max_components]


def _filter_responses(residual, sigma, scales) -> tuple[np.ndarray, np.ndarray]:
    """Matched-filter SNR T_s and amplitude (profile units) of ``residual`` at each scale (bins), shape
    (n_scales, n_g); weights 1/σ², bins with non-finite or non-positive σ or a non-finite residual left out."""
    sigma = np.asarray(sigma, dtype=float)
    ok = np.isfinite(sigma) & (sigma > 0) & np.isfinite(residual)
    weight = np.where(ok, 1.0 / np.where(ok, sigma, 1.0) ** 2, 0.0)
    r = np.where(ok, residual, 0.0).astype(float)
    return _matched_filter(weight, scales).snr_and_amplitude(r * weight)


def _scale_maxima(snr: np.ndarray, threshold_sigma: float) -> tuple[list[np.ndarray], list[np.ndarray]]:
    """Per scale: every local maximum of the SNR (for following a feature through the scales), and the
    starting points, the maxima above ``threshold_sigma`` that stand out from their surroundings by a
    significant dip (prominence ≥ PEAK_PROMINENCE_SIGMA in SNR units; T_s has unit noise), so the noise
    ripples on top of a strong ring or a halo are not taken for separate rings. Bin indices."""
    from scipy.signal import argrelmax, find_peaks

    finite = np.isfinite(snr)
    floor = float(np.min(snr[finite])) if finite.any() else 0.0
    finite_snr = np.where(finite, snr, floor)
    maxima = [argrelmax(finite_snr[k], order=1, mode="clip")[0] for k in range(snr.shape[0])]
    starts = [
        find_peaks(finite_snr[k], height=threshold_sigma, prominence=PEAK_PROMINENCE_SIGMA)[0]
        for k in range(snr.shape[0])
    ]
    return maxima, starts


def _followed_up(snr, maxima, scales, k: int, i: int) -> tuple[int, int]:
    """(scale, bin) where the maximum at scale ``k``, bin ``i`` stops: followed up through the scales to the
    nearest maximum of the next scale while its SNR grows and it stays within its starting FWHM of ``i``."""
    kk, ii = k, i
    while kk + 1 < len(scales):
        nxt = maxima[kk + 1]
        near = nxt[np.abs(nxt - ii) <= max(1.0, 0.5 * FWHM_PER_SIGMA * scales[kk + 1])]
        if near.size == 0:
            break
        j = near[np.argmax(snr[kk + 1, near])]
        if snr[kk + 1, j] <= snr[kk, ii]:
            break
        # a maximum that drifts away from where it started by more than its starting
        # FWHM is being taken over by a neighbour: the feature itself ended
        if abs(j - i) > max(1.0, FWHM_PER_SIGMA * scales[k]):
            break
        kk, ii = kk + 1, j
    return kk, ii


def _part_of_accepted(ends, scales, k: int, kk: int, ii: int) -> bool:
    """Whether a maximum starting at scale ``k`` and ending at (``kk``, ``ii``) belongs to accepted ones
    (``ends``: their start scale, end scale and end bin): a fine maximum that grows into a feature at least
    SHOULDER_SCALE_STEPS scales broader, where another accepted one already ended, is a shoulder of that broad
    feature, not a new ring; and a maximum starting at a coarser scale that ends where one resolved at a finer
    scale ended is the blend of resolved ones."""
    same_end = [ks for ks, ke, ie in ends if ke == kk and abs(ie - ii) < 0.5 * FWHM_PER_SIGMA * scales[kk]]
    return bool(same_end) and (kk - k >= SHOULDER_SCALE_STEPS or min(same_end) < k)


# ---------------------------------------------------------------- fitting


def _instrument_fwhm_array(instrument, g):
    if instrument is None:
        return None
    if callable(getattr(instrument, "fwhm_per_nm", None)):
        return np.asarray(instrument.fwhm_per_nm(g), dtype=float) * np.ones_like(g)
    if callable(instrument):
        return np.asarray(instrument(g), dtype=float) * np.ones_like(g)
    return np.full_like(g, float(instrument))


def _hat_basis(g, spacing_per_nm):
    """Linear B-spline (hat) functions with knots every ``spacing_per_nm`` across g; (n_knots, n_g)."""
    lo, hi = float(g[0]), float(g[-1])
    n_int = max(1, int(math.ceil((hi - lo) / spacing_per_nm)))
    knots = np.linspace(lo, hi, n_int + 1)
    h = knots[1] - knots[0]
    return np.clip(1.0 - np.abs(g[None, :] - knots[:, None]) / h, 0.0, None)


@dataclass
class _Fit:
    params: np.ndarray  # (n_comp, 4): g0, fwhm, eta, area
    cov: np.ndarray  # covariance of the component parameters (4 n_comp square)
    chi2_nu: float
    comps: np.ndarray  # (n_comp, n_g) component curves on the full grid
    correction: np.ndarray  # fitted smooth background correction on the full grid
    converged: bool = True


def _fit_components(g, y, sigma, ok, background, cands, fwhm_lo, fwhm_hi, basis, max_nfev=200, step=None):
    """Joint bounded least squares of pseudo-Voigt components plus a smooth background correction."""
    from scipy.optimize import least_squares

    n_comp = len(cands)
    gs, ys, ws = g[ok], (y - background)[ok], 1.0 / sigma[ok]
    bas = basis[:, ok]
    n_bas = bas.shape[0]
    if step is None:
        step = float(np.median(np.diff(g)))
    x0, lo, hi = [], [], []
    for c in cands:
        w0 = float(np.clip(c.fwhm_per_nm, fwhm_lo * 1.01, fwhm_hi * 0.99))
        dg = max(w0, 2.0 * step)
        a0 = max(c.area, 1e-12)
        x0 += [c.g_per_nm, w0, float(np.clip(c.eta, 0.0, 1.0)), a0]
        lo += [c.g_per_nm - dg, fwhm_lo, 0.0, 0.0]
        hi += [c.g_per_nm + dg, fwhm_hi, 1.0, np.inf]
    x0 = np.array(x0 + [0.0] * n_bas)
    lo = np.array(lo + [-np.inf] * n_bas)
    hi = np.array(hi + [np.inf] * n_bas)
    bas_w = (bas * ws).T

    def fun(p):
        comps = _components(gs, p[: 4 * n_comp], n_comp)
        return (comps.sum(axis=0) + p[4 * n_comp :] @ bas - ys) * ws

    def jac(p):
        jc = _jacobian(gs, p[: 4 * n_comp], n_comp)
        return np.hstack([(jc.reshape(4 * n_comp, gs.size) * ws).T, bas_w])

    # exact trust-region steps (an SVD of J per iteration) for small problems; for many rings
    # the iterative LSMR solver is cheaper (the covariance below still uses the full SVD)
    solver = "exact" if x0.size <= LSMR_ABOVE_PARAMETERS else "lsmr"
    # x_scale="jac": variables scaled by the Jacobian's column norms (measured: fewer iterations
    # than fixed width/area scales on clusters of close rings)
    res = least_squares(
        fun, x0, jac=jac, bounds=(lo, hi), method="trf", x_scale="jac", max_nfev=max_nfev, ftol=1e-5, xtol=1e-5,
        tr_solver=solver,
    )
    p = res.x
    # reduced χ² over the bins under the components (±2 FWHM): misfit far out in a window, in the
    # tails of neighbours held fixed, says nothing about these components' own uncertainty
    centres, widths = p[0 : 4 * n_comp : 4], p[1 : 4 * n_comp : 4]
    core = (np.abs(gs[:, None] - centres[None, :]) <= 2.0 * widths[None, :]).any(axis=1)
    if core.sum() <= p.size:
        core = np.ones(gs.size, bool)
    dof = max(int(core.sum()) - p.size, 1)
    chi2_nu = float(np.sum(res.fun[core] ** 2) / dof)
    J = res.jac
    # covariance (JᵀJ)⁻¹ χ²_ν via SVD (pseudo-inverse for degenerate directions)
    _, sv, vt = np.linalg.svd(J, full_matrices=False)
    tol = np.finfo(float).eps * max(J.shape) * (sv[0] if sv.size else 0.0)
    inv = np.where(sv > tol, 1.0 / np.where(sv > tol, sv, 1.0) ** 2, 0.0)
    cov = ((vt.T * inv) @ vt * chi2_nu)[: 4 * n_comp, : 4 * n_comp]
    comps = _components(g, p[: 4 * n_comp], n_comp)
    return _Fit(p[: 4 * n_comp].reshape(n_comp, 4), cov, chi2_nu, comps, p[4 * n_comp :] @ basis, res.status > 0)


def _height(c: Candidate) -> float:
    return c.area / float(pseudo_voigt_integral_breadth(c.fwhm_per_nm, c.eta))


def _resolved_from(new: Candidate, existing: list[Candidate], shape_tolerance: float = 0.0) -> bool:
    """Whether a residual detection is a separate component rather than a misfit of one we have.

    Within a factor 3 in width, two components closer than 0.75 × the larger FWHM are not
    resolved (the resolution limit of the detection); a component (not much broader) within
    3 FWHM of one more than 1/``shape_tolerance`` times higher is taken for the misfit of that
    one's shape.
    A much broader component (a halo) under narrow ones is kept only if its area is at least
    ``shape_tolerance`` times the area of the rings within its FWHM.
    """
    under = 0.0
    for c in existing:
        ratio = max(new.fwhm_per_nm, c.fwhm_per_nm) / min(new.fwhm_per_nm, c.fwhm_per_nm)
        sep = abs(new.g_per_nm - c.g_per_nm)
        wmax = max(new.fwhm_per_nm, c.fwhm_per_nm)
        if ratio >= 3.0 and new.fwhm_per_nm > c.fwhm_per_nm:
            if sep < new.fwhm_per_nm:
                under += c.area
            continue
        if ratio < 3.0 and sep < 0.75 * wmax:
            return False
        if sep < 3.0 * wmax and _height(new) < shape_tolerance * _height(c):
            return False
    return not (under > 0 and new.area < shape_tolerance * under)


def _near_rejected(new: Candidate, rejected: list[Candidate]) -> bool:
    """A residual detection within one FWHM of a dropped component (unless much broader: a halo
    under it) is that one again."""
    for c in rejected:
        if new.fwhm_per_nm < 3.0 * c.fwhm_per_nm and abs(new.g_per_nm - c.g_per_nm) < max(
            new.fwhm_per_nm, c.fwhm_per_nm
        ):
            return True
    return False


def _weakest_dropped(
    fit: _Fit, confirm_sigma: float, fwhm_floor: float = 0.0, g_range=(-np.inf, np.inf), fwhm_ceiling: float = np.inf,
    misfit_scaled: bool = True,
) -> np.ndarray:
    """Keep-mask that drops only the least significant component, if it is below confirm_sigma.

    One at a time: components that share one feature are each insignificant while together
    they are not, and dropping all of them at once would lose the feature. A component pressed
    against the narrowest allowed width (sharper than the instrument) counts as insignificant.
    With ``misfit_scaled`` False the area uncertainty is not inflated by a reduced χ² above 1:
    while the model is still incomplete (rings not yet found sit in the window), the misfit
    they cause says nothing about this component.
    """
    cov = fit.cov if misfit_scaled else fit.cov / max(fit.chi2_nu, 1.0)
    area_sigma = np.sqrt(np.clip(np.diag(cov)[3::4], 0.0, None))
    z = fit.params[:, 3] / np.where(area_sigma > 0, area_sigma, np.inf)
    z = np.where(fit.params[:, 1] <= 1.02 * fwhm_floor, 0.0, z)
    # a narrow-stage component pressed against its widest allowed width is part of a broader
    # feature (a halo), left to the broad stage
    z = np.where(fit.params[:, 1] >= 0.98 * fwhm_ceiling, 0.0, z)
    # a component reaching past the end of the data by more than its HWHM cannot be told from
    # the background tail there
    g0, half = fit.params[:, 0], 0.5 * fit.params[:, 1]
    z = np.where((g0 - 3.0 * half < g_range[0]) | (g0 + 3.0 * half > g_range[1]), 0.0, z)
    keep = np.ones(len(z), bool)
    k = int(np.argmin(z))
    if z[k] < confirm_sigma:
        keep[k] = False
    return keep


def _one_blas_thread():
    """Run the small dense linear algebra of a fit on one BLAS thread.

    Fits here are many small problems (a few hundred × a few dozen); a multi-threaded BLAS spends
    more time synchronising than computing, by 10–60× on a loaded 2-core machine (measured).
    Uses threadpoolctl when installed, else does nothing (set OPENBLAS_NUM_THREADS=1 instead).
    """
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:
        import contextlib

        return contextlib.nullcontext()
    return threadpool_limits(1, user_api="blas")


@dataclass(frozen=True)
class RingFitSettings:
    """Tuning of :func:`fit_rings` (widths in 1/nm, areas in the profile's intensity × 1/nm).

    false_alarm_probability : α, probability per profile that pure noise gives one or more
        detections (Bonferroni over the resolution elements searched).
    halo_min_fwhm_per_nm : components at least this broad are reported with kind="halo"
        (see :class:`ringid.sample.crystallinity.CrystallinityThresholds`); also the widest
        component of the narrow (ring) stage.
    fwhm_max_per_nm : widest component searched (None: the background window, 2 nm⁻¹).
    confirm_sigma : a fitted component is kept only if area/σ_area ≥ this.
    max_rounds : residual searches per stage; when the last one still finds rings the fit is
        flagged ``ring_search_not_converged``.
    max_components : most rings a profile's fit holds; also the most candidates taken from one
        detection.
    correction_spacing_per_nm : knot spacing of the smooth additive background correction
        (linear B-splines) fitted jointly with the halos; at least twice the widest component,
        so that it takes up the bias of the clipped background but not a halo.
    max_new_per_round : most detections added to the model in one residual round.
    background_iterations, background_tolerance_sigma : the background is clipped again from
        the profile with the rings taken out at most this many times, until it moves by less
        than this many σ of a bin.
    cleaned_smooth_per_nm : smoothing of those re-clipped backgrounds
        (:func:`ringid.profile.background.estimate_background`).
    shape_tolerance : the pseudo-Voigt describes a real ring (a Voigt, a size-broadened ring)
        to a few percent of its height; residual structure next to or under a ring weaker than
        this fraction of it (height for neighbours, area for a broad component under rings) is
        taken for shape misfit, not a new ring.
    halo_trial : when the residual shows no halo, test for one hidden under dense rings (a halo
        whose area the rings' Lorentzian tails took); kept only if it lowers χ² by the
        likelihood-ratio threshold (see :meth:`_RingSearch.hidden_halo_trial`).
    band_misfit_fraction : a broad component in a sample with rings is reported as an
        unresolved band of rings (kind "band", flag ``unresolved_ring_band``) instead of a halo
        when the model fails under it: χ² over its ±FWHM is above the 1 − α quantile of the χ²
        distribution, and the residual in excess of the noise (rms) is more than this fraction
        of the fitted signal there (rms above the background). None: 2 × ``shape_tolerance``,
        the pseudo-Voigt's own misfit of a ring plus that of a halo; more than that is
        structure the smooth halo does not describe (many rings closer than their width).
    cluster_reach_fwhm : half-width of a cluster's fit window, in FWHM of its members.
    cluster_link_fwhm : rings whose ±this many FWHM overlap are fitted as one cluster.
    cluster_max_nfev : most function evaluations of one cluster fit.
    """

    false_alarm_probability: float = 0.01
    halo_min_fwhm_per_nm: float = 0.74
    fwhm_max_per_nm: float | None = None
    confirm_sigma: float = 3.0
    max_rounds: int = 6
    max_components: int = 60
    correction_spacing_per_nm: float = 2.0
    max_new_per_round: int = 8
    background_iterations: int = 4
    background_tolerance_sigma: float = 0.5
    cleaned_smooth_per_nm: float = DEFAULT_SMOOTH_PER_NM
    shape_tolerance: float = 0.05
    halo_trial: bool = True
    band_misfit_fraction: float | None = None
    cluster_reach_fwhm: float = 8.0
    cluster_link_fwhm: float = 4.0
    cluster_max_nfev: int = 200

    @property
    def misfit_fraction(self) -> float:
        """``band_misfit_fraction``, or its default 2 × ``shape_tolerance``."""
        return 2.0 * self.shape_tolerance if self.band_misfit_fraction is None else self.band_misfit_fraction


def fit_rings(
    profile: Profile,
    background: np.ndarray | None = None,
    *,
    instrument=None,
    settings: RingFitSettings | None = None,
    **overrides,
) -> RingFit:
    """Detect and jointly fit the rings and halos of a 1D profile.

    Parameters
    ----------
    profile : :class:`ringid.core.model.Profile` (uniform g grid in 1/nm)
    background : background array; default :func:`ringid.profile.background.estimate_background`
    instrument : instrumental FWHM: a number (1/nm), a callable g ↦ FWHM, or an object with a
        ``fwhm_per_nm(g)`` method (:class:`ringid.sample.size.InstrumentProfile`); sets the narrowest
        width searched. Default: 3 bins.
    settings : :class:`RingFitSettings` (default: its defaults)
    **overrides : fields of :class:`RingFitSettings` to change, e.g. ``false_alarm_probability=0.001``
        (an unknown name raises TypeError)

    Returns
    -------
    :class:`RingFit`, rings sorted by g.
    """
    settings = RingFitSettings() if settings is None else settings
    if overrides:
        settings = dataclasses.replace(settings, **overrides)
    with _one_blas_thread():
        return _fit_rings(profile, background, instrument, settings)


def _fit_rings(profile, background, instrument, settings: RingFitSettings) -> RingFit:
    """The ring stage in its steps: checks, background, width limits, stage A (narrow rings and the
    re-clipped background), the resolution rule on the complete set, stage B (halos), the result."""
    from ringid.profile.background import estimate_background, valid_mask

    g, y, sigma, step = _checked_profile(profile)
    ok = valid_mask(y, sigma)
    background_given = background is not None
    if background is None:
        background = estimate_background(g, y, sigma)
    background = np.asarray(background, dtype=float)
    widths = _widths(g, ok, step, instrument, settings)
    alpha = settings.false_alarm_probability
    empty = RingFit((), background, background.copy(), math.nan, widths.z, alpha, widths.n_res, ())
    if ok.sum() < 8:
        return RingFit((), background, background.copy(), math.nan, widths.z, alpha, widths.n_res, ("no_valid_bins",))
    search = _RingSearch(g, y, sigma, ok, step, widths, background_given, settings)
    comps, background = search.narrow_stage(background)
    comps = search.unresolved_dropped(comps, background)
    comps, halos, correction, basis = search.broad_stage(comps, background)
    if not comps and not halos:
        return empty
    return search.result(comps, halos, background, correction, basis)


def _checked_profile(profile):
    """The profile's g, intensity and σ as float arrays and its g step (1/nm); RingidError unless
    they are 1D, of one length ≥ 8, on a uniform increasing grid (steps within 1 %)."""
    g = np.asarray(profile.g_per_nm, dtype=float)
    y = np.asarray(profile.intensity, dtype=float)
    sigma = np.asarray(profile.sigma, dtype=float)
    if g.ndim != 1 or g.size < 8 or y.shape != g.shape or sigma.shape != g.shape:
        raise RingidError(None, "profile arrays must be 1D of equal length ≥ 8")
    steps = np.diff(g)
    step = float(np.median(steps))
    if not step > 0 or np.any(steps <= 0) or np.max(np.abs(steps - step)) > 0.01 * step:
        raise RingidError(None, "profile g grid must be uniform and increasing")
    return g, y, sigma, step


@dataclass(frozen=True)
class _Widths:
    """Widths (1/nm) and detection threshold of one profile's search.

    narrowest : the instrumental FWHM (or 3 bins), at least 2 bins
    fwhm_min, fwhm_max : range of widths the detection searches
    fwhm_lo, fwhm_hi : range of widths a fit allows
    n_res : number of independent resolution elements searched; z : the threshold for them
    """

    narrowest: float
    fwhm_min: float
    fwhm_max: float
    fwhm_lo: float
    fwhm_hi: float
    n_res: float
    z: float


def _widths(g, ok, step, instrument, settings: RingFitSettings) -> _Widths:
    """Width limits of the search on grid g (step in 1/nm) with valid bins ok."""
    from ringid.profile.background import DEFAULT_WINDOW_PER_NM

    instr = _instrument_fwhm_array(instrument, g)
    # narrowest ring the fit allows: 0.7 × the instrumental FWHM (nothing is sharper than the
    # instrument; the margin takes its uncertainty); the detection searches down to half the
    # instrumental width, where the compensated kernel still separates rings 1 FWHM apart
    fwhm_narrowest = max(float(np.nanmin(instr)) if instr is not None else 3.0 * step, 2.0 * step)
    fwhm_min = max(0.5 * fwhm_narrowest, 1.5 * step)
    fwhm_max = DEFAULT_WINDOW_PER_NM if settings.fwhm_max_per_nm is None else float(settings.fwhm_max_per_nm)
    fwhm_max = max(fwhm_max, fwhm_min)
    g_range = float(g[ok].max() - g[ok].min()) if ok.sum() > 1 else 0.0
    n_res = _n_resolution_elements(g_range, step, _scales_bins(step, fwhm_min, fwhm_max))
    z = detection_threshold(settings.false_alarm_probability, n_res)
    return _Widths(fwhm_narrowest, fwhm_min, fwhm_max, 0.7 * fwhm_narrowest, 1.5 * fwhm_max, n_res, z)


class _Component:
    """Mutable working state of one fitted component during the search (internal)."""

    __slots__ = ("params", "cov", "snr", "fit_window", "fit_baseline")

    def __init__(self, params, cov, snr):
        self.params = np.asarray(params, dtype=float)
        self.cov = cov
        self.snr = snr
        self.fit_window = None  # (i0, i1) of the window of its last cluster fit
        self.fit_baseline = None  # the baseline there at that fit

    def candidate(self) -> Candidate:
        g0, fwhm, eta, area = map(float, self.params)
        return Candidate(g0, fwhm, self.snr, area, eta)


def _curve(g, comps):
    """Sum of the components' pseudo-Voigts on the grid g."""
    out = np.zeros_like(g)
    for c in comps:
        out += pseudo_voigt(g, c.params[0], c.params[1], c.params[2], c.params[3])
    return out


def _clusters(comps, reach, max_members=CLUSTER_MAX_MEMBERS):
    """Groups of components whose ±reach·FWHM windows overlap (index lists, sorted by g).

    A group larger than ``max_members`` (a dense run of rings chained by their overlaps) is
    split at its widest gap relative to the widths either side, until every group is small;
    the neighbours across a cut are held fixed in each other's fits, and the clusters are
    fitted in turn (block coordinate descent), so the cut costs nothing in the solution.
    """
    if not comps:
        return []
    order = sorted(range(len(comps)), key=lambda k: comps[k].params[0])
    groups, hi = [[order[0]]], comps[order[0]].params[0] + reach * comps[order[0]].params[1]
    for k in order[1:]:
        g0, w = comps[k].params[0], comps[k].params[1]
        if g0 - reach * w <= hi:
            groups[-1].append(k)
            hi = max(hi, g0 + reach * w)
        else:
            groups.append([k])
            hi = g0 + reach * w
    out = []
    while groups:
        grp = groups.pop()
        if len(grp) <= max_members:
            out.append(grp)
            continue
        p = np.array([comps[k].params[:2] for k in grp])
        gap = np.diff(p[:, 0]) / (p[:-1, 1] + p[1:, 1])
        cut = int(np.argmax(gap)) + 1
        groups += [grp[:cut], grp[cut:]]
    return sorted(out, key=lambda grp: comps[grp[0]].params[0])


def _grouped(g, y, sigma, ok, stride):
    """Means over groups of ``stride`` bins (σ of a mean of valid bins: √Σσ²/n); a group with
    any invalid bin is dropped. Returns the groups' g, y, σ and valid mask."""
    if stride <= 1:
        return g, y, sigma, ok
    n = (g.size // stride) * stride
    shape = (-1, stride)
    okg = ok[:n].reshape(shape).all(axis=1)
    yg = np.where(ok[:n], y[:n], 0.0).reshape(shape).mean(axis=1)
    sg = np.sqrt((np.where(ok[:n], sigma[:n], 1.0) ** 2).reshape(shape).sum(axis=1)) / stride
    return _group_means(g, stride), yg, sg, okg


def _group_means(a, stride):
    """Means of a over the groups of ``stride`` bins of :func:`_grouped` (a itself for stride 1)."""
    if stride <= 1:
        return a
    n = (a.size // stride) * stride
    return a[:n].reshape(-1, stride).mean(axis=1)


def _linear_basis(gw):
    """Local linear background correction on a window: rows 1 and (g − g_mid)/half-width."""
    mid, half = 0.5 * (gw[0] + gw[-1]), max(0.5 * (gw[-1] - gw[0]), 1e-12)
    return np.vstack([np.ones_like(gw), (gw - mid) / half])


def _from_candidates(cands):
    """Working components started at detected candidates (no covariance yet)."""
    return [_Component([c.g_per_nm, c.fwhm_per_nm, c.eta, max(c.area, 1e-12)], None, c.snr) for c in cands]


def _components_of(fit: _Fit, cands):
    """The components of an accepted fit, each with its own 4 × 4 block of the covariance."""
    return [
        _Component(p, fit.cov[4 * k : 4 * k + 4, 4 * k : 4 * k + 4], c.snr)
        for k, (p, c) in enumerate(zip(fit.params, cands))
    ]


def _kept_candidates(fit: _Fit, cands, keep):
    """Candidates for the refit, started at the fitted parameters of the members kept by ``keep``."""
    return [
        Candidate(float(p[0]), float(p[1]), c.snr, float(p[3]), float(p[2]))
        for p, c, k in zip(fit.params, cands, keep)
        if k
    ]


@dataclass(frozen=True)
class _BroadGrid:
    """The bins of the broad stage.

    inner : valid bins at least one clipping window inside the data (full grid). Within one
        window of the data ends the SNIP window is cut short (it shrinks to the distance from
        the end), so there the background cannot be told from a broad feature (the steep
        central-beam tail above all).
    stride : bins per group, leaving ≥ BINS_PER_FWHM groups per FWHM of the narrowest halo allowed
    g, y, sigma, ok : the group means of the inner bins (:func:`_grouped`)
    basis : hat basis of the smooth background correction on the groups
    """

    inner: np.ndarray
    stride: int
    g: np.ndarray
    y: np.ndarray
    sigma: np.ndarray
    ok: np.ndarray
    basis: np.ndarray


class _RingSearch:
    """The search for the rings and halos of one profile: its fixed data and what it has learnt.

    Fixed: the profile (g in 1/nm, y, σ, valid bins ``ok``), the g step, the width limits
    (:class:`_Widths`), whether the background was given (then taken as known: no local
    correction and no re-clipping) and the settings. Learnt while searching:

    rejected : candidates dropped (insignificant, unresolved, or on a window with too few valid
        bins), so a residual detection does not bring one back
    settled : False once a residual search still found rings after ``max_rounds`` rounds
    converged : False once an accepted cluster or halo fit ended without meeting its tolerances
        (``least_squares`` status ≤ 0: the evaluation limit)
    model_complete : False until the residual search of stage A is done; until then a cluster's
        window holds rings not yet in the model, and its misfit must not count against the
        components being tested (σ_A not inflated by χ²_ν)
    """

    def __init__(self, g, y, sigma, ok, step, widths: _Widths, background_given: bool, settings: RingFitSettings):
        self.g, self.y, self.sigma, self.ok, self.step = g, y, sigma, ok, step
        self.widths = widths
        self.background_given = background_given
        self.settings = settings
        self.ring_hi = settings.halo_min_fwhm_per_nm  # widest component of the ring (narrow) stage
        self.data_range = (float(g[ok].min()), float(g[ok].max()))
        self.inv_sigma = np.where(ok, 1.0 / np.where(ok, sigma, 1.0), 0.0)
        self.rejected: list[Candidate] = []
        self.settled = True
        self.converged = True
        self.model_complete = False

    def detect(self, residual, sigma, fwhm_min_per_nm, max_components):
        """:func:`detect_rings` on this profile's grid, up to the widest width, at the threshold z."""
        return detect_rings(
            self.g, residual, sigma, max_components=max_components, fwhm_min_per_nm=fwhm_min_per_nm,
            fwhm_max_per_nm=self.widths.fwhm_max, threshold_sigma=self.widths.z,
        )

    # ------------------------------------------------------------ clusters of narrow rings

    def fit_cluster(self, members, baseline):
        """Fit one cluster of narrow components on its own window, the rest held fixed.

        The window spans ±cluster_reach_fwhm FWHM around every member; the baseline there is
        the clipped background, the halos and the tails of all other components, plus a local
        linear correction fitted with the cluster. The least significant member is dropped and
        the cluster refitted until all are significant. Returns the surviving components.
        """
        g, step, settings = self.g, self.step, self.settings
        cands = [m.candidate() for m in members]
        while cands:
            i0, i1 = self.window_of(cands)
            win = slice(i0, i1)
            okw = self.ok[win]
            if okw.sum() < 4 * len(cands) + 4:
                self.rejected.extend(cands)
                return []
            # broad members are sampled far finer than their shape needs: average the window
            # into groups of bins, keeping ≥ BINS_PER_FWHM per FWHM of the narrowest member
            # (the model evaluated at a group's centre differs from its mean by ≈ (Δ/FWHM)²/24)
            stride = max(1, int(min(c.fwhm_per_nm for c in cands) / (BINS_PER_FWHM * step)))
            gw, yw, sw, okw = _grouped(g[win], self.y[win], self.sigma[win], okw, stride)
            bw = _group_means(baseline[win], stride)
            fit = _fit_components(
                gw, yw, sw, okw, bw, cands, self.widths.fwhm_lo, self.ring_hi, self.local_basis(gw),
                max_nfev=settings.cluster_max_nfev, step=step * stride,
            )
            keep = _weakest_dropped(fit, settings.confirm_sigma, self.widths.fwhm_lo, self.data_range,
                                    fwhm_ceiling=self.ring_hi, misfit_scaled=self.model_complete)
            if keep.all():
                self.converged = self.converged and fit.converged
                out = _components_of(fit, cands)
                for c in out:
                    c.fit_window, c.fit_baseline = (i0, i1), baseline[win].copy()
                return out
            self.rejected.extend(c for c, k in zip(cands, keep) if not k)
            cands = _kept_candidates(fit, cands, keep)
        return []

    def local_basis(self, gw):
        """Local correction of a cluster window: linear, or none when the background was given
        (it is taken as known)."""
        return np.zeros((0, gw.size)) if self.background_given else _linear_basis(gw)

    def window_of(self, cands):
        """Bin range (i0, i1) of the ±cluster_reach_fwhm FWHM window around the candidates."""
        g, reach = self.g, self.settings.cluster_reach_fwhm
        lo_g = min(c.g_per_nm - reach * c.fwhm_per_nm for c in cands)
        hi_g = max(c.g_per_nm + reach * c.fwhm_per_nm for c in cands)
        return max(int(np.searchsorted(g, lo_g)), 0), min(int(np.searchsorted(g, hi_g)) + 1, g.size)

    def refit(self, comps, base, tolerance_sigma=0.1, force=False):
        """One sweep over the clusters of comps; returns (components, number of clusters fitted).

        Each cluster is fitted with the others' tails held fixed in its baseline. A cluster
        whose members were last fitted together on the same window, with a baseline that has
        not changed there by ``tolerance_sigma`` of a bin's σ since, is left as it is.
        """
        total = _curve(self.g, comps)
        out, n_fitted = [], 0
        for grp in _clusters(comps, self.settings.cluster_link_fwhm):
            members = [comps[k] for k in grp]
            baseline = base + (total - _curve(self.g, members))
            if not force and self.unchanged(members, baseline, tolerance_sigma):
                out.extend(members)
                continue
            n_fitted += 1
            out.extend(self.fit_cluster(members, baseline))
        return out, n_fitted

    def unchanged(self, members, baseline, tolerance_sigma) -> bool:
        """Whether the members were last fitted together on one window, and the baseline there has
        moved by less than ``tolerance_sigma`` of a bin's σ since."""
        win = members[0].fit_window
        if win is None or not all(m.fit_window == win for m in members):
            return False
        i0, i1 = win
        return all(
            np.max(np.abs(baseline[i0:i1] - m.fit_baseline) * self.inv_sigma[i0:i1], initial=0.0) < tolerance_sigma
            for m in members
        )

    def settle(self, comps, base, max_sweeps=6, force=False):
        """Sweep over the clusters until no cluster needs refitting (block coordinate descent:
        the sweeps make the clusters' solutions consistent with each other's tails); with
        ``force`` the first sweep refits every cluster."""
        for sweep in range(max_sweeps):
            comps, n_fitted = self.refit(comps, base, force=force and sweep == 0)
            if n_fitted == 0:
                break
        return comps

    def residual_rounds(self, comps, base, sweeps=2):
        """Search the residual for rings the model lacks and add them, until a search finds none
        (at most ``max_rounds`` searches; ``settled`` is cleared when the last still found some)."""
        settings = self.settings
        for _ in range(settings.max_rounds):
            model = base + _curve(self.g, comps)
            have = [c.candidate() for c in comps]
            extra = [
                c
                for c in self.detect(self.y - model, self.sigma, self.widths.fwhm_min, settings.max_components)
                if c.fwhm_per_nm < self.ring_hi
                and _resolved_from(c, have, settings.shape_tolerance)
                and not _near_rejected(c, self.rejected)
            ][: max(0, min(settings.max_new_per_round, settings.max_components - len(comps)))]
            if not extra:
                return comps
            comps = self.settle(comps + _from_candidates(extra), base, max_sweeps=sweeps)
        self.settled = False
        return comps

    # ------------------------------------------------------------ stage A: narrow rings

    def narrow_stage(self, background):
        """Stage A: the narrow rings, cluster by cluster, on the clipped background; then the
        background clipped again with the rings taken out. Returns (components, background)."""
        settings = self.settings
        narrow = [
            c
            for c in self.detect(self.y - background, self.sigma, self.widths.fwhm_min, settings.max_components)
            if c.fwhm_per_nm < self.ring_hi
        ]
        # sweeps over the clusters: each is fitted with its neighbours' tails held fixed, so further
        # sweeps make the solution consistent across clusters (block coordinate descent). When the
        # background is clipped again below, only the sweeps after the last clipping need to
        # converge: before it, two sweeps here and one per residual round and per earlier clipping
        # (measured on a 21-ring 2048² profile: 29 % fewer cluster fits, the same rings, sizes of
        # broad rings within 0.6 % of full sweeps)
        reclip = not self.background_given and settings.background_iterations > 0
        comps = self.settle(_from_candidates(narrow), background, max_sweeps=2 if reclip else 4)
        comps = self.residual_rounds(comps, background, sweeps=1 if reclip else 2)
        self.model_complete = True
        if self.background_given:
            # the significance test with the misfit counted, now that every ring is in
            comps = self.settle(comps, background, max_sweeps=2, force=True)
        if comps and not self.background_given:
            comps, background = self.reclipped(comps, background)
        return comps, background

    def reclipped(self, comps, background):
        """The tails of many close rings pile up into a broad pedestal that a clipped background
        cannot tell from a halo: clip the background again from the profile with the fitted
        rings taken out (dips deeper than 2σ below the first background are misfits, not
        background, and are floored there), and refit. Returns (components, background)."""
        from ringid.profile.background import estimate_background

        g, y, settings = self.g, self.y, self.settings
        # until the background moves by less than background_tolerance_sigma of a bin's σ
        # (broad Lorentzian rings give back their tails over several rounds; sharp ones at once)
        for it in range(settings.background_iterations):
            cleaned = np.maximum(y - _curve(g, comps), background - 2.0 * np.where(self.ok, self.sigma, 0.0))
            previous, background = background, estimate_background(g, cleaned, self.sigma,
                                                                   smooth_per_nm=settings.cleaned_smooth_per_nm)
            moved = float(np.max(np.abs(background - previous) * self.inv_sigma, initial=0.0))
            last = it == settings.background_iterations - 1 or moved < settings.background_tolerance_sigma
            comps = self.settle(comps, background, max_sweeps=2 if last else 1)
            if last:
                break
        return comps, background

    def unresolved_dropped(self, comps, base):
        """The complete set must obey the same resolution rule as a residual detection: a component
        not resolved from a stronger one (closer than 0.75 of the larger FWHM within a factor 3 in
        width, or a shape misfit next to it) is the fit sharing one feature out, and is dropped
        (the rest refitted)."""
        order = sorted(comps, key=lambda c: -c.params[3])
        kept, dropped = [], False
        for c in order:
            if _resolved_from(c.candidate(), [k.candidate() for k in kept], self.settings.shape_tolerance):
                kept.append(c)
            else:
                self.rejected.append(c.candidate())
                dropped = True
        return self.settle(kept, base, max_sweeps=2, force=True) if dropped else comps

    # ------------------------------------------------------------ stage B: halos

    def broad_stage(self, comps, background):
        """Stage B: broad components (halos) on the residual of the rings, fitted jointly over the
        whole profile with a smooth background correction, the rings held fixed; then the ring
        clusters refitted on the background + halos.

        Returns (rings, halos, the smooth correction on the full grid, its hat basis there).
        """
        g, settings = self.g, self.settings
        rings_curve = _curve(g, comps)
        have = [c.candidate() for c in comps]
        # searched at the broad scales only: ring misfits at fine scales would otherwise be taken
        # first and hide a broad maximum under them
        fwhm_min_broad = max(0.5 * self.ring_hi, self.widths.fwhm_min)
        broad = [
            c
            for c in self.detect(self.y - background - rings_curve, self.sigma, fwhm_min_broad, settings.max_components)
            if c.fwhm_per_nm >= 0.5 * self.ring_hi and _resolved_from(c, have, settings.shape_tolerance)
        ][: settings.max_new_per_round]
        basis = _hat_basis(g, max(settings.correction_spacing_per_nm, 2.0 * self.widths.fwhm_max))
        grid = self.broad_grid()
        broad = [c for c in broad if grid.inner[int(np.clip(np.searchsorted(g, c.g_per_nm), 0, g.size - 1))]]
        halos, correction = self.fit_halos(broad, grid, self.grouped_baseline(grid, background + rings_curve))
        # (also when the broad stage found only components narrower than a halo, held in the baseline)
        if (comps and not self.background_given and settings.halo_trial
                and not any(h.params[1] >= settings.halo_min_fwhm_per_nm for h in halos)):
            trial = self.hidden_halo_trial(comps, background + _curve(g, halos), grid, basis)
            if trial is not None:
                found, comps, correction = trial
                halos = halos + found
        if halos:
            base = background + correction + _curve(g, halos)
            comps = self.settle(comps, base, max_sweeps=2)
            comps = self.residual_rounds(comps, base)
        return comps, halos, correction, basis

    def broad_grid(self) -> _BroadGrid:
        """The inner bins of the profile in groups for the broad fits (:class:`_BroadGrid`)."""
        from ringid.profile.background import DEFAULT_WINDOW_PER_NM as clip_window

        g, lo, hi = self.g, self.data_range[0], self.data_range[1]
        inner = self.ok & (g >= lo + clip_window) & (g <= hi - clip_window)
        stride = max(1, int(0.5 * self.ring_hi / (BINS_PER_FWHM * self.step)))
        gb, yb, sb, okb = _grouped(g, self.y, self.sigma, inner, stride)
        basis = _hat_basis(gb, max(self.settings.correction_spacing_per_nm, 2.0 * self.widths.fwhm_max))
        return _BroadGrid(inner, stride, gb, yb, sb, okb, basis)

    def grouped_baseline(self, grid: _BroadGrid, baseline):
        """A baseline on the full grid as group means on the broad grid."""
        return _group_means(baseline, grid.stride)

    def fit_halos(self, cands, grid: _BroadGrid, baseline):
        """Fit the broad candidates jointly on the broad grid over ``baseline`` (group means), the
        least significant dropped and the rest refitted until all are significant. Returns
        (halos, the smooth correction interpolated onto the full grid)."""
        settings = self.settings
        while cands:
            fit = _fit_components(grid.g, grid.y, grid.sigma, grid.ok, baseline, cands, 0.5 * self.ring_hi,
                                  self.widths.fwhm_hi, grid.basis)
            keep = _weakest_dropped(fit, settings.confirm_sigma, 0.5 * self.ring_hi, self.data_range)
            if keep.all():
                self.converged = self.converged and fit.converged
                # linear between the group centres
                return _components_of(fit, cands), np.interp(self.g, grid.g, fit.correction)
            cands = _kept_candidates(fit, cands, keep)
        return [], np.zeros_like(self.g)

    def chi2_with_correction(self, base, comps, basis, use) -> float:
        """χ² over the bins ``use`` of base + components + the best smooth correction (hat basis)."""
        rest = np.where(use, self.y - base - _curve(self.g, comps), 0.0)
        w = np.where(use, self.inv_sigma, 0.0)
        coef, *_ = np.linalg.lstsq((basis * w).T, rest * w, rcond=None)
        return float(np.sum(((rest - coef @ basis) * w) ** 2))

    def halo_proposal(self, comps, background, inner):
        """The strongest halo-wide detection on the profile minus ``background`` with the ring
        cores (±1.5 FWHM, at most the median ring's) left out, or None."""
        masked = np.where(inner, self.sigma, np.nan)
        # cores at most as wide as the median ring: a ring that took a halo came out broader
        # than its neighbours, and its own width would hide the halo under it
        narrow_w = [c.params[1] for c in comps if c.params[1] < self.ring_hi]
        typical = float(np.median(narrow_w)) if narrow_w else self.ring_hi
        for c in comps:
            if c.params[1] < self.ring_hi:
                masked[np.abs(self.g - c.params[0]) < 1.5 * min(c.params[1], typical)] = np.nan
        found = self.detect(self.y - background, masked, self.ring_hi, 4)
        halo_wide = [c for c in found if c.fwhm_per_nm >= self.ring_hi]
        return halo_wide[0] if halo_wide else None

    def hidden_halo_trial(self, comps, background, grid: _BroadGrid, basis):
        """A halo hidden under dense rings, whose Lorentzian tails and local corrections took it.

        The residual of such a fit shows no halo (the rings absorbed it), so the candidate is
        searched with the ring cores left out (:meth:`halo_proposal`), at halo widths only.
        The rings and the halo are then fitted in turn (rings on background + halo, halo with
        the rings held; three rounds), and the halo is kept when it lowers χ² (over the inner
        bins, each model with its best smooth correction on ``basis``) by more than z² times the
        reduced χ² of the model without it: the likelihood-ratio form of the detection threshold,
        scaled for the misfit the line shape leaves. Returns (halos, rings, correction) or None.
        """
        g, settings, floor = self.g, self.settings, 0.5 * self.ring_hi
        cand = self.halo_proposal(comps, background, grid.inner)
        if cand is None:
            return None
        chi2_without = self.chi2_with_correction(background, comps, basis, grid.inner)
        dof = max(int(grid.inner.sum()) - 4 * len(comps) - basis.shape[0], 1)
        corr_t = np.zeros_like(g)
        halo_t = _Component([cand.g_per_nm, cand.fwhm_per_nm, 0.5, max(cand.area, 1e-12)], None, cand.snr)
        rings_t = comps
        for _ in range(3):
            # the rings on background + halo first (they give back the tails they took), then the halo
            rings_t = self.settle(rings_t, background + corr_t + _curve(g, [halo_t]), max_sweeps=1)
            bb = self.grouped_baseline(grid, background + _curve(g, rings_t))
            fit_h = _fit_components(grid.g, grid.y, grid.sigma, grid.ok, bb, [cand], floor, self.widths.fwhm_hi,
                                    grid.basis)
            p = fit_h.params[0]
            if p[1] <= 1.02 * floor:
                return None  # collapsed onto the narrowest broad width: ring misfit, not a halo
            cand = Candidate(float(p[0]), float(p[1]), cand.snr, float(p[3]), float(p[2]))
            halo_t = _Component(p, fit_h.cov, cand.snr)
            corr_t = np.interp(g, grid.g, fit_h.correction)
        # judged after the last round only: in the first rounds the rings still hold part of it
        if (fit_h.params[0, 1] < settings.halo_min_fwhm_per_nm
                or not _weakest_dropped(fit_h, settings.confirm_sigma, floor, self.data_range).all()):
            return None
        rings_t = self.settle(rings_t, background + corr_t + _curve(g, [halo_t]), max_sweeps=1)
        chi2_with = self.chi2_with_correction(background + _curve(g, [halo_t]), rings_t, basis, grid.inner)
        if chi2_without - chi2_with <= self.widths.z**2 * max(chi2_without / dof, 1.0):
            return None
        return [halo_t], rings_t, corr_t

    # ------------------------------------------------------------ the result

    def result(self, comps, halos, background, correction, basis) -> RingFit:
        """The :class:`RingFit` of the final rings and halos (not both empty) on ``background``.

        Without halos, the reported background takes the smooth correction of the ring residual
        (linear least squares on the hat basis); halos among rings that fail the misfit test
        (:func:`_fails_under`) are reported as bands.
        """
        g, y, sigma, ok, settings = self.g, self.y, self.sigma, self.ok, self.settings
        if not halos and comps:
            rest = y - background - _curve(g, comps)
            w = self.inv_sigma
            coef, *_ = np.linalg.lstsq((basis * w).T, np.where(ok, rest, 0.0) * w, rcond=None)
            correction = coef @ basis
        background = background + correction
        everything = comps + halos
        flags = []
        if not self.settled:
            flags.append("ring_search_not_converged")
        if not self.converged:
            flags.append("fit_not_converged")
        model = background + _curve(g, everything)
        n_par = 4 * len(everything)
        chi2_nu = float(np.sum(((y - model)[ok] / sigma[ok]) ** 2) / max(int(ok.sum()) - n_par, 1))
        alpha, halo_min = settings.false_alarm_probability, settings.halo_min_fwhm_per_nm
        band_ids = {
            id(h) for h in halos
            if h.params[1] >= halo_min and comps
            and _fails_under(g, y, sigma, ok, background, model, h.params, alpha, settings.misfit_fraction)
        }
        if band_ids:
            flags.append("unresolved_ring_band")
        rings = [
            _fitted_ring(c, "band" if id(c) in band_ids else "halo" if float(c.params[1]) >= halo_min else "ring")
            for c in everything
        ]
        order = np.argsort([r.g_per_nm for r in rings])
        rings = tuple(rings[i] for i in order)
        return RingFit(rings, background, model, chi2_nu, self.widths.z, alpha, self.widths.n_res, tuple(flags))


def _fitted_ring(comp: _Component, kind: str) -> FittedRing:
    """The reported ring of a fitted component: parameters, standard uncertainties from the
    diagonal of its covariance, the integral breadth β and σ_β from the (Γ, η) block."""
    g0, fwhm, eta, area = map(float, comp.params)
    cov = comp.cov if comp.cov is not None else np.full((4, 4), np.nan)
    sd = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    breadth = float(pseudo_voigt_integral_breadth(fwhm, eta))
    den = eta * LORENTZ_HEIGHT + (1.0 - eta) * GAUSS_HEIGHT
    grad = np.array([1.0 / den, -fwhm * (LORENTZ_HEIGHT - GAUSS_HEIGHT) / den**2])
    block = cov[1:3, 1:3]
    breadth_sigma = float(math.sqrt(max(grad @ block @ grad, 0.0)))
    return FittedRing(
        g_per_nm=g0,
        g_sigma_per_nm=float(sd[0]),
        fwhm_per_nm=fwhm,
        fwhm_sigma_per_nm=float(sd[1]),
        eta=eta,
        area=area,
        area_sigma=float(sd[3]),
        kind=kind,
        significance=float(comp.snr),
        eta_sigma=float(sd[2]),
        breadth_per_nm=breadth,
        breadth_sigma_per_nm=breadth_sigma,
        height=area / breadth,
    )


def misfit_under(g, y, sigma, ok, background, model, g0, fwhm) -> tuple[float, int, float]:
    """Misfit of the model under a component (g0 ± FWHM, 1/nm): χ² there, its number of bins,
    and the residual beyond the noise as a fraction of the signal above the background (both
    rms; NaN with fewer than 8 bins)."""
    under = ok & (np.abs(g - g0) < fwhm)
    n = int(under.sum())
    if n < 8:
        return math.nan, n, math.nan
    residual, noise = (y - model)[under], sigma[under]
    excess = math.sqrt(max(float(np.mean(residual**2) - np.mean(noise**2)), 0.0))
    signal = math.sqrt(float(np.mean((model - background)[under] ** 2)))
    return float(np.sum((residual / noise) ** 2)), n, excess / signal if signal > 0 else math.inf


def _fails_under(g, y, sigma, ok, background, model, params, false_alarm_probability, misfit_fraction) -> bool:
    """Whether the model fails under a broad component: χ² there above its 1 − α quantile, and
    a residual beyond the noise of more than ``misfit_fraction`` of the signal. A halo among
    dense nanocrystal rings that are closer than their width takes the band they form, but not
    the structure they leave on it."""
    from scipy.special import gammainccinv  # χ² quantile (scipy.stats costs 0.7 s to import)

    chi2, n, fraction = misfit_under(g, y, sigma, ok, background, model, params[0], params[1])
    if not n >= 8:
        return False
    return chi2 > 2.0 * gammainccinv(0.5 * n, false_alarm_probability) and fraction > misfit_fraction


# ---------------------------------------------------------------- the whole stage


@dataclass(frozen=True)
class RingAnalysis:
    """Everything the ring stage measures on one profile.

    rings (sorted by g), with ring_sizes and characters in the same order; background and model
    on the profile's g grid; crystallinity (:class:`ringid.sample.crystallinity.Crystallinity`); size
    (:class:`ringid.sample.size.SizeEstimate`); flags (sorted, unique).
    """

    rings: tuple[FittedRing, ...]
    background: np.ndarray
    model: np.ndarray
    chi2_reduced: float
    crystallinity: object
    size: object
    ring_sizes: tuple = ()
    characters: tuple = ()
    flags: tuple[str, ...] = ()
    threshold_sigma: float = math.nan
    false_alarm_probability: float = math.nan


def analyze_profile(
    profile: Profile,
    *,
    instrument=None,
    thresholds=None,
    character_thresholds=None,
    false_alarm_probability: float = 0.01,
    shape_constant: float | None = None,
) -> RingAnalysis:
    """Background, ring detection and fitting, size, crystallinity and ring character of a profile.

    Parameters
    ----------
    profile : :class:`ringid.core.model.Profile` on a uniform g grid (1/nm), with the cake if available
    instrument : :class:`ringid.sample.size.InstrumentProfile` from the calibration (FWHM(g), η), or a
        number (constant FWHM in 1/nm, Gaussian), or None (no instrument removal: sizes are
        lower limits, flag ``instrument_width_unknown``)
    thresholds : :class:`ringid.sample.crystallinity.CrystallinityThresholds`
    character_thresholds : :class:`ringid.sample.character.CharacterThresholds`
    false_alarm_probability : probability per profile that noise alone gives a ring (α)
    shape_constant : Scherrer K (default 4/3: sphere diameter on the integral breadth)

    Returns
    -------
    :class:`RingAnalysis`
    """
    from ringid.sample.character import CharacterThresholds, pattern_character
    from ringid.sample.crystallinity import CrystallinityThresholds, classify
    from ringid.sample.size import K_SPHERE_DIAMETER, InstrumentProfile, sample_size

    thresholds = CrystallinityThresholds() if thresholds is None else thresholds
    character_thresholds = CharacterThresholds() if character_thresholds is None else character_thresholds
    shape_constant = K_SPHERE_DIAMETER if shape_constant is None else shape_constant
    if instrument is not None and not isinstance(instrument, InstrumentProfile):
        instrument = InstrumentProfile(float(instrument), 0.0, 0.0)
    fit = fit_rings(
        profile,
        instrument=instrument,
        false_alarm_probability=false_alarm_probability,
        halo_min_fwhm_per_nm=thresholds.halo_min_fwhm_per_nm,
    )
    flags = set(fit.flags)
    usable = "no_valid_bins" not in flags
    crystallinity = classify(fit.rings, thresholds, usable=usable)
    flags.update(crystallinity.flags)
    size, ring_sizes = sample_size(fit.rings, instrument, shape_constant=shape_constant)
    if instrument is None and fit.rings:
        flags.add("instrument_width_unknown")
    if size.is_lower_limit:
        flags.add("size_is_lower_limit")
    try:
        characters, character_flags = pattern_character(profile, fit.rings, fit.background, character_thresholds)
    except (ValueError, ArithmeticError, np.linalg.LinAlgError):
        # the ring character is an extra; a cake it cannot use is a flag, not a failed sample
        from ringid.sample.character import UNKNOWN

        characters, character_flags = tuple(UNKNOWN for _ in fit.rings), ("ring_character_failed",)
    flags.update(character_flags)
    return RingAnalysis(
        rings=fit.rings,
        background=fit.background,
        model=fit.model,
        chi2_reduced=fit.chi2_reduced,
        crystallinity=crystallinity,
        size=size,
        ring_sizes=ring_sizes,
        characters=characters,
        flags=tuple(sorted(flags)),
        threshold_sigma=fit.threshold_sigma,
        false_alarm_probability=fit.false_alarm_probability,
    )


# ---------------------------------------------------------------- writers

RINGS_CSV_COLUMNS = [
    "g_per_nm",
    "g_sigma_per_nm",
    "d_angstrom",
    "d_sigma_angstrom",
    "fwhm_per_nm",
    "fwhm_sigma_per_nm",
    "eta",
    "area",
    "area_sigma",
    "kind",
    "significance",
    "size_nm",
    "size_sigma_nm",
    "size_lower_limit_nm",
    "character",
    "n_grains",
    "texture_direction_deg",
    "phase",
    "hkl",
]

PROFILE_CSV_COLUMNS = ["g_per_nm", "intensity", "sigma", "background", "model"]


def write_rings_csv(path, analysis: RingAnalysis, assignments=None) -> None:
    """Write ``rings.csv`` (docs/design.md contract) atomically, one row per ring, sorted by g.

    assignments : optional sequence (one per ring) of ``(phase, hkl)`` pairs or None, filled by
        phase identification; the ``phase`` and ``hkl`` columns are empty without it.
    """
    from ringid.core.atomic import format_cell, write_csv

    n = len(analysis.rings)
    if assignments is not None and len(assignments) != n:
        raise RingidError(path, f"{len(assignments)} assignments given for {n} rings")
    rows = []
    for k, r in enumerate(analysis.rings):
        s = analysis.ring_sizes[k] if k < len(analysis.ring_sizes) else None
        c = analysis.characters[k] if k < len(analysis.characters) else None
        phase, hkl = ("", "") if assignments is None or assignments[k] is None else assignments[k]
        rows.append(
            [
                format_cell(r.g_per_nm, ".8g"),
                format_cell(r.g_sigma_per_nm, ".3g"),
                format_cell(r.d_angstrom, ".7g"),
                format_cell(r.d_sigma_angstrom, ".3g"),
                format_cell(r.fwhm_per_nm, ".5g"),
                format_cell(r.fwhm_sigma_per_nm, ".3g"),
                format_cell(round(r.eta, 3), ".3g"),  # the fit does not fix η better than that
                format_cell(r.area, ".6g"),
                format_cell(r.area_sigma, ".3g"),
                r.kind,
                format_cell(r.significance, ".4g"),
                format_cell(s.size_nm if s else None, ".4g"),
                format_cell(s.size_sigma_nm if s else None, ".2g"),
                format_cell(s.lower_limit_nm if s else None, ".3g"),
                c.character if c else "",
                # a grain count only where the ring is not continuous (there: too many grains to count)
                format_cell(c.n_grains if c and c.character in ("spotty", "textured") else None, ".3g"),
                format_cell(c.texture_direction_deg if c and c.character == "textured" else None, ".4g"),
                phase,
                hkl,
            ]
        )
    write_csv(path, RINGS_CSV_COLUMNS, rows)


def write_profile_csv(path, profile: Profile, analysis: RingAnalysis) -> None:
    """Write ``profile.csv`` (g_per_nm, intensity, sigma, background, model) atomically."""
    from ringid.core.atomic import format_cell, write_csv

    cols = [profile.g_per_nm, profile.intensity, profile.sigma, analysis.background, analysis.model]
    n = len(profile.g_per_nm)
    if any(len(c) != n for c in cols):
        raise RingidError(path, "profile and analysis arrays differ in length")
    # every column as floats, 8 significant digits (an integer array too)
    cols = [np.asarray(c, dtype=float) for c in cols]
    rows = ([format_cell(c[i], ".8g") for c in cols] for i in range(n))
    write_csv(path, PROFILE_CSV_COLUMNS, rows)
