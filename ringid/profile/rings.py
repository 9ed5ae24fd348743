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
    from scipy.signal import argrelmax, find_peaks

    g = np.asarray(g_per_nm, dtype=float)
    step = float(np.median(np.diff(g)))
    sigma = np.asarray(sigma, dtype=float)
    ok = np.isfinite(sigma) & (sigma > 0) & np.isfinite(residual)
    weight = np.where(ok, 1.0 / np.where(ok, sigma, 1.0) ** 2, 0.0)
    r = np.where(ok, residual, 0.0).astype(float)
    scales = _scales_bins(step, fwhm_min_per_nm, fwhm_max_per_nm)
    snr, amp = _matched_filter(weight, scales).snr_and_amplitude(r * weight)
    finite = np.isfinite(snr)
    floor = float(np.min(snr[finite])) if finite.any() else 0.0
    finite_snr = np.where(finite, snr, floor)
    # every local maximum, for following a feature through the scales
    maxima = [argrelmax(finite_snr[k], order=1, mode="clip")[0] for k in range(len(scales))]
    # starting points: maxima above the threshold that stand out from their surroundings by a
    # significant dip (prominence ≥ PEAK_PROMINENCE_SIGMA in SNR units; T_s has unit noise), so
    # the noise ripples on top of a strong ring or a halo are not taken for separate rings
    starts = [
        find_peaks(finite_snr[k], height=threshold_sigma, prominence=PEAK_PROMINENCE_SIGMA)[0]
        for k in range(len(scales))
    ]
    taken: list[int] = []  # positions (bins) of accepted candidates
    ends: list[tuple[int, int, int]] = []  # (start scale, end scale, end bin) of each accepted candidate
    found: list[Candidate] = []
    for k, idx in enumerate(starts):
        half = 0.5 * FWHM_PER_SIGMA * scales[k]
        for i in idx[np.argsort(-snr[k, idx])]:
            if any(abs(i - t) < half for t in taken):
                continue
            # follow the maximum up through the scales while its SNR grows
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
            # a fine maximum that grows into a feature at least 3× broader, where another
            # accepted one already ended, is a shoulder of that broad feature, not a new ring
            # and a maximum starting at a coarser scale that ends where one resolved at a finer
            # scale ended is the blend of resolved ones
            same_end = [ks for ks, ke, ie in ends if ke == kk and abs(ie - ii) < 0.5 * FWHM_PER_SIGMA * scales[kk]]
            if same_end and (kk - k >= SHOULDER_SCALE_STEPS or min(same_end) < k):
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


def fit_rings(
    profile: Profile,
    background: np.ndarray | None = None,
    *,
    instrument=None,
    false_alarm_probability: float = 0.01,
    halo_min_fwhm_per_nm: float = 0.74,
    fwhm_max_per_nm: float | None = None,
    confirm_sigma: float = 3.0,
    max_rounds: int = 6,
    max_components: int = 60,
    correction_spacing_per_nm: float = 2.0,
    max_new_per_round: int = 8,
    background_iterations: int = 4,
    background_tolerance_sigma: float = 0.5,
    cleaned_smooth_per_nm: float = DEFAULT_SMOOTH_PER_NM,
    shape_tolerance: float = 0.05,
    halo_trial: bool = True,
    band_misfit_fraction: float | None = None,
) -> RingFit:
    """Detect and jointly fit the rings and halos of a 1D profile.

    Parameters
    ----------
    profile : :class:`ringid.core.model.Profile` (uniform g grid in 1/nm)
    background : background array; default :func:`ringid.profile.background.estimate_background`
    instrument : instrumental FWHM: a number (1/nm), a callable g ↦ FWHM, or an object with a
        ``fwhm_per_nm(g)`` method (:class:`ringid.sample.size.InstrumentProfile`); sets the narrowest
        width searched. Default: 3 bins.
    false_alarm_probability : α, probability per profile that pure noise gives one or more
        detections (Bonferroni over the resolution elements searched).
    halo_min_fwhm_per_nm : components at least this broad are reported with kind="halo"
        (see :class:`ringid.sample.crystallinity.CrystallinityThresholds`).
    fwhm_max_per_nm : widest component searched (default: the background window, 2 nm⁻¹).
    confirm_sigma : a fitted component is kept only if area/σ_area ≥ this.
    shape_tolerance : the pseudo-Voigt describes a real ring (a Voigt, a size-broadened ring)
        to a few percent of its height; residual structure next to or under a ring weaker than
        this fraction of it (height for neighbours, area for a broad component under rings) is
        taken for shape misfit, not a new ring.
    correction_spacing_per_nm : knot spacing of the smooth additive background correction
        (linear B-splines) fitted jointly with the rings; at least twice the widest component,
        so that it takes up the bias of the clipped background but not a halo.
    halo_trial : when the residual shows no halo, test for one hidden under dense rings (a halo
        whose area the rings' Lorentzian tails took); kept only if it lowers χ² by the
        likelihood-ratio threshold (see ``hidden_halo_trial`` in the code).
    band_misfit_fraction : a broad component in a sample with rings is reported as an
        unresolved band of rings (kind "band", flag ``unresolved_ring_band``) instead of a halo
        when the model fails under it: χ² over its ±FWHM is above the 1 − α quantile of the χ²
        distribution, and the residual in excess of the noise (rms) is more than this fraction
        of the fitted signal there (rms above the background). Default 2 × ``shape_tolerance``:
        the pseudo-Voigt's own misfit of a ring plus that of a halo; more than that is
        structure the smooth halo does not describe (many rings closer than their width).

    Returns
    -------
    :class:`RingFit`, rings sorted by g.
    """
    settings = dict(
        instrument=instrument,
        false_alarm_probability=false_alarm_probability,
        halo_min_fwhm_per_nm=halo_min_fwhm_per_nm,
        fwhm_max_per_nm=fwhm_max_per_nm,
        confirm_sigma=confirm_sigma,
        max_rounds=max_rounds,
        max_components=max_components,
        correction_spacing_per_nm=correction_spacing_per_nm,
        max_new_per_round=max_new_per_round,
        background_iterations=background_iterations,
        background_tolerance_sigma=background_tolerance_sigma,
        cleaned_smooth_per_nm=cleaned_smooth_per_nm,
        shape_tolerance=shape_tolerance,
        halo_trial=halo_trial,
        band_misfit_fraction=2.0 * shape_tolerance if band_misfit_fraction is None else band_misfit_fraction,
    )
    with _one_blas_thread():
        return _fit_rings(profile, background, **settings)


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


def _grouped(g, y, sigma, ok, baseline, stride):
    """Means over groups of ``stride`` bins (σ of a mean of valid bins: √Σσ²/n); a group with
    any invalid bin is dropped."""
    if stride <= 1:
        return g, y, sigma, ok, baseline
    n = (g.size // stride) * stride
    shape = (-1, stride)
    okg = ok[:n].reshape(shape).all(axis=1)
    yg = np.where(ok[:n], y[:n], 0.0).reshape(shape).mean(axis=1)
    sg = np.sqrt((np.where(ok[:n], sigma[:n], 1.0) ** 2).reshape(shape).sum(axis=1)) / stride
    return g[:n].reshape(shape).mean(axis=1), yg, sg, okg, baseline[:n].reshape(shape).mean(axis=1)


def _linear_basis(gw):
    """Local linear background correction on a window: rows 1 and (g − g_mid)/half-width."""
    mid, half = 0.5 * (gw[0] + gw[-1]), max(0.5 * (gw[-1] - gw[0]), 1e-12)
    return np.vstack([np.ones_like(gw), (gw - mid) / half])


def _fit_rings(
    profile,
    background,
    *,
    instrument,
    false_alarm_probability,
    halo_min_fwhm_per_nm,
    fwhm_max_per_nm,
    confirm_sigma,
    max_rounds,
    max_components,
    correction_spacing_per_nm,
    max_new_per_round,
    background_iterations,
    background_tolerance_sigma,
    cleaned_smooth_per_nm,
    shape_tolerance,
    halo_trial,
    band_misfit_fraction,
    cluster_reach_fwhm=8.0,
    cluster_link_fwhm=4.0,
    cluster_max_nfev=200,
):
    from ringid.profile.background import DEFAULT_WINDOW_PER_NM, estimate_background, valid_mask

    g = np.asarray(profile.g_per_nm, dtype=float)
    y = np.asarray(profile.intensity, dtype=float)
    sigma = np.asarray(profile.sigma, dtype=float)
    if g.ndim != 1 or g.size < 8 or y.shape != g.shape or sigma.shape != g.shape:
        raise RingidError(None, "profile arrays must be 1D of equal length ≥ 8")
    steps = np.diff(g)
    step = float(np.median(steps))
    if not step > 0 or np.any(steps <= 0) or np.max(np.abs(steps - step)) > 0.01 * step:
        raise RingidError(None, "profile g grid must be uniform and increasing")
    ok = valid_mask(y, sigma)
    flags: list[str] = []
    background_given = background is not None
    if background is None:
        background = estimate_background(g, y, sigma)
    background = np.asarray(background, dtype=float)
    instr = _instrument_fwhm_array(instrument, g)
    # narrowest ring the fit allows: 0.7 × the instrumental FWHM (nothing is sharper than the
    # instrument; the margin takes its uncertainty); the detection searches down to half the
    # instrumental width, where the compensated kernel still separates rings 1 FWHM apart
    fwhm_narrowest = max(float(np.nanmin(instr)) if instr is not None else 3.0 * step, 2.0 * step)
    fwhm_min = max(0.5 * fwhm_narrowest, 1.5 * step)
    fwhm_max = DEFAULT_WINDOW_PER_NM if fwhm_max_per_nm is None else float(fwhm_max_per_nm)
    fwhm_max = max(fwhm_max, fwhm_min)
    g_range = float(g[ok].max() - g[ok].min()) if ok.sum() > 1 else 0.0
    n_res = _n_resolution_elements(g_range, step, _scales_bins(step, fwhm_min, fwhm_max))
    z = detection_threshold(false_alarm_probability, n_res)
    empty = RingFit((), background, background.copy(), math.nan, z, false_alarm_probability, n_res, ())
    if ok.sum() < 8:
        return RingFit(
            (), background, background.copy(), math.nan, z, false_alarm_probability, n_res, ("no_valid_bins",)
        )

    detect = dict(fwhm_min_per_nm=fwhm_min, fwhm_max_per_nm=fwhm_max, threshold_sigma=z)
    fwhm_lo, fwhm_hi = 0.7 * fwhm_narrowest, 1.5 * fwhm_max
    ring_hi = halo_min_fwhm_per_nm  # widest component of the ring (narrow) stage
    data_range = (float(g[ok].min()), float(g[ok].max()))
    rejected: list[Candidate] = []
    settled = True
    converged = True
    # until the residual search has found every ring, a cluster's window holds rings not yet in
    # the model, and its misfit must not count against the components being tested
    model_complete = False

    def fit_cluster(members, baseline):
        """Fit one cluster of narrow components on its own window, the rest held fixed.

        The window spans ±cluster_reach_fwhm FWHM around every member; the baseline there is
        the clipped background, the halos and the tails of all other components, plus a local
        linear correction fitted with the cluster. The least significant member is dropped and
        the cluster refitted until all are significant. Returns the surviving components.
        """
        nonlocal converged
        cands_ = [m.candidate() for m in members]
        while cands_:
            i0, i1 = window_of(cands_)
            win = slice(i0, i1)
            okw = ok[win]
            if okw.sum() < 4 * len(cands_) + 4:
                rejected.extend(cands_)
                return []
            # broad members are sampled far finer than their shape needs: average the window
            # into groups of bins, keeping ≥ BINS_PER_FWHM per FWHM of the narrowest member
            # (the model evaluated at a group's centre differs from its mean by ≈ (Δ/FWHM)²/24)
            stride = max(1, int(min(c.fwhm_per_nm for c in cands_) / (BINS_PER_FWHM * step)))
            gw, yw, sw, okw, bw = _grouped(g[win], y[win], sigma[win], okw, baseline[win], stride)
            fit_ = _fit_components(
                gw, yw, sw, okw, bw, cands_, fwhm_lo, ring_hi, local_basis(gw), max_nfev=cluster_max_nfev,
                step=step * stride,
            )
            keep_ = _weakest_dropped(fit_, confirm_sigma, fwhm_lo, data_range, fwhm_ceiling=ring_hi,
                                     misfit_scaled=model_complete)
            if keep_.all():
                converged = converged and fit_.converged
                out_ = [
                    _Component(p, fit_.cov[4 * k : 4 * k + 4, 4 * k : 4 * k + 4], c.snr)
                    for k, (p, c) in enumerate(zip(fit_.params, cands_))
                ]
                for c in out_:
                    c.fit_window, c.fit_baseline = (i0, i1), baseline[win].copy()
                return out_
            rejected.extend(c for c, k in zip(cands_, keep_) if not k)
            cands_ = [
                Candidate(float(p[0]), float(p[1]), c.snr, float(p[3]), float(p[2]))
                for p, c, k in zip(fit_.params, cands_, keep_)
                if k
            ]
        return []

    def local_basis(gw):
        # a background given by the caller is taken as known: no local correction
        return np.zeros((0, gw.size)) if background_given else _linear_basis(gw)

    def window_of(cands_):
        lo_g = min(c.g_per_nm - cluster_reach_fwhm * c.fwhm_per_nm for c in cands_)
        hi_g = max(c.g_per_nm + cluster_reach_fwhm * c.fwhm_per_nm for c in cands_)
        return max(int(np.searchsorted(g, lo_g)), 0), min(int(np.searchsorted(g, hi_g)) + 1, g.size)

    inv_sigma = np.where(ok, 1.0 / np.where(ok, sigma, 1.0), 0.0)

    def refit(comps_, base, tolerance_sigma=0.1, force=False):
        """One sweep over the clusters of comps_; returns (components, number of clusters fitted).

        Each cluster is fitted with the others' tails held fixed in its baseline. A cluster
        whose members were last fitted together on the same window, with a baseline that has
        not changed there by ``tolerance_sigma`` of a bin's σ since, is left as it is.
        """
        total = _curve(g, comps_)
        out, n_fitted = [], 0
        for grp in _clusters(comps_, cluster_link_fwhm):
            members = [comps_[k] for k in grp]
            baseline = base + (total - _curve(g, members))
            win = members[0].fit_window
            if not force and win is not None and all(m.fit_window == win for m in members):
                i0, i1 = win
                if all(
                    np.max(np.abs(baseline[i0:i1] - m.fit_baseline) * inv_sigma[i0:i1], initial=0.0) < tolerance_sigma
                    for m in members
                ):
                    out.extend(members)
                    continue
            n_fitted += 1
            out.extend(fit_cluster(members, baseline))
        return out, n_fitted

    def settle(comps_, base, max_sweeps=6, force=False):
        """Sweep over the clusters until no cluster needs refitting (block coordinate descent:
        the sweeps make the clusters' solutions consistent with each other's tails); with
        ``force`` the first sweep refits every cluster."""
        for sweep in range(max_sweeps):
            comps_, n_fitted = refit(comps_, base, force=force and sweep == 0)
            if n_fitted == 0:
                break
        return comps_

    def from_candidates(cands_):
        return [_Component([c.g_per_nm, c.fwhm_per_nm, c.eta, max(c.area, 1e-12)], None, c.snr) for c in cands_]

    def chi2_with_correction(base_, comps_, basis_, use) -> float:
        """χ² over the bins ``use`` of base + components + the best smooth correction (hat basis)."""
        rest = np.where(use, y - base_ - _curve(g, comps_), 0.0)
        w = np.where(use, inv_sigma, 0.0)
        coef, *_ = np.linalg.lstsq((basis_ * w).T, rest * w, rcond=None)
        return float(np.sum(((rest - coef @ basis_) * w) ** 2))

    def hidden_halo_trial(comps_, background_, inner_, gb_, sb_, okb_, stride_, basis_b_, basis_):
        """A halo hidden under dense rings, whose Lorentzian tails and local corrections took it.

        The residual of such a fit shows no halo (the rings absorbed it), so the candidate is
        searched on the profile minus the background with the ring cores (±1.5 FWHM, at most
        the median ring's) left out, at halo widths only. The rings and the halo are then fitted
        in turn (rings on background + halo, halo with the rings held; three rounds), and the
        halo is kept when it lowers χ² (over the inner bins, each model with its best smooth
        correction) by more than z² times the
        reduced χ² of the model without it: the likelihood-ratio form of the detection threshold,
        scaled for the misfit the line shape leaves. Returns (halos, rings, correction) or None.
        """
        masked = np.where(inner_, sigma, np.nan)
        # cores at most as wide as the median ring: a ring that took a halo came out broader
        # than its neighbours, and its own width would hide the halo under it
        narrow_w = [c.params[1] for c in comps_ if c.params[1] < ring_hi]
        typical = float(np.median(narrow_w)) if narrow_w else ring_hi
        for c in comps_:
            if c.params[1] < ring_hi:
                masked[np.abs(g - c.params[0]) < 1.5 * min(c.params[1], typical)] = np.nan
        proposals = [
            c
            for c in detect_rings(g, y - background_, masked, max_components=4, fwhm_min_per_nm=ring_hi,
                                  fwhm_max_per_nm=fwhm_max, threshold_sigma=z)
            if c.fwhm_per_nm >= ring_hi
        ][:1]
        if not proposals:
            return None
        chi2_without = chi2_with_correction(background_, comps_, basis_, inner_)
        dof = max(int(inner_.sum()) - 4 * len(comps_) - basis_.shape[0], 1)
        cand, corr_t = proposals[0], np.zeros_like(g)
        halo_t = _Component([cand.g_per_nm, cand.fwhm_per_nm, 0.5, max(cand.area, 1e-12)], None, cand.snr)
        rings_t = comps_
        for _ in range(3):
            # the rings on background + halo first (they give back the tails they took), then the halo
            rings_t = settle(rings_t, background_ + corr_t + _curve(g, [halo_t]), max_sweeps=1)
            _, yb_, _, _, bb_ = _grouped(g, y, sigma, inner_, background_ + _curve(g, rings_t), stride_)
            fit_h = _fit_components(gb_, yb_, sb_, okb_, bb_, [cand], 0.5 * ring_hi, fwhm_hi, basis_b_)
            p = fit_h.params[0]
            if p[1] <= 1.02 * 0.5 * ring_hi:
                return None  # collapsed onto the narrowest broad width: ring misfit, not a halo
            cand = Candidate(float(p[0]), float(p[1]), cand.snr, float(p[3]), float(p[2]))
            halo_t = _Component(p, fit_h.cov, cand.snr)
            corr_t = np.interp(g, gb_, fit_h.correction)
        # judged after the last round only: in the first rounds the rings still hold part of it
        if fit_h.params[0, 1] < halo_min_fwhm_per_nm or not _weakest_dropped(fit_h, confirm_sigma, 0.5 * ring_hi,
                                                                               data_range).all():
            return None
        rings_t = settle(rings_t, background_ + corr_t + _curve(g, [halo_t]), max_sweeps=1)
        chi2_with = chi2_with_correction(background_ + _curve(g, [halo_t]), rings_t, basis_, inner_)
        if chi2_without - chi2_with <= z**2 * max(chi2_without / dof, 1.0):
            return None
        return [halo_t], rings_t, corr_t

    # Stage A: the narrow rings, cluster by cluster, on the clipped background
    narrow = [
        c
        for c in detect_rings(g, y - background, sigma, max_components=max_components, **detect)
        if c.fwhm_per_nm < ring_hi
    ]
    # sweeps over the clusters: each is fitted with its neighbours' tails held fixed, so further
    # sweeps make the solution consistent across clusters (block coordinate descent). When the
    # background is clipped again below, only the sweeps after the last clipping need to
    # converge: before it, two sweeps here and one per residual round and per earlier clipping
    # (measured on a 21-ring 2048² profile: 29 % fewer cluster fits, the same rings, sizes of
    # broad rings within 0.6 % of full sweeps)
    reclip = not background_given and background_iterations > 0
    comps = settle(from_candidates(narrow), background, max_sweeps=2 if reclip else 4)

    def residual_rounds(comps_, base, sweeps=2):
        nonlocal settled
        for _ in range(max_rounds):
            model_ = base + _curve(g, comps_)
            have = [c.candidate() for c in comps_]
            extra_ = [
                c
                for c in detect_rings(g, y - model_, sigma, max_components=max_components, **detect)
                if c.fwhm_per_nm < ring_hi
                and _resolved_from(c, have, shape_tolerance)
                and not _near_rejected(c, rejected)
            ][: max(0, min(max_new_per_round, max_components - len(comps_)))]
            if not extra_:
                return comps_
            comps_ = settle(comps_ + from_candidates(extra_), base, max_sweeps=sweeps)
        settled = False
        return comps_

    comps = residual_rounds(comps, background, sweeps=1 if reclip else 2)
    # The tails of many close rings pile up into a broad pedestal that a clipped background
    # cannot tell from a halo: clip the background again from the profile with the fitted
    # rings taken out (dips deeper than 2σ below the first background are misfits, not
    # background, and are floored there), and refit.
    model_complete = True
    if background_given:
        # the significance test with the misfit counted, now that every ring is in
        comps = settle(comps, background, max_sweeps=2, force=True)
    if comps and not background_given:
        # until the background moves by less than background_tolerance_sigma of a bin's σ
        # (broad Lorentzian rings give back their tails over several rounds; sharp ones at once)
        for it in range(background_iterations):
            cleaned = np.maximum(y - _curve(g, comps), background - 2.0 * np.where(ok, sigma, 0.0))
            previous, background = background, estimate_background(g, cleaned, sigma,
                                                                   smooth_per_nm=cleaned_smooth_per_nm)
            moved = float(np.max(np.abs(background - previous) * inv_sigma, initial=0.0))
            last = it == background_iterations - 1 or moved < background_tolerance_sigma
            comps = settle(comps, background, max_sweeps=2 if last else 1)
            if last:
                break

    # The complete set must obey the same resolution rule as a residual detection: a component
    # not resolved from a stronger one (closer than 0.75 of the larger FWHM within a factor 3 in
    # width, or a shape misfit next to it) is the fit sharing one feature out, and is dropped.
    def unresolved_dropped(comps_, base):
        order = sorted(comps_, key=lambda c: -c.params[3])
        kept, dropped = [], False
        for c in order:
            if _resolved_from(c.candidate(), [k.candidate() for k in kept], shape_tolerance):
                kept.append(c)
            else:
                rejected.append(c.candidate())
                dropped = True
        return settle(kept, base, max_sweeps=2, force=True) if dropped else comps_

    comps = unresolved_dropped(comps, background)

    # Stage B: broad components (halos) on the residual of the rings, fitted jointly over the
    # whole profile with a smooth background correction, the rings held fixed; then the ring
    # clusters are refitted on the background + halos.
    rings_curve = _curve(g, comps)
    have = [c.candidate() for c in comps]
    # searched at the broad scales only: ring misfits at fine scales would otherwise be taken
    # first and hide a broad maximum under them
    detect_broad = dict(detect, fwhm_min_per_nm=max(0.5 * ring_hi, fwhm_min))
    broad = [
        c
        for c in detect_rings(g, y - background - rings_curve, sigma, max_components=max_components, **detect_broad)
        if c.fwhm_per_nm >= 0.5 * ring_hi and _resolved_from(c, have, shape_tolerance)
    ][:max_new_per_round]
    basis = _hat_basis(g, max(correction_spacing_per_nm, 2.0 * fwhm_max))
    halos: list[_Component] = []
    correction = np.zeros_like(g)
    cands_b = broad
    # the broad fit runs on groups of bins, ≥ BINS_PER_FWHM per FWHM of the narrowest halo allowed
    # Within one clipping window of the data ends the SNIP window is cut short (it shrinks to
    # the distance from the end), so there the background cannot be told from a broad
    # feature (the steep central-beam tail above all): the broad stage uses the bins at least
    # one window inside the data.
    from ringid.profile.background import DEFAULT_WINDOW_PER_NM as clip_window

    inner = ok & (g >= data_range[0] + clip_window) & (g <= data_range[1] - clip_window)
    broad = [c for c in broad if inner[int(np.clip(np.searchsorted(g, c.g_per_nm), 0, g.size - 1))]]
    cands_b = broad
    stride_b = max(1, int(0.5 * ring_hi / (BINS_PER_FWHM * step)))
    gb, yb, sb, okb, bb = _grouped(g, y, sigma, inner, background + rings_curve, stride_b)
    basis_b = _hat_basis(gb, max(correction_spacing_per_nm, 2.0 * fwhm_max))
    while cands_b:
        fit_b = _fit_components(gb, yb, sb, okb, bb, cands_b, 0.5 * ring_hi, fwhm_hi, basis_b)
        keep_b = _weakest_dropped(fit_b, confirm_sigma, 0.5 * ring_hi, data_range)
        if keep_b.all():
            converged = converged and fit_b.converged
            halos = [
                _Component(p, fit_b.cov[4 * k : 4 * k + 4, 4 * k : 4 * k + 4], c.snr)
                for k, (p, c) in enumerate(zip(fit_b.params, cands_b))
            ]
            correction = np.interp(g, gb, fit_b.correction)  # linear between the group centres
            break
        cands_b = [
            Candidate(float(p[0]), float(p[1]), c.snr, float(p[3]), float(p[2]))
            for p, c, k in zip(fit_b.params, cands_b, keep_b)
            if k
        ]
    # (also when the broad stage found only components narrower than a halo, held in the baseline)
    if (comps and not background_given and halo_trial
            and not any(h.params[1] >= halo_min_fwhm_per_nm for h in halos)):
        trial = hidden_halo_trial(comps, background + _curve(g, halos), inner, gb, sb, okb, stride_b, basis_b, basis)
        if trial is not None:
            found, comps, correction = trial
            halos = halos + found
    if halos:
        base = background + correction + _curve(g, halos)
        comps = settle(comps, base, max_sweeps=2)
        comps = residual_rounds(comps, base)
    else:
        base = background
    # the smooth correction of the reported background (linear least squares on the hat basis)
    if not halos and comps:
        rest = y - background - _curve(g, comps)
        w = np.where(ok, 1.0 / np.where(ok, sigma, 1.0), 0.0)
        coef, *_ = np.linalg.lstsq((basis * w).T, np.where(ok, rest, 0.0) * w, rcond=None)
        correction = coef @ basis
    background = background + correction
    everything = comps + halos
    if not everything:
        return empty
    if not settled:
        flags.append("ring_search_not_converged")
    if not converged:
        flags.append("fit_not_converged")
    comp_curve = _curve(g, everything)
    model = background + comp_curve
    n_par = 4 * len(everything)
    chi2_nu = float(np.sum(((y - model)[ok] / sigma[ok]) ** 2) / max(int(ok.sum()) - n_par, 1))

    band_ids = {
        id(h) for h in halos
        if h.params[1] >= halo_min_fwhm_per_nm and comps
        and _fails_under(g, y, sigma, ok, background, model, h.params, false_alarm_probability, band_misfit_fraction)
    }
    if band_ids:
        flags.append("unresolved_ring_band")

    rings = []
    for comp in everything:
        g0, fwhm, eta, area = map(float, comp.params)
        cov = comp.cov if comp.cov is not None else np.full((4, 4), np.nan)
        sd = np.sqrt(np.clip(np.diag(cov), 0.0, None))
        breadth = float(pseudo_voigt_integral_breadth(fwhm, eta))
        # σ_β from the (Γ, η) block of the covariance
        den = eta * LORENTZ_HEIGHT + (1.0 - eta) * GAUSS_HEIGHT
        grad = np.array([1.0 / den, -fwhm * (LORENTZ_HEIGHT - GAUSS_HEIGHT) / den**2])
        block = cov[1:3, 1:3]
        breadth_sigma = float(math.sqrt(max(grad @ block @ grad, 0.0)))
        rings.append(
            FittedRing(
                g_per_nm=g0,
                g_sigma_per_nm=float(sd[0]),
                fwhm_per_nm=fwhm,
                fwhm_sigma_per_nm=float(sd[1]),
                eta=eta,
                area=area,
                area_sigma=float(sd[3]),
                kind="band" if id(comp) in band_ids else "halo" if fwhm >= halo_min_fwhm_per_nm else "ring",
                significance=float(comp.snr),
                eta_sigma=float(sd[2]),
                breadth_per_nm=breadth,
                breadth_sigma_per_nm=breadth_sigma,
                height=area / breadth,
            )
        )
    order = np.argsort([r.g_per_nm for r in rings])
    rings = tuple(rings[i] for i in order)
    return RingFit(rings, background, model, chi2_nu, z, false_alarm_probability, n_res, tuple(flags))


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


def _fmt(x, digits=6):
    if x is None:
        return ""
    if isinstance(x, str):
        return x
    x = float(x)
    if math.isnan(x):
        return ""
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    return f"{x:.{digits}g}"


def write_rings_csv(path, analysis: RingAnalysis, assignments=None) -> None:
    """Write ``rings.csv`` (docs/design.md contract) atomically, one row per ring, sorted by g.

    assignments : optional sequence (one per ring) of ``(phase, hkl)`` pairs or None, filled by
        phase identification; the ``phase`` and ``hkl`` columns are empty without it.
    """
    from ringid.core.atomic import write_csv

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
                _fmt(r.g_per_nm, 8),
                _fmt(r.g_sigma_per_nm, 3),
                _fmt(r.d_angstrom, 7),
                _fmt(r.d_sigma_angstrom, 3),
                _fmt(r.fwhm_per_nm, 5),
                _fmt(r.fwhm_sigma_per_nm, 3),
                _fmt(r.eta, 3),
                _fmt(r.area, 6),
                _fmt(r.area_sigma, 3),
                r.kind,
                _fmt(r.significance, 4),
                _fmt(s.size_nm if s else None, 4),
                _fmt(s.size_sigma_nm if s else None, 2),
                _fmt(s.lower_limit_nm if s else None, 3),
                c.character if c else "",
                _fmt(c.n_grains if c else None, 3),
                _fmt(c.texture_direction_deg if c and c.character == "textured" else None, 4),
                phase,
                hkl,
            ]
        )
    write_csv(path, RINGS_CSV_COLUMNS, rows)


def write_profile_csv(path, profile: Profile, analysis: RingAnalysis) -> None:
    """Write ``profile.csv`` (g_per_nm, intensity, sigma, background, model) atomically."""
    from ringid.core.atomic import write_csv

    cols = [profile.g_per_nm, profile.intensity, profile.sigma, analysis.background, analysis.model]
    n = len(profile.g_per_nm)
    if any(len(c) != n for c in cols):
        raise RingidError(path, "profile and analysis arrays differ in length")
    rows = ([_fmt(c[i], 8) for c in cols] for i in range(n))
    write_csv(path, PROFILE_CSV_COLUMNS, rows)
