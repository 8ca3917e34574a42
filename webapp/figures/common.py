"""What every figure shares: the colours, the domain styles, index text, the empty figure."""

from __future__ import annotations

from fractions import Fraction

import numpy as np
import plotly.graph_objects as go

__all__ = ["PALETTE", "DOMAIN_COLOURS", "DOMAIN_STYLES", "domain_colour", "domain_dash", "hk_text", "empty_figure"]

# Okabe & Ito, "Color Universal Design" (2008): eight colours told apart with every common colour-vision deficiency.
PALETTE = {
    "orange": "#E69F00", "sky": "#56B4E9", "green": "#009E73", "yellow": "#F0E442",
    "blue": "#0072B2", "vermillion": "#D55E00", "purple": "#CC79A7", "black": "#000000",
}
# One meaning per colour and line style on the pattern (dark background):
#   domains: the six colours below, in this order, and nothing else uses them;
#   substrate net, centre and a1*/a2*: white; a tried model: white dashed; screen edge: steel
#   dashed; gun shadow: light grey dotted; unexplained spots: white crosses; faint detections set aside: small
#   grey crosses; hand edits: white stars; spots of a coexisting phase: light magenta open squares, its net light
#   magenta dotted.
DOMAIN_COLOURS = [PALETTE["orange"], PALETTE["sky"], PALETTE["green"], PALETTE["vermillion"], PALETTE["purple"],
                  PALETTE["yellow"]]
DOMAIN_DASHES = ["solid", "dash", "dot", "dashdot"]  # after six domains the colours repeat with another dash
SUBSTRATE_COLOUR = "#FFFFFF"
MODEL_COLOUR = "#FFFFFF"
SCREEN_COLOUR = "#8FA8C0"
GUN_COLOUR = "#D9D9D9"
INTEGER_SPOT_COLOUR = "#C8C8C8"
UNEXPLAINED_COLOUR = "#FFFFFF"
SET_ASIDE_COLOUR = "#9A9A9A"
PHASE_COLOUR = "#FF8CF0"  # spots of a coexisting phase (not the answer's): light magenta open squares
# each domain gets its own marker shape as well as its own colour (the PNG/SVG export)
DOMAIN_STYLES = [(shape, DOMAIN_COLOURS[i % len(DOMAIN_COLOURS)]) for i, shape in enumerate(
    ["circle-open", "square-open", "diamond-open", "triangle-up-open", "pentagon-open", "hexagon-open",
     "triangle-down-open", "star-open"])]


def domain_colour(i: int) -> str:
    """The colour of domain `i` (0-based) everywhere: pattern, real space, result panel, export.

    Parameters
    ----------
    i : int
        Domain index (0-based).

    Returns
    -------
    str
        A CSS colour.
    """
    return DOMAIN_COLOURS[int(i) % len(DOMAIN_COLOURS)]


def domain_dash(i: int) -> str:
    """The line style of domain `i`: solid for the first six, then another dash per round of colours.

    Parameters
    ----------
    i : int
        Domain index (0-based).

    Returns
    -------
    str
        A Plotly dash style.
    """
    return DOMAIN_DASHES[(int(i) // len(DOMAIN_COLOURS)) % len(DOMAIN_DASHES)]



def hk_text(h: float, k: float) -> str:
    """``(1/2, -1)``: indices as small fractions, or 2 decimals when not one.

    >>> hk_text(0.5, -1.0), hk_text(0.3333333, 0.0), hk_text(0.123, 1)
    ('(1/2, -1)', '(1/3, 0)', '(0.12, 1)')

    Parameters
    ----------
    h, k : float
        Beam indices in the substrate's reciprocal basis.

    Returns
    -------
    str
        The label.
    """
    def one(x):
        if x is None or not np.isfinite(x):
            return "?"
        f = Fraction(float(x)).limit_denominator(12)
        return str(f) if abs(float(f) - x) < 2e-3 else f"{x:.2f}"
    return f"({one(h)}, {one(k)})"


def num(x, fmt="{:.3g}"):
    """A number as text, or an en dash when it is none.

    Parameters
    ----------
    x : object
        The value.
    fmt : str
        Format of a number.

    Returns
    -------
    str
        The text.
    """
    try:
        return fmt.format(float(x))
    except (TypeError, ValueError):
        return "–"


def empty_figure(message: str = "Drop a LEED image here or pick a demo image", *, height: int = 640) -> go.Figure:
    """A blank figure with a message in its middle.

    Parameters
    ----------
    message : str
        The text shown.
    height : int, keyword-only
        Figure height, pixels.

    Returns
    -------
    plotly.graph_objects.Figure
        No axes, the message centred.
    """
    fig = go.Figure()
    fig.update_layout(
        template="plotly_white", margin=dict(l=10, r=10, t=10, b=10), height=height,
        xaxis=dict(visible=False), yaxis=dict(visible=False),
        annotations=[dict(text=message, showarrow=False, font=dict(size=16, color="#666"),
                          xref="paper", yref="paper", x=0.5, y=0.5)])
    return fig
