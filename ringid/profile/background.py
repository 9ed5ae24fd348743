"""Background under the rings of a 1D profile: SNIP clipping on the LLS scale.

Method: the Statistics-sensitive Non-linear Iterative Peak-clipping algorithm (SNIP; Ryan,
Clayton, Griffin, Sie & Cousens 1988, Nucl. Instrum. Methods B34, 396–402). The profile is first
put on an effective-counts scale and compressed with the LLS operator
v = ln(ln(√(y+1) + 1) + 1), which turns the orders-of-magnitude fall of the central-beam and
inelastic tail into a gently curved line; then, for window half-widths p = 1 … w (in bins),

    v_p(i) = min{ v_{p−1}(i), [v_{p−1}(i−p) + v_{p−1}(i+p)] / 2 },

and the result is transformed back. A convex, slowly varying tail survives every step while any
feature narrower than about the window is clipped down to the chord under it. The window is the
one physical choice: it is set **wider than the widest amorphous halo** (default half-width
2 nm⁻¹; first halos have Δ(1/d) ≈ 0.5–1 nm⁻¹, common practice, from memory), so broad halos
and nanocrystal rings are clipped off the background and stay in the signal, as they must (a
narrower window would remove real signal). A moving-average pre-smoothing over 0.2 nm⁻¹
(Morháč et al. 1997, Nucl. Instrum. Methods A401, 113) limits the downward bias that clipping to
noise minima would give.

The effective-counts scale: for Poisson data the ratio y/σ² is the number of pixels averaged per
bin, so n = y · median(y/σ²) is in counts and the LLS operator acts on the scale it was made for.

Clipping about a trend. SNIP's chord test cannot see a feature that lies below the chord of a
convex background: on a tail of curvature c (LLS scale) anything lower than about c·p²/2 over a
window p survives. The far Lorentzian tails of broad rings (nanocrystals: FWHM 0.3 nm⁻¹ and
more) are of that kind on the steep inner part of the profile, so plain SNIP keeps them as a
bump under the rings, and a ring fit on that background comes out too narrow (measured: sizes of
3 nm crystals +13 %; benchmarks/bench_ring_accuracy.py). The clipping is therefore repeated on
the profile minus a smooth trend of the clipped background (cubic Savitzky–Golay smoothing over
±``trend_half_width_ln_g`` in ln g, scipy ``savgol_filter``; ±0.5 spans g/1.65 … 1.65 g, much
wider than the bump at g ≳ 3 nm⁻¹ yet able to follow the tail's curvature near the central beam),
where the chord test has next to no curvature allowance: the bump is clipped, the tail kept
(measured on the same profiles: +3 % at 3 nm). The price is a larger clipping-to-noise bias
(median −0.6 σ of a bin on a noisy tail, against −0.15 σ without the trend;
tests/test_background.py), which the ring fit's smooth corrections take up. The pre-smoothing is
0.2 nm⁻¹ rather than a few bins for that reason: with 3 bins the bias was −1.7 σ and its slow
variation along g reached the halo search (seen while developing, on the blank profile of
benchmarks/bench_rings.py; not a test).
"""

from __future__ import annotations

import math

import numpy as np

DEFAULT_WINDOW_PER_NM = 2.0
# pre-smoothing: far narrower than the window (the clipping does not need the rings' shapes),
# and it averages 20 bins of noise at 0.01 nm⁻¹ per bin
DEFAULT_SMOOTH_PER_NM = 0.2
DEFAULT_TREND_HALF_WIDTH_LN_G = 0.5
# sampling of the trend's ln g grid: the smoothing keeps nothing finer than its half-width
TREND_POINTS_PER_HALF_WIDTH = 25


def lls(y):
    """LLS operator of Ryan et al. (1988): v = ln(ln(√(y+1)+1)+1), y ≥ 0 in counts."""
    return np.log(np.log(np.sqrt(np.asarray(y, dtype=float) + 1.0) + 1.0) + 1.0)


def lls_inverse(v):
    """Inverse of :func:`lls`."""
    return (np.exp(np.exp(np.asarray(v, dtype=float)) - 1.0) - 1.0) ** 2 - 1.0


def snip(values: np.ndarray, window_bins: int) -> np.ndarray:
    """SNIP clipping (Ryan et al. 1988) with window half-widths 1 … ``window_bins``.

    Near the ends the window shrinks to the distance from the end (bin i is clipped only for
    p ≤ min(i, n−1−i)), the usual SNIP convention.
    """
    work = np.array(values, dtype=float)
    n = work.size
    w = int(max(1, min(window_bins, (n - 1) // 2)))
    for p in range(1, w + 1):
        mid = 0.5 * (work[: n - 2 * p] + work[2 * p :])
        np.minimum(work[p : n - p], mid, out=work[p : n - p])
    return work


def _moving_average_linear_ends(values: np.ndarray, width: int) -> np.ndarray:
    """Centred moving average over ``width`` bins; the ends are continued by odd reflection
    (a straight-line continuation), so a steep tail is not bent at the ends."""
    half = max(1, width // 2)
    v = np.asarray(values, dtype=float)
    if v.size <= half + 1:
        return v.copy()
    padded = np.concatenate([2.0 * v[0] - v[half:0:-1], v, 2.0 * v[-1] - v[-2 : -half - 2 : -1]])
    kernel = np.full(2 * half + 1, 1.0 / (2 * half + 1))
    return np.convolve(padded, kernel, mode="valid")


def log_g_trend(g_per_nm, values, half_width_ln_g: float, order: int = 3) -> np.ndarray:
    """Savitzky–Golay smoothing (scipy, polynomial ``order``) of ``values`` over ±half_width in ln g.

    The values are resampled onto a uniform ln g grid (``TREND_POINTS_PER_HALF_WIDTH`` points per
    half-width, at most as many as the profile has), smoothed, and interpolated back; g ≤ 0 is
    taken as half a bin.
    """
    from scipy.signal import savgol_filter

    g = np.asarray(g_per_nm, dtype=float)
    step = float(np.median(np.diff(g)))
    x = np.log(np.maximum(g, 0.5 * step))
    n = int(min(g.size, max(order + 2, math.ceil((x[-1] - x[0]) / half_width_ln_g * TREND_POINTS_PER_HALF_WIDTH))))
    xu = np.linspace(x[0], x[-1], n)
    half = max(order + 1, int(round(half_width_ln_g / (xu[1] - xu[0]))))
    n_window = min(2 * half + 1, n if n % 2 else n - 1)
    if n_window <= order:
        return np.asarray(values, dtype=float).copy()
    return np.interp(x, xu, savgol_filter(np.interp(xu, x, values), n_window, order, mode="interp"))


def valid_mask(intensity, sigma) -> np.ndarray:
    """Bins with a finite intensity and a finite, positive uncertainty."""
    intensity = np.asarray(intensity, dtype=float)
    sigma = np.asarray(sigma, dtype=float)
    return np.isfinite(intensity) & np.isfinite(sigma) & (sigma > 0)


def estimate_background(
    g_per_nm,
    intensity,
    sigma,
    *,
    window_per_nm: float = DEFAULT_WINDOW_PER_NM,
    smooth_per_nm: float = DEFAULT_SMOOTH_PER_NM,
    trend_half_width_ln_g: float | None = DEFAULT_TREND_HALF_WIDTH_LN_G,
) -> np.ndarray:
    """SNIP background (LLS scale) of a 1D profile, in the profile's intensity units.

    Parameters
    ----------
    g_per_nm, intensity, sigma : profile arrays on a uniform g grid (1/nm); NaN or σ ≤ 0 bins
        are ignored (filled by interpolation for the clipping).
    window_per_nm : largest clipping half-width in 1/nm; must exceed the widest halo FWHM.
    smooth_per_nm : pre-smoothing moving-average width in 1/nm (at least one bin).
    trend_half_width_ln_g : half-width (in ln g) of the trend the clipping is repeated about;
        None for plain SNIP.

    Returns
    -------
    background : array like ``intensity`` (non-negative).
    """
    g = np.asarray(g_per_nm, dtype=float)
    y = np.asarray(intensity, dtype=float)
    s = np.asarray(sigma, dtype=float)
    ok = valid_mask(y, s)
    if ok.sum() < 3:
        return np.zeros_like(y)
    step = float(np.median(np.diff(g)))
    yf = np.interp(g, g[ok], y[ok])
    yf = np.clip(yf, 0.0, None)
    pos = ok & (y > 0)
    gain = float(np.median(y[pos] / s[pos] ** 2)) if pos.any() else 1.0
    counts = yf * gain
    smooth_bins = max(1, int(round(smooth_per_nm / step)))
    # smoothing on the LLS scale, where the steep tail near the central beam is nearly straight
    # (a moving average of the counts there would lift the background on the convex tail)
    values = lls(counts)
    if smooth_bins > 1:
        values = _moving_average_linear_ends(values, smooth_bins)
    window_bins = max(1, int(round(window_per_nm / step)))
    clipped = snip(values, window_bins)
    if trend_half_width_ln_g:
        trend = log_g_trend(g, clipped, trend_half_width_ln_g)
        clipped = snip(values - trend, window_bins) + trend
    background_counts = lls_inverse(clipped)
    return np.clip(background_counts, 0.0, None) / gain
