"""Load a diffraction pattern from TIFF (tifffile), MRC (mrcfile) or ``.npy`` into a 2D float32 array.

Formats
-------
TIFF: classic or BigTIFF, either byte order, strips or tiles, uncompressed or compressed with
any scheme tifffile decodes (Deflate/zlib itself; LZW, PackBits and the others through
imagecodecs). MRC: the MRC2014 format (Cheng et al., J. Struct. Biol. 192, 146 (2015)) read with
mrcfile, modes 0 (int8), 1 (int16), 2 (float32), 6 (uint16) and 12 (float16), told by its map ID
``MAP `` at byte 208 or by the name ``.mrc``/``.mrcs``; pixels are kept in stored order (x fastest,
first stored row first: MRC2014 draws it at the bottom, so a viewer that follows it shows the
pattern flipped vertically, which changes no ring). NumPy ``.npy``: a plain numeric array.

Pixels: unsigned and signed integers, float16/32/64. A frame stack is summed (noted) unless one
frame is chosen: several TIFF pages, one TIFF page whose samples (greyscale with extra samples)
or depth hold the frames, an MRC stack of sections (image stack or volume), or a
(frames, ny, nx) ``.npy`` array. Grey data saved as RGB(A) is converted with a warning, true
colour is refused. NaN and ±inf pixels, and pixels at the most negative value of a signed
integer type (an underflow or a fill value, never a measurement), are reported as ``invalid``
for masking. Negative values are otherwise kept as they are (dark-subtracted data).

Saturation level (counts at which the detector clips), for integer data; in this order:
a configured level; the TIFF ``BitsPerSample`` tag when it gives fewer bits than the container
(12 in a uint16 page: 4095); the TIFF ``MaxSampleValue`` tag when it is below the container's
maximum (TIFF 6.0 specification, section 8: "the maximum component value used"); the maximum
of the data when it is a round 2ⁿ − 1 (n = 10 … container bits − 1) held by at least
:data:`ROUND_MAX_MIN_PIXELS` pixels; else the container's maximum (65535 for uint16). A tag
that the data contradict (a pixel above it) is ignored with a warning. Float data have no
level unless one is configured. For a summed stack the level applies to each frame, and the
pixels that reach it in any frame are returned as ``saturated``.

Every refusal is a one-line :class:`ringid.core.errors.RingidError` naming the file:
unreadable, truncated or damaged file, not an image, smaller than 64×64, 3-D data that is not a
frame stack, a frame that the file does not have, or larger than the configured limits (checked
before the pixels are read).
"""

from __future__ import annotations

import logging
import math
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ringid.core.errors import RingidError

MIN_SIDE_PX = 64
DEFAULT_MAX_PIXELS = 8192 * 8192
DEFAULT_MAX_BYTES = 2 * 1024**3
# tifffile series axes that lead a greyscale frame stack: pages (I, Q), time (T), angle (R), samples (S),
# depth or ImageJ slices (Z), and ImageJ channels (C: tifffile writes a plain 3-D array as ImageJ channels)
FRAME_AXES = "IQTRSZC"
ROUND_MAX_MIN_PIXELS = 9
"""Pixels that must sit at a round maximum 2ⁿ − 1 for it to be taken as the saturation level.

A detector that clips piles its saturated pixels up at one value, and a saturated direct beam
or Bragg spot covers a patch of at least 3 × 3 pixels. Without clipping the maximum of counts is
held by few pixels: conditioned on the maximum, the number of pixels at it is close to a
Poisson variable of mean ≲ 1 (the expected number of pixels at the top value), so 9 or more
happen with a chance of about 10⁻⁶, to be multiplied by the chance that the maximum is a round
2ⁿ − 1 at all. Fewer saturated pixels than 9 are left unmasked (noted): they cost little.
"""
ROUND_MAX_MIN_BITS = 10
_TIFF_MAGIC = (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+")
_NPY_MAGIC = b"\x93NUMPY"
_MRC_MAP_ID = b"MAP "  # MRC2014 header word 53 (bytes 208-211)
_MRC_SUFFIXES = (".mrc", ".mrcs")
_PHOTOMETRIC_RGB = 2  # TIFF 6.0 PhotometricInterpretation: RGB


@dataclass(frozen=True)
class LoadedImage:
    """A loaded 2D pattern.

    data : (ny, nx) float32 counts, negative values kept. invalid : bool mask of NaN/inf pixels
    (and signed-integer minimum pixels) or None.
    saturation_level : counts at or above which a pixel of ``data`` is saturated (configured or
    from the bit depth, see the module docstring); NaN when none is known, and for a sum of frames.
    saturated : for a sum of frames, the pixels saturated in at least one frame (None otherwise,
    or when none is).
    frame_saturation_level : the level of one frame (equal to ``saturation_level`` for a single image).
    saturation_source : where the (per-frame) level came from: ``configured``, ``TIFF
    BitsPerSample``, ``TIFF MaxSampleValue``, ``data maximum``, ``dtype maximum``, or ``""``.
    source_dtype : numpy dtype name of the stored pixels. n_frames : frames summed (1 if one).
    notes, warnings : plain-language remarks for the sample record.
    """

    data: np.ndarray
    path: str
    invalid: np.ndarray | None
    saturation_level: float
    source_dtype: str
    n_frames: int
    notes: tuple[str, ...] = ()
    warnings: tuple[str, ...] = ()
    saturated: np.ndarray | None = None
    frame_saturation_level: float = float("nan")
    saturation_source: str = ""

    @property
    def shape(self) -> tuple[int, int]:
        return self.data.shape


@dataclass
class _Source:
    """What a reader found besides the pixels: the layout (``image``; ``frames`` along axis 0;
    ``rgb`` along the last axis; ``other``), the TIFF bit-depth tags, remarks."""

    kind: str
    frame_taken: bool = False
    bits_per_sample: int | None = None
    max_sample_value: int | None = None
    notes: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)


def load_image(path: str | os.PathLike, *, frame: int | None = None, saturation_level: float | None = None,
               max_pixels: int = DEFAULT_MAX_PIXELS, max_bytes: int = DEFAULT_MAX_BYTES) -> LoadedImage:
    """Load a pattern as float32.

    Parameters
    ----------
    path : path-like
        A TIFF (.tif/.tiff, classic or BigTIFF), an MRC (.mrc/.mrcs) or a NumPy ``.npy`` file.
    frame : int or None
        Use this frame (from 0) of a frame stack instead of summing all frames; 0 is also
        accepted for a single image.
    saturation_level : float or None
        The detector's saturation level (counts per frame); None: from the bit depth.
    max_pixels, max_bytes : int
        Refuse images with more pixels (per frame) or more bytes of pixel data than this.

    Raises
    ------
    RingidError
        With the file and the problem in one line.
    """
    path = Path(path)
    if not path.is_file():
        raise RingidError(path, "file not found")
    if path.stat().st_size == 0:
        raise RingidError(path, "empty file (0 bytes)")
    if frame is not None and frame < 0:
        raise RingidError(path, f"frame {frame} requested: frames are counted from 0")
    try:
        with open(path, "rb") as fh:
            head = fh.read(256)
    except OSError as exc:
        raise RingidError(path, f"cannot read file: {exc.strerror or exc}") from None
    if head.startswith(_NPY_MAGIC):
        raw, source = _read_npy(path, frame, max_pixels, max_bytes)
    elif any(head.startswith(m) for m in _TIFF_MAGIC):
        raw, source = _read_tiff(path, frame, max_pixels, max_bytes)
    elif head[208:212] == _MRC_MAP_ID or path.suffix.lower() in _MRC_SUFFIXES:
        raw, source = _read_mrc(path, frame, max_pixels, max_bytes)
    else:
        raise RingidError(path, "not an image: neither a TIFF, an MRC nor a .npy file")
    return _to_pattern(path, raw, source, frame, saturation_level)


def _check_size(path, shape, itemsize, max_pixels, max_bytes):
    n_total = int(np.prod(shape, dtype=np.int64)) if len(shape) else 0
    if n_total * itemsize > max_bytes:
        raise RingidError(path, f"image data of {n_total * itemsize / 2**20:.0f} MiB exceeds the limit of "
                                f"{max_bytes / 2**20:.0f} MiB")
    spatial = [s for s in shape if s >= MIN_SIDE_PX]
    n_frame = int(np.prod(spatial[-2:], dtype=np.int64)) if len(spatial) >= 2 else n_total
    if n_frame > max_pixels:
        raise RingidError(path, f"image of {n_frame} pixels exceeds the limit of {max_pixels} pixels")


def _frame_or_all(path, arr, source, frame: int | None) -> np.ndarray:
    """The chosen frame of a frame stack (noted in ``source``), or every pixel of ``arr`` read into memory."""
    if source.kind == "frames" and frame is not None:
        source.notes.append(_check_frame(path, frame, arr.shape[0]))
        source.kind, source.frame_taken = "image", True
        return np.array(arr[frame])
    return np.array(arr)


def _check_frame(path, frame: int, n_frames: int) -> str:
    """The note for taking ``frame`` of ``n_frames``; raises when the stack has no such frame."""
    if not 0 <= frame < n_frames:
        raise RingidError(path, f"frame {frame} requested but the file has {n_frames} frames")
    return f"used frame {frame} of {n_frames}"


def _read_npy(path, frame, max_pixels, max_bytes):
    try:
        arr = np.load(path, mmap_mode="r", allow_pickle=False)
    except Exception as exc:  # numpy raises ValueError/OSError/EOFError for damaged files
        raise RingidError(path, f"unreadable or truncated .npy file ({_one_line(exc)})") from None
    if not isinstance(arr, np.ndarray) or arr.dtype.fields is not None:
        raise RingidError(path, "not an image: the .npy file holds no plain numeric array")
    _check_size(path, arr.shape, arr.dtype.itemsize, max_pixels, max_bytes)
    source = _Source("image" if arr.ndim == 2 else "other")
    if arr.ndim == 3:
        if arr.shape[-1] in (3, 4) and arr.shape[0] >= MIN_SIDE_PX:
            source.kind = "rgb"
        elif arr.shape[0] < min(arr.shape[1:]):
            source.kind = "frames"
    try:
        data = _frame_or_all(path, arr, source, frame)
    except RingidError:
        raise
    except Exception as exc:
        raise RingidError(path, f"unreadable or truncated .npy file ({_one_line(exc)})") from None
    return data, source


class _TiffLog(logging.Handler):
    """Collects what tifffile logs while a file is read (and keeps it off the console).

    tifffile reads on past some damage and says so only in its log: a chain of pages that
    breaks off (truncated file), page metadata that no longer match the pages. Its ERROR
    records are such damage; its WARNING records are kept as the image's warnings.
    """

    def __init__(self):
        super().__init__(logging.WARNING)
        self.errors: list[str] = []
        self.warnings: list[str] = []

    def emit(self, record):
        text = " ".join(record.getMessage().split())
        if text.startswith("<") and "> " in text:  # drop tifffile's "<TiffPages @8> " prefix
            text = text.split("> ", 1)[1]
        (self.errors if record.levelno >= logging.ERROR else self.warnings).append(text)

    def __enter__(self):
        self._logger = logging.getLogger("tifffile")
        self._propagate = self._logger.propagate
        self._logger.addHandler(self)
        self._logger.propagate = False
        return self

    def __exit__(self, *exc):
        self._logger.removeHandler(self)
        self._logger.propagate = self._propagate
        return False


def _read_tiff(path, frame, max_pixels, max_bytes):
    import tifffile

    try:
        with _TiffLog() as log, tifffile.TiffFile(path) as tif:
            series = tif.series[0]
            axes, shape = series.axes, tuple(series.shape)
            _check_size(path, shape, np.dtype(series.dtype).itemsize, max_pixels, max_bytes)
            page = series.keyframe
            rgb = int(page.photometric) == _PHOTOMETRIC_RGB
            source = _Source("image", bits_per_sample=int(page.bitspersample),
                             max_sample_value=_tag_int(page, 281))  # 281: MaxSampleValue
            if len(shape) == 3 and not rgb and axes[0] in FRAME_AXES:
                source.kind = "frames"
            elif len(shape) == 3 and not rgb and axes[-1] == "S":
                source.kind = "frames_last"
            elif len(shape) == 3 and rgb and axes in ("YXS", "SYX") and shape[axes.index("S")] in (3, 4):
                source.kind = "rgb"
            elif len(shape) != 2:
                source.kind = "other"
            if source.kind == "frames" and frame is not None and len(series.pages) == shape[0] > 1:
                source.notes.append(_check_frame(path, frame, shape[0]))
                source.kind, source.frame_taken = "image", True
                data = series.asarray(key=frame)
            else:
                data = series.asarray()
        if log.errors:
            raise RingidError(path, f"unreadable or truncated TIFF ({log.errors[0]})")
        source.warnings += [f"TIFF reader: {w}" for w in log.warnings]
    except RingidError:
        raise
    except Exception as exc:  # tifffile and imagecodecs raise many types for damaged files
        raise RingidError(path, f"unreadable or truncated TIFF ({_one_line(exc)})") from None
    if source.kind == "frames_last":
        data, source.kind = np.moveaxis(data, -1, 0), "frames"
    elif source.kind == "rgb" and axes == "SYX":
        data = np.moveaxis(data, 0, -1)  # planar RGB
    if data.ndim != len(shape) and source.kind != "image":
        source.kind = "other"
    return data, source


def _tag_int(page, code: int) -> int | None:
    """The integer value of TIFF tag ``code`` of ``page`` (the largest of several), or None."""
    tag = page.tags.get(code)
    if tag is None:
        return None
    value = tag.value
    try:
        return int(max(value)) if isinstance(value, (tuple, list)) else int(value)
    except (TypeError, ValueError):
        return None


def _read_mrc(path, frame, max_pixels, max_bytes):
    """An MRC2014 file (Cheng et al. 2015): a 1024-byte header (NX, NY, NZ, MODE, NSYMBT, the map
    ID ``MAP `` at byte 208), NSYMBT bytes of extended header, then the pixels, x fastest."""
    import warnings

    import mrcfile
    from mrcfile.utils import data_dtype_from_header, data_shape_from_header

    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            with mrcfile.open(path, mode="r", permissive=False, header_only=True) as mrc:
                header = mrc.header
                dtype = data_dtype_from_header(header)
                shape = tuple(int(n) for n in data_shape_from_header(header))
                expected = 1024 + int(header.nsymbt) + int(np.prod(shape, dtype=np.int64)) * dtype.itemsize
                ispg = int(header.ispg)
            size = path.stat().st_size
            if size < expected:
                raise RingidError(path, f"truncated MRC file: the header describes {expected} bytes, the file "
                                        f"has {size}")
            _check_size(path, shape, dtype.itemsize, max_pixels, max_bytes)
            with mrcfile.mmap(path, mode="r", permissive=False) as mrc:
                stack = mrc.data
                source = _Source({2: "image", 3: "frames"}.get(stack.ndim, "other"))
                data = _frame_or_all(path, stack, source, frame)
                if source.kind == "frames" and ispg != 0:
                    source.notes.append(f"the MRC header marks a volume (ISPG {ispg}): its "
                                        f"{stack.shape[0]} sections read as frames")
    except RingidError:
        raise
    except Exception as exc:  # mrcfile raises ValueError for a broken header, numpy for short data
        raise RingidError(path, f"unreadable or broken MRC file ({_one_line(exc)})") from None
    source.warnings += [f"MRC reader: {' '.join(str(w.message).split())}" for w in caught]
    return data, source


def _to_pattern(path, raw: np.ndarray, source: _Source, frame: int | None,
                configured_level: float | None) -> LoadedImage:
    notes, warnings = list(source.notes), list(source.warnings)
    if raw.dtype.kind not in "uif":
        raise RingidError(path, f"unsupported pixel type {raw.dtype} (expected integers or floats)")
    kind = source.kind
    if raw.ndim > 2 and 1 in raw.shape:
        raw = np.squeeze(raw)
        kind = "image" if raw.ndim == 2 else kind
    source_dtype = raw.dtype.name  # a big-endian >u2 is a uint16 as well
    if kind == "rgb" and raw.ndim == 3 and raw.shape[-1] in (3, 4):
        rgb = raw[..., :3]
        if not (np.array_equal(rgb[..., 0], rgb[..., 1]) and np.array_equal(rgb[..., 0], rgb[..., 2])):
            raise RingidError(path, "true-colour RGB image: a diffraction pattern must be greyscale")
        raw, kind = rgb[..., 0], "image"
        warnings.append("grey data stored as RGB(A): used one channel")
    if kind == "frames" and raw.ndim == 3 and frame is not None:
        notes.append(_check_frame(path, frame, raw.shape[0]))
        raw, kind = raw[frame], "image"
    elif raw.ndim == 2 and frame not in (None, 0) and not source.frame_taken:
        raise RingidError(path, f"frame {frame} requested but the file holds a single image")
    if not (raw.ndim == 2 or (raw.ndim == 3 and kind == "frames")):
        raise RingidError(path, f"{raw.ndim}-D data of shape {tuple(raw.shape)} is not a single image or a frame stack")
    if min(raw.shape[-2:]) < MIN_SIDE_PX:
        raise RingidError(path, f"image of {raw.shape[-1]}×{raw.shape[-2]} px is smaller than "
                                f"{MIN_SIDE_PX}×{MIN_SIDE_PX}")
    integer = raw.dtype.kind in "ui"
    lo = hi = None
    if integer:
        lo, hi = raw.min(), raw.max()  # one pass each over the stored pixels, cheaper than on float32
    level, level_source, level_notes, level_warnings = _saturation(raw, source, configured_level, hi)
    notes += level_notes
    warnings += level_warnings
    invalid = None
    if raw.dtype.kind == "i" and lo == np.iinfo(raw.dtype).min:
        invalid = raw == lo if raw.ndim == 2 else (raw == lo).any(axis=0)
        warnings.append(f"{int(invalid.sum())} pixels at the {raw.dtype.name} minimum {int(lo)} (an underflow or "
                        "fill value, not a measurement) masked")
    n_frames, saturated = 1, None
    if raw.ndim == 3:
        n_frames = raw.shape[0]
        saturated = _saturated_in_any_frame(raw, level)
        raw = raw.sum(axis=0, dtype=np.float64)
        notes.append(f"summed {n_frames} frames")
        if saturated is not None:
            notes.append(f"{int(saturated.sum())} pixels saturated in at least one frame (at or above "
                         f"{level:g} counts) masked")
    data = np.asarray(raw, dtype=np.float32)
    if data.dtype.kind == "f" and raw.dtype.kind == "f":
        bad = ~np.isfinite(data)
        if bad.any():
            invalid = bad if invalid is None else invalid | bad
            data = np.where(bad, np.float32(0), data)
            warnings.append(f"{int(bad.sum())} NaN/inf pixels masked")
    constant = (lo == hi) if (integer and n_frames == 1) else not np.any(data != data.flat[0])
    if constant:
        warnings.append("image is constant")
    return LoadedImage(data=data, path=str(path), invalid=invalid,
                       saturation_level=level if n_frames == 1 else float("nan"), source_dtype=source_dtype,
                       n_frames=n_frames, notes=tuple(notes), warnings=tuple(warnings), saturated=saturated,
                       frame_saturation_level=level, saturation_source=level_source)


def _saturated_in_any_frame(stack: np.ndarray, level: float) -> np.ndarray | None:
    """Pixels of a (frames, ny, nx) stack at or above ``level`` in at least one frame; None if none is."""
    if not math.isfinite(level):
        return None
    if stack.dtype.kind in "ui":
        threshold = math.ceil(level)
        if threshold > np.iinfo(stack.dtype).max:
            return None
        threshold = max(threshold, int(np.iinfo(stack.dtype).min))
    else:
        threshold = level
    saturated = (stack >= stack.dtype.type(threshold)).any(axis=0)
    return saturated if saturated.any() else None


def _saturation(raw: np.ndarray, source: _Source, configured: float | None, data_max):
    """The saturation level of one frame of ``raw``: ``(level, where from, notes, warnings)``.

    The order of the rules is the module docstring's. ``data_max`` is the maximum of ``raw``
    (integer data; None for floats).
    """
    if configured is not None:
        return float(configured), "configured", [f"saturation level {configured:g} counts (configured)"], []
    if raw.dtype.kind == "f":
        return float("nan"), "", [], []
    info = np.iinfo(raw.dtype)
    container = float(info.max)
    if raw.dtype.kind == "i":
        return container, "dtype maximum", [], []
    bits, top = info.bits, int(data_max)
    warnings: list[str] = []
    tag_bits = source.bits_per_sample
    if tag_bits and tag_bits < bits:
        level = 2**tag_bits - 1
        if top <= level:
            return float(level), "TIFF BitsPerSample", [
                f"saturation level {level} counts: {tag_bits}-bit data (TIFF BitsPerSample)"], []
        warnings.append(f"the TIFF BitsPerSample tag says {tag_bits} bits but pixels reach {top}: tag ignored")
    msv = source.max_sample_value
    if msv is not None and 0 < msv < container:
        if top <= msv:
            return float(msv), "TIFF MaxSampleValue", [f"saturation level {msv} counts (TIFF MaxSampleValue)"], \
                warnings
        warnings.append(f"the TIFF MaxSampleValue tag says {msv} but pixels reach {top}: tag ignored")
    n = (top + 1).bit_length() - 1
    if bits >= 16 and ROUND_MAX_MIN_BITS <= n < bits and top == 2**n - 1:
        count = int(np.count_nonzero(raw == raw.dtype.type(top)))
        if count >= ROUND_MAX_MIN_PIXELS:
            return float(top), "data maximum", [
                f"saturation level {top} counts: {n}-bit data in a {bits}-bit container ({count} pixels at the "
                f"maximum 2^{n} - 1)"], warnings
        return container, "dtype maximum", [
            f"the maximum {top} = 2^{n} - 1 is held by {count} pixels only (fewer than {ROUND_MAX_MIN_PIXELS}): "
            f"saturation level left at the {raw.dtype.name} maximum {int(container)}"], warnings
    return container, "dtype maximum", [], warnings


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    return f"{type(exc).__name__}: {text}"[:200] if text else type(exc).__name__
