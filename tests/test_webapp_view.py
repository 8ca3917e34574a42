"""The display turn/mirror (webapp.figures.orient) and the click → camera-pixel mapping."""

from __future__ import annotations

import numpy as np
import pytest

from webapp.figures.orient import orient_figure, orient_levels, to_camera, to_display


@pytest.mark.parametrize("rot", [0, 90, 180, 270])
@pytest.mark.parametrize("mirror", [False, True])
def test_points_land_on_their_pixel_in_the_turned_array(rot, mirror):
    # truth: numpy's fliplr (mirror columns) and rot90 with k = -rot/90 (turns clockwise when rows
    # are drawn downwards, numpy.rot90 documentation); the value at a camera pixel must be found at
    # the display pixel to_display gives
    a = np.random.default_rng(rot + mirror).integers(0, 1 << 16, (5, 7))
    shown = np.rot90(np.fliplr(a) if mirror else a, k=-(rot // 90))
    assert np.array_equal(orient_levels(a, rotate_deg=rot, mirror=mirror), shown)
    yy, xx = np.mgrid[0:5, 0:7]
    dx, dy = to_display(xx, yy, width=7, height=5, rotate_deg=rot, mirror=mirror)
    assert np.array_equal(shown[dy.astype(int), dx.astype(int)], a)


@pytest.mark.parametrize("seed", range(5))
def test_to_camera_undoes_to_display(seed):
    rng = np.random.default_rng(seed)
    x, y = rng.uniform(-0.5, 639.5, 50), rng.uniform(-0.5, 479.5, 50)
    for rot in (0, 90, 180, 270):
        for mirror in (False, True):
            kw = dict(width=640, height=480, rotate_deg=rot, mirror=mirror)
            bx, by = to_camera(*to_display(x, y, **kw), **kw)
            np.testing.assert_allclose(np.c_[bx, by], np.c_[x, y], atol=1e-9)


def test_figure_markers_and_centre_follow_the_turn():
    from webapp.figures import pattern_figure

    result = {"center_px": [100.0, 50.0], "spots": [{"x": 10.0, "y": 20.0, "kind": "integer"}]}
    fig = pattern_figure(None, width=200, height=100, result=result, overlays=["spots"])
    fig = orient_figure(fig, width=200, height=100, rotate_deg=90)
    spot = next(t for t in fig.data if t.name == "Detected spots")
    # worked by hand: a quarter turn clockwise sends (x, y) to (H − 1 − y, x) = (79, 10)
    assert (spot.x[0], spot.y[0]) == (79.0, 10.0)
    c = fig.layout.shapes[0]
    assert ((c.x0 + c.x1) / 2, (c.y0 + c.y1) / 2) == pytest.approx((49.0, 100.0))


def test_click_on_turned_view_edits_in_camera_pixels():
    from webapp.pages.analyse import pattern

    image = {"sha": "s", "width": 200, "height": 100}
    click = {"points": [{"x": 79.0, "y": 10.0}]}  # display point of camera (10, 20) turned 90°, as above
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(pattern, "triggered", lambda: (pattern.ids.GRAPH, "graph.clickData"))
        ed = pattern.on_graph_event(click, None, None, "spots", None, image, None, 90, [])
    assert ed["added"] == [[10.0, 20.0]]


def test_background_view_of_a_flat_image_keeps_the_picture_and_says_why(monkeypatch):
    from webapp.pages.analyse import pattern

    flat = np.zeros((8, 8))  # too small for the spot search's screen: no background estimate
    monkeypatch.setattr(pattern.service, "image_array", lambda sha: flat)
    pattern.display_image.cache_clear()
    pattern.background_image.cache_clear()
    image = {"sha": "f" * 64, "width": 8, "height": 8}
    fig = pattern.render_pattern(image, None, None, None, "linear", 0.5, [0.5, 99.95], [], None, None, 0,
                                 ["minus_bg"], None)
    assert any(t.type == "image" for t in fig.data)
    notes = [a.text for a in fig.layout.annotations if a.text]
    assert len(notes) == 1 and notes[0].startswith("No background view: ") and "\n" not in notes[0]
    pattern.display_image.cache_clear()
    pattern.background_image.cache_clear()


def test_line_drawn_on_turned_view_is_profiled_in_camera_pixels():
    from webapp.pages.analyse import spot_tools

    image = {"sha": "s", "width": 200, "height": 100}
    # camera (10, 20) -> display (79, 10) and camera (110, 60) -> display (39, 110), turned 90° (as above)
    relayout = {"shapes": [{"type": "circle"}, {"type": "line", "x0": 79.0, "y0": 10.0, "x1": 39.0, "y1": 110.0}]}
    assert spot_tools.line_from_relayout(relayout, image, 90, []) == (10.0, 20.0, 110.0, 60.0)
    assert spot_tools.line_from_relayout(relayout) == (79.0, 10.0, 39.0, 110.0)  # unturned: as drawn
