"""Helpers for calling Dash callbacks as plain functions in tests."""

from __future__ import annotations

import base64
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
