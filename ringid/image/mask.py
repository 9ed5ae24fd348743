"""Pixel masks found automatically: saturation, hot/dead pixels, beam-stop shadow, borders, user mask.

A mask is a bool array, True where a pixel is excluded. :func:`build_mask`
combines them and counts what each one removed.

- Saturated: pixels at or above the saturation level (configured, or from the data's bit
  depth: :mod:`ringid.image.load`), and the pixels of a summed stack saturated in any frame,
  grown by one pixel (charge spills into neighbours).
- Below the floor: pixels below a configured ``negative_floor`` (none by default: a
  dark-subtracted pattern's negative pixels are noise about a low level, and masking or
  clipping them would bias the azimuthal mean upwards).
- Hot / dead: isolated outliers. A hot pixel exceeds the largest of its eight
  neighbours, a dead pixel falls below the smallest of them, by ``outlier_sigma``
  noise standard deviations at the local level (the noise gain is estimated
  from the image itself, robustly). Comparing with the neighbour extremes rather
  than the neighbour median keeps ring crests and diffraction spots, which always
  have a bright neighbour, unmasked. Negative values take part as they are: an isolated
  pixel far below a darkest neighbour at or below 0 is an outlier all the same (the
  "less than half" condition is then implied). Data with negative values (dark-subtracted)
  carry an additive noise (read noise) that Poisson statistics do not give at low level;
  its variance, measured from neighbour differences at low level, is added to the noise.
- Beam stop: a dark connected region that reaches the direct beam. On a
  block-averaged image, pixels far below the azimuthal median at their radius
  (the rod) or inside the dark central disc are dark; the connected dark
  component touching the centre is the shadow (its rod may run to any edge).
- Borders: ``border_px`` pixels on each edge, plus edge rows/columns that are constant.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass

import numpy as np

from ringid.core.errors import RingidError


@dataclass(frozen=True)
class MaskResult:
    """The combined mask (True = excluded) and what each part removed (pixel counts)."""

    mask: np.ndarray
    n_invalid: int
    n_saturated: int
    n_hot: int
    n_dead: int
    n_beam_stop: int
    n_border: int
    n_user: int
    beam_stop: np.ndarray | None
    rough_center_xy: tuple[float, float] | None
    notes: tuple[str, ...] = ()
    n_below_floor: int = 0

    @property
    def fraction_masked(self) -> float:
        return float(self.mask.mean())


def saturated_mask(data: np.ndarray, level: float, saturated: np.ndarray | None = None) -> np.ndarray:
    """Pixels at or above ``level`` (NaN: none) or in ``saturated``, grown by one pixel (8-connected)."""
    from scipy import ndimage

    sat = data >= np.float32(level) if np.isfinite(level) else np.zeros(data.shape, bool)
    if saturated is not None:
        sat |= saturated
    if sat.any():
        ys, xs = np.nonzero(sat)
        y0, y1 = max(ys.min() - 1, 0), min(ys.max() + 2, data.shape[0])
        x0, x1 = max(xs.min() - 1, 0), min(xs.max() + 2, data.shape[1])
        sat[y0:y1, x0:x1] = ndimage.binary_dilation(sat[y0:y1, x0:x1], structure=np.ones((3, 3), bool))
    return sat


def _neighbour_extremes_rows(block: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Max and min of the eight neighbours for the inner rows of ``block`` (its first and last
    rows are the halo); columns reflected at the edges."""
    p = np.pad(block, ((0, 0), (1, 1)), mode="reflect")
    n, nx = block.shape[0] - 2, block.shape[1]
    hi = lo = None
    for dy in (0, 1, 2):
        for dx in (0, 1, 2):
            if dy == 1 and dx == 1:
                continue
            v = p[dy : dy + n, dx : dx + nx]
            if hi is None:
                hi, lo = v.copy(), v.copy()
            else:
                np.maximum(hi, v, out=hi)
                np.minimum(lo, v, out=lo)
    return hi, lo


def _neighbour_pairs(data: np.ndarray, valid: np.ndarray | None, n_sample: int, seed: int):
    """Values (x, y) of up to ``n_sample`` random pairs of horizontal neighbours, both valid (float64)."""
    a = data[:, :-1].reshape(-1)
    b = data[:, 1:].reshape(-1)
    rng = np.random.default_rng(seed)
    idx = rng.integers(0, a.size, min(n_sample, a.size))
    x, y = a[idx].astype(np.float64), b[idx].astype(np.float64)
    if valid is not None:
        keep = valid[:, :-1].reshape(-1)[idx] & valid[:, 1:].reshape(-1)[idx]
        x, y = x[keep], y[keep]
    return x, y


def noise_gain(data: np.ndarray, valid: np.ndarray | None = None, *, n_sample: int = 200_000, seed: int = 0) -> float:
    """Variance per unit signal (1 for Poisson counts) from differences of horizontal neighbours.

    For counts with variance g·μ, (x_i − x_{i+1})² has mean 2gμ; the median ratio of
    (x_i − x_{i+1})² to (x_i + x_{i+1}) is 0.455·g for a χ²₁ variable (a robust estimate).
    """
    x, y = _neighbour_pairs(data, valid, n_sample, seed)
    level = x + y
    keep = level > 2.0
    if keep.sum() < 100:
        return 1.0
    ratio = (x[keep] - y[keep]) ** 2 / level[keep]
    gain = float(np.median(ratio)) / 0.4549
    return gain if gain > 0 else 1.0


def low_level_variance(data: np.ndarray, valid: np.ndarray | None = None, *, n_sample: int = 200_000,
                       seed: int = 0) -> float:
    """Noise variance per pixel at low level for data with negative values (0 for data without).

    Counts are never negative; negative pixels mean an offset was subtracted (a dark frame),
    whose read noise adds a variance σ₀² that Poisson statistics at a level near 0 do not
    give. For two neighbours x, y of equal variance σ² the difference x − y is independent of
    the sum x + y (Gaussian noise), so the pairs with a low sum (x + y ≤ 2) give an unbiased
    σ² = median((x − y)²) / (2 · 0.4549) (the median of χ²₁ is 0.4549) at the low level.
    Fewer than 100 such pairs: 0.
    """
    if not data.min() < 0:
        return 0.0
    x, y = _neighbour_pairs(data, valid, n_sample, seed)
    low = x + y <= 2.0
    if low.sum() < 100:
        return 0.0
    return float(np.median((x[low] - y[low]) ** 2)) / (2 * 0.4549)


def outlier_pixel_mask(data: np.ndarray, valid: np.ndarray | None = None, *, outlier_sigma: float = 8.0,
                       gain: float | None = None, additive_variance: float | None = None
                       ) -> tuple[np.ndarray, np.ndarray]:
    """Hot and dead pixels: isolated outliers against all eight neighbours.

    Returns (hot, dead) bool arrays. A hot pixel stands ``outlier_sigma`` noise
    standard deviations √(g·max(level, 1) + σ₀²) above its brightest neighbour and is more
    than twice as bright; a dead pixel the same below its darkest neighbour and
    less than half of it (8σ keeps false alarms below about one per 10⁷ pixels for
    Poisson counts; common practice for defect maps, not a published value). σ₀² is
    :func:`low_level_variance` (0 for data without negative values) unless
    ``additive_variance`` gives it.
    """
    d = data.astype(np.float32, copy=False)
    if gain is None:
        gain = noise_gain(d, valid)
    if additive_variance is None:
        additive_variance = low_level_variance(d, valid)
    k = np.float32(outlier_sigma)
    g = np.float32(gain)
    v0 = np.float32(additive_variance)
    hot = np.zeros(d.shape, bool)
    dead = np.zeros(d.shape, bool)
    ny = d.shape[0]
    rows_per_block = max(1, (1 << 21) // max(d.shape[1], 1))  # ~8 MB float32 temporaries per block
    for y0 in range(0, ny, rows_per_block):
        y1 = min(y0 + rows_per_block, ny)
        # one row of halo on each side (reflected at the image edges, as np.pad does)
        lo_y, hi_y = max(y0 - 1, 0), min(y1 + 1, ny)
        block = d[lo_y:hi_y]
        if y0 == 0:
            block = np.concatenate([d[1:2], block]) if ny > 1 else np.concatenate([block, block])
        if y1 == ny:
            block = np.concatenate([block, d[ny - 2 : ny - 1]]) if ny > 1 else np.concatenate([block, block])
        hi, lo = _neighbour_extremes_rows(block)
        dd = d[y0:y1]
        if v0 > 0:
            hot[y0:y1] = ((dd - hi) > k * np.sqrt(g * np.maximum(hi, 1.0) + v0) + 2 * g) & (dd > 2.0 * hi)
            dead[y0:y1] = ((lo - dd) > k * np.sqrt(g * np.maximum(lo, 1.0) + v0) + 2 * g) & (dd < 0.5 * lo)
        else:
            hot[y0:y1] = ((dd - hi) > k * np.sqrt(g * np.maximum(hi, 1.0)) + 2 * g) & (dd > 2.0 * hi)
            dead[y0:y1] = ((lo - dd) > k * np.sqrt(g * np.maximum(lo, 1.0)) + 2 * g) & (dd < 0.5 * lo)
    if valid is not None:
        hot &= valid
        dead &= valid
    return hot, dead


def border_mask(data: np.ndarray, border_px: int = 2) -> np.ndarray:
    """``border_px`` pixels along each edge, plus constant edge rows/columns (padding)."""
    m = np.zeros(data.shape, bool)
    if border_px > 0:
        m[:border_px] = m[-border_px:] = True
        m[:, :border_px] = m[:, -border_px:] = True
    ny, nx = data.shape
    for axis_rows in (True, False):
        n = ny if axis_rows else nx
        for order in (range(n), range(n - 1, -1, -1)):
            for i in order:
                line = data[i] if axis_rows else data[:, i]
                if line.size and np.all(line == line[0]):
                    if axis_rows:
                        m[i] = True
                    else:
                        m[:, i] = True
                else:
                    break
    return m


def block_mean(data: np.ndarray, valid: np.ndarray | None, block: int) -> tuple[np.ndarray, np.ndarray]:
    """Mean over block×block tiles of the valid pixels, and the valid fraction per tile."""
    ny, nx = data.shape
    my, mx = ny // block, nx // block
    d = data[: my * block, : mx * block]
    # sum the contiguous axis first (fast), in float32 (tile sums stay exact well past 10⁶ counts)
    if valid is None:
        s = d.astype(np.float32, copy=False).reshape(my, block, mx, block).sum(3).sum(1)
        n = np.full(s.shape, float(block * block))
    else:
        v = valid[: my * block, : mx * block]
        s = np.where(v, d, np.float32(0)).astype(np.float32, copy=False).reshape(my, block, mx, block).sum(3).sum(1)
        n = v.reshape(my, block, mx, block).sum(3, dtype=np.int32).sum(1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(n > 0, s / np.maximum(n, 1), 0.0)
    return mean.astype(np.float32), (n / (block * block)).astype(np.float32)


def beam_stop_mask(data: np.ndarray, valid: np.ndarray | None, center_x_px: float, center_y_px: float, *,
                   dark_fraction: float = 0.15, block: int | None = None) -> np.ndarray:
    """Shadow of the beam stop: the dark connected region that reaches the direct beam.

    Parameters
    ----------
    data : (ny, nx) array
    valid : bool array or None
        False for pixels already excluded (they count as neither dark nor bright).
    center_x_px, center_y_px : float
        Approximate pattern centre (a few px is enough).
    dark_fraction : float
        A block is dark when below this fraction of the azimuthal median at its
        radius (a shadow transmits a few % at most).

    Returns
    -------
    bool array, True in the shadow (empty when there is no beam stop).
    """
    from scipy import ndimage

    ny, nx = data.shape
    if block is None:
        block = max(1, int(math.ceil(max(ny, nx) / 384)))
    small, frac = block_mean(data, valid, block)
    my, mx = small.shape
    yy = (np.arange(my) * block + (block - 1) / 2.0 - center_y_px)[:, None]
    xx = (np.arange(mx) * block + (block - 1) / 2.0 - center_x_px)[None, :]
    r = np.sqrt(xx * xx + yy * yy)
    rb = (r / block).astype(np.int64)
    ok = frac > 0.5
    small, n_s = _smooth_dim_tiles(small, ok, r, block)
    nb = int(rb.max()) + 1
    med = _binned_quantile(rb[ok], small[ok].astype(np.float64), nb, 0.5)
    # where only a short arc of an annulus lies inside the image (corners) the rod can be
    # half of it: there the 80th percentile stands for the unshadowed level
    n_tiles = np.bincount(rb[ok], minlength=nb)
    arc = n_tiles / np.maximum(2 * np.pi * (np.arange(nb) + 0.5), 1.0)
    high = _binned_quantile(rb[ok], small[ok].astype(np.float64), nb, 0.8)
    med = np.where(arc < 0.5, high, med)
    # the central disc: inner radii whose median is dark against the brightest median just outside
    inner = int(0.25 * min(my, mx))
    head = med[: max(inner, 2)]
    peak = float(np.nanmax(head)) if np.isfinite(head).any() else 0.0
    disc_r = 0
    if peak > 0:
        # radii with no valid tile (a masked saturated beam) do not count as dark
        bright = np.flatnonzero(~(head < dark_fraction * peak))
        disc_r = int(bright[0]) if bright.size else 0
    ref = np.nan_to_num(med, nan=0.0)[np.minimum(rb, nb - 1)]
    # "dark against the median" needs a median above 0: dark-subtracted data far out sit about 0
    dark = ok & (((small < dark_fraction * ref) & (ref > 0)) | (rb < disc_r))
    if not dark.any():
        return np.zeros(data.shape, bool)
    # connect across one-tile gaps (a bright ring seen through the stop's few % transmission)
    bridged = dark | ndimage.binary_closing(dark, structure=np.ones((3, 3), bool), iterations=2)
    labels, n = ndimage.label(bridged, structure=np.ones((3, 3), bool))
    near_center = r < max(2.0 * block, 1.5 * disc_r * block + block)
    touching = np.unique(labels[near_center & bridged])
    touching = touching[touching > 0]
    if touching.size == 0:
        return np.zeros(data.shape, bool)
    shadow_small = np.isin(labels, touching) & bridged
    shadow_small = ndimage.binary_fill_holes(shadow_small)
    # a margin of one tile plus half the smoothing window covers the penumbra and the cut tiles
    shadow_small = ndimage.binary_dilation(shadow_small, structure=np.ones((3, 3), bool), iterations=1 + n_s // 2)
    return _tiles_to_pixels(shadow_small, block, data.shape)


def _smooth_dim_tiles(small: np.ndarray, ok: np.ndarray, r: np.ndarray, block: int) -> tuple[np.ndarray, int]:
    """The tile means smoothed over enough tiles that the dimmest (outer) region holds ≥ 12 counts
    per window, so that "dark" is not decided by Poisson zeros; at most 16 px wide so that a rod
    stays resolved. Returns the smoothed tiles and the window width (tiles)."""
    from scipy import ndimage

    outer = ok & (r >= np.percentile(r[ok], 80)) if ok.any() else ok
    level = float(small[outer].mean()) if outer.any() else 0.0
    n_s = int(math.ceil(math.sqrt(12.0 / max(level * block * block, 1e-6))))
    n_s = int(min(max(n_s, 1), max(16 // block, 1)))
    if n_s > 1:
        w = ok.astype(np.float32)
        num = ndimage.uniform_filter(np.where(ok, small, 0).astype(np.float32), n_s, mode="constant")
        den = ndimage.uniform_filter(w, n_s, mode="constant")
        small = np.where(den > 0, num / np.maximum(den, 1e-6), 0).astype(np.float32)
    return small, n_s


def _tiles_to_pixels(tiles: np.ndarray, block: int, shape: tuple[int, int]) -> np.ndarray:
    """A mask of block × block tiles on the pixel grid of ``shape``; rows and columns beyond the
    last whole tile copy their neighbour."""
    ny, nx = shape
    full = np.zeros(shape, bool)
    up = np.repeat(np.repeat(tiles, block, axis=0), block, axis=1)
    full[: up.shape[0], : up.shape[1]] = up
    if up.shape[0] < ny:
        full[up.shape[0]:, : up.shape[1]] = up[-1:, :]
    if up.shape[1] < nx:
        full[:, up.shape[1]:] = full[:, up.shape[1] - 1 : up.shape[1]]
    return full


def _binned_quantile(bins: np.ndarray, values: np.ndarray, n_bins: int, q: float) -> np.ndarray:
    """Quantile ``q`` of ``values`` per integer bin (nearest rank; NaN for empty bins)."""
    order = np.lexsort((values, bins))
    b, v = bins[order], values[order]
    starts = np.searchsorted(b, np.arange(n_bins), side="left")
    ends = np.searchsorted(b, np.arange(n_bins), side="right")
    out = np.full(n_bins, np.nan)
    has = ends > starts
    pick = (starts + np.floor(q * (ends - starts - 1) + 0.5).astype(np.int64))[has]
    out[has] = v[pick]
    return out


def load_user_mask(path: str | os.PathLike, shape: tuple[int, int]) -> np.ndarray:
    """Read a user mask image (TIFF or .npy; non-zero = excluded) of the pattern's shape."""
    from ringid.image.load import load_image

    m = load_image(path)
    if m.data.shape != tuple(shape):
        raise RingidError(path, f"mask of {m.data.shape[1]}×{m.data.shape[0]} px does not match the image "
                                f"({shape[1]}×{shape[0]} px)")
    return m.data != 0


def build_mask(data: np.ndarray, *, invalid: np.ndarray | None = None, saturation_level: float = math.nan,
               saturated: np.ndarray | None = None, negative_floor: float | None = None,
               user_mask: np.ndarray | None = None, border_px: int = 2, detect_beam_stop: bool = True,
               detect_outliers: bool = True, outlier_sigma: float = 8.0,
               center_hint: tuple[float, float] | None = None) -> MaskResult:
    """Combine all masks for one pattern.

    Parameters
    ----------
    data : (ny, nx) float32
    invalid : bool array or None
        NaN/inf pixels from loading.
    saturation_level : float
        Counts at which the detector saturates (NaN: none known, skip).
    saturated : bool array or None
        Pixels known to be saturated (those of a summed stack saturated in some frame).
    negative_floor : float or None
        Mask pixels below this value (None: keep every negative value).
    user_mask : bool array or None
        Extra pixels to exclude (True = excluded).
    border_px : int
        Edge pixels to drop on every side.
    detect_beam_stop, detect_outliers : bool
        Switch the automatic beam-stop and hot/dead detection.
    center_hint : (x, y) or None
        Approximate centre for the beam-stop search; None finds one by point symmetry.
    """
    notes: list[str] = []
    mask = np.zeros(data.shape, bool) if invalid is None else invalid.copy()
    n_invalid = int(mask.sum())
    n_sat = 0
    if np.isfinite(saturation_level) or saturated is not None:
        sat = saturated_mask(data, saturation_level, saturated)
        n_sat = int((sat & ~mask).sum())
        mask |= sat
    n_floor = 0
    if negative_floor is not None:
        below = data < np.float32(negative_floor)
        n_floor = int((below & ~mask).sum())
        if n_floor:
            notes.append(f"{n_floor} pixels below the negative floor {negative_floor:g} masked")
        mask |= below
    border = border_mask(data, border_px)
    n_border = int((border & ~mask).sum())
    mask |= border
    n_user = 0
    if user_mask is not None:
        n_user = int((user_mask & ~mask).sum())
        mask |= user_mask
    n_hot = n_dead = 0
    if detect_outliers:
        hot, dead = outlier_pixel_mask(data, ~mask, outlier_sigma=outlier_sigma)
        n_hot, n_dead = int(hot.sum()), int(dead.sum())
        mask |= hot
        mask |= dead
    shadow = None
    n_bs = 0
    rough = center_hint
    if detect_beam_stop:
        if rough is None:
            from ringid.image.center import coarse_center

            cc = coarse_center(data, mask)
            rough = (cc.center_x_px, cc.center_y_px)
        shadow = beam_stop_mask(data, ~mask, rough[0], rough[1])
        n_bs = int((shadow & ~mask).sum())
        if n_bs:
            notes.append(f"beam stop shadow masked ({n_bs} px)")
            mask |= shadow
            if center_hint is None:
                # the shadow breaks the point symmetry: find the centre again without it
                from ringid.image.center import coarse_center

                cc = coarse_center(data, mask)
                rough = (cc.center_x_px, cc.center_y_px)
        else:
            shadow = None
    return MaskResult(mask=mask, n_invalid=n_invalid, n_saturated=n_sat, n_hot=n_hot, n_dead=n_dead,
                      n_beam_stop=n_bs, n_border=n_border, n_user=n_user, beam_stop=shadow,
                      rough_center_xy=rough, notes=tuple(notes), n_below_floor=n_floor)
