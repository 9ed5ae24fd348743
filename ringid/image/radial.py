"""Third-order radial (pincushion/barrel) lens distortion: the map and its inverse.

Besides the elliptical (affine) distortion of :mod:`ringid.image.ellipse`, the projector lenses
scale a ring's radius by a factor that grows with the square of the radius, the third-order
distortion of Seidel's aberration theory (Born & Wolf, Principles of Optics, ch. 5, for light;
Hawkes & Kasper, Principles of Electron Optics, vol. 1, for magnetic lenses)::

    ρ = f(R) = R·(1 + k₃·R²)

R is the true radius (px, so that d = K/R) and ρ the radius in the ellipse-corrected frame,
ρ = |A⁻¹(p − c)| (:func:`ringid.image.ellipse.undistorted_offsets`). k₃ > 0 is a pincushion
(outer rings pushed out), k₃ < 0 a barrel. The radial term is applied in the ellipse-corrected
frame, which makes it a function of ρ alone: a ring of true radius R is still an exact ellipse
with the centre, ε and θ of the pattern, drawn at ρ = f(R). So the centre and ellipse fits, the
sector azimuths and the cake's azimuth are unaffected by it; only the conversion of ρ to g is.
Applying the radial term to the observed offset instead (ellipse first) differs from this by a
product of the two small terms, of relative size ε·k₃·R² (2·10⁻⁵ for ε = 1 %, 0.2 % pincushion).

The inverse R = f⁻¹(ρ) is the real root of k₃R³ + R − ρ = 0 next to ρ. :func:`undistort_radius`
finds it by Newton's method from the first-order guess R ≈ ρ(1 − k₃ρ²) (any array, float64
accuracy). For the per-pixel arrays of an integration, :func:`scaled_true_radius_from_squared`
uses the series of the same root in x = k₃ρ²: with R = ρ·u the equation is u = 1 − x·u³, whose
solution is the generalised binomial series u = B₃(−x) = Σₙ (−1)ⁿ C(3n, n)/(2n + 1)·xⁿ
= 1 − x + 3x² − 12x³ + 55x⁴ − … (Graham, Knuth & Patashnik, Concrete Mathematics, 2nd ed.,
§5.4; from memory), convergent for |x| < 4/27. Truncated where the first omitted term is below
float32 resolution (degree 4 for 0.3 % at 1,024 px, out to a 2048² frame's corners), it costs a
few in-place passes over the array where Newton's method costs several times more.
f is monotonic where f′(R) = 1 + 3k₃R² > 0, which for a barrel bounds the radius:
R < 1/√(−3k₃), ρ < (2/3)/√(−3k₃) (the fold, x = −4/27); a radius beyond the fold has no
inverse and raises ValueError.
"""

from __future__ import annotations

import math

import numpy as np

NEWTON_MAX_STEPS = 8
SERIES_MAX_X = 0.05  # beyond |k₃ρ²| = 5 % the series needs many terms: Newton's method instead
SERIES_TOLERANCE = 2.0**-26  # truncation error of the series, relative (a quarter of float32 resolution)


def distorted_radius(radius_px, k3_per_px2: float):
    """ρ = R·(1 + k₃·R²): where a ring of true radius R (px) is drawn in the ellipse-corrected frame."""
    r = np.asarray(radius_px, dtype=float)
    return r * (1.0 + k3_per_px2 * r * r)


def fold_radius_px(k3_per_px2: float) -> float:
    """Largest ellipse-corrected radius ρ (px) the distortion can produce: (2/3)/√(−3k₃) for a barrel,
    infinite for a pincushion or none."""
    return (2.0 / 3.0) / math.sqrt(-3.0 * k3_per_px2) if k3_per_px2 < 0 else math.inf


def check_radius_range(rho_max_px: float, k3_per_px2: float) -> None:
    """Raise ValueError when radii up to ``rho_max_px`` (px) lie beyond the fold of a barrel distortion."""
    if rho_max_px >= fold_radius_px(k3_per_px2):
        raise ValueError(f"radial distortion k3 = {k3_per_px2:.4g} per px² folds over at radius "
                         f"{fold_radius_px(k3_per_px2):.0f} px, inside the image ({rho_max_px:.0f} px)")


def undistort_radius(rho_px, k3_per_px2: float, *, out=None):
    """True radius R = f⁻¹(ρ) (px) of ellipse-corrected radii ``rho_px`` (array or scalar).

    Newton steps on k₃R³ + R − ρ from R ≈ ρ(1 − k₃ρ²), until the largest relative step is below the
    resolution of the array's floating type (two steps for a few tenths of a percent). A float32
    array stays float32 (``out`` may be ``rho_px`` itself, to work in place); k₃ = 0 returns ρ
    unchanged (the same array unless ``out`` is given). Radii beyond the fold of a barrel raise
    ValueError.
    """
    rho = np.asarray(rho_px)
    if not np.issubdtype(rho.dtype, np.floating):
        rho = rho.astype(float)
    if out is None:
        out = rho.copy() if k3_per_px2 else rho
    elif out is not rho:
        out[...] = rho
    if not k3_per_px2 or rho.size == 0:
        return out if rho.ndim else float(out)
    k = rho.dtype.type(k3_per_px2)
    rho_max = float(np.max(np.abs(rho)))
    check_radius_range(rho_max, k3_per_px2)
    rho_c = rho if out is not rho else rho.copy()
    eps = 4.0 * np.finfo(rho.dtype).eps
    work = np.empty_like(out)
    # first-order guess
    np.multiply(rho_c, rho_c, out=work)
    work *= -k
    work += 1
    np.multiply(rho_c, work, out=out)
    for _ in range(NEWTON_MAX_STEPS):
        # step = (R + k R³ − ρ)/(1 + 3k R²)
        r2 = out * out
        num = out * (1 + k * r2) - rho_c
        np.multiply(r2, 3 * k, out=work)
        work += 1
        np.divide(num, work, out=work)
        out -= work
        step = float(np.max(np.abs(work))) / max(rho_max, 1e-30)
        if step < eps:
            break
    return out if rho.ndim else float(out)


def _series_coefficients(x_max: float) -> list[float]:
    """Coefficients C(3n, n)/(2n + 1)·(−1)ⁿ of u = B₃(−x), up to the degree whose first omitted term
    (times 1/(1 − 27|x|/4), the bound of a tail of same-signed terms) is below SERIES_TOLERANCE at |x| = x_max."""
    coeffs = [1.0]
    n = 0
    while True:
        n += 1
        c = math.comb(3 * n, n) / (2 * n + 1)
        if c * x_max**n / (1.0 - 6.75 * x_max) <= SERIES_TOLERANCE:
            return coeffs
        coeffs.append(-c if n % 2 else c)


def scaled_true_radius_from_squared(rho2, k3_per_px2: float, *, rho_max_px: float, scale: float = 1.0, work=None):
    """scale·f⁻¹(√ρ²) in place in the float32 array ``rho2`` of squared ellipse-corrected radii (px²).

    ``rho_max_px`` bounds the radii (e.g. the largest at the image corners); it sets the degree of the
    series (module docstring) and is checked against the fold of a barrel. ``work`` is an array of the
    same shape and type to use as scratch (it is overwritten). Returns ``rho2``. With k₃ = 0 it is
    √ρ²·scale; beyond |k₃|·ρ_max² = SERIES_MAX_X it falls back to :func:`undistort_radius`.
    """
    check_radius_range(rho_max_px, k3_per_px2)
    dtype = rho2.dtype.type
    x_max = abs(k3_per_px2) * rho_max_px**2
    if not k3_per_px2 or x_max > SERIES_MAX_X or not rho_max_px > 0:
        np.sqrt(rho2, out=rho2)
        if k3_per_px2:
            undistort_radius(rho2, k3_per_px2, out=rho2)
        rho2 *= dtype(scale)
        return rho2
    coeffs = _series_coefficients(x_max)
    if len(coeffs) == 1:  # k₃ρ² below float32 resolution everywhere
        np.sqrt(rho2, out=rho2)
        rho2 *= dtype(scale)
        return rho2
    # in t = ρ²/ρ_max² ∈ [0, 1] (coefficients cₙ·(k₃ρ_max²)ⁿ of order one: no float32 underflow
    # of k₃ⁿ), with scale·ρ_max folded into them: scale·ρ·u = √t · Σ bₙtⁿ, Horner's rule in ``work``
    x_signed = k3_per_px2 * rho_max_px**2
    b = [c * x_signed**n * scale * rho_max_px for n, c in enumerate(coeffs)]
    t = rho2
    t *= dtype(1.0 / rho_max_px**2)
    acc = np.multiply(t, dtype(b[-1]), out=work)
    for bn in b[-2:0:-1]:
        acc += dtype(bn)
        acc *= t
    acc += dtype(b[0])
    np.sqrt(t, out=t)
    t *= acc
    return t
