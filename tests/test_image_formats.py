"""Real camera files: every TIFF and MRC variant loads to the pixels of the plain TIFF.

Each variant is written here with tifffile or mrcfile from one reference array (a simulated
ring pattern of 14-bit data in a uint16 container, its direct beam clipped at 2^14 - 1 = 16383)
and compared with the plain uncompressed little-endian TIFF of the same array: the same float32
pixels, and for the compressed and MRC files the same pyFAI profile. Then the saturation level
from the bit depth, negative values of dark-subtracted data, frame stacks and the one-line
errors of damaged files.
"""

from __future__ import annotations

import json
import math

import mrcfile
import numpy as np
import pytest
import tifffile

from ringid.core.errors import RingidError
from ringid.core.model import Geometry
from ringid.image.load import ROUND_MAX_MIN_PIXELS, load_image
from ringid.image.stage import load_and_mask, process_image
from ringid.synthetic.simulate import simulate_pattern

K_A_PX = 125.0  # camera constant of the synthetic patterns (Å·px)
D_AL = [2.33803, 2.0248, 1.43174, 1.22098]  # source: pyFAI calibrant table "Al", d(111) ... d(311) in Å
LEVEL_14_BIT = 2**14 - 1


def pattern(seed: int = 4, **kw) -> np.ndarray:
    """A 256² ring pattern (uint16); by default 14-bit, the direct beam clipped at 16383."""
    kw.setdefault("saturation_level", float(LEVEL_14_BIT))
    kw.setdefault("instrument_fwhm_per_nm", 0.3)
    return simulate_pattern(D_AL, [100, 50, 30, 30], camera_constant_A_px=K_A_PX, shape=(256, 256), seed=seed,
                            **kw).image


@pytest.fixture(scope="module")
def reference() -> np.ndarray:
    ref = pattern()
    assert ref.dtype == np.uint16 and int(ref.max()) == LEVEL_14_BIT
    assert np.count_nonzero(ref == LEVEL_14_BIT) >= ROUND_MAX_MIN_PIXELS  # the clipped direct beam
    return ref


@pytest.fixture(scope="module")
def plain(tmp_path_factory, reference):
    """The reference written as a plain uncompressed little-endian TIFF, and its loaded image."""
    p = tmp_path_factory.mktemp("plain") / "plain.tif"
    tifffile.imwrite(p, reference)
    return p, load_image(p)


CALIBRATION = Geometry(127.5, 127.5, camera_constant_A_px=K_A_PX, voltage_kv=200.0)


def assert_one_line_error(path, info):
    text = str(info.value)
    assert text.startswith(f"{path}: ") and "\n" not in text, text


# --------------------------------------------------------------------------- TIFF variants

TIFF_VARIANTS = {
    "zlib": dict(compression="zlib"),
    "zlib_predictor": dict(compression="zlib", predictor=True),
    "lzw": dict(compression="lzw"),
    "lzw_predictor": dict(compression="lzw", predictor=True),
    "packbits": dict(compression="packbits"),
    "strips_of_16_rows": dict(rowsperstrip=16),
    "tiled": dict(tile=(64, 64)),
    "tiled_lzw": dict(tile=(64, 64), compression="lzw"),
    "big_endian": dict(byteorder=">"),
    "big_endian_zlib": dict(byteorder=">", compression="zlib"),
    "bigtiff": dict(bigtiff=True),
    "bigtiff_tiled_zlib": dict(bigtiff=True, tile=(64, 64), compression="zlib"),
    "big_endian_bigtiff_lzw": dict(bigtiff=True, byteorder=">", compression="lzw"),
}


@pytest.mark.parametrize("variant", list(TIFF_VARIANTS))
def test_tiff_variant_loads_the_pixels_of_the_plain_tiff(tmp_path, reference, plain, variant):
    p = tmp_path / f"{variant}.tif"
    tifffile.imwrite(p, reference, **TIFF_VARIANTS[variant])
    img, ref = load_image(p), plain[1]
    assert img.data.dtype == np.float32 and np.array_equal(img.data, ref.data)
    assert img.source_dtype == "uint16" and img.n_frames == 1 and img.invalid is None
    assert img.saturation_level == ref.saturation_level and img.saturation_source == ref.saturation_source


@pytest.mark.parametrize("dtype", ["float32", "int32", "uint16"])
@pytest.mark.parametrize("compression", [None, "zlib", "lzw"])
def test_pixel_types_compressed_or_not_load_the_same_pixels(tmp_path, reference, plain, dtype, compression):
    p = tmp_path / f"{dtype}_{compression}.tif"
    tifffile.imwrite(p, reference.astype(dtype), compression=compression)
    img = load_image(p)
    assert np.array_equal(img.data, plain[1].data) and img.source_dtype == dtype


@pytest.mark.parametrize("variant", ["zlib", "tiled_lzw", "big_endian_bigtiff_lzw"])
def test_compressed_tiff_gives_the_profile_of_the_plain_tiff(tmp_path, reference, plain, variant):
    p = tmp_path / f"{variant}.tif"
    tifffile.imwrite(p, reference, **TIFF_VARIANTS[variant])
    a, b = process_image(plain[0], CALIBRATION), process_image(p, CALIBRATION)
    assert (a.geometry.center_x_px, a.geometry.center_y_px) == (b.geometry.center_x_px, b.geometry.center_y_px)
    assert np.array_equal(a.mask.mask, b.mask.mask)
    np.testing.assert_allclose(b.profile.g_per_nm, a.profile.g_per_nm, rtol=1e-7)
    np.testing.assert_allclose(b.profile.intensity, a.profile.intensity, rtol=1e-6, equal_nan=True)
    np.testing.assert_allclose(b.profile.sigma, a.profile.sigma, rtol=1e-6, equal_nan=True)


# --------------------------------------------------------------------------- frame stacks


@pytest.fixture(scope="module")
def frames() -> np.ndarray:
    return np.stack([pattern(seed=s) for s in (11, 12, 13)])


def _layout(frames: np.ndarray, name: str):
    """(array, tifffile keywords) of a three-frame stack in one of the layouts writers use."""
    return {
        "pages": (frames, dict(photometric="minisblack")),
        "pages_without_metadata": (frames, dict(photometric="minisblack", metadata=None)),
        "pages_zlib": (frames, dict(photometric="minisblack", compression="zlib")),
        "imagej": (frames, dict(imagej=True)),
        "one_page_separate_samples": (frames, dict(photometric="minisblack", planarconfig="separate")),
        "one_page_contiguous_samples": (np.moveaxis(frames, 0, -1), dict(photometric="minisblack",
                                                                          planarconfig="contig")),
        "one_page_depth_tiled": (frames, dict(photometric="minisblack", volumetric=True, tile=(64, 64))),
    }[name]


STACK_LAYOUTS = ["pages", "pages_without_metadata", "pages_zlib", "imagej", "one_page_separate_samples",
                 "one_page_contiguous_samples", "one_page_depth_tiled"]


@pytest.mark.parametrize("layout", STACK_LAYOUTS)
def test_tiff_frame_stack_is_summed_or_one_frame_taken(tmp_path, frames, layout):
    data, kw = _layout(frames, layout)
    p = tmp_path / f"{layout}.tif"
    tifffile.imwrite(p, data, **kw)
    summed = load_image(p)
    assert summed.n_frames == 3 and "summed 3 frames" in summed.notes
    assert np.array_equal(summed.data, frames.astype(np.float64).sum(0).astype(np.float32))
    one = load_image(p, frame=2)
    assert one.n_frames == 1 and np.array_equal(one.data, frames[2].astype(np.float32))
    assert "used frame 2 of 3" in one.notes
    with pytest.raises(RingidError, match="frame 3 requested but the file has 3 frames") as info:
        load_image(p, frame=3)
    assert_one_line_error(p, info)


def test_frame_of_a_single_image(tmp_path, plain):
    assert np.array_equal(load_image(plain[0], frame=0).data, plain[1].data)
    with pytest.raises(RingidError, match="frame 1 requested but the file holds a single image") as info:
        load_image(plain[0], frame=1)
    assert_one_line_error(plain[0], info)


def test_a_stack_masks_the_pixels_saturated_in_any_frame(tmp_path):
    """Summed, a pixel clipped in one frame no longer sits at any level: the frames tell it."""
    clipped = pattern(seed=21)
    stack = np.stack([clipped, np.minimum(pattern(seed=22), 15000), np.minimum(pattern(seed=23), 15000)])
    p = tmp_path / "stack.tif"
    tifffile.imwrite(p, stack, photometric="minisblack")
    img, masks = load_and_mask(p)
    expected = (stack >= LEVEL_14_BIT).any(axis=0)
    assert expected.sum() >= ROUND_MAX_MIN_PIXELS
    assert math.isnan(img.saturation_level) and img.frame_saturation_level == LEVEL_14_BIT
    assert np.array_equal(img.saturated, expected)
    assert masks.mask[expected].all() and masks.n_saturated >= expected.sum()
    assert img.data[expected].max() < 3 * LEVEL_14_BIT  # the sum itself would not tell


# --------------------------------------------------------------------------- MRC


@pytest.mark.parametrize("dtype,mode", [("int8", 0), ("int16", 1), ("float32", 2), ("uint16", 6), ("float16", 12)])
def test_mrc_modes_load_the_pixels_of_the_tiff(tmp_path, reference, dtype, mode):
    if dtype == "int8":
        array = (reference // 130).astype(np.int16) - 64  # the pattern in −64 … 62
    elif dtype == "float16":
        array = reference // 8  # ≤ 2047: exact in float16
    else:
        array = reference
    array = array.astype(dtype)
    m = tmp_path / f"{dtype}.mrc"
    with mrcfile.new(m, array) as mrc:
        assert int(mrc.header.mode) == mode
    t = tmp_path / f"{dtype}.tif"
    tifffile.imwrite(t, array if dtype != "float16" else array.astype(np.float32))
    a, b = load_image(m), load_image(t)
    assert np.array_equal(a.data, b.data) and a.source_dtype == dtype
    if dtype != "float16":
        assert a.saturation_level == b.saturation_level or (math.isnan(a.saturation_level)
                                                            and math.isnan(b.saturation_level))


def test_mrc_gives_the_profile_of_the_tiff(tmp_path, reference, plain):
    m = tmp_path / "pattern.mrc"
    mrcfile.new(m, reference).close()
    a, b = process_image(plain[0], CALIBRATION), process_image(m, CALIBRATION)
    assert b.mask.n_saturated == a.mask.n_saturated > 0
    np.testing.assert_allclose(b.profile.intensity, a.profile.intensity, rtol=1e-6, equal_nan=True)
    np.testing.assert_allclose(b.profile.sigma, a.profile.sigma, rtol=1e-6, equal_nan=True)
    f = tmp_path / "pattern_float.mrc"
    mrcfile.new(f, reference.astype(np.float32)).close()
    g = tmp_path / "pattern_float.tif"
    tifffile.imwrite(g, reference.astype(np.float32), compression="zlib")
    c, d = process_image(g, CALIBRATION), process_image(f, CALIBRATION)
    np.testing.assert_allclose(d.profile.intensity, c.profile.intensity, rtol=1e-6, equal_nan=True)


@pytest.mark.parametrize("stack_kind", ["image_stack", "volume"])
def test_mrc_stack_is_summed_like_tiff_frames(tmp_path, frames, stack_kind):
    m = tmp_path / "movie.mrcs"
    with mrcfile.new(m, frames) as mrc:
        if stack_kind == "image_stack":
            mrc.set_image_stack()
    t = tmp_path / "movie.tif"
    tifffile.imwrite(t, frames, photometric="minisblack")
    a, b = load_image(m), load_image(t)
    assert a.n_frames == 3 and np.array_equal(a.data, b.data)
    assert any("read as frames" in n for n in a.notes) == (stack_kind == "volume")
    assert np.array_equal(load_image(m, frame=1).data, frames[1].astype(np.float32))
    with pytest.raises(RingidError, match="frame 7 requested but the file has 3 frames"):
        load_image(m, frame=7)


def test_mrc_told_by_its_content_whatever_its_name(tmp_path, reference, plain):
    m = tmp_path / "exported.img"
    mrcfile.new(tmp_path / "exported.mrc", reference).close()
    (tmp_path / "exported.mrc").rename(m)
    assert np.array_equal(load_image(m).data, plain[1].data)


# --------------------------------------------------------------------------- saturation from the bit depth


def test_round_maximum_with_a_clipped_beam_is_the_saturation_level(plain, reference):
    img = plain[1]
    assert img.saturation_level == LEVEL_14_BIT and img.saturation_source == "data maximum"
    assert any("14-bit data in a 16-bit container" in n for n in img.notes)
    _, masks = load_and_mask(plain[0])
    assert masks.mask[reference == LEVEL_14_BIT].all() and masks.n_saturated >= (reference == LEVEL_14_BIT).sum()


def test_bits_per_sample_tag_gives_the_level(tmp_path, reference):
    data = np.minimum(reference, 4000)  # 12-bit data whose maximum is not round
    p = tmp_path / "twelve.tif"
    tifffile.imwrite(p, data, bitspersample=12)
    img = load_image(p)
    assert img.saturation_level == 4095 and img.saturation_source == "TIFF BitsPerSample"
    assert np.array_equal(img.data, data.astype(np.float32))
    assert any("12-bit data (TIFF BitsPerSample)" in n for n in img.notes)


def test_max_sample_value_tag_gives_the_level(tmp_path, reference):
    data = np.minimum(reference, 16000)
    p = tmp_path / "msv.tif"
    tifffile.imwrite(p, data, compression="zlib", extratags=[(281, "H", 1, LEVEL_14_BIT, True)])
    img = load_image(p)
    assert img.saturation_level == LEVEL_14_BIT and img.saturation_source == "TIFF MaxSampleValue"


def test_a_tag_the_data_contradict_is_ignored(tmp_path, reference):
    p = tmp_path / "wrong_tag.tif"
    tifffile.imwrite(p, reference, extratags=[(281, "H", 1, 4095, True)])
    img = load_image(p)
    assert any("MaxSampleValue tag says 4095 but pixels reach 16383" in w for w in img.warnings)
    assert img.saturation_level == LEVEL_14_BIT and img.saturation_source == "data maximum"


def test_a_round_maximum_of_few_pixels_is_not_taken(tmp_path, reference):
    data = np.minimum(reference, 16000)
    data[[10, 20, 30], [40, 50, 60]] = LEVEL_14_BIT
    p = tmp_path / "few.tif"
    tifffile.imwrite(p, data)
    img = load_image(p)
    assert img.saturation_level == 65535 and img.saturation_source == "dtype maximum"
    assert any("held by 3 pixels only" in n for n in img.notes)
    flat = np.minimum(reference, 16000)  # clipped, but not at a round 2^n - 1
    q = tmp_path / "not_round.tif"
    tifffile.imwrite(q, flat)
    other = load_image(q)
    assert other.saturation_level == 65535 and not other.notes


def test_a_configured_level_wins(tmp_path, plain, reference):
    img, masks = load_and_mask(plain[0], saturation_level=12000)
    assert img.saturation_level == 12000 and img.saturation_source == "configured"
    assert "saturation level 12000 counts (configured)" in img.notes
    assert masks.mask[reference >= 12000].all()


# --------------------------------------------------------------------------- negative values


@pytest.fixture(scope="module")
def dark_subtracted() -> np.ndarray:
    """A float32 pattern after dark subtraction: read noise σ = 3 about a background near 0."""
    sim = simulate_pattern(D_AL, [100, 50, 30, 30], camera_constant_A_px=K_A_PX, shape=(256, 256), seed=5,
                           instrument_fwhm_per_nm=0.3, background_counts=20.0, floor_counts=0.5, dtype="float32")
    rng = np.random.default_rng(6)
    data = sim.image + rng.normal(0.0, 3.0, sim.image.shape) - 1.0
    return np.minimum(data, 30000.0).astype(np.float32)  # the direct beam within an int16


def as_int16(data: np.ndarray) -> np.ndarray:
    return np.rint(data).astype(np.int16)


@pytest.mark.parametrize("container", ["tiff_float32", "tiff_int16_lzw", "mrc_float32", "mrc_int16"])
def test_negative_values_are_kept(tmp_path, dark_subtracted, container):
    array = dark_subtracted if container.endswith("float32") else as_int16(dark_subtracted)
    assert (array < 0).mean() > 0.1
    if container.startswith("tiff"):
        p = tmp_path / f"{container}.tif"
        tifffile.imwrite(p, array, compression="lzw" if container.endswith("lzw") else None)
    else:
        p = tmp_path / f"{container}.mrc"
        mrcfile.new(p, array).close()
    img, masks = load_and_mask(p)
    assert np.array_equal(img.data, array.astype(np.float32)) and img.invalid is None
    from ringid.image.mask import border_mask

    negative = array < 0
    assert masks.n_below_floor == 0
    # off the border, a negative pixel is masked only as a rare outlier, not for its sign
    assert (masks.mask & negative & ~border_mask(img.data)).sum() <= 1e-3 * negative.sum()


def test_negative_floor_masks_below_it(tmp_path, dark_subtracted):
    p = tmp_path / "dark.tif"
    tifffile.imwrite(p, dark_subtracted)
    img, masks = load_and_mask(p, negative_floor=-5.0)
    below = dark_subtracted < -5.0
    assert below.any() and masks.mask[below].all()
    assert masks.n_below_floor == below.sum()  # float data: no invalid or saturated pixel masked before
    assert f"{below.sum()} pixels below the negative floor -5 masked" in masks.notes


def test_integration_sees_the_negative_values(tmp_path, dark_subtracted):
    from ringid.image.integrate import integrate_profile

    p = tmp_path / "dark.tif"
    tifffile.imwrite(p, dark_subtracted, compression="zlib")
    res = process_image(p, CALIBRATION)
    far = res.profile.g_per_nm > 0.8 * np.nanmax(res.profile.g_per_nm)
    assert np.nanmean(res.profile.intensity[far]) < 0  # the azimuthal mean far out is below 0
    # the same mask and geometry, the pattern shifted: the profile shifts by as much (nothing clipped)
    shifted = integrate_profile(dark_subtracted + np.float32(50.0), res.mask.mask, res.geometry)
    base = integrate_profile(dark_subtracted, res.mask.mask, res.geometry)
    np.testing.assert_allclose(shifted.intensity - 50.0, base.intensity, atol=1e-3, equal_nan=True)


def test_signed_minimum_is_invalid(tmp_path, dark_subtracted):
    array = as_int16(dark_subtracted)
    array[5, 7] = array[100, 9] = np.iinfo(np.int16).min
    p = tmp_path / "underflow.tif"
    tifffile.imwrite(p, array)
    img = load_image(p)
    assert img.invalid.sum() == 2 and img.invalid[5, 7] and img.invalid[100, 9]
    assert any("int16 minimum -32768" in w for w in img.warnings)


def test_low_level_variance_is_the_read_noise():
    from ringid.image.mask import low_level_variance

    rng = np.random.default_rng(7)
    assert low_level_variance(rng.poisson(5.0, (256, 256)).astype(np.float32)) == 0.0
    noise = rng.normal(0.0, 4.0, (512, 512)).astype(np.float32)
    assert low_level_variance(noise) == pytest.approx(16.0, rel=0.1)
    # on a positive level, the pairs of low sum are a tail: their differences still give σ²
    assert low_level_variance(noise + np.float32(3.0)) == pytest.approx(16.0, rel=0.15)


def test_dark_subtracted_shadow_gives_no_false_outliers():
    """A bright pattern with a beam-stop shadow near 0: read noise there is no defect."""
    from ringid.image.mask import outlier_pixel_mask

    sim = simulate_pattern(D_AL, [100, 50, 30, 30], camera_constant_A_px=500.0, shape=(1024, 1024), seed=1,
                           beam_stop=True, background_counts=2000.0, floor_counts=50.0, instrument_fwhm_per_nm=0.3,
                           hot_pixel_fraction=1e-4, dead_pixel_fraction=1e-4, dtype="float32")
    rng = np.random.default_rng(5)
    data = sim.image + rng.normal(0.0, 6.0, sim.image.shape).astype(np.float32)
    assert (data < 0).sum() > 1000
    hot, dead = outlier_pixel_mask(data)
    injected = np.zeros(data.size, bool)
    injected[np.concatenate([sim.hot_pixels, sim.dead_pixels])] = True
    injected = injected.reshape(data.shape)
    assert not (hot & ~injected).any() and not (dead & ~injected).any()
    assert hot[injected].sum() >= 0.95 * len(sim.hot_pixels)


# --------------------------------------------------------------------------- damaged files


def _truncated(path, keep: float = 0.6):
    data = path.read_bytes()
    path.write_bytes(data[: int(len(data) * keep)])
    return path


@pytest.mark.parametrize("variant", ["zlib", "lzw", "tiled_lzw", "bigtiff_tiled_zlib"])
def test_truncated_compressed_tiff_is_a_one_line_error(tmp_path, reference, variant):
    p = tmp_path / f"{variant}.tif"
    tifffile.imwrite(p, reference, **TIFF_VARIANTS[variant])
    with pytest.raises(RingidError, match="unreadable or truncated TIFF") as info:
        load_image(_truncated(p))
    assert_one_line_error(p, info)


@pytest.mark.parametrize("compression", ["zlib", "lzw"])
def test_garbled_compressed_strip_is_a_one_line_error(tmp_path, reference, compression):
    p = tmp_path / f"garbled_{compression}.tif"
    tifffile.imwrite(p, reference, compression=compression, rowsperstrip=32)
    with tifffile.TiffFile(p) as tif:
        offset, count = tif.pages[0].dataoffsets[2], tif.pages[0].databytecounts[2]
    raw = bytearray(p.read_bytes())
    raw[offset : offset + count] = np.random.default_rng(0).integers(0, 256, count, dtype=np.uint8).tobytes()
    p.write_bytes(bytes(raw))
    with pytest.raises(RingidError, match="unreadable or truncated TIFF") as info:
        load_image(p)
    assert_one_line_error(p, info)


@pytest.mark.parametrize("kw", [dict(metadata=None), dict(imagej=True), dict(compression="zlib")],
                         ids=["plain_pages", "imagej", "zlib_pages"])
def test_truncated_stack_is_refused_not_read_as_fewer_frames(tmp_path, frames, kw):
    p = tmp_path / "stack.tif"
    tifffile.imwrite(p, frames, photometric=None if kw.get("imagej") else "minisblack", **kw)
    with pytest.raises(RingidError, match="unreadable or truncated TIFF") as info:
        load_image(_truncated(p, 0.7))
    assert_one_line_error(p, info)


def _broken_mrc(path, reference, case):
    mrcfile.new(path, reference).close()
    raw = path.read_bytes()
    if case == "truncated":
        path.write_bytes(raw[: len(raw) - 1000])
    elif case == "header_cut":
        path.write_bytes(raw[:500])
    elif case == "bad_mode":
        path.write_bytes(raw[:12] + (99).to_bytes(4, "little") + raw[16:])
    elif case == "not_mrc":
        path.write_bytes(b"pixel data exported as text\n" * 100)
    return path


@pytest.mark.parametrize("case,message", [
    ("truncated", "truncated MRC file: the header describes"),
    ("header_cut", "unreadable or broken MRC file"),
    ("bad_mode", "unreadable or broken MRC file (ValueError: Unrecognised mode '99')"),
    ("not_mrc", "unreadable or broken MRC file (ValueError: Map ID string not found"),
])
def test_broken_mrc_is_a_one_line_error(tmp_path, reference, case, message):
    p = _broken_mrc(tmp_path / f"{case}.mrc", reference, case)
    with pytest.raises(RingidError) as info:
        load_image(p)
    assert message in str(info.value)
    assert_one_line_error(p, info)


# --------------------------------------------------------------------------- the frame option


@pytest.fixture(scope="module")
def calibration(tmp_path_factory):
    from ringid.jobs.measure import make_calibration
    from ringid.jobs.sheets import CalibrationRow

    path = tmp_path_factory.mktemp("cal") / "known.json"
    row = CalibrationRow("known", "constant", 200.0, camera_constant_A_px=K_A_PX)
    assert make_calibration(row, path).status == "ok"
    return path


def test_measure_and_batch_measure_take_a_frame(tmp_path, frames, calibration, capsys):
    from ringid.cli import main

    stack = tmp_path / "stack.mrcs"
    mrcfile.new(stack, frames).close()
    out = tmp_path / "one"
    assert main(["measure", str(stack), "--calibration", str(calibration), "-o", str(out), "--frame", "1"]) == 0
    rec = json.loads((out / "sample.json").read_text(encoding="utf-8"))
    assert rec["status"] == "ok" and "used frame 1 of 3" in rec["notes"]
    out = tmp_path / "summed"
    main(["measure", str(stack), "--calibration", str(calibration), "-o", str(out)])
    assert "summed 3 frames" in json.loads((out / "sample.json").read_text(encoding="utf-8"))["notes"]
    manifest = tmp_path / "batch.csv"
    manifest.write_text(f"sample,image,calibration\ns1,{stack},known\n", encoding="utf-8")
    samples = tmp_path / "samples"
    assert main(["batch", "measure", str(manifest), "--calibrations-dir", str(calibration.parent), "-o",
                 str(samples), "--frame", "5"]) == 0
    rec = json.loads((samples / "s1" / "sample.json").read_text(encoding="utf-8"))
    assert rec["status"] == "failed" and rec["error"] == f"{stack}: frame 5 requested but the file has 3 frames"
    capsys.readouterr()
