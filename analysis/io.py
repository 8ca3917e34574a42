"""Reading camera images: the only module of the core that opens image files.

PNG, JPEG, BMP (through Pillow) and TIFF (through tifffile; 8/16/32-bit
integers and 32/64-bit floats, multi-page stacks). Colour is converted to
luminance with the ITU-R BT.601 weights (0.299, 0.587, 0.114). Every failure a
user can cause (not an image, truncated, all-constant, too many pixels, too many
bytes, not 2-D, a dark or flat frame of the wrong size) raises
:class:`analysis.errors.ImageError` with a one-line message.

Arrays are (row, col) = (y, x); the centre of the top-left pixel is (0, 0).
"""

from __future__ import annotations

import io as _stdio
import os
import re
import warnings
import zipfile
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .errors import ImageError

__all__ = [
    "LoadedImage",
    "load_image",
    "iter_frames",
    "to_luminance",
    "MAX_PIXELS",
    "MAX_BYTES",
    "IMAGE_SUFFIXES",
]

MAX_PIXELS = 64_000_000
MAX_BYTES = 200_000_000
IMAGE_SUFFIXES = (".png", ".jpg", ".jpeg", ".bmp", ".tif", ".tiff")
_LUMA = np.array([0.299, 0.587, 0.114])  # ITU-R BT.601 luma weights


@dataclass(frozen=True, eq=False)
class LoadedImage:
    """One camera frame as read from disk.

    Attributes
    ----------
    data : (M, N) ndarray of float64
        Pixel values in the file's own units (ADU), after the optional dark
        subtraction and flat division; read-only.
    dtype_name : str
        NumPy dtype of the stored pixels (``"uint8"``, ``"uint16"``, ``"float32"``...).
    bit_depth : int or None
        Bits per stored sample for integer data; None for floating point.
    source_name : str
        File name (or ``"<bytes>"``, ``"<array>"``, ``"stack.tif#3"``...).
    saturation_level : float or None
        Full-scale value of the stored integers (2**bit_depth − 1); None for
        floating-point data and after a dark/flat correction.
    n_frames : int
        Number of frames in the source (the first one is `data`).
    """

    data: np.ndarray
    dtype_name: str
    bit_depth: int | None
    source_name: str
    saturation_level: float | None = None
    n_frames: int = 1

    @property
    def shape(self) -> tuple[int, int]:
        return self.data.shape  # type: ignore[return-value]


# --------------------------------------------------------------------------- helpers


def _natural_key(name: str):
    return [int(t) if t.isdigit() else t.lower() for t in re.split(r"(\d+)", name)]


def to_luminance(arr: np.ndarray, *, name: str = "image") -> np.ndarray:
    """Convert a grey, grey+alpha, RGB or RGBA array to a 2-D float64 luminance.

    Parameters
    ----------
    arr : (M, N) or (M, N, C) ndarray, C in 1..4
        The pixels; alpha is dropped, colour weighted by the ITU-R BT.601 luma weights.
    name : str, keyword-only
        Used in the error message.

    Returns
    -------
    (M, N) ndarray of float64
        The luminance.

    Examples
    --------
    >>> rgb = np.zeros((2, 3, 3)); rgb[..., 1] = 100.0
    >>> print(round(float(to_luminance(rgb)[0, 0]), 6))
    58.7
    """
    a = np.asarray(arr)
    if a.dtype == bool:
        a = a.astype(np.uint8)
    if not (np.issubdtype(a.dtype, np.integer) or np.issubdtype(a.dtype, np.floating)):
        raise ImageError(f"{name}: pixel type {a.dtype} is not a number type.")
    if a.ndim == 3 and a.shape[2] in (1, 2):
        a = a[..., 0]
    elif a.ndim == 3 and a.shape[2] in (3, 4):
        a = a[..., :3].astype(np.float64) @ _LUMA
    if a.ndim != 2:
        raise ImageError(f"{name}: not a 2-D image (array shape {tuple(np.shape(arr))}).")
    if min(a.shape) < 2:
        raise ImageError(f"{name}: the image is too small ({a.shape[1]}×{a.shape[0]} px); the smallest "
                         f"accepted size is 2×2 px.")
    return np.asarray(a, dtype=np.float64)


def _check_pixels(rows: int, cols: int, max_pixels: int, name: str) -> None:
    n = int(rows) * int(cols)
    if n > max_pixels:
        raise ImageError(f"{name}: {cols}×{rows} = {n / 1e6:.1f} megapixels is more than the "
                         f"{max_pixels / 1e6:.0f}-megapixel limit (or a decompression bomb).")


def _finalise(a: np.ndarray, name: str, as_float: bool = True) -> np.ndarray:
    if not as_float:
        raw = np.asarray(a)
        if raw.ndim == 3 and raw.shape[2] in (1, 2):
            raw = raw[..., 0]
        if raw.ndim == 2 and min(raw.shape) >= 2 and np.issubdtype(raw.dtype, np.integer) and raw.dtype != bool:
            # an integer grey frame is always finite; the type's own values are kept
            if raw.max() == raw.min():
                raise ImageError(f"{name}: the image is empty (every pixel has the same value).")
            return raw
    a = to_luminance(a, name=name)
    finite = np.isfinite(a)
    if not finite.all():
        if not finite.any():
            raise ImageError(f"{name}: every pixel is NaN or infinite.")
        a = np.where(finite, a, np.min(a[finite]))
    if a.size == 0 or float(a.max()) == float(a.min()):
        raise ImageError(f"{name}: the image is empty (every pixel has the same value).")
    return a


def _bit_depth(dtype: np.dtype) -> int | None:
    dtype = np.dtype(dtype)
    if np.issubdtype(dtype, np.integer) or dtype == bool:
        return 1 if dtype == bool else dtype.itemsize * 8
    return None


def _is_tiff(head: bytes) -> bool:
    return head[:4] in (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+")


def _read_source(source, max_bytes: int) -> tuple[bytes | None, str | None, str]:
    """(raw bytes or None, path or None, display name). Size guard applied."""
    if isinstance(source, (bytes, bytearray, memoryview)):
        raw = bytes(source)
        if len(raw) > max_bytes:
            raise ImageError(f"<bytes>: {len(raw) / 1e6:.0f} MB is more than the {max_bytes / 1e6:.0f} MB limit.")
        return raw, None, "<bytes>"
    if isinstance(source, (str, os.PathLike)):
        p = Path(source)
        if not p.exists():
            raise ImageError(f"{p.name}: file not found ({p}).")
        if p.is_dir():
            raise ImageError(f"{p.name}: is a folder, not an image file (use iter_frames for folders).")
        size = p.stat().st_size
        if size > max_bytes:
            raise ImageError(f"{p.name}: {size / 1e6:.0f} MB is more than the {max_bytes / 1e6:.0f} MB limit.")
        if size == 0:
            raise ImageError(f"{p.name}: the file is empty (0 bytes), not an image.")
        return None, str(p), p.name
    raise ImageError(f"Image source must be a path, bytes or an array, got {type(source).__name__}.")


def _head(raw: bytes | None, path: str | None) -> bytes:
    if raw is not None:
        return raw[:8]
    with open(path, "rb") as fh:
        return fh.read(8)


def _tiff_pages(raw: bytes | None, path: str | None, name: str, max_pixels: int,
                first_only: bool = False) -> Iterator[tuple[str, np.ndarray, np.dtype, int]]:
    """Yield (name, array, stored dtype, n_pages) page by page."""
    import tifffile

    try:
        tif = tifffile.TiffFile(_stdio.BytesIO(raw) if raw is not None else path)
    except Exception as exc:  # tifffile raises several types for damaged headers
        raise ImageError(f"{name}: truncated or corrupt TIFF file ({type(exc).__name__}).") from None
    with tif:
        pages = tif.pages
        n = len(pages)
        if n == 0:
            raise ImageError(f"{name}: the TIFF file holds no image.")
        for i in range(n):
            try:
                page = pages[i]
                shape, axes = page.shape, page.axes
            except Exception as exc:
                raise ImageError(f"{name}: truncated or corrupt TIFF page {i} ({type(exc).__name__}).") from None
            yx = [s for s, ax in zip(shape, axes) if ax in "YX"]
            if len(yx) == 2:
                _check_pixels(yx[0], yx[1], max_pixels, name)
            try:
                arr = page.asarray()
            except Exception as exc:
                raise ImageError(f"{name}: truncated or corrupt TIFF data on page {i} "
                                 f"({type(exc).__name__}).") from None
            if arr.ndim == 3 and axes[0] == "S" and arr.shape[0] in (1, 2, 3, 4):
                arr = np.moveaxis(arr, 0, -1)  # planar colour -> samples last
            fname = name if n == 1 else f"{name}#{i}"
            yield fname, arr, page.dtype, n
            if first_only:
                return


def _pillow_image(raw: bytes | None, path: str | None, name: str, max_pixels: int):
    from PIL import Image

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error", Image.DecompressionBombWarning)
            im = Image.open(_stdio.BytesIO(raw) if raw is not None else path)
    except Image.DecompressionBombError:
        raise ImageError(f"{name}: too many pixels for the limit (a decompression bomb?).") from None
    except Image.DecompressionBombWarning:
        raise ImageError(f"{name}: too many pixels for the limit (a decompression bomb?).") from None
    except Image.UnidentifiedImageError:
        raise ImageError(f"{name}: not an image (PNG, JPEG, BMP or TIFF expected).") from None
    except (OSError, ValueError, SyntaxError) as exc:
        raise ImageError(f"{name}: truncated or corrupt image file ({exc}).") from None
    cols, rows = im.size
    _check_pixels(rows, cols, max_pixels, name)
    return im


def _pillow_frames(raw: bytes | None, path: str | None, name: str, max_pixels: int,
                   first_only: bool = False) -> Iterator[tuple[str, np.ndarray, np.dtype, int]]:
    from PIL import Image, ImageSequence

    im = _pillow_image(raw, path, name, max_pixels)
    n = int(getattr(im, "n_frames", 1))
    try:
        for i, frame in enumerate(ImageSequence.Iterator(im)):
            arr, dtype = _pillow_to_array(frame, name)
            yield (name if n == 1 else f"{name}#{i}"), arr, dtype, n
            if first_only:
                return
    except (OSError, ValueError, SyntaxError, Image.DecompressionBombError) as exc:
        raise ImageError(f"{name}: truncated or corrupt image file ({exc}).") from None
    finally:
        im.close()


def _pillow_to_array(im, name: str) -> tuple[np.ndarray, np.dtype]:
    mode = im.mode
    im.load()  # raises OSError on truncated data
    if mode == "P" or mode == "PA":
        im = im.convert("RGBA" if "transparency" in im.info or mode == "PA" else "RGB")
        mode = im.mode
    if mode == "1":
        return np.asarray(im, dtype=np.uint8), np.dtype(bool)
    if mode.startswith("I;16"):
        arr = np.asarray(im).astype(np.uint16)
        return arr, np.dtype(np.uint16)
    if mode == "I":
        arr = np.asarray(im)
        if arr.size and arr.min() >= 0 and arr.max() <= 65535:  # 16-bit PNGs open as mode I
            return arr.astype(np.uint16), np.dtype(np.uint16)
        return arr, np.dtype(np.int32)
    if mode == "F":
        return np.asarray(im, dtype=np.float32), np.dtype(np.float32)
    if mode in ("L", "LA", "RGB", "RGBA"):
        return np.asarray(im), np.dtype(np.uint8)
    if mode in ("CMYK", "YCbCr", "LAB", "HSV"):
        return np.asarray(im.convert("RGB")), np.dtype(np.uint8)
    raise ImageError(f"{name}: unsupported pixel mode {mode!r}.")


def _frames_of_file(raw, path, name, max_pixels, first_only=False):
    head = _head(raw, path)
    if _is_tiff(head):
        return _tiff_pages(raw, path, name, max_pixels, first_only)
    return _pillow_frames(raw, path, name, max_pixels, first_only)


def _correction(frame, kind: str, shape, max_pixels: int, max_bytes: int) -> np.ndarray | None:
    if frame is None:
        return None
    a = frame.data if isinstance(frame, LoadedImage) else (
        _array_image(frame, kind) if isinstance(frame, np.ndarray)
        else load_image(frame, max_pixels=max_pixels, max_bytes=max_bytes, _allow_constant=True).data)
    if a.shape != tuple(shape):
        raise ImageError(f"The {kind} frame is {a.shape[1]}×{a.shape[0]} px but the image is "
                         f"{shape[1]}×{shape[0]} px.")
    return a


def _array_image(arr: np.ndarray, name: str) -> np.ndarray:
    a = to_luminance(arr, name=name)
    return np.where(np.isfinite(a), a, 0.0)


def _apply(data: np.ndarray, dark: np.ndarray | None, flat: np.ndarray | None, name: str) -> np.ndarray:
    if dark is not None:
        data = data - dark
    if flat is not None:
        f = flat - dark if dark is not None else flat
        good = f > 0
        if good.mean() < 0.5:
            raise ImageError(f"{name}: the flat field is zero or negative over most of the image.")
        f = f / np.median(f[good])
        data = np.where(good, data / np.where(good, f, 1.0), data)
    if float(data.max()) == float(data.min()):
        raise ImageError(f"{name}: the image is empty after the dark/flat correction (all pixels equal).")
    return data


# --------------------------------------------------------------------------- public


def load_image(source, *, dark=None, flat=None, max_pixels: int = MAX_PIXELS,
               max_bytes: int = MAX_BYTES, _allow_constant: bool = False) -> LoadedImage:
    """Read one camera frame (the first page of a stack) as float64 luminance.

    Parameters
    ----------
    source : str, os.PathLike, bytes or ndarray
        A file path, the raw bytes of an uploaded file, or an array (grey or colour).
    dark : same kinds as `source`, optional, keyword-only
        Dark frame subtracted pixel by pixel.
    flat : same kinds as `source`, optional, keyword-only
        Flat field: the image becomes ``(image − dark) / (f / median(f))`` with
        ``f = flat − dark`` (``f = flat`` without a dark frame); pixels where
        f ≤ 0 are left undivided.
    max_pixels : int, keyword-only
        Refuse images with more pixels (guard against decompression bombs).
    max_bytes : int, keyword-only
        Refuse files larger than this.
    _allow_constant : bool, keyword-only
        Accept an image whose pixels are all equal (for internal callers only).

    Returns
    -------
    LoadedImage
        ``data`` is (M, N) float64, read-only.

    Raises
    ------
    ImageError
        Not an image, truncated or corrupt, all pixels equal, too many pixels,
        too many bytes, not 2-D, or a dark/flat frame of another size.

    Examples
    --------
    >>> arr = np.arange(12, dtype=np.uint16).reshape(3, 4)
    >>> im = load_image(arr)
    >>> print(im.data.shape, im.bit_depth, im.saturation_level, im.data[2, 3])
    (3, 4) 16 65535.0 11.0
    """
    if isinstance(source, LoadedImage):
        return source
    if isinstance(source, np.ndarray):
        name, dtype, n = "<array>", source.dtype, 1
        if source.ndim == 2:
            _check_pixels(source.shape[0], source.shape[1], max_pixels, name)
        arr = source
    else:
        raw, path, name = _read_source(source, max_bytes)
        frames = _frames_of_file(raw, path, name, max_pixels, first_only=True)
        try:
            _, arr, dtype, n = next(iter(frames))
        except StopIteration:
            raise ImageError(f"{name}: the file holds no image.") from None
    if _allow_constant:
        data = _array_image(arr, name)
    else:
        data = _finalise(arr, name)
    bits = _bit_depth(dtype)
    sat = float(2**bits - 1) if bits is not None and bits <= 32 and np.dtype(dtype).kind == "u" else None
    if dtype == np.dtype(np.uint8) and data.max() > 255:  # never, but keep the level honest
        sat = None
    d = _correction(dark, "dark", data.shape, max_pixels, max_bytes)
    f = _correction(flat, "flat", data.shape, max_pixels, max_bytes)
    if d is not None or f is not None:
        data = _apply(data, d, f, name)
        sat = None  # full scale is no longer one number after a per-pixel correction
    data = np.array(data, dtype=np.float64)
    data.flags.writeable = False
    return LoadedImage(data=data, dtype_name=np.dtype(dtype).name, bit_depth=bits, source_name=name,
                       saturation_level=sat, n_frames=int(n))


def iter_frames(source, *, max_pixels: int = MAX_PIXELS, max_bytes: int = MAX_BYTES, as_float: bool = True
                ) -> Iterator[tuple[str, np.ndarray]]:
    """Yield the frames of a stack one at a time, as (name, (M, N) float64 array).

    Parameters
    ----------
    source : path or bytes
        A multi-page TIFF (or a single image), a folder of image files, or a
        zip file of image files (bytes of a zip or TIFF also work). Folder and
        zip members are taken in natural order (``frame2`` before ``frame10``);
        files whose suffix is not an image suffix, and hidden files, are skipped.
    max_pixels, max_bytes : int, keyword-only
        Limits per frame / file, as in :func:`load_image`; a zip member that
        would inflate beyond `max_bytes` is refused.
    as_float : bool, keyword-only
        False: a grey frame stored as integers comes in its own integer type (no float64
        copy of the whole frame, for readers that take small cut-outs); colour and
        floating-point frames still come as float64.

    Yields
    ------
    name : str
        File name, with ``#i`` appended for page i of a multi-page file.
    frame : (M, N) ndarray of float64 (or of the stored integer type, see `as_float`)

    Raises
    ------
    ImageError
        As :func:`load_image`, for the first bad frame; or a folder/zip with no image.

    Examples
    --------
    >>> import tifffile, io as _io
    >>> buf = _io.BytesIO()
    >>> tifffile.imwrite(buf, np.arange(30, dtype=np.uint16).reshape(2, 3, 5), photometric="minisblack")
    >>> [(n, f.shape) for n, f in iter_frames(buf.getvalue())]
    [('<bytes>#0', (3, 5)), ('<bytes>#1', (3, 5))]
    """
    if isinstance(source, (str, os.PathLike)) and Path(source).is_dir():
        yield from _iter_folder(Path(source), max_pixels, max_bytes, as_float)
        return
    raw, path, name = _read_source(source, max_bytes)
    head = _head(raw, path)
    if head[:4] == b"PK\x03\x04":
        yield from _iter_zip(raw, path, name, max_pixels, max_bytes, as_float)
        return
    for fname, arr, _, _ in _frames_of_file(raw, path, name, max_pixels):
        yield fname, _finalise(arr, fname, as_float)


def _iter_folder(folder: Path, max_pixels: int, max_bytes: int, as_float: bool = True):
    files = sorted((p for p in folder.iterdir() if p.is_file() and not p.name.startswith(".")
                    and p.suffix.lower() in IMAGE_SUFFIXES), key=lambda p: _natural_key(p.name))
    if not files:
        raise ImageError(f"{folder.name}: the folder holds no image files ({', '.join(IMAGE_SUFFIXES)}).")
    for p in files:
        raw, path, name = _read_source(p, max_bytes)
        for fname, arr, _, _ in _frames_of_file(raw, path, name, max_pixels):
            yield fname, _finalise(arr, fname, as_float)


def _iter_zip(raw, path, name, max_pixels, max_bytes, as_float: bool = True):
    try:
        zf = zipfile.ZipFile(_stdio.BytesIO(raw) if raw is not None else path)
    except (zipfile.BadZipFile, OSError) as exc:
        raise ImageError(f"{name}: truncated or corrupt zip file ({exc}).") from None
    with zf:
        members = sorted((m for m in zf.infolist() if not m.is_dir()
                          and not Path(m.filename).name.startswith((".", "__"))
                          and Path(m.filename).suffix.lower() in IMAGE_SUFFIXES),
                         key=lambda m: _natural_key(m.filename))
        if not members:
            raise ImageError(f"{name}: the zip file holds no image files ({', '.join(IMAGE_SUFFIXES)}).")
        for m in members:
            mname = Path(m.filename).name
            if m.file_size > max_bytes:
                raise ImageError(f"{mname}: {m.file_size / 1e6:.0f} MB unpacked is more than the "
                                 f"{max_bytes / 1e6:.0f} MB limit.")
            try:
                with zf.open(m) as fh:
                    data = fh.read(max_bytes + 1)
            except (zipfile.BadZipFile, OSError, EOFError) as exc:
                raise ImageError(f"{mname}: corrupt zip member ({exc}).") from None
            if len(data) > max_bytes:
                raise ImageError(f"{mname}: more than the {max_bytes / 1e6:.0f} MB limit unpacked.")
            if not data:
                raise ImageError(f"{mname}: the file is empty (0 bytes), not an image.")
            for fname, arr, _, _ in _frames_of_file(data, None, mname, max_pixels):
                yield fname, _finalise(arr, fname, as_float)
