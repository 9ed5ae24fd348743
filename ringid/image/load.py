"""Load a diffraction pattern from TIFF (tifffile) or ``.npy`` into a 2D float32 array.

Accepted: uint8/16/32, signed integers, float32/64; a multi-frame TIFF or a
(frames, ny, nx) array is summed (noted) unless one frame is chosen; grey data
saved as RGB(A) is converted with a warning, true colour is refused. NaN and
±inf pixels are reported as ``invalid`` for masking. Every refusal is a one-line
:class:`ringid.core.errors.RingidError` naming the file: unreadable or truncated
file, not an image, smaller than 64×64, 3-D data that is not a frame stack, or
larger than the configured limits (checked before the pixels are read).
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ringid.core.errors import RingidError

MIN_SIDE_PX = 64
DEFAULT_MAX_PIXELS = 8192 * 8192
DEFAULT_MAX_BYTES = 2 * 1024**3
FRAME_AXES = "IQTRS"  # tifffile series axes that mean "frame/time/sequence" (S handled as samples)
_TIFF_MAGIC = (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+")
_NPY_MAGIC = b"\x93NUMPY"


@dataclass(frozen=True)
class LoadedImage:
    """A loaded 2D pattern.

    data : (ny, nx) float32 counts. invalid : bool mask of NaN/inf pixels or None.
    saturation_level : the source dtype's maximum for integer data (NaN for float data).
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

    @property
    def shape(self) -> tuple[int, int]:
        return self.data.shape


def load_image(path: str | os.PathLike, *, frame: int | None = None, max_pixels: int = DEFAULT_MAX_PIXELS,
               max_bytes: int = DEFAULT_MAX_BYTES) -> LoadedImage:
    """Load a pattern as float32.

    Parameters
    ----------
    path : path-like
        A TIFF (.tif/.tiff, classic or BigTIFF) or a NumPy ``.npy`` file.
    frame : int or None
        Use this frame of a multi-frame file instead of summing all frames.
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
    try:
        with open(path, "rb") as fh:
            head = fh.read(8)
    except OSError as exc:
        raise RingidError(path, f"cannot read file: {exc.strerror or exc}") from None
    if head.startswith(_NPY_MAGIC):
        raw, axes = _read_npy(path, frame, max_pixels, max_bytes)
    elif any(head.startswith(m) for m in _TIFF_MAGIC):
        raw, axes = _read_tiff(path, frame, max_pixels, max_bytes)
    else:
        raise RingidError(path, "not an image: neither a TIFF nor a .npy file")
    return _to_pattern(path, raw, axes, frame)


def _check_size(path, shape, itemsize, max_pixels, max_bytes):
    n_total = int(np.prod(shape, dtype=np.int64)) if len(shape) else 0
    if n_total * itemsize > max_bytes:
        raise RingidError(path, f"image data of {n_total * itemsize / 2**20:.0f} MiB exceeds the limit of "
                                f"{max_bytes / 2**20:.0f} MiB")
    spatial = [s for s in shape if s >= MIN_SIDE_PX]
    n_frame = int(np.prod(spatial[-2:], dtype=np.int64)) if len(spatial) >= 2 else n_total
    if n_frame > max_pixels:
        raise RingidError(path, f"image of {n_frame} pixels exceeds the limit of {max_pixels} pixels")


def _read_npy(path, frame, max_pixels, max_bytes):
    try:
        arr = np.load(path, mmap_mode="r", allow_pickle=False)
    except Exception as exc:  # numpy raises ValueError/OSError/EOFError for damaged files
        raise RingidError(path, f"unreadable or truncated .npy file ({_one_line(exc)})") from None
    if not isinstance(arr, np.ndarray) or arr.dtype.fields is not None:
        raise RingidError(path, "not an image: the .npy file holds no plain numeric array")
    _check_size(path, arr.shape, arr.dtype.itemsize, max_pixels, max_bytes)
    axes = None
    if arr.ndim == 3:
        if arr.shape[-1] in (3, 4) and arr.shape[0] >= MIN_SIDE_PX:
            axes = "YXS"
        elif arr.shape[0] < min(arr.shape[1:]):
            axes = "IYX"
    try:
        data = np.array(arr)
    except Exception as exc:
        raise RingidError(path, f"unreadable or truncated .npy file ({_one_line(exc)})") from None
    return data, axes


def _read_tiff(path, frame, max_pixels, max_bytes):
    import tifffile

    try:
        with tifffile.TiffFile(path) as tif:
            series = tif.series[0]
            axes = series.axes
            _check_size(path, series.shape, np.dtype(series.dtype).itemsize, max_pixels, max_bytes)
            if frame is not None and len(series.shape) == 3 and axes[0] in FRAME_AXES:
                if not 0 <= frame < series.shape[0]:
                    raise RingidError(path, f"frame {frame} requested but the file has {series.shape[0]} frames")
                data = series.asarray(key=frame)
                axes = axes[1:]
            else:
                data = series.asarray()
    except RingidError:
        raise
    except Exception as exc:  # tifffile raises many types for damaged files
        raise RingidError(path, f"unreadable or truncated TIFF ({_one_line(exc)})") from None
    if data.ndim != len(axes):
        axes = None
    return data, axes


def _to_pattern(path, raw: np.ndarray, axes: str | None, frame: int | None) -> LoadedImage:
    notes: list[str] = []
    warnings: list[str] = []
    if raw.dtype.kind not in "uif":
        raise RingidError(path, f"unsupported pixel type {raw.dtype} (expected integers or floats)")
    raw = np.squeeze(raw) if raw.ndim > 2 and 1 in raw.shape else raw
    source_dtype = str(raw.dtype)
    n_frames = 1
    if raw.ndim == 3 and axes == "SYX" and raw.shape[0] in (3, 4):
        raw, axes = np.moveaxis(raw, 0, -1), "YXS"  # planar RGB
    if raw.ndim == 3 and axes is not None and axes[-1] == "S" and raw.shape[-1] in (3, 4):
        rgb = raw[..., :3]
        if not (np.array_equal(rgb[..., 0], rgb[..., 1]) and np.array_equal(rgb[..., 0], rgb[..., 2])):
            raise RingidError(path, "true-colour RGB image: a diffraction pattern must be greyscale")
        raw = rgb[..., 0]
        warnings.append("grey data stored as RGB(A): used one channel")
    elif raw.ndim == 3 and axes is not None and axes[0] in FRAME_AXES and axes[1:] == "YX":
        if frame is not None:
            if not 0 <= frame < raw.shape[0]:
                raise RingidError(path, f"frame {frame} requested but the file has {raw.shape[0]} frames")
            raw = raw[frame]
            notes.append(f"used frame {frame}")
        else:
            n_frames = raw.shape[0]
            raw = raw.sum(axis=0, dtype=np.float64)
            notes.append(f"summed {n_frames} frames")
    elif raw.ndim != 2:
        raise RingidError(path, f"{raw.ndim}-D data of shape {tuple(raw.shape)} is not a single image or a frame stack")
    if min(raw.shape) < MIN_SIDE_PX:
        raise RingidError(path, f"image of {raw.shape[1]}×{raw.shape[0]} px is smaller than "
                                f"{MIN_SIDE_PX}×{MIN_SIDE_PX}")
    if raw.dtype.kind in "ui" and n_frames == 1:
        level = float(np.iinfo(raw.dtype).max)
    else:
        level = float("nan")  # float data, or a sum of frames: use a configured level
    data = np.asarray(raw, dtype=np.float32)
    invalid = None
    if data.dtype.kind == "f" and raw.dtype.kind == "f":
        bad = ~np.isfinite(data)
        if bad.any():
            invalid = bad
            data = np.where(bad, np.float32(0), data)
            warnings.append(f"{int(bad.sum())} NaN/inf pixels masked")
    if not np.any(data != data.flat[0]):
        warnings.append("image is constant")
    return LoadedImage(data=data, path=str(path), invalid=invalid, saturation_level=level,
                       source_dtype=source_dtype, n_frames=n_frames, notes=tuple(notes), warnings=tuple(warnings))


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    return f"{type(exc).__name__}: {text}"[:200] if text else type(exc).__name__
