"""Camera artefacts of real LEED photographs, one small pure function each.

The light reaching the camera is modelled in photons per pixel (float arrays):
what the screen emits is darkened by dust and modulated by the channel plate's
texture (:func:`channel_plate_transmission`, :func:`dust_transmission`), and stray
light adds glare (:func:`add_glare`). The sensor (:func:`expose`) turns it into
counts with shot and read noise, a full well whose excess charge spills along the
columns (:func:`bloom_columns`), gain, offset and quantisation. Defects of the
sensor act on the counts (:func:`add_hot_pixels`, :func:`add_cosmic_rays`), and a
colour camera saves an 8-bit JPEG (:func:`to_colour_jpeg`).

Every function takes its random numbers from a ``numpy.random.Generator`` passed in
and returns new arrays; the positions it creates are returned beside the image, as
(row, col) pixels, so the truth can list them.

Pixels: (row, col) arrays, the centre of the top-left pixel at (0, 0); image angles
counter-clockwise from +x on the screen (y up), as in :mod:`analysis.optics`.
"""

from __future__ import annotations

import io
import math

import numpy as np
from scipy import ndimage as ndi

from ..errors import ParameterError

__all__ = [
    "channel_plate_transmission",
    "add_channel_plate_texture",
    "dust_transmission",
    "add_dust",
    "add_glare",
    "bloom_columns",
    "expose",
    "add_hot_pixels",
    "add_cosmic_rays",
    "to_colour_jpeg",
]


def _shape2(shape, name: str = "shape") -> tuple[int, int]:
    try:
        rows, cols = (int(v) for v in shape)
    except (TypeError, ValueError):
        raise ParameterError(f"`{name}` must be (rows, cols), got {shape!r}.") from None
    if rows < 1 or cols < 1:
        raise ParameterError(f"`{name}` must be positive, got {shape!r}.")
    return rows, cols


def _image2(image, name: str = "image") -> np.ndarray:
    a = np.asarray(image)
    if a.ndim != 2 or a.size == 0:
        raise ParameterError(f"`{name}` must be a non-empty 2-D array, got shape {a.shape}.")
    return a


def _check_rng(rng) -> None:
    if not isinstance(rng, np.random.Generator):
        raise ParameterError(f"`rng` must be a numpy.random.Generator, got {type(rng).__name__}.")


def _full_scale(image: np.ndarray, full_scale) -> float:
    if full_scale is not None:
        return float(full_scale)
    if np.issubdtype(image.dtype, np.integer):
        return float(np.iinfo(image.dtype).max)
    raise ParameterError(f"`full_scale` is needed for a {image.dtype} image (integers know their own).")


# --------------------------------------------------------------------------- screen


def channel_plate_transmission(shape, *, period_px: float, depth: float, angle_deg: float = 0.0,
                               phase_rad=(0.0, 0.0, 0.0)) -> np.ndarray:
    """The faint hexagonal texture a channel plate (MCP) prints on the screen.

    The plate's fibres are packed hexagonally; their gain is highest in the middle
    of each cell. The texture is the three first harmonics of a hexagonal lattice
    of period `period_px` (wave vectors of length 4π / (√3 period) at 0°, 60° and
    120° from `angle_deg`), averaged exactly over each pixel (a cosine of wave
    vector k averaged over a unit pixel is damped by sinc(k_x / 2π) sinc(k_y / 2π)):

        T = 1 + depth · Σ_j cos(k_j · r + φ_j) / 3,

    so T has mean 1 and spans [1 − depth/2, 1 + depth] before the pixel averaging.

    Parameters
    ----------
    shape : (rows, cols)
        Size of the frame.
    period_px : float, keyword-only
        Distance between neighbouring cells, pixels (> 1).
    depth : float, keyword-only
        Relative modulation in [0, 1).
    angle_deg : float, keyword-only
        Image angle of one row of cells.
    phase_rad : 3 floats, keyword-only
        Phases φ_j (moves the lattice).

    Returns
    -------
    (rows, cols) ndarray of float64
        Multiplies the screen's light.

    Examples
    --------
    >>> t = channel_plate_transmission((240, 240), period_px=4.0, depth=0.1)
    >>> print(round(float(t.mean()), 3), bool(t.min() > 0.94 and t.max() < 1.1))
    1.0 True
    """
    rows, cols = _shape2(shape)
    if not (period_px > 1.0 and math.isfinite(period_px)):
        raise ParameterError(f"`period_px` must be > 1 px, got {period_px!r}.")
    if not (0.0 <= depth < 1.0):
        raise ParameterError(f"`depth` must be in [0, 1), got {depth!r}.")
    ph = np.broadcast_to(np.asarray(phase_rad, dtype=np.float64), (3,))
    k = 4.0 * math.pi / (math.sqrt(3.0) * period_px)
    x = np.arange(cols, dtype=np.float64)
    y = np.arange(rows, dtype=np.float64)
    out = np.zeros((rows, cols))
    for j in range(3):
        a = math.radians(angle_deg + 30.0 + 60.0 * j)  # the reciprocal rows sit 30° off the cell rows
        kx, ky = k * math.cos(a), -k * math.sin(a)  # y grows downwards
        damp = np.sinc(kx / (2 * math.pi)) * np.sinc(ky / (2 * math.pi))
        ax, ay = kx * x + ph[j], ky * y
        out += damp * (np.cos(ay)[:, None] * np.cos(ax)[None, :] - np.sin(ay)[:, None] * np.sin(ax)[None, :])
    return 1.0 + depth * out / 3.0


def add_channel_plate_texture(light, *, period_px: float, depth: float, angle_deg: float = 0.0,
                              phase_rad=(0.0, 0.0, 0.0)) -> np.ndarray:
    """`light` × :func:`channel_plate_transmission` (photons per pixel, (rows, cols) float64).

    Parameters
    ----------
    light : (rows, cols) array_like of float
        Photons per pixel.
    period_px, depth, angle_deg, phase_rad : keyword-only
        The texture, as for :func:`channel_plate_transmission`.

    Returns
    -------
    (rows, cols) ndarray of float64
        The light with the texture.

    Examples
    --------
    >>> out = add_channel_plate_texture(np.full((64, 64), 100.0), period_px=5.0, depth=0.2)
    >>> print(bool(out.std() > 1.0), round(float(out.mean()), 0))
    True 100.0
    """
    a = _image2(light, "light").astype(np.float64)
    return a * channel_plate_transmission(a.shape, period_px=period_px, depth=depth, angle_deg=angle_deg,
                                          phase_rad=phase_rad)


def dust_transmission(shape, rng: np.random.Generator, *, n: int, radius_px=(1.5, 15.0), opacity=(0.3, 0.9),
                      edge_px=(0.3, 1.5), center_px=None, within_px: float | None = None
                      ) -> tuple[np.ndarray, list[dict]]:
    """Dark specks of dust (or burnt phosphor) on the screen.

    Each speck is a soft-edged disk that removes the fraction `opacity` of the
    light at its middle: T = Π (1 − o_i s((|r − r_i| − R_i) / w_i)), s(u) = 1 / (1 + eᵘ).
    Radii are drawn log-uniformly (small specks are the common ones); opacity and
    edge width uniformly.

    Parameters
    ----------
    shape : (rows, cols)
        Size of the frame.
    rng : numpy.random.Generator
        Source of the random draws.
    n : int, keyword-only
        Number of specks.
    radius_px, opacity, edge_px : (low, high), keyword-only
        Ranges of the radius (pixels), the opacity in (0, 1] and the edge width (pixels).
    center_px : (x, y), optional, keyword-only
        With `within_px`: specks fall uniformly on this disk (the screen); default
        anywhere in the frame.
    within_px : float, optional, keyword-only
        Radius of that disk, pixels.

    Returns
    -------
    transmission : (rows, cols) ndarray of float64
        Multiplies the screen's light.
    specks : list of dict
        ``x``, ``y`` (pixels), ``radius_px``, ``opacity``, ``edge_px`` of each speck.

    Examples
    --------
    >>> t, specks = dust_transmission((100, 120), np.random.default_rng(0), n=3)
    >>> s = specks[0]
    >>> print(len(specks), bool(abs(t[round(s["y"]), round(s["x"])] - (1 - s["opacity"])) < 0.2))
    3 True
    """
    rows, cols = _shape2(shape)
    _check_rng(rng)
    if int(n) < 0:
        raise ParameterError(f"`n` must be ≥ 0, got {n!r}.")
    lo, hi = (float(v) for v in radius_px)
    if not (0 < lo <= hi):
        raise ParameterError(f"`radius_px` must be (low, high) with 0 < low ≤ high, got {radius_px!r}.")
    if not (0 < float(opacity[0]) <= float(opacity[1]) <= 1.0):
        raise ParameterError(f"`opacity` must be (low, high) in (0, 1], got {opacity!r}.")
    t = np.ones((rows, cols))
    specks = []
    for _ in range(int(n)):
        if within_px is not None and center_px is not None:
            rad, ang = float(within_px) * math.sqrt(rng.uniform()), rng.uniform(0, 2 * math.pi)
            x, y = center_px[0] + rad * math.cos(ang), center_px[1] + rad * math.sin(ang)
        else:
            x, y = rng.uniform(-0.5, cols - 0.5), rng.uniform(-0.5, rows - 0.5)
        r_px = math.exp(rng.uniform(math.log(lo), math.log(hi)))
        o = rng.uniform(float(opacity[0]), float(opacity[1]))
        w = rng.uniform(float(edge_px[0]), float(edge_px[1]))
        reach = r_px + 12.0 * w + 1.0
        r0, r1 = max(int(math.floor(y - reach)), 0), min(int(math.ceil(y + reach)) + 1, rows)
        c0, c1 = max(int(math.floor(x - reach)), 0), min(int(math.ceil(x + reach)) + 1, cols)
        if r0 < r1 and c0 < c1:
            yy = np.arange(r0, r1, dtype=np.float64)[:, None]
            xx = np.arange(c0, c1, dtype=np.float64)[None, :]
            u = (np.hypot(xx - x, yy - y) - r_px) / w
            t[r0:r1, c0:c1] *= 1.0 - o / (1.0 + np.exp(np.clip(u, -50, 50)))
        specks.append({"x": x, "y": y, "radius_px": r_px, "opacity": o, "edge_px": w})
    return t, specks


def add_dust(light, rng: np.random.Generator, *, n: int, **kw) -> tuple[np.ndarray, list[dict]]:
    """`light` × :func:`dust_transmission` (same keywords); returns (light, specks).

    Parameters
    ----------
    light : (rows, cols) array_like of float
        Photons per pixel.
    rng : numpy.random.Generator
        Source of the random draws.
    n : int, keyword-only
        Number of specks.
    **kw
        The other keywords of :func:`dust_transmission`.

    Returns
    -------
    light : (rows, cols) ndarray of float64
        The light with the specks.
    specks : list of dict
        Each speck, as :func:`dust_transmission` lists them.
    """
    a = _image2(light, "light").astype(np.float64)
    t, specks = dust_transmission(a.shape, rng, n=n, **kw)
    return a * t, specks


def add_glare(light, *, center_px, sigma_px, photons_per_px: float, angle_deg: float = 0.0) -> np.ndarray:
    """Stray light: a broad, smooth, elliptical Gaussian patch added to `light`.

    A reflection of the bright screen (or of a hot filament) in the viewport or the
    chamber wall reaches the camera out of focus, as a smooth patch much wider than
    a spot.

    Parameters
    ----------
    light : (rows, cols) array_like of float
        Photons per pixel.
    center_px : (x, y), keyword-only
        Centre of the patch, pixels.
    sigma_px : float or (major, minor), keyword-only
        Widths along `angle_deg` and across it, pixels.
    photons_per_px : float, keyword-only
        Added light at the centre of the patch.
    angle_deg : float, keyword-only
        Image angle of the major axis.

    Returns
    -------
    (rows, cols) ndarray of float64
        The light with the patch.

    Examples
    --------
    >>> out = add_glare(np.zeros((50, 80)), center_px=(60.0, 10.0), sigma_px=(20.0, 8.0), photons_per_px=30.0)
    >>> print([int(i) for i in np.unravel_index(int(np.argmax(out)), out.shape)], round(float(out.max()), 1))
    [10, 60] 30.0
    """
    a = _image2(light, "light").astype(np.float64)
    s_maj, s_min = np.broadcast_to(np.asarray(sigma_px, dtype=np.float64), (2,))
    if not (s_maj > 0 and s_min > 0) or not (photons_per_px >= 0 and math.isfinite(photons_per_px)):
        raise ParameterError(f"`sigma_px` must be > 0 and `photons_per_px` ≥ 0, got {sigma_px!r}, "
                             f"{photons_per_px!r}.")
    rows, cols = a.shape
    x = np.arange(cols, dtype=np.float64)[None, :] - float(center_px[0])
    y = np.arange(rows, dtype=np.float64)[:, None] - float(center_px[1])
    c, s = math.cos(math.radians(angle_deg)), math.sin(math.radians(angle_deg))
    along, across = x * c - y * s, x * s + y * c  # y is down: the image angle turns the other way
    return a + photons_per_px * np.exp(-0.5 * ((along / s_maj) ** 2 + (across / s_min) ** 2))


# --------------------------------------------------------------------------- sensor


def bloom_columns(electrons, *, full_well_e: float) -> np.ndarray:
    """Charge above the full well spills into the column's neighbours (CCD blooming).

    A pixel holds at most `full_well_e`; the excess of each run of full pixels flows
    half up and half down its column, filling the next pixels to the full well in
    turn. Charge that runs off the end of a column is lost (drained). Total charge
    is otherwise kept.

    Parameters
    ----------
    electrons : (rows, cols) array_like of float
        Charge per pixel, electrons.
    full_well_e : float, keyword-only
        Largest charge a pixel holds, electrons.

    Returns
    -------
    (rows, cols) ndarray of float64
        The charge after blooming, electrons.

    Examples
    --------
    >>> e = np.zeros((9, 3)); e[4, 1] = 500.0
    >>> out = bloom_columns(e, full_well_e=100.0)
    >>> print(out[:, 1].tolist(), float(out.sum()))
    [0.0, 0.0, 100.0, 100.0, 100.0, 100.0, 100.0, 0.0, 0.0] 500.0
    """
    out = _image2(electrons, "electrons").astype(np.float64)
    fw = float(full_well_e)
    if not (fw > 0 and math.isfinite(fw)):
        raise ParameterError(f"`full_well_e` must be > 0, got {full_well_e!r}.")
    for j in np.flatnonzero((out > fw).any(axis=0)):
        col = out[:, j]
        for _ in range(8):  # a spill may reach another run: repeat until none is over
            over = col > fw
            if not over.any():
                break
            edges = np.flatnonzero(np.diff(np.concatenate([[0], (col >= fw).astype(np.int8), [0]])))
            for a, b in zip(edges[::2], edges[1::2]):  # runs [a, b) of full pixels
                excess = float(np.sum(col[a:b] - fw))
                if excess <= 0:
                    continue
                col[a:b] = fw
                _fill(col, np.arange(a - 1, -1, -1), excess / 2, fw)
                _fill(col, np.arange(b, len(col)), excess / 2, fw)
        out[:, j] = col
    return out


def _fill(col: np.ndarray, path: np.ndarray, charge: float, fw: float) -> None:
    """Pour `charge` into `col` along `path`, each pixel up to `fw` (in place)."""
    if len(path) == 0 or charge <= 0:
        return
    room = np.maximum(fw - col[path], 0.0)
    before = np.cumsum(room) - room  # room in the pixels before each one on the path
    col[path] += np.clip(charge - before, 0.0, room)


def expose(light, rng: np.random.Generator, *, gain_adu_per_e: float, offset_adu: float, read_noise_e: float,
           bit_depth: int = 16, full_well_e: float | None = None, bloom: bool = False) -> np.ndarray:
    """Photons per pixel → camera counts.

    Poisson shot noise; with `bloom` the charge above `full_well_e` spills along the
    columns (:func:`bloom_columns`); Gaussian read noise; counts = offset + gain ×
    electrons, rounded and clipped to the bit depth.

    Parameters
    ----------
    light : (rows, cols) array_like of float
        Expected photons per pixel (1 photon = 1 electron).
    rng : numpy.random.Generator
        Source of the random draws.
    gain_adu_per_e, offset_adu, read_noise_e : float, keyword-only
        Counts per electron, the dark offset (counts) and the read noise (electrons).
    bit_depth : {8, 16}, keyword-only
        Bits per pixel of the output.
    full_well_e : float, optional, keyword-only
        Default: a little above the charge that reaches full scale,
        (2^bits − 1 − offset) / gain + 5 × read noise, so a full pixel reads full scale
        whatever its read noise.
    bloom : bool, keyword-only
        Let charge above the full well spill along the columns.

    Returns
    -------
    (rows, cols) ndarray of uint8 or uint16
        Camera counts.

    Examples
    --------
    >>> im = expose(np.full((4, 4), 1e6), np.random.default_rng(0), gain_adu_per_e=1.0, offset_adu=10.0,
    ...             read_noise_e=2.0, bit_depth=8)
    >>> print(im.dtype, int(im.min()))
    uint8 255
    """
    a = _image2(light, "light").astype(np.float64)
    _check_rng(rng)
    if bit_depth not in (8, 16):
        raise ParameterError(f"`bit_depth` must be 8 or 16, got {bit_depth!r}.")
    if not (gain_adu_per_e > 0) or not (offset_adu >= 0) or not (read_noise_e >= 0):
        raise ParameterError(f"`gain_adu_per_e` must be > 0, `offset_adu` and `read_noise_e` ≥ 0, got "
                             f"{gain_adu_per_e!r}, {offset_adu!r}, {read_noise_e!r}.")
    full = float(2**bit_depth - 1)
    electrons = rng.poisson(np.clip(a, 0.0, None)).astype(np.float64)
    if bloom:
        fw = ((full - offset_adu) / gain_adu_per_e + 5.0 * read_noise_e if full_well_e is None
              else float(full_well_e))
        electrons = bloom_columns(electrons, full_well_e=fw)
    if read_noise_e > 0:
        electrons += rng.normal(0.0, read_noise_e, a.shape)
    adu = np.clip(np.rint(offset_adu + gain_adu_per_e * electrons), 0.0, full)
    return adu.astype(np.uint8 if bit_depth == 8 else np.uint16)


def add_hot_pixels(image, rng: np.random.Generator, *, n: int, level=(0.85, 1.0), full_scale=None
                   ) -> tuple[np.ndarray, np.ndarray]:
    """Hot pixels: single sensor pixels whose dark current fills them to near full scale.

    Parameters
    ----------
    image : (rows, cols) ndarray of int or float
        Camera counts.
    rng : numpy.random.Generator
        Source of the random draws.
    n : int, keyword-only
        Number of hot pixels (distinct positions, uniform over the frame).
    level : (low, high), keyword-only
        Their value as a fraction of full scale, drawn uniformly.
    full_scale : float, optional, keyword-only
        Default: the largest value of an integer dtype.

    Returns
    -------
    image : (rows, cols) ndarray of the input dtype
        A pixel keeps its value where that is already higher.
    rc : (n, 2) ndarray of int64
        Positions (row, col).

    Examples
    --------
    >>> im, rc = add_hot_pixels(np.zeros((32, 32), np.uint16), np.random.default_rng(1), n=5)
    >>> print(rc.shape, bool(np.all(im[rc[:, 0], rc[:, 1]] > 0.84 * 65535)), int((im > 0).sum()))
    (5, 2) True 5
    """
    a = _image2(image).copy()
    _check_rng(rng)
    full = _full_scale(a, full_scale)
    n = int(n)
    if not (0 <= n <= a.size):
        raise ParameterError(f"`n` must be in [0, {a.size}], got {n}.")
    flat = rng.choice(a.size, size=n, replace=False)
    rc = np.column_stack(np.unravel_index(flat, a.shape)).astype(np.int64).reshape(-1, 2)
    val = np.rint(full * rng.uniform(float(level[0]), float(level[1]), n))
    a[rc[:, 0], rc[:, 1]] = np.maximum(a[rc[:, 0], rc[:, 1]], val.astype(a.dtype))
    return a, rc


def add_cosmic_rays(image, rng: np.random.Generator, *, n: int, length_px=(1.0, 3.0), charge_e=(2000.0, 20000.0),
                    gain_adu_per_e: float = 1.0, full_scale=None) -> tuple[np.ndarray, list[dict]]:
    """Cosmic-ray hits: short straight tracks of charge.

    A charged particle crossing the sensor at a slant leaves charge along a short
    line; its projection here is `length_px` long (uniform in the range), at a
    uniform random angle, with a total charge drawn log-uniformly in `charge_e`
    shared evenly along its length. Counts are clipped at full scale.

    Parameters
    ----------
    image : (rows, cols) ndarray
        Camera counts.
    rng : numpy.random.Generator
        Source of the random draws.
    n : int, keyword-only
        Number of tracks.
    length_px, charge_e : (low, high), keyword-only
        Ranges of the projected track length (pixels) and of its charge (electrons).
    gain_adu_per_e : float, keyword-only
        Counts per electron of the camera.
    full_scale : float, optional, keyword-only
        Largest count; default the largest value of an integer dtype.

    Returns
    -------
    image : (rows, cols) ndarray of the input dtype
        The frame with the tracks.
    tracks : list of dict
        ``x0``, ``y0``, ``x1``, ``y1`` (ends, pixels), ``charge_e`` and ``rc``
        (the (row, col) pixels it lit).

    Examples
    --------
    >>> im, tracks = add_cosmic_rays(np.zeros((40, 40), np.uint16), np.random.default_rng(3), n=2)
    >>> print(len(tracks), all(1 <= len(t["rc"]) <= 5 for t in tracks), bool(im.max() > 1000))
    2 True True
    """
    a = _image2(image).copy()
    _check_rng(rng)
    full = _full_scale(a, full_scale)
    rows, cols = a.shape
    acc = np.zeros(a.shape)
    tracks = []
    for _ in range(int(n)):
        x0, y0 = rng.uniform(-0.5, cols - 0.5), rng.uniform(-0.5, rows - 0.5)
        length = rng.uniform(float(length_px[0]), float(length_px[1]))
        ang = rng.uniform(0, 2 * math.pi)
        x1, y1 = x0 + length * math.cos(ang), y0 - length * math.sin(ang)
        q = math.exp(rng.uniform(math.log(charge_e[0]), math.log(charge_e[1])))
        t = (np.arange(64) + 0.5) / 64
        r = np.clip(np.rint(y0 + t * (y1 - y0)).astype(np.int64), 0, rows - 1)
        c = np.clip(np.rint(x0 + t * (x1 - x0)).astype(np.int64), 0, cols - 1)
        np.add.at(acc, (r, c), q / 64)
        lit = sorted(set(zip(r.tolist(), c.tolist())))
        tracks.append({"x0": x0, "y0": y0, "x1": x1, "y1": y1, "charge_e": q, "rc": [list(p) for p in lit]})
    out = np.clip(np.rint(a.astype(np.float64) + gain_adu_per_e * acc), 0.0, full)
    return out.astype(a.dtype), tracks


# --------------------------------------------------------------------------- colour file


def to_colour_jpeg(image, *, quality: int, black_adu: float | None = None, white_adu: float | None = None,
                   channel_gains=(0.3, 1.0, 0.12), gamma: float = 1.0, bayer: bool = True) -> bytes:
    """The frame as a colour camera saves it: an 8-bit RGB JPEG.

    The phosphor glows green, so the green-filtered pixels carry most of the light
    (`channel_gains` are the red, green and blue responses to it). With `bayer`,
    each sensor pixel sees one colour (RGGB pattern) and the other two are
    interpolated bilinearly from its neighbours, as the camera does; then
    counts map linearly from [`black_adu`, `white_adu`] to [0, 1], are raised to
    `gamma`, scaled to 0–255, rounded and saved by Pillow at `quality` (4:2:0
    chroma subsampling, 8 × 8 block transform).

    Parameters
    ----------
    image : (rows, cols) array_like
        Camera counts.
    quality : int, keyword-only
        JPEG quality, 1–95.
    black_adu, white_adu : float, optional, keyword-only
        Counts that become 0 and 255 (default: the image's 0.1st percentile, and the
        99.99th percentile of its 3 × 3 median, which hot pixels do not move).
    channel_gains : 3 floats, keyword-only
        Red, green and blue responses to the phosphor's light.
    gamma : float, keyword-only
        Exponent of the tone curve (1 = linear, 1/2.2 ≈ a display gamma).
    bayer : bool, keyword-only
        Sample through an RGGB colour filter and interpolate, as a one-chip camera does.

    Returns
    -------
    bytes
        The JPEG file.

    Examples
    --------
    >>> from PIL import Image
    >>> ramp = np.tile(np.linspace(0, 4000, 64), (48, 1))
    >>> data = to_colour_jpeg(ramp, quality=85, black_adu=0, white_adu=4000)
    >>> rgb = np.asarray(Image.open(io.BytesIO(data)))
    >>> print(data[:2] == b"\\xff\\xd8", rgb.shape, rgb.dtype, bool(rgb[..., 1].mean() > 2 * rgb[..., 0].mean()))
    True (48, 64, 3) uint8 True
    """
    from PIL import Image

    a = _image2(image).astype(np.float64)
    if not (1 <= int(quality) <= 95):
        raise ParameterError(f"`quality` must be 1 … 95, got {quality!r}.")
    gains = np.asarray(channel_gains, dtype=np.float64).reshape(3)
    black = float(np.percentile(a, 0.1)) if black_adu is None else float(black_adu)
    white = (float(np.percentile(ndi.median_filter(a, size=3), 99.99)) if white_adu is None else float(white_adu))
    if not white > black:
        raise ParameterError(f"`white_adu` must exceed `black_adu`, got {white} and {black}.")
    v = (a - black) / (white - black)
    if bayer:
        rgb = _bayer_rgb(v, gains)
    else:
        rgb = v[:, :, None] * gains[None, None, :]
    rgb = np.clip(rgb, 0.0, 1.0) ** float(gamma)
    buf = io.BytesIO()
    Image.fromarray(np.rint(255.0 * rgb).astype(np.uint8), "RGB").save(buf, "JPEG", quality=int(quality),
                                                                           subsampling=2)
    return buf.getvalue()


def _bayer_rgb(v: np.ndarray, gains: np.ndarray) -> np.ndarray:
    """Sample `v` through an RGGB colour-filter mosaic, then interpolate each colour
    bilinearly from its own pixels: (rows, cols, 3)."""
    rows, cols = v.shape
    r_even = (np.arange(rows) % 2 == 0)[:, None]
    c_even = (np.arange(cols) % 2 == 0)[None, :]
    sites = [r_even & c_even, (r_even ^ c_even), ~r_even & ~c_even]  # R, G, B
    cross = np.array([[0, 1, 0], [1, 4, 1], [0, 1, 0]]) / 4.0
    square = np.array([[1, 2, 1], [2, 4, 2], [1, 2, 1]]) / 4.0
    out = np.empty((rows, cols, 3))
    for ch, (m, kern) in enumerate(zip(sites, (square, cross, square))):
        out[:, :, ch] = ndi.convolve(np.where(m, v * gains[ch], 0.0), kern, mode="mirror")
    return out
