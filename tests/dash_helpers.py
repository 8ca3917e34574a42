"""Helpers for calling Dash callbacks as plain functions in tests."""

from __future__ import annotations

import base64
import time
from contextvars import copy_context


def call_callback(fn, prop_id, *args):
    """Run a callback function with Dash's callback context saying `prop_id` fired (Dash's unit-test recipe)."""
    from dash._callback_context import context_value
    from dash._utils import AttributeDict

    def run():
        context_value.set(AttributeDict(triggered_inputs=[{"prop_id": prop_id, "value": None}]))
        return fn(*args)

    return copy_context().run(run)


def data_url(raw: bytes, mime: str = "application/octet-stream") -> str:
    """An upload's `contents` as dcc.Upload gives it: a base64 data URL."""
    return f"data:{mime};base64," + base64.b64encode(raw).decode()


def text_of(component) -> str:
    """All text inside a Dash component tree."""
    if component is None:
        return ""
    if isinstance(component, (str, int, float)):
        return str(component)
    if isinstance(component, (list, tuple)):
        return " ".join(text_of(c) for c in component)
    return text_of(getattr(component, "children", None))


def click_drawn_pattern(page, x: float, y: float, *, added: int | None = None, timeout_ms: int = 120_000):
    """Click the pattern (``#graph``) at page point (x, y) as a user would.

    Two waits make the click land. (1) With `added`, the figure drawn must show that many spots
    added by hand: the result panel updates before the new figure arrives and is drawn, and a
    click while Plotly redraws is lost. (2) The pointer rests on the point until Plotly has found
    what lies under it, then the button goes down: a synthetic click moves, presses and releases
    at once, and on a loaded machine the hover came after the press, so Plotly reported no click
    and the page sent no request at all.
    """
    if added is not None:
        page.wait_for_function("""n => { const gd = document.querySelector('#graph .js-plotly-plot');
            if (!gd || !gd._fullData) return false;
            const t = gd._fullData.find(d => d.name === 'Added by hand');  // arrays decoded here
            return (t ? t.x.length : 0) === n; }""", arg=added, timeout=timeout_ms)
    from playwright.sync_api import TimeoutError as PlaywrightTimeoutError

    page.evaluate("() => { const gd = document.querySelector('#graph .js-plotly-plot'); if (gd) gd._hoverdata = undefined; }")
    # the pointer comes from one pixel away each time: a pointer already resting on (x, y) (the
    # previous click's place) sends no move, and a redraw since then leaves Plotly no hover
    hovered = "() => ((document.querySelector('#graph .js-plotly-plot') || {})._hoverdata || []).length > 0"
    deadline = time.monotonic() + timeout_ms / 1000.0
    while True:
        page.mouse.move(x + 1, y + 1)
        page.mouse.move(x, y)
        try:
            page.wait_for_function(hovered, timeout=5_000)
            break
        except PlaywrightTimeoutError:
            if time.monotonic() > deadline:
                raise
    page.mouse.down()
    page.mouse.up()
