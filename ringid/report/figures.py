"""Figures: the per-sample overview and the calibration residual plot (matplotlib, Agg).

Figures are drawn at screen resolution (about 900 × 340 px, 40–80 kB per sample) so a
report of 500 samples stays light. Imported only by the jobs that draw.
"""

from __future__ import annotations

import math
import os

import numpy as np

from ringid.core.model import Geometry

PHASE_COLOURS = ["#c0392b", "#2471a3", "#1e8449", "#7d3c98", "#b9770e"]


def _pyplot():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def make_thumbnail(image: np.ndarray, mask: np.ndarray | None = None, size_px: int = 256) -> tuple[np.ndarray, int]:
    """Block-mean downsampled, log-scaled uint8 thumbnail and its binning factor (px per thumbnail px)."""
    ny, nx = image.shape
    b = max(1, int(math.ceil(max(ny, nx) / size_px)))
    my, mx = ny // b, nx // b
    data = np.asarray(image[: my * b, : mx * b], dtype=np.float32)
    if mask is not None:
        data = np.where(mask[: my * b, : mx * b], np.nan, data)
    import warnings

    with np.errstate(invalid="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-masked blocks are NaN, as intended
        blocks = np.nanmean(data.reshape(my, b, mx, b), axis=(1, 3))
    finite = np.isfinite(blocks)
    if not finite.any():
        return np.zeros((my, mx), np.uint8), b
    lo = np.nanpercentile(blocks, 1)
    logd = np.log10(np.clip(np.where(finite, blocks, lo) - lo + 1.0, 1.0, None))
    top = np.percentile(logd, 99.7) or 1.0
    return (np.clip(logd / top, 0, 1) * 255).astype(np.uint8), b


def overview_png(path: str | os.PathLike, *, title: str, thumbnail: np.ndarray | None, bin_px: int,
                 geometry: Geometry | None,
                 profile: dict | None, rings: list[dict], references: list[tuple[str, object, float]]) -> None:
    """Write the overview figure of one sample.

    Parameters
    ----------
    thumbnail, bin_px : the log-scaled thumbnail and its binning factor.
    geometry : the pattern's centre, ellipse and camera constant (rings are drawn only when all are known).
    profile : dict of arrays g_per_nm, intensity, background, model (any may be missing).
    rings : rows of rings.csv (g_per_nm, kind, phase, hkl).
    references : (phase id, PhaseRings, dilation) of the identified phases.
    """

    plt = _pyplot()
    fig = plt.figure(figsize=(9.0, 3.4), dpi=100)
    ax_img = fig.add_axes([0.01, 0.04, 0.27, 0.86])
    ax = fig.add_axes([0.36, 0.14, 0.62, 0.76])
    fig.suptitle(title, fontsize=10, x=0.01, ha="left")
    ax_img.set_axis_off()
    if thumbnail is not None and thumbnail.size:
        _draw_thumbnail(ax_img, thumbnail, bin_px, geometry, rings)
    if profile and len(profile.get("g_per_nm", [])):
        g = np.asarray(profile["g_per_nm"], float)
        y = np.asarray(profile["intensity"], float)
        ax.plot(g, y, color="#222", lw=0.7, label="profile")
        if "background" in profile:
            ax.plot(g, profile["background"], color="#888", lw=0.8, ls="--", label="background")
        if "model" in profile:
            ax.plot(g, profile["model"], color="#e67e22", lw=0.8, label="fit")
        finite = y[np.isfinite(y) & (y > 0)]
        if finite.size:
            from matplotlib.ticker import LogFormatter, NullLocator

            ax.set_yscale("log")
            ax.yaxis.set_minor_locator(NullLocator())  # decades only (minor log ticks cost half the drawing)
            ax.yaxis.set_major_formatter(LogFormatter(labelOnlyBase=True))  # plain "100", no mathtext parsing
            lo, hi = np.percentile(finite, 0.5), finite.max()
            ax.set_ylim(lo * 0.8, hi * 1.6)
        ax.set_xlim(g.min(), g.max())
        ymin, ymax = ax.get_ylim()
        _draw_phase_ticks(ax, references, g, ymin, ymax)
        _draw_unexplained(ax, rings)
        ax.legend(fontsize=7, loc="upper right", frameon=False)
    ax.set_xlabel("g = 1/d (1/nm)", fontsize=8)
    ax.set_ylabel("azimuthal mean (counts/px)", fontsize=8)
    ax.tick_params(labelsize=7)
    _save_small_png(fig, path)
    plt.close(fig)


# a sharp ring no reported phase explains: black on the profile, bright green on the (magma) thumbnail,
# unlike any phase colour
UNEXPLAINED_COLOUR = "#111111"
UNEXPLAINED_COLOUR_ON_IMAGE = "#39ff14"


def _is_unexplained(row) -> bool:
    return row.get("kind", "ring") == "ring" and not row.get("phase")


def _draw_thumbnail(ax_img, thumbnail: np.ndarray, bin_px: int, geometry: Geometry | None, rings) -> None:
    """The log-scaled thumbnail with each ring of ``rings`` marked by a short arc of the ellipse it
    is on the detector, at the left edge of the pattern only, so that the spots and texture of the
    rings stay visible (halos in cyan, unexplained rings in green)."""
    ax_img.imshow(thumbnail, cmap="magma", origin="upper", interpolation="nearest")
    k, cx, cy = (math.nan,) * 3 if geometry is None else (
        geometry.camera_constant_A_px, geometry.center_x_px, geometry.center_y_px)
    if k and all(map(math.isfinite, (k, cx, cy))):
        from matplotlib.patches import Arc

        eps = geometry.ellipticity if math.isfinite(geometry.ellipticity) else 0.0
        ang = geometry.ellipse_angle_deg if math.isfinite(geometry.ellipse_angle_deg) else 0.0
        for r in rings:
            try:
                g = float(r["g_per_nm"])
            except (KeyError, ValueError):
                continue
            radius = k * g / 10.0 / bin_px
            a, b = radius / math.sqrt(1 - eps), radius * math.sqrt(1 - eps)
            colour = ("#7fdbff" if r.get("kind", "ring") == "halo"
                      else UNEXPLAINED_COLOUR_ON_IMAGE if _is_unexplained(r) else "#ffffff")
            # the arc's angles are in the ellipse's own frame: 160°–200° of the image, about −x
            ax_img.add_patch(Arc(((cx + 0.5) / bin_px - 0.5, (cy + 0.5) / bin_px - 0.5), 2 * a, 2 * b, angle=ang,
                                 theta1=160.0 - ang, theta2=200.0 - ang, lw=0.9, ec=colour, alpha=0.95))
        ax_img.set_xlim(-0.5, thumbnail.shape[1] - 0.5)
        ax_img.set_ylim(thumbnail.shape[0] - 0.5, -0.5)


def _draw_unexplained(ax, rings) -> None:
    """A black marker just above the profile frame over every sharp ring no reported phase explains."""
    g = []
    for r in rings:
        try:
            if _is_unexplained(r):
                g.append(float(r["g_per_nm"]))
        except (KeyError, ValueError):
            continue
    if g:
        ax.plot(g, [1.025] * len(g), "v", ms=5, color=UNEXPLAINED_COLOUR, transform=ax.get_xaxis_transform(),
                clip_on=False, label="unexplained ring", ls="none")


def _draw_phase_ticks(ax, references, g: np.ndarray, ymin: float, ymax: float) -> None:
    """Ticks at the identified phases' ring positions (height by intensity), hkl on up to 12 of the
    strongest per phase, skipping a label that would overlap one already placed."""
    placed: list[float] = []  # label positions, as fractions of the g axis
    span = float(g.max() - g.min()) or 1.0
    for n, (phase, rings_of_phase, dilation) in enumerate(references):
        colour = PHASE_COLOURS[n % len(PHASE_COLOURS)]
        gr = rings_of_phase.g_per_nm / dilation
        keep = (gr >= g.min()) & (gr <= g.max()) & (~rings_of_phase.double_diffraction)
        frac = 0.05 + 0.25 * rings_of_phase.intensity[keep] / 100.0
        # one collection for all ticks of a phase: x in data, y in axes units
        ax.vlines(gr[keep], 0.0, frac, transform=ax.get_xaxis_transform(), colors=colour, lw=1.0, alpha=0.8)
        labels = np.array(rings_of_phase.hkl)[keep]
        for j in np.argsort(-rings_of_phase.intensity[keep])[:12]:
            x = (gr[keep][j] - g.min()) / span
            if any(abs(x - p) < 0.014 for p in placed):  # about one label's width at this figure size
                continue
            placed.append(x)
            ax.text(gr[keep][j], ymin * (ymax / ymin) ** (frac[j] + 0.01), labels[j].replace(" ", ""), rotation=90,
                    fontsize=6, color=colour, ha="center", va="bottom")
        ax.plot([], [], color=colour, lw=1.5, label=phase)


def _draw_standard_profile(ax, profile, residuals) -> None:
    """The standard film's azimuthal mean (log scale) with a tick at each assigned ring's calculated g."""
    g = np.asarray(profile.g_per_nm, float)
    y = np.asarray(profile.intensity, float)
    ax.plot(g, y, color="#222", lw=0.7)
    finite = y[np.isfinite(y) & (y > 0)]
    if finite.size:
        from matplotlib.ticker import LogFormatter, NullLocator

        ax.set_yscale("log")
        ax.yaxis.set_minor_locator(NullLocator())
        ax.yaxis.set_major_formatter(LogFormatter(labelOnlyBase=True))
        ax.set_ylim(np.percentile(finite, 0.5) * 0.8, finite.max() * 1.6)
    gc = np.array([r.g_calc_per_nm for r in residuals], float)
    ax.vlines(gc, 0.0, 0.12, transform=ax.get_xaxis_transform(), colors="#c0392b", lw=1.0)
    for gi, r in zip(gc, residuals):
        ax.text(gi, 0.97, str(r.hkl).replace(" ", ""), transform=ax.get_xaxis_transform(), rotation=90, fontsize=6,
                color="#c0392b", ha="center", va="top")
    ax.set_xlim(g.min(), g.max())
    ax.set_ylabel("azimuthal mean", fontsize=8)
    ax.tick_params(labelsize=7)
    ax.set_title("standard film: profile at the fitted geometry, assigned rings", fontsize=8)


def _save_small_png(fig, path) -> None:
    """Save as a palette PNG (≤ 128 colours): a noisy thumbnail then costs tens, not hundreds, of kB."""
    from PIL import Image

    from ringid.core.atomic import atomic_path

    # the Agg canvas's pixels straight to PIL (no PNG encoded and decoded on the way)
    fig.set_dpi(100)
    fig.canvas.draw()
    rgba = np.asarray(fig.canvas.buffer_rgba())
    img = Image.fromarray(rgba[..., :3]).quantize(colors=128, method=Image.Quantize.FASTOCTREE)
    with atomic_path(path, suffix=".png") as tmp:
        img.save(tmp, format="PNG", optimize=True)


def calibration_png(path: str | os.PathLike, *, title: str, residuals, profile=None) -> None:
    """The standard's profile with its fitted rings (when ``profile``, a Profile at the fitted
    geometry, is given), and the residuals (g_obs − g_calc)/g_calc in % against g, labelled by hkl."""

    plt = _pyplot()
    if profile is not None and len(profile.g_per_nm):
        fig, (ax_p, ax) = plt.subplots(2, 1, figsize=(7.0, 4.6), dpi=100, height_ratios=(1.4, 1.0))
        _draw_standard_profile(ax_p, profile, residuals)
    else:
        fig, ax = plt.subplots(figsize=(6.0, 2.6), dpi=100)
    g = np.array([r.g_calc_per_nm for r in residuals], float)
    rel = np.array([100.0 * (r.g_obs_per_nm - r.g_calc_per_nm) / r.g_calc_per_nm for r in residuals], float)
    ax.axhline(0, color="#888", lw=0.8)
    ax.plot(g, rel, "o", color="#2471a3", ms=4)
    for gi, ri, r in zip(g, rel, residuals):
        ax.annotate(
            str(r.hkl).replace(" ", ""), (gi, ri), fontsize=6, xytext=(2, 3), textcoords="offset points"
        )
    ax.set_xlabel("g (1/nm)", fontsize=8)
    ax.set_ylabel("Δg/g (%)", fontsize=8)
    ax.set_title(title, fontsize=9)
    ax.tick_params(labelsize=7)
    fig.tight_layout()
    _save_small_png(fig, path)
    plt.close(fig)


def series_png(path: str | os.PathLike, *, title: str, variable: str, columns: list[str], rows: list[dict]) -> None:
    """The trends of a series against its variable: the amorphous share and the crystalline phases'
    shares (stacked bars), the crystallite size with σ on a log axis (lower limits as upward triangles), and each
    phase's lattice parameter a as its change from the phase's first value (%, with σ). Failed or
    unidentified samples are marked as crosses under the first panel (gaps, not dropped)."""
    plt = _pyplot()
    fig, (ax_f, ax_s, ax_a) = plt.subplots(3, 1, figsize=(7.0, 6.4), dpi=100, sharex=True)
    fig.suptitle(title, fontsize=10, x=0.01, ha="left")
    phases = [c[len("fraction_"):] for c in columns if c.startswith("fraction_")]
    groups = sorted({r["group"] for r in rows})
    xs = np.array([r[variable] for r in rows], float)
    span = float(np.ptp(xs)) if xs.size > 1 else 1.0
    steps = np.diff(np.unique(xs))
    width = 0.6 * (float(steps.min()) if steps.size else span or 1.0) / max(len(groups), 1)

    def num(r, key):
        v = r.get(key)
        return float(v) if isinstance(v, (int, float)) and v is not None and math.isfinite(v) else math.nan

    for gi, group in enumerate(groups):
        members = [r for r in rows if r["group"] == group]
        x = np.array([r[variable] for r in members], float) + (gi - (len(groups) - 1) / 2) * width
        ok = np.array([r["status"] == "ok" and bool(r.get("phases") or r.get("crystallinity") == "amorphous")
                       for r in members])
        amorphous = np.array([num(r, "amorphous_share") for r in members])
        amorphous = np.where(np.isfinite(amorphous), amorphous, 0.0)
        bottom = np.where(ok, amorphous, 0.0)
        ax_f.bar(x[ok], amorphous[ok], width, color="#bbbbbb", label="amorphous" if gi == 0 else None)
        for n, phase in enumerate(phases):
            share = np.array([num(r, f"fraction_{phase}") for r in members])
            share = np.where(np.isfinite(share) & ok, share * (1 - amorphous), 0.0)
            ax_f.bar(x, share, width, bottom=bottom, color=PHASE_COLOURS[n % len(PHASE_COLOURS)],
                     label=phase if gi == 0 else None)
            bottom = bottom + share
        if (~ok).any():
            ax_f.plot(x[~ok], np.full((~ok).sum(), -0.06), "x", color="#a61b1b", ms=6, clip_on=False,
                      label="failed or unidentified" if gi == 0 else None)
        marker = "os^Dv"[gi % 5]
        size = np.array([num(r, "crystallite_size_nm") for r in members])
        sig = np.array([num(r, "crystallite_size_sigma_nm") for r in members])
        lower = np.array([num(r, "crystallite_size_lower_limit_nm") for r in members])
        ax_s.errorbar(x, size, yerr=np.where(np.isfinite(sig), sig, 0.0), fmt=marker + "-", color="#2471a3", ms=4,
                      capsize=2, lw=0.8, label=group or None)
        if np.isfinite(lower).any():
            ax_s.plot(x, lower, "^", color="#2471a3", mfc="none", ms=6, label="lower limit" if gi == 0 else None)
        for n, phase in enumerate(phases):
            a = np.array([num(r, f"a_{phase}_angstrom") for r in members])
            sa = np.array([num(r, f"a_{phase}_sigma_angstrom") for r in members])
            if not np.isfinite(a).any():
                continue
            a0 = a[np.isfinite(a)][0]
            ax_a.errorbar(x, 100 * (a / a0 - 1), yerr=np.where(np.isfinite(sa), 100 * sa / a0, 0.0),
                          fmt=marker + "-", color=PHASE_COLOURS[n % len(PHASE_COLOURS)], ms=4, capsize=2, lw=0.8,
                          label=f"{phase} (a₀ = {a0:.4f} Å)" if gi == 0 else None)
    ax_f.set_ylim(0, 1.02)
    ax_f.set_ylabel("share of\nscattering", fontsize=8)
    ax_f.legend(fontsize=6, loc="upper left", bbox_to_anchor=(1.0, 1.0), frameon=False)
    sizes = [y for line in ax_s.get_lines() for y in np.asarray(line.get_ydata(), float) if np.isfinite(y) and y > 0]
    if sizes:  # sizes span decades (nanocrystals to the instrument's limit): a log axis
        ax_s.set_yscale("log")
    ax_s.set_ylabel("crystallite\nsize (nm)", fontsize=8)
    if ax_s.get_legend_handles_labels()[0]:
        ax_s.legend(fontsize=6, loc="upper left", bbox_to_anchor=(1.0, 1.0), frameon=False)
    vegard = [c for c in columns if c.startswith("vegard_x_") and not c.endswith("_sigma")]
    if vegard:  # the composition by Vegard's law, on its own axis, marked as an estimate
        ax_x = ax_a.twinx()
        col = vegard[0]
        xv = np.array([r[variable] for r in rows], float)
        comp = np.array([num(r, col) for r in rows])
        sig = np.array([num(r, f"{col}_sigma") for r in rows])
        ax_x.errorbar(xv, comp, yerr=np.where(np.isfinite(sig), sig, 0.0), fmt="k--", ms=3, capsize=2, lw=0.8)
        ax_x.set_ylabel(f"x({col[len('vegard_x_'):]}), Vegard\n(estimate)", fontsize=7)
        ax_x.tick_params(labelsize=7)
    ax_a.set_ylabel("Δa/a₀ (%)", fontsize=8)
    ax_a.axhline(0, color="#888", lw=0.6)
    handles, _ = ax_a.get_legend_handles_labels()
    if handles:
        ax_a.legend(fontsize=6, loc="upper left", bbox_to_anchor=(1.0, 1.0), frameon=False)
    ax_a.set_xlabel(variable, fontsize=8)
    for ax in (ax_f, ax_s, ax_a):
        ax.tick_params(labelsize=7)
    fig.tight_layout()
    _save_small_png(fig, path)
    plt.close(fig)


def message_png(path: str | os.PathLike, text: str) -> None:
    """A small figure that says, in words, why the figure meant for ``path`` could not be drawn."""
    import textwrap

    plt = _pyplot()
    fig = plt.figure(figsize=(6.0, 1.2), dpi=100)
    fig.text(0.02, 0.5, "\n".join(textwrap.wrap(text, 100)), fontsize=8, va="center", ha="left", color="#a61b1b")
    _save_small_png(fig, path)
    plt.close(fig)
