"""Display orientation: the pattern turned in 90° steps and mirrored on screen only.

The analysis, its coordinates and every export stay in the camera's frame; these helpers
map camera pixels (x column, y row, centre of the top-left pixel at (0, 0)) to the turned
display and back. The display is the camera image mirrored left–right first (when asked),
then turned clockwise on screen by ``rotate_deg`` (0, 90, 180 or 270).
"""

from __future__ import annotations

import numpy as np

__all__ = ["ROTATIONS", "clean_view", "display_size", "to_display", "to_camera", "orient_levels",
           "orient_figure"]

ROTATIONS = (0, 90, 180, 270)  # clockwise on screen, degrees


def clean_view(rotate_deg=0, mirror=False) -> tuple[int, bool]:
    """A valid (rotation, mirror) pair from whatever the page sent.

    Parameters
    ----------
    rotate_deg : object
        Clockwise turn on screen, degrees; anything but 0, 90, 180, 270 counts as 0.
    mirror : object
        Truthy: mirror left–right.

    Returns
    -------
    (int, bool)
        The rotation and the mirror flag.

    Examples
    --------
    >>> clean_view("90", 1), clean_view(45, None), clean_view(None, False)
    ((90, True), (0, False), (0, False))
    """
    try:
        r = int(rotate_deg or 0)
    except (TypeError, ValueError):
        r = 0
    return (r if r in ROTATIONS else 0), bool(mirror)


def display_size(width: int, height: int, rotate_deg: int = 0) -> tuple[int, int]:
    """(width, height) of the display of a `width` × `height` camera image.

    Parameters
    ----------
    width, height : int
        Camera image size, pixels.
    rotate_deg : int
        Clockwise turn, degrees.

    Returns
    -------
    (int, int)
        Display width and height, pixels.

    Examples
    --------
    >>> display_size(640, 480, 90), display_size(640, 480, 180)
    ((480, 640), (640, 480))
    """
    return (int(height), int(width)) if rotate_deg % 180 else (int(width), int(height))


def to_display(x, y, *, width: int, height: int, rotate_deg: int = 0, mirror: bool = False):
    """Camera pixel coordinates to display coordinates.

    Parameters
    ----------
    x, y : float or ndarray of float
        Camera column and row, pixels (any matching shapes; NaN stays NaN).
    width, height : int, keyword-only
        Camera image size, pixels.
    rotate_deg : int, keyword-only
        Clockwise turn on screen, degrees.
    mirror : bool, keyword-only
        Mirror left–right before turning.

    Returns
    -------
    (ndarray, ndarray) of float64
        Display x and y, pixels.

    Examples
    --------
    >>> [float(v) for v in to_display(0.0, 0.0, width=4, height=3, rotate_deg=90)]  # top-left -> top-right
    [2.0, 0.0]
    >>> [float(v) for v in to_display(1.0, 2.0, width=4, height=3, mirror=True)]
    [2.0, 2.0]
    """
    x, y = np.asarray(x, dtype=np.float64), np.asarray(y, dtype=np.float64)
    w, h = int(width), int(height)
    if mirror:
        x = (w - 1) - x
    for _ in range((int(rotate_deg) // 90) % 4):
        x, y = (h - 1) - y, x  # a clockwise quarter turn with y pointing down
        w, h = h, w
    return x, y


def to_camera(x, y, *, width: int, height: int, rotate_deg: int = 0, mirror: bool = False):
    """Display coordinates back to camera pixels (the inverse of :func:`to_display`).

    Parameters
    ----------
    x, y : float or ndarray of float
        Display x and y, pixels.
    width, height : int, keyword-only
        Camera image size, pixels (not the display's).
    rotate_deg : int, keyword-only
        Clockwise turn on screen, degrees.
    mirror : bool, keyword-only
        The display is mirrored.

    Returns
    -------
    (ndarray, ndarray) of float64
        Camera column and row, pixels.

    Examples
    --------
    >>> xd, yd = to_display(3.0, 1.0, width=4, height=3, rotate_deg=270, mirror=True)
    >>> [float(v) for v in to_camera(xd, yd, width=4, height=3, rotate_deg=270, mirror=True)]
    [3.0, 1.0]
    """
    x, y = np.asarray(x, dtype=np.float64), np.asarray(y, dtype=np.float64)
    k = (int(rotate_deg) // 90) % 4
    w, h = display_size(width, height, 90 * k)
    for _ in range(k):
        x, y = y, (w - 1) - x  # undo one clockwise quarter turn
        w, h = h, w
    if mirror:
        x = (int(width) - 1) - x
    return x, y


def orient_levels(levels: np.ndarray, *, rotate_deg: int = 0, mirror: bool = False) -> np.ndarray:
    """The image array as displayed: mirrored left–right, then turned clockwise.

    Parameters
    ----------
    levels : (M, N) ndarray
        The camera image (row, col).
    rotate_deg : int, keyword-only
        Clockwise turn on screen, degrees.
    mirror : bool, keyword-only
        Mirror left–right first.

    Returns
    -------
    ndarray
        (M, N) or (N, M): the display's rows and columns (a view where possible).

    Examples
    --------
    >>> a = np.arange(6).reshape(2, 3)
    >>> orient_levels(a, rotate_deg=90).tolist()
    [[3, 0], [4, 1], [5, 2]]
    """
    a = np.asarray(levels)
    if mirror:
        a = a[:, ::-1]
    return np.rot90(a, -((int(rotate_deg) // 90) % 4))


def _xy_list(vals, y_vals, **kw):
    """Transform x/y sequences that may hold None (line breaks) or be missing."""
    xs = np.array([np.nan if v is None else float(v) for v in vals], dtype=np.float64)
    ys = np.array([np.nan if v is None else float(v) for v in y_vals], dtype=np.float64)
    dx, dy = to_display(xs, ys, **kw)
    gap = np.isnan(xs) | np.isnan(ys)
    return ([None if g else float(v) for v, g in zip(dx, gap)],
            [None if g else float(v) for v, g in zip(dy, gap)])


def orient_figure(fig, *, width: int, height: int, rotate_deg: int = 0, mirror: bool = False):
    """Move every marker, line, shape and arrow of a camera-frame pattern figure onto the display.

    The image trace must already hold the turned picture (:func:`orient_levels`); it is left
    alone. Scatter traces, shapes (the centre circle stays a circle) and arrows/labels in data
    coordinates are mapped with :func:`to_display`, and the axes span the display.

    Parameters
    ----------
    fig : plotly.graph_objects.Figure
        The pattern drawn in camera pixels; changed in place.
    width, height : int, keyword-only
        Camera image size, pixels.
    rotate_deg : int, keyword-only
        Clockwise turn on screen, degrees.
    mirror : bool, keyword-only
        Mirror left–right.

    Returns
    -------
    plotly.graph_objects.Figure
        `fig`.
    """
    kw = dict(width=width, height=height, rotate_deg=rotate_deg, mirror=mirror)
    if not rotate_deg and not mirror:
        return fig
    for tr in fig.data:
        if tr.type == "image" or tr.x is None or tr.y is None:
            continue
        tr.x, tr.y = _xy_list(tr.x, tr.y, **kw)
    shapes = []
    for s in fig.layout.shapes or ():
        s = s.to_plotly_json()
        if s.get("xref") == "x" and s.get("yref") == "y" and all(k in s for k in ("x0", "x1", "y0", "y1")):
            (x0, x1), (y0, y1) = _xy_list([s["x0"], s["x1"]], [s["y0"], s["y1"]], **kw)
            if s.get("type") in ("circle", "rect"):
                x0, x1, y0, y1 = min(x0, x1), max(x0, x1), min(y0, y1), max(y0, y1)
            s.update(x0=x0, x1=x1, y0=y0, y1=y1)
        shapes.append(s)
    anns = []
    for a in fig.layout.annotations or ():
        a = a.to_plotly_json()
        if a.get("xref") == "x" and a.get("yref") == "y" and a.get("x") is not None:
            (a["x"],), (a["y"],) = _xy_list([a["x"]], [a["y"]], **kw)
            if a.get("axref") == "x" and a.get("ayref") == "y" and a.get("ax") is not None:
                (a["ax"],), (a["ay"],) = _xy_list([a["ax"]], [a["ay"]], **kw)
        anns.append(a)
    w, h = display_size(width, height, rotate_deg)
    # a turned non-square image: both axes span the longer side, centred. Plotly's update of a
    # figure whose scale-locked axes swap their aspect kept the old x range (seen with Plotly 7
    # here); a square axes box sidesteps that, at the cost of dark bands beside the image.
    pad_x = (max(w, h) - w) / 2.0 if w != h and rotate_deg % 180 else 0.0
    pad_y = (max(w, h) - h) / 2.0 if w != h and rotate_deg % 180 else 0.0
    fig.update_layout(shapes=shapes, annotations=anns)
    fig.update_xaxes(range=[-0.5 - pad_x, w - 0.5 + pad_x], autorange=False)
    fig.update_yaxes(range=[h - 0.5 + pad_y, -0.5 - pad_y], autorange=False)
    return fig
