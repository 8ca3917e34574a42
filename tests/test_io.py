"""Image loading: formats, bit depths, colour, stacks, dark/flat, and every guard."""

from __future__ import annotations

import io
import struct
import zipfile
import zlib

import numpy as np
import pytest
import tifffile
from numpy.testing import assert_allclose, assert_array_equal
from PIL import Image

from analysis.errors import ImageError
from analysis.io import LoadedImage, iter_frames, load_image, to_luminance


def _ramp(dtype=np.uint16, shape=(40, 60), top=4000):
    y, x = np.mgrid[: shape[0], : shape[1]]
    return ((x + 3 * y) * top // (shape[1] + 3 * shape[0])).astype(dtype)


# --------------------------------------------------------------------------- formats


@pytest.mark.parametrize("fmt", ["PNG", "BMP", "TIFF"])
def test_8bit_grey_round_trip_exact(tmp_path, fmt):
    a = _ramp(np.uint8, top=250)
    p = tmp_path / f"frame.{fmt.lower()}"
    Image.fromarray(a).save(p, format=fmt)
    im = load_image(p)
    assert isinstance(im, LoadedImage)
    assert_array_equal(im.data, a.astype(float))
    assert im.bit_depth == 8 and im.saturation_level == 255.0 and im.dtype_name == "uint8"
    assert im.source_name == p.name


def test_16bit_png_keeps_full_range(tmp_path):
    a = _ramp(np.uint16, top=60000)
    p = tmp_path / "deep.png"
    Image.fromarray(a).save(p)
    im = load_image(p)
    assert_array_equal(im.data, a.astype(float))
    assert im.bit_depth == 16 and im.saturation_level == 65535.0


@pytest.mark.parametrize("dtype", [np.uint16, np.float32])
def test_tiff_16bit_and_float(tmp_path, dtype):
    a = _ramp(np.uint16, top=50000).astype(dtype) * (0.5 if dtype == np.float32 else 1)
    p = tmp_path / "cam.tif"
    tifffile.imwrite(p, a)
    im = load_image(p)
    assert_array_equal(im.data, a.astype(float))
    assert im.bit_depth == (16 if dtype == np.uint16 else None)
    assert im.saturation_level == (65535.0 if dtype == np.uint16 else None)


def test_jpeg_from_upload_bytes_is_close():
    a = _ramp(np.uint8, top=200)
    buf = io.BytesIO()
    Image.fromarray(a).save(buf, format="JPEG", quality=95)
    im = load_image(buf.getvalue())
    assert im.source_name == "<bytes>" and im.data.shape == a.shape
    # JPEG is lossy; at quality 95 a smooth ramp stays within a few counts (common practice)
    assert np.abs(im.data - a).max() <= 4


def test_colour_is_converted_to_bt601_luminance(tmp_path):
    rgb = np.zeros((10, 12, 3), np.uint8)
    rgb[..., 0], rgb[..., 1], rgb[..., 2] = 200, 100, 50
    rgb[0, 0] = (0, 0, 0)
    p = tmp_path / "colour.png"
    Image.fromarray(rgb).save(p)
    # ITU-R BT.601 luma: Y = 0.299 R + 0.587 G + 0.114 B
    assert_allclose(load_image(p).data[5, 5], 0.299 * 200 + 0.587 * 100 + 0.114 * 50)
    assert_allclose(to_luminance(np.dstack([rgb, np.full((10, 12), 255, np.uint8)]))[5, 5], 124.2)


def test_dark_and_flat_correction():
    rng = np.random.default_rng(3)
    truth = rng.uniform(100, 200, (30, 40))
    dark = rng.uniform(5, 10, (30, 40))
    gain = rng.uniform(0.8, 1.2, (30, 40))
    raw = truth * gain + dark
    flat = 1000.0 * gain + dark
    im = load_image(raw, dark=dark, flat=flat)
    # (raw − dark) / ((flat − dark) / median) = truth · median(1000 gain)
    assert_allclose(im.data, truth * np.median(1000 * gain) / 1000.0, rtol=1e-12)


def test_saturation_level_dropped_after_dark_subtraction():
    raw = _ramp(np.uint16, top=60000)
    assert load_image(raw).saturation_level == 65535.0
    # after a per-pixel dark subtraction full scale is no longer one number
    assert load_image(raw, dark=np.full(raw.shape, 100.0)).saturation_level is None


def test_multipage_tiff_stack_streams_frames(tmp_path):
    stack = np.stack([_ramp(np.uint16, top=1000 * (i + 1)) for i in range(4)])
    p = tmp_path / "series.tif"
    tifffile.imwrite(p, stack, photometric="minisblack")
    frames = list(iter_frames(p))
    assert [n for n, _ in frames] == [f"series.tif#{i}" for i in range(4)]
    for (_, f), s in zip(frames, stack):
        assert_array_equal(f, s.astype(float))
    first = load_image(p)
    assert first.n_frames == 4 and first.source_name == "series.tif"
    assert_array_equal(first.data, stack[0].astype(float))


def test_iter_frames_can_keep_integer_frames_in_their_type(tmp_path):
    """as_float=False: grey integer pages come as stored (same values), colour pages still
    as float64 luminance, and a constant integer page is still refused as empty."""
    grey = np.stack([_ramp(np.uint16, top=4000), _ramp(np.uint16, top=60000)])
    path = tmp_path / "stack.tif"
    tifffile.imwrite(path, grey, photometric="minisblack")
    got = list(iter_frames(path, as_float=False))
    assert [f.dtype for _, f in got] == [np.uint16, np.uint16]
    assert_array_equal(got[1][1], grey[1])
    as_float = list(iter_frames(path))
    assert as_float[1][1].dtype == np.float64
    assert_array_equal(as_float[1][1], got[1][1].astype(np.float64))
    rgb = np.zeros((20, 30, 3), dtype=np.uint8)
    rgb[..., 1] = _ramp(np.uint8, shape=(20, 30), top=200)
    Image.fromarray(rgb).save(tmp_path / "colour.png")
    (_, frame), = iter_frames(tmp_path / "colour.png", as_float=False)
    assert frame.dtype == np.float64 and frame.max() > 0
    tifffile.imwrite(tmp_path / "flat.tif", np.full((2, 8, 8), 7, dtype=np.uint16), photometric="minisblack")
    with pytest.raises(ImageError, match="empty"):
        list(iter_frames(tmp_path / "flat.tif", as_float=False))


def test_iter_frames_folder_and_zip_in_natural_order(tmp_path):
    folder = tmp_path / "run"
    folder.mkdir()
    names = ["e_10.png", "e_2.png", "e_100.png"]
    for i, n in enumerate(names):
        Image.fromarray(_ramp(np.uint8, top=50 + 50 * i)).save(folder / n)
    (folder / "notes.txt").write_text("energies in eV")
    got = [n for n, _ in iter_frames(folder)]
    assert got == ["e_2.png", "e_10.png", "e_100.png"]
    zpath = tmp_path / "run.zip"
    with zipfile.ZipFile(zpath, "w") as zf:
        for n in names:
            zf.write(folder / n, f"run/{n}")
        zf.writestr("run/readme.md", "text")
    zframes = list(iter_frames(zpath))
    assert [n for n, _ in zframes] == ["e_2.png", "e_10.png", "e_100.png"]
    assert_array_equal(zframes[1][1], _ramp(np.uint8, top=50).astype(float))
    assert [n for n, _ in iter_frames(zpath.read_bytes())] == got


# --------------------------------------------------------------------------- guards


def test_not_an_image(tmp_path):
    p = tmp_path / "notes.txt"
    p.write_text("this is a lab notebook, not a picture\n" * 20)
    with pytest.raises(ImageError, match="notes.txt: not an image"):
        load_image(p)
    with pytest.raises(ImageError, match="<bytes>: not an image"):
        load_image(b"GIF? no, plain words")


def test_missing_and_empty_files(tmp_path):
    with pytest.raises(ImageError, match="file not found"):
        load_image(tmp_path / "nothing.png")
    (tmp_path / "zero.png").write_bytes(b"")
    with pytest.raises(ImageError, match="file is empty"):
        load_image(tmp_path / "zero.png")
    with pytest.raises(ImageError, match="must be a path, bytes or an array"):
        load_image(3.5)


def test_truncated_png(tmp_path):
    buf = io.BytesIO()
    Image.fromarray(np.random.default_rng(0).integers(0, 255, (200, 200), np.uint8)).save(buf, format="PNG")
    p = tmp_path / "cut.png"
    p.write_bytes(buf.getvalue()[: len(buf.getvalue()) // 2])
    with pytest.raises(ImageError, match="cut.png: truncated or corrupt"):
        load_image(p)


def test_truncated_tiff(tmp_path):
    buf = io.BytesIO()
    tifffile.imwrite(buf, np.random.default_rng(0).integers(0, 60000, (300, 300), np.uint16))
    p = tmp_path / "cut.tif"
    p.write_bytes(buf.getvalue()[:5000])
    with pytest.raises(ImageError, match="cut.tif: truncated or corrupt"):
        load_image(p)


def test_all_constant_images(tmp_path):
    p = tmp_path / "black.png"
    Image.fromarray(np.zeros((50, 50), np.uint8)).save(p)
    with pytest.raises(ImageError, match="black.png: the image is empty"):
        load_image(p)
    with pytest.raises(ImageError, match="every pixel is NaN"):
        load_image(np.full((4, 4), np.nan))


def _png_header_only(width: int, height: int) -> bytes:
    """A PNG whose IHDR claims width × height but holds a tiny IDAT."""
    def chunk(kind: bytes, data: bytes) -> bytes:
        return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))
    ihdr = struct.pack(">IIBBBBB", width, height, 8, 0, 0, 0, 0)
    return b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", zlib.compress(b"\x00" * 10)) + \
        chunk(b"IEND", b"")


def test_decompression_bomb_header(tmp_path):
    p = tmp_path / "bomb.png"
    p.write_bytes(_png_header_only(20000, 20000))  # 400 megapixels claimed
    with pytest.raises(ImageError, match="bomb.png: .*(megapixel|decompression bomb)"):
        load_image(p)
    with pytest.raises(ImageError, match=r"12\.0 megapixels is more than the 10-megapixel limit"):
        load_image(_png_header_only(4000, 3000), max_pixels=10_000_000)


def test_too_many_bytes(tmp_path):
    p = tmp_path / "huge.tif"
    tifffile.imwrite(p, _ramp(np.uint16, shape=(100, 100)))
    with pytest.raises(ImageError, match=r"huge.tif: 0 MB is more than the 0 MB limit"):
        load_image(p, max_bytes=1000)
    with pytest.raises(ImageError, match="more than the"):
        load_image(b"\x00" * 2000, max_bytes=1000)


def test_not_2d():
    with pytest.raises(ImageError, match=r"not a 2-D image \(array shape \(2, 3, 4, 5\)\)"):
        load_image(np.ones((2, 3, 4, 5)))
    with pytest.raises(ImageError, match="not a 2-D image"):
        load_image(np.arange(10.0))


def test_dark_frame_of_wrong_size():
    with pytest.raises(ImageError, match="dark frame is 5×4 px but the image is 6×5 px"):
        load_image(np.arange(30.0).reshape(5, 6), dark=np.zeros((4, 5)))
    with pytest.raises(ImageError, match="flat field is zero or negative"):
        load_image(np.arange(30.0).reshape(5, 6), flat=np.zeros((5, 6)))


def test_folder_and_zip_without_images(tmp_path):
    (tmp_path / "a.txt").write_text("x")
    with pytest.raises(ImageError, match="holds no image files"):
        list(iter_frames(tmp_path))
    z = tmp_path / "b.zip"
    with zipfile.ZipFile(z, "w") as zf:
        zf.writestr("x.txt", "x")
    with pytest.raises(ImageError, match="b.zip: the zip file holds no image files"):
        list(iter_frames(z))
    with pytest.raises(ImageError, match="is a folder"):
        load_image(tmp_path)


def test_bad_frame_inside_stack_names_the_member(tmp_path):
    z = tmp_path / "c.zip"
    with zipfile.ZipFile(z, "w") as zf:
        buf = io.BytesIO()
        Image.fromarray(_ramp(np.uint8)).save(buf, format="PNG")
        zf.writestr("f1.png", buf.getvalue())
        zf.writestr("f2.png", b"not really a png")
    it = iter_frames(z)
    assert next(it)[0] == "f1.png"
    with pytest.raises(ImageError, match="f2.png: not an image"):
        next(it)
