"""Colours and line styles of the bench window (no Qt here: plain strings and tuples).

Colours: the Okabe-Ito palette (Okabe & Ito, "Color Universal Design", 2008), chosen so
that people with the common forms of colour-vision deficiency can tell the curves apart.
Colour never carries meaning alone: the sweep direction is also told by the line style and
the marker (forward: solid line, round markers; reverse: dashed line, triangles), and
light and dark curves live on different plots.
"""
from __future__ import annotations

# Okabe-Ito, in the order successive sweeps take them (yellow last: weak on white).
OKABE_ITO = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky_blue": "#56B4E9",
    "bluish_green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish_purple": "#CC79A7",
}

SWEEP_COLOURS = (
    OKABE_ITO["blue"], OKABE_ITO["vermillion"], OKABE_ITO["bluish_green"],
    OKABE_ITO["reddish_purple"], OKABE_ITO["orange"], OKABE_ITO["sky_blue"],
)  # black is kept for the fitted model curves, so no measured sweep is drawn in it

# Earlier sweeps laid over the live ones: the same palette from the other end, drawn thin
# and dotted without markers so that they never look like the sweep in progress.
OVERLAY_COLOURS = tuple(reversed(SWEEP_COLOURS))

FIT_COLOUR = OKABE_ITO["black"]
POWER_ALPHA = 150            # of 255: the power curve sits behind the current

# Status colours of the safety strip and the verdict (foreground, background).
OK_COLOURS = ("#FFFFFF", OKABE_ITO["bluish_green"])
ALARM_COLOURS = ("#FFFFFF", OKABE_ITO["vermillion"])
LIVE_COLOURS = ("#000000", OKABE_ITO["orange"])
UNKNOWN_COLOURS = ("#000000", "#D9D9D9")
CAUTION_COLOURS = ("#000000", "#FFF6C8")
ESTOP_COLOURS = ("#FFFFFF", "#C00000")

# Direction -> (Qt pen style name, pyqtgraph symbol, legend word).
DIRECTION_STYLE = {
    "forward": ("SolidLine", "o", "fwd"),
    "reverse": ("DashLine", "t", "rev"),
    "none": ("DotLine", "s", ""),
}


def sweep_colour(index: int) -> str:
    return SWEEP_COLOURS[index % len(SWEEP_COLOURS)]


def overlay_colour(index: int) -> str:
    return OVERLAY_COLOURS[index % len(OVERLAY_COLOURS)]


def direction_style(direction: str) -> tuple[str, str, str]:
    return DIRECTION_STYLE.get(direction, DIRECTION_STYLE["none"])
