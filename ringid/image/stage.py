"""The image stage of one sample: load → masks → centre (and ellipse) → pyFAI integration."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ringid.core.model import Geometry, Profile
from ringid.image.integrate import integrate_profile

# the whole image half for one pattern




@dataclass(frozen=True)
class ImageResult:
    """Everything the image half produces for one pattern.

    geometry: centre (with its uncertainty), ε, θ, K, voltage used for the profile.
    profile: 1D I(g) with Poisson σ and the cake. fit: the centre fit (rings used,
    residuals). mask: the MaskResult. flags / notes: plain-language remarks.
    timings_s: seconds per step (load, mask, center, integrate).
    """

    geometry: Geometry
    profile: Profile
    fit: object
    mask: object
    path: str
    flags: tuple[str, ...] = ()
    notes: tuple[str, ...] = ()
    warnings: tuple[str, ...] = ()
    timings_s: dict = field(default_factory=dict)
    data: np.ndarray | None = None  # the loaded pattern (for thumbnails; not copied)


def process_image(path, calibration: Geometry, *, user_mask_path=None, frame: int | None = None,
                  saturation_level: float | None = None, negative_floor: float | None = None,
                  fit_ellipse: bool = False, n_azimuth: int = 72,
                  g_step_per_nm: float | None = None, with_cake: bool = True, max_pixels: int | None = None,
                  max_bytes: int | None = None) -> ImageResult:
    """Load → mask → centre (at the calibration's ellipse) → integrate one sample pattern.

    Parameters
    ----------
    path : path-like
        The pattern (TIFF, MRC or .npy).
    calibration : Geometry
        The ``geometry`` of a :class:`ringid.core.records.CalibrationRecord` (standard, known or nominal):
        K (Å·px, required), ε, θ, radial distortion k₃, voltage; its centre is only a fallback. The
        sample keeps the calibration's k₃ (lens distortion does not change between patterns); its
        centre is refined on the ellipse-corrected radius ρ, which k₃ leaves circular
        (:mod:`ringid.image.radial`), and the profile is integrated on the true radius f⁻¹(ρ).
    fit_ellipse : bool
        Fit the sample's own ε and θ instead of inheriting them (e.g. when the
        calibration is a nominal constant with no distortion measured).
    Other parameters are passed to the stages (see :func:`ringid.image.load.load_image`,
    :func:`ringid.image.mask.build_mask`, :func:`integrate_profile`).

    Returns
    -------
    ImageResult

    Raises
    ------
    RingidError
        For unreadable input; a pattern without rings is not an error (the centre
        then comes from point symmetry alone, flagged ``center_from_symmetry``).
    """
    import time

    from ringid.core.errors import RingidError

    if not (calibration.camera_constant_A_px > 0):
        raise RingidError(path, "the calibration gives no camera constant")
    t = {}
    img, masks = load_and_mask(path, frame=frame, saturation_level=saturation_level, negative_floor=negative_floor,
                               user_mask_path=user_mask_path, max_pixels=max_pixels, max_bytes=max_bytes, timings_s=t)
    t0 = time.perf_counter()
    g, fit, flags, notes = _centre(img, masks, calibration, fit_ellipse, path)
    geometry = Geometry(center_x_px=g.center_x_px, center_y_px=g.center_y_px, ellipticity=g.ellipticity,
                        ellipse_angle_deg=g.ellipse_angle_deg, camera_constant_A_px=calibration.camera_constant_A_px,
                        voltage_kv=calibration.voltage_kv, center_sigma_px=g.center_sigma_px,
                        radial_distortion_k3_per_px2=calibration.radial_distortion_k3_per_px2)
    t["center"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    profile = integrate_profile(img.data, masks.mask, geometry, g_step_per_nm=g_step_per_nm, n_azimuth=n_azimuth,
                                with_cake=with_cake)
    t["integrate"] = time.perf_counter() - t0
    return ImageResult(geometry=geometry, profile=profile, fit=fit, mask=masks, path=str(path), flags=tuple(flags),
                       notes=tuple(img.notes) + tuple(masks.notes) + tuple(notes), warnings=tuple(img.warnings),
                       timings_s=t, data=img.data)


def load_and_mask(path, *, frame: int | None = None, saturation_level: float | None = None,
                  negative_floor: float | None = None, user_mask_path=None, max_pixels: int | None = None,
                  max_bytes: int | None = None, timings_s: dict | None = None):
    """Load a pattern and build its mask: ``(LoadedImage, MaskResult)``; a pattern with no usable
    pixel raises RingidError saying why. ``saturation_level`` (counts per frame; None: from the
    data's bit depth) and ``frame`` go to :func:`ringid.image.load.load_image`, ``negative_floor``
    (None: keep every negative value) to :func:`ringid.image.mask.build_mask`. ``timings_s`` (if
    given) gets ``load`` and ``mask`` (s)."""
    import time

    from ringid.core.errors import RingidError
    from ringid.image.load import DEFAULT_MAX_BYTES, DEFAULT_MAX_PIXELS, load_image
    from ringid.image.mask import build_mask, load_user_mask

    t = {} if timings_s is None else timings_s
    t0 = time.perf_counter()
    img = load_image(path, frame=frame, saturation_level=saturation_level, max_pixels=max_pixels or DEFAULT_MAX_PIXELS,
                     max_bytes=max_bytes or DEFAULT_MAX_BYTES)
    t["load"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    user = load_user_mask(user_mask_path, img.shape) if user_mask_path else None
    masks = build_mask(img.data, invalid=img.invalid, saturation_level=img.saturation_level, saturated=img.saturated,
                       negative_floor=negative_floor, user_mask=user)
    t["mask"] = time.perf_counter() - t0
    if masks.mask.all():
        raise RingidError(path, _nothing_usable(img, negative_floor))
    return img, masks


def _centre(img, masks, calibration: Geometry, fit_ellipse: bool, path):
    """The sample's centre (and, with ``fit_ellipse``, its own ellipse): ``(Geometry, fit or None,
    flags, notes)``. A pattern without a ring to centre on falls back to point symmetry."""
    from ringid.core.errors import RingidError
    from ringid.image.center import coarse_center, refine_geometry, refine_sample_center

    try:
        if fit_ellipse:
            fit = refine_geometry(img.data, masks.mask, center_guess=masks.rough_center_xy,
                                  ellipticity=calibration.ellipticity,
                                  ellipse_angle_deg=calibration.ellipse_angle_deg, fit_ellipse=True, path=path)
        else:
            fit = refine_sample_center(img.data, masks.mask, calibration, center_guess=masks.rough_center_xy,
                                       path=path)
        return fit.geometry, fit, list(fit.flags), list(fit.notes)
    except RingidError as exc:
        if "ring" not in exc.problem:
            raise
        _refuse_centre_outside(img.data, masks.mask, path)
        cc = coarse_center(img.data, masks.mask)
        g = Geometry(center_x_px=cc.center_x_px, center_y_px=cc.center_y_px, ellipticity=calibration.ellipticity,
                     ellipse_angle_deg=calibration.ellipse_angle_deg, center_sigma_px=float(cc.block_px) / 2)
        return g, None, ["center_from_symmetry"], [f"no ring to centre on ({exc.problem}); centre from point symmetry"]


FALLOFF_AGREEMENT_MIN = 0.8  # blocks whose gradient points at the falloff centre (noise: ≈ 0.2–0.4, measured)


def _refuse_centre_outside(data, mask, path) -> None:
    """Raise when the pattern is centred outside the frame (arcs, not rings).

    Called when no ring was found about a centre inside the image: if the gradients of the
    whole image agree (≥ FALLOFF_AGREEMENT_MIN) on a centre outside it, the rings are arcs
    about a direct beam off the detector, and a centre from point symmetry would be wrong.
    """
    from ringid.image.center import falloff_center
    from ringid.core.errors import RingidError

    fc = falloff_center(data, mask)
    ny, nx = data.shape
    inside = -0.5 <= fc.center_x_px <= nx - 0.5 and -0.5 <= fc.center_y_px <= ny - 0.5
    if fc.agreement >= FALLOFF_AGREEMENT_MIN and not inside:
        raise RingidError(path, f"the pattern's centre is outside the image (near x = {fc.center_x_px:.0f}, "
                                f"y = {fc.center_y_px:.0f} px; image {nx}×{ny} px): the rings are arcs, "
                                "record the pattern with the direct beam on the detector")


def _nothing_usable(img, negative_floor: float | None) -> str:
    """Why every pixel of a loaded pattern is masked, in one line."""
    import math

    level = img.saturation_level
    if img.invalid is not None and img.invalid.all():
        return "every pixel is NaN or infinite: no usable data"
    if not np.any(img.data):
        return "every pixel is 0: no counts recorded"
    if (math.isfinite(level) and np.all(img.data >= level)) or (img.saturated is not None and img.saturated.all()):
        per_frame = " in some frame" if img.n_frames > 1 else ""
        return (f"every pixel is saturated (at or above {img.frame_saturation_level:g} counts{per_frame}): "
                "nothing to measure")
    if negative_floor is not None and np.all(img.data < negative_floor):
        return f"every pixel is below the negative floor {negative_floor:g}: nothing to measure"
    return "every pixel is masked (invalid, saturated, dead, hot or user-masked): nothing to measure"

