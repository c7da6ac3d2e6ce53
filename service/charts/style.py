"""What every chart shares: size, colours, markers, segment names, PNG output.

Colours: the eight-colour palette of Okabe, M. & Ito, K. (2008), "Color Universal Design (CUD): how to make
figures and presentations that are friendly to colorblind people" (J*FLY), chosen so that viewers with the
common forms of colour blindness can tell the colours apart. Yellow (#F0E442) comes last, since it is faint
on white. Colour is never the only cue: every series also has its own marker shape, and charts label their
marks in text.
"""

from __future__ import annotations

import io
from typing import Any

from matplotlib.figure import Figure

# 10 x 6.25 inches at 100 dots per inch: 1000 x 625 pixels (the issue asks for at least 800 x 500).
WIDTH_INCHES, HEIGHT_INCHES, DPI = 10.0, 6.25, 100

OKABE_ITO = {
    "blue": "#0072B2",
    "orange": "#E69F00",
    "bluish_green": "#009E73",
    "vermillion": "#D55E00",
    "reddish_purple": "#CC79A7",
    "sky_blue": "#56B4E9",
    "black": "#000000",
    "yellow": "#F0E442",
}
SERIES_COLOURS = tuple(OKABE_ITO.values())
# Filled shapes that stay distinct when drawn small and when drawn hollow (outliers).
SERIES_MARKERS = ("o", "s", "^", "D", "v", "P", "X", "*", "<", ">", "h", "p")
# Drift statuses: a colour, a shape and a word each (the word is printed beside the mark).
STATUS_STYLE = {
    "stable": {"colour": OKABE_ITO["bluish_green"], "marker": "o"},
    "watch": {"colour": OKABE_ITO["orange"], "marker": "^"},
    "alert": {"colour": OKABE_ITO["vermillion"], "marker": "X"},
}
# ColorBrewer's RdBu (Brewer, colorbrewer2.org), reversed so that above-average is red: a diverging scheme
# ColorBrewer marks as colour-blind safe.
DIVERGING_COLOURMAP = "RdBu_r"


def series_style(index: int) -> dict[str, str]:
    """Colour and marker of the ``index``-th series; the pair repeats only after 24 series."""
    return {"colour": SERIES_COLOURS[index % len(SERIES_COLOURS)],
            "marker": SERIES_MARKERS[index % len(SERIES_MARKERS)]}


def segment_name(segment: dict[str, Any]) -> str:
    """'2 · gift buyers' when the segment has a label, else 'segment 2'."""
    label = segment.get("label")
    return f"{segment['id']} · {label}" if label else f"segment {segment['id']}"


def new_figure() -> Figure:
    """A figure of the standard size, laid out by matplotlib's constrained layout.

    ``Figure`` is used without ``pyplot``: no global figure registry, no GUI backend; ``savefig`` renders
    with Agg.
    """
    figure = Figure(figsize=(WIDTH_INCHES, HEIGHT_INCHES), dpi=DPI, layout="constrained")
    figure.set_facecolor("white")
    return figure


def to_png(figure: Figure) -> bytes:
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=DPI)
    return buffer.getvalue()
