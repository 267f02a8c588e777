"""The look of our plots: one sequential colour map, line styles and marker kinds.

Design rules (checked in ``tests/test_plot_palette.py``):

* The probability colour map runs from paper white to ink, through sand, clay,
  brick and plum; its CIE L* lightness falls monotonically, so more probable
  sky is always darker, in colour, in greyscale and for every colour-vision
  deficiency (a change of lightness survives all of them).
* Kinds are told apart by shape and line style first, colour second:
  candidates are filled stars, host galaxies open diamonds, the 50% contour is
  solid and the 90% contour dashed, error circles are dotted.
* Everything drawn over the map carries a thin white halo, so it reads on the
  light and on the dark end of the colour map alike.
"""

from __future__ import annotations

from matplotlib import patheffects
from matplotlib.colors import LinearSegmentedColormap, to_rgb

__all__ = [
    "SKY_ANCHORS",
    "SKY_CMAP",
    "INK",
    "PAPER",
    "CANDIDATE",
    "HOST",
    "ERROR_CIRCLE",
    "LINE_OF_SIGHT",
    "FOOTPRINT",
    "contour_style",
    "halo",
]

#: (CIE L*, colour) anchors of the probability map, palest first. The position of
#: each anchor in the map is its drop in lightness, so L* falls nearly linearly.
SKY_ANCHORS = (
    (96.2, "#f7f4ec"),  # paper
    (88.1, "#efdca6"),  # sand
    (72.8, "#e0a867"),  # clay
    (56.0, "#c66f4a"),  # brick
    (39.7, "#98405a"),  # plum
    (25.8, "#5b2a5e"),  # aubergine
    (11.4, "#241640"),  # ink
)


def _sky_cmap() -> LinearSegmentedColormap:
    top, bottom = SKY_ANCHORS[0][0], SKY_ANCHORS[-1][0]
    stops = [((top - lum) / (top - bottom), to_rgb(c)) for lum, c in SKY_ANCHORS]
    cmap = LinearSegmentedColormap.from_list("matcher_sky", stops, N=256)
    return cmap.with_extremes(bad=(0.0, 0.0, 0.0, 0.0))  # outside the projection: transparent


#: Sequential map for probability per deg² (low = paper, high = ink).
SKY_CMAP = _sky_cmap()

INK = "#15131f"
PAPER = "#f7f4ec"

#: Reported transients: filled stars, sky blue with a navy edge.
CANDIDATE = {"marker": "*", "face": "#2a9df4", "edge": "#0b1a33", "size": 150.0, "small": 36.0}
#: Host galaxies: open (white) diamonds with a dark teal edge.
HOST = {"marker": "D", "face": "#ffffff", "edge": "#0d5c63", "size": 38.0}
#: Error circles: dotted navy.
ERROR_CIRCLE = {"color": "#1f5fbf", "linestyle": ":", "linewidth": 1.3}
#: The distance posterior along the top candidate's line of sight.
LINE_OF_SIGHT = {"color": "#1f5fbf", "linestyle": "--", "linewidth": 1.4}
#: Outline of the zoomed view on the all-sky map.
FOOTPRINT = {"color": "#5e5a6e", "linestyle": "-", "linewidth": 0.9}

_LEVEL_STYLES = {0.5: ("-", 1.7), 0.9: ("--", 1.4)}


def contour_style(level: float) -> dict:
    """Line style of a credible contour: 50% solid, 90% dashed, any other level dash-dot."""
    ls, lw = _LEVEL_STYLES.get(round(float(level), 6), ("-.", 1.2))
    return {"colors": INK, "linestyles": ls, "linewidths": lw}


def halo(width: float = 2.6) -> list:
    """A white stroke under a line or marker, so it reads on any part of the colour map."""
    return [patheffects.withStroke(linewidth=width, foreground="white")]
