"""Tests of pattern loading (ringid.image)."""

import numpy as np
import pytest
import tifffile

from ringid.core.errors import RingidError
from ringid.image.load import load_image


@pytest.fixture
def rng():
    return np.random.default_rng(0)


@pytest.mark.parametrize("dtype", ["uint8", "uint16", "uint32", "int16", "int32", "float32", "float64"])
def test_loads_every_pixel_type_as_float32(tmp_path, rng, dtype):
    a = (rng.integers(0, 100, (70, 90))).astype(dtype)
    p = tmp_path / f"img_{dtype}.tif"
    tifffile.imwrite(p, a)
    img = load_image(p)
    assert img.data.dtype == np.float32 and img.data.shape == (70, 90)
    assert np.array_equal(img.data, a.astype(np.float32))
    assert img.source_dtype == dtype
    if np.dtype(dtype).kind in "ui":
        assert img.saturation_level == float(np.iinfo(dtype).max)
    else:
        assert np.isnan(img.saturation_level)


def test_multi_frame_tiff_is_summed_or_one_frame_chosen(tmp_path, rng):
    frames = rng.integers(0, 60000, (3, 64, 80)).astype(np.uint16)
    p = tmp_path / "stack.tif"
    tifffile.imwrite(p, frames, photometric="minisblack")
    summed = load_image(p)
    assert summed.n_frames == 3
    assert np.array_equal(summed.data, frames.astype(np.float64).sum(0).astype(np.float32))
    assert any("summed 3 frames" in n for n in summed.notes)
    one = load_image(p, frame=1)
    assert np.array_equal(one.data, frames[1].astype(np.float32))
    with pytest.raises(RingidError, match="frame 5"):
        load_image(p, frame=5)


def test_grey_rgb_converted_with_warning_true_colour_refused(tmp_path, rng):
    grey = rng.integers(0, 255, (64, 64)).astype(np.uint8)
    p = tmp_path / "grey_rgb.tif"
    tifffile.imwrite(p, np.stack([grey] * 3, axis=-1), photometric="rgb")
    img = load_image(p)
    assert np.array_equal(img.data, grey.astype(np.float32))
    assert img.warnings
    colour = np.stack([grey, grey[::-1], grey], axis=-1)
    q = tmp_path / "colour.tif"
    tifffile.imwrite(q, colour, photometric="rgb")
    with pytest.raises(RingidError, match="true-colour"):
        load_image(q)


def test_nan_and_inf_are_reported_invalid(tmp_path):
    a = np.ones((64, 64), np.float32)
    a[3, 4] = np.nan
    a[10, 11] = np.inf
    p = tmp_path / "nan.npy"
    np.save(p, a)
    img = load_image(p)
    assert img.invalid.sum() == 2 and img.invalid[3, 4] and img.invalid[10, 11]
    assert np.isfinite(img.data).all()


def test_npy_frame_stack_and_plain(tmp_path, rng):
    a = rng.random((2, 64, 64)).astype(np.float32)
    p = tmp_path / "stack.npy"
    np.save(p, a)
    assert load_image(p).n_frames == 2
    np.save(tmp_path / "plain.npy", a[0])
    assert load_image(tmp_path / "plain.npy").data.shape == (64, 64)


@pytest.mark.parametrize("case,message", [
    ("text", "not an image"),
    ("truncated", "unreadable or truncated"),
    ("small", "smaller than 64"),
    ("volume", "not a single image or a frame stack"),
    ("missing", "file not found"),
    ("complex", "unsupported pixel type"),
])
def test_refusals_are_one_line_errors_naming_the_file(tmp_path, rng, case, message):
    p = tmp_path / f"{case}.tif"
    if case == "text":
        p.write_text("sample,image\n")
    elif case == "truncated":
        tifffile.imwrite(p, rng.integers(0, 1000, (256, 256)).astype(np.uint16))
        data = p.read_bytes()
        p.write_bytes(data[: len(data) // 2])
    elif case == "small":
        tifffile.imwrite(p, np.zeros((32, 128), np.uint16))
    elif case == "volume":
        p = tmp_path / "volume.npy"
        np.save(p, np.zeros((4, 64, 64, 5), np.float32))
    elif case == "complex":
        p = tmp_path / "complex.npy"
        np.save(p, np.zeros((64, 64), np.complex64))
    with pytest.raises(RingidError, match=message) as info:
        load_image(p)
    assert str(p) in str(info.value) and "\n" not in str(info.value)


def test_size_limits_checked_before_reading(tmp_path):
    p = tmp_path / "big.tif"
    tifffile.imwrite(p, np.zeros((128, 128), np.uint16))
    with pytest.raises(RingidError, match="exceeds the limit of 10000 pixels"):
        load_image(p, max_pixels=10_000)
    with pytest.raises(RingidError, match="MiB"):
        load_image(p, max_bytes=1000)
