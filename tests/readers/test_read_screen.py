"""Screen image reader: PNG/TIFF/.npy pixels, sidecar fields, dark frames and refusals.

Pixel references are the analytic arrays the sample files were written from
(recomputed here), and files written in the test by tifffile, Pillow and numpy.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import tifffile
from PIL import Image

from diagnostics.errors import InputError
from diagnostics.readers import screen
from diagnostics.readers.screen import read_frame

SIDECAR = {"device": "SCR-01", "timestamp": "2026-11-30T10:00:00Z", "pixel_size_m": 2e-5}


def _spot() -> np.ndarray:
    """The Gaussian spot of the committed SCR-02 sample (same formula that wrote it)."""
    yy, xx = np.mgrid[0:24, 0:32]
    return 40 + 3000 * np.exp(-0.5 * (((xx - 15.5) / 4) ** 2 + ((yy - 11) / 3) ** 2))


@pytest.fixture
def image(tmp_path):
    """``image(name, pixels, **sidecar_fields) -> Path`` written with its sidecar."""

    def _image(name, pixels, sidecar=None, **fields):
        path = tmp_path / name
        suffix = path.suffix
        if suffix == ".png":
            Image.fromarray(pixels).save(path)
        elif suffix in (".tif", ".tiff"):
            tifffile.imwrite(path, pixels)
        else:
            np.save(path, pixels)
        meta = dict(SIDECAR if sidecar is None else sidecar, **fields)
        path.with_suffix(".json").write_text(json.dumps(meta))
        return path

    return _image


def test_16bit_png_with_dark_roi_and_bit_depth(good):
    frame = read_frame(good / "SCR-02_101500.png")
    expected = np.round(_spot()).astype(np.uint16)
    assert frame.pixels.dtype == np.uint16
    np.testing.assert_array_equal(frame.pixels, expected)
    np.testing.assert_array_equal(frame.dark, np.full((24, 32), 40, np.uint16))
    assert frame.device == "SCR-02"
    assert frame.timestamp == pd.Timestamp("2026-11-30T10:15:00Z")
    assert frame.pixel_size_m == (2.5e-5, 2.4e-5)
    assert frame.bit_depth == 12 and frame.roi == (2, 1, 30, 23)
    assert frame.metadata == {"exposure_s": 0.002}
    assert frame.source == str(good / "SCR-02_101500.png")


def test_load_dark_false_keeps_the_name_only(good):
    frame = read_frame(good / "SCR-02_101500.png", load_dark=False)
    assert frame.dark is None and frame.metadata["dark"] == "dark_SCR-02.png"


def test_8bit_png_scalar_pixel_size_epoch_time(good):
    frame = read_frame(good / "SCR-01_8bit.png")
    assert frame.pixels.dtype == np.uint8
    np.testing.assert_array_equal(frame.pixels, (np.round(_spot()).astype(np.uint16) // 16).astype(np.uint8))
    assert frame.pixel_size_m == (3e-5, 3e-5) and frame.bit_depth is None and frame.dark is None
    assert frame.timestamp == pd.Timestamp(1764497700, unit="s", tz="UTC")


def test_big_endian_tiff_becomes_native_with_same_values(good):
    frame = read_frame(good / "SCR-03_bigendian.tif")
    assert frame.pixels.dtype == np.dtype("=u2") and frame.pixels.dtype.isnative
    np.testing.assert_array_equal(frame.pixels, np.round(_spot()).astype(np.uint16))
    assert frame.timestamp == pd.Timestamp("2026-11-30T09:15:00Z")  # +02:00 offset


def test_float_npy(good):
    frame = read_frame(good / "SCR-03_float.npy")
    assert frame.pixels.dtype == np.float32
    np.testing.assert_array_equal(frame.pixels, (_spot() / 3000).astype(np.float32))


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16, ">u2", np.int16, np.uint32, np.float64, ">f4"])
def test_npy_and_tiff_round_trip_bit_identical(image, dtype):
    """Values written by numpy and by tifffile come back unchanged, in native byte order."""
    rng = np.random.default_rng(7)
    pixels = rng.integers(0, 200, size=(5, 7)).astype(dtype)
    for name in ("a.npy", "a.tif"):
        frame = read_frame(image(name, pixels))
        assert frame.pixels.dtype.isnative and frame.pixels.dtype == np.dtype(dtype).newbyteorder("=")
        np.testing.assert_array_equal(frame.pixels, pixels)


def test_fortran_order_npy(tmp_path, image):
    pixels = np.asfortranarray(np.arange(12, dtype=np.uint16).reshape(3, 4))
    np.testing.assert_array_equal(read_frame(image("f.npy", pixels)).pixels, pixels)


@pytest.mark.parametrize(
    ("name", "pattern"),
    [
        ("not_a_png.png", r"not_a_png\.png: not a PNG file"),
        ("truncated.png", r"truncated\.png: cannot decode PNG"),
        ("no_sidecar.png", r"no_sidecar\.png: sidecar 'no_sidecar\.json' not found"),
        ("bad_json.png", r"bad_json\.json: invalid JSON at line 1 column 58"),
        ("no_pixel_size.png", r"no_pixel_size\.json: field 'pixel_size_m' missing \(did you mean 'pixel_size'\?\)"),
        ("dark_shape.png", r"dark_shape\.json: field 'dark': dark frame 'dark_small\.png' has shape \(10, 10\), "
                           r"image has \(24, 32\)"),
    ],
)
def test_broken_image_files(broken, name, pattern):
    with pytest.raises(InputError, match=pattern) as info:
        read_frame(broken / name)
    assert "\n" not in str(info.value)


@pytest.mark.parametrize(
    ("fields", "pattern"),
    [
        ({"bit_depth": 8}, r"pixel \(x=3, y=0\) = 300 lies outside 0\.\.255 of bit_depth 8"),
        ({"bit_depth": 0}, r"field 'bit_depth': expected an integer >= 1 and <= 32, found 0"),
        ({"bit_depth": 12.0}, r"field 'bit_depth': expected an integer, found 12\.0"),
        ({"roi": [0, 0, 9, 4]}, r"field 'roi': \[0, 0, 9, 4\] is not inside the 8 x 4 image"),
        ({"roi": [2, 2, 2, 3]}, r"is not inside"),
        ({"roi": [0, 0, 4]}, r"field 'roi': expected \[x_min, y_min, x_max, y_max\]"),
        ({"roi": [0, -1, 4, 4]}, r"field 'roi\[1\]': expected an integer >= 0"),
        ({"pixel_size_m": -1e-5}, r"field 'pixel_size_m': expected a number > 0"),
        ({"pixel_size_m": [1e-5]}, r"expected one number or \[x, y\], found 1 values"),
        ({"pixel_size_m": [1e-5, "2e-5"]}, r"field 'pixel_size_m\[1\]': expected a number"),
        ({"timestamp": "2026-11-30T10:00:00"}, r"field 'timestamp': '2026-11-30T10:00:00' has no time zone"),
        ({"device": ""}, r"field 'device' is '': expected the screen name"),
        ({"dark": "../outside.png"}, r"field 'dark': '\.\./outside\.png' leaves the folder"),
        ({"dark": "/etc/passwd"}, r"field 'dark': '/etc/passwd' is an absolute path"),
        ({"dark": "missing.png"}, r"field 'dark': dark frame 'missing\.png' not found"),
    ],
)
def test_sidecar_mistakes(image, fields, pattern):
    pixels = (np.arange(32).reshape(4, 8) * 100).astype(np.uint16)
    with pytest.raises(InputError, match=pattern) as info:
        read_frame(image("a.png", pixels, **fields))
    assert "\n" not in str(info.value)


def test_sidecar_without_device_and_not_an_object(image, tmp_path):
    pixels = np.zeros((2, 2), np.uint8)
    sidecar = {k: v for k, v in SIDECAR.items() if k != "device"}
    with pytest.raises(InputError, match=r"field 'device' missing"):
        read_frame(image("a.png", pixels, sidecar=sidecar))
    path = image("b.png", pixels)
    path.with_suffix(".json").write_text("[1, 2]")
    with pytest.raises(InputError, match=r"b\.json: expected a JSON object"):
        read_frame(path)
    path.with_suffix(".json").write_text('{"device": "S", "timestamp": NaN, "pixel_size_m": 1}')
    with pytest.raises(InputError, match=r"NaN is not valid JSON"):
        read_frame(path)


def test_dark_above_bit_depth_is_named(image, tmp_path):
    Image.fromarray(np.full((4, 8), 5000, np.uint16)).save(tmp_path / "dark.png")
    with pytest.raises(InputError, match=r"dark\.png: pixel \(x=0, y=0\) = 5000 lies outside 0\.\.4095"):
        read_frame(image("a.png", np.zeros((4, 8), np.uint16), bit_depth=12, dark="dark.png"))


def test_dark_symlink_leaving_the_folder_is_refused(image, tmp_path):
    outside = tmp_path.parent / f"{tmp_path.name}_outside.png"
    Image.fromarray(np.zeros((4, 8), np.uint16)).save(outside)
    (tmp_path / "link.png").symlink_to(outside)
    with pytest.raises(InputError, match=r"'link\.png' leaves the folder"):
        read_frame(image("a.png", np.zeros((4, 8), np.uint16), dark="link.png"))


def test_colour_png_multipage_tiff_and_3d_npy_are_refused(image, tmp_path):
    rgb = np.zeros((4, 4, 3), np.uint8)
    with pytest.raises(InputError, match=r"PNG mode 'RGB' is not grayscale"):
        read_frame(image("rgb.png", rgb))
    with pytest.raises(InputError, match=r"TIFF holds .* \(expected one 2-D grayscale image\)"):
        read_frame(image("rgb.tif", rgb))
    with pytest.raises(InputError, match=r"image has shape \(2, 3, 4\)"):
        read_frame(image("cube.npy", np.zeros((2, 3, 4), np.uint16)))
    with pytest.raises(InputError, match=r"pixel type bool not supported"):
        read_frame(image("mask.npy", np.zeros((2, 3), bool)))
    with pytest.raises(InputError, match=r"pixel type complex128 not supported"):
        read_frame(image("c.npy", np.zeros((2, 3), complex)))


def test_npy_with_objects_is_never_unpickled(tmp_path, image):
    path = image("o.npy", np.zeros((2, 2), np.uint8))
    np.save(path, np.array([[{"a": 1}, None]], dtype=object), allow_pickle=True)
    with pytest.raises(InputError, match=r"holds Python objects \(expected numbers; pickles are never loaded\)"):
        read_frame(path)


def test_truncated_npy_and_tiff(image):
    for name in ("t.npy", "t.tif"):
        path = image(name, np.arange(400, dtype=np.uint16).reshape(20, 20))
        path.write_bytes(path.read_bytes()[:-300])
        with pytest.raises(InputError) as info:
            read_frame(path)
        assert info.match(r"truncated|cannot decode") and "\n" not in str(info.value)


def test_nan_pixels_are_refused(image):
    pixels = np.zeros((3, 4), np.float32)
    pixels[2, 1] = np.nan
    with pytest.raises(InputError, match=r"pixel \(x=1, y=2\) is nan"):
        read_frame(image("n.npy", pixels))


def test_suffix_and_content_must_agree(image, tmp_path):
    png = image("a.png", np.zeros((2, 2), np.uint8))
    as_tif = tmp_path / "a2.tif"
    as_tif.write_bytes(png.read_bytes())
    as_tif.with_suffix(".json").write_text(json.dumps(SIDECAR))
    with pytest.raises(InputError, match=r"not a TIFF file"):
        read_frame(as_tif)
    with pytest.raises(InputError, match=r"unknown image type '\.jpg'"):
        read_frame(tmp_path / "a.jpg")


def test_decompression_bomb_guard_refuses_before_decoding(image, monkeypatch):
    """The pixel limit is checked from the header, before any pixel is decoded."""
    monkeypatch.setattr(screen, "MAX_PIXELS", 100)
    for name in ("big.png", "big.tif", "big.npy"):
        with pytest.raises(InputError, match=r"image of 121 pixels exceeds the limit of 100"):
            read_frame(image(name, np.zeros((11, 11), np.uint16)))
    frame = read_frame(image("ok.png", np.zeros((10, 10), np.uint16)))
    assert frame.pixels.shape == (10, 10)


def test_pillow_bomb_check_does_not_warn_for_large_real_images(image, monkeypatch):
    """Above Pillow's own MAX_IMAGE_PIXELS our limit rules, without a warning (warnings are errors here)."""
    monkeypatch.setattr(Image, "MAX_IMAGE_PIXELS", 50)
    frame = read_frame(image("a.png", np.zeros((10, 10), np.uint16)))
    assert frame.pixels.shape == (10, 10)
