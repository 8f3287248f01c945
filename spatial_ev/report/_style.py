"""The visual style shared by every spatial_ev figure: palette, typography, colour maps.

One place decides how the report looks, so maps, charts and the HTML page agree. The palette
is built from hues that stay distinguishable for the common forms of colour-vision deficiency
(blue / vermillion / bluish green / reddish purple / orange, with greys for "not explained" and
"not selected"); the diverging map scale runs dark blue → near white → dark orange, the
sequential one is matplotlib's ``cividis`` (designed for colour-vision deficiency). Figures are
drawn inside :func:`styled` so the settings never leak into the caller's matplotlib state.
"""

from __future__ import annotations

import functools
from collections.abc import Callable, Sequence
from typing import Any, TypeVar

import matplotlib
from matplotlib.colors import LinearSegmentedColormap

__all__ = ["INK", "MUTED", "GRID", "UNEXPLAINED", "SHARED", "HIGHLIGHT", "GROUP_COLOURS",
           "BAND_COLOURS", "CLASS_COLOURS", "DIVERGING", "SEQUENTIAL", "RC", "styled",
           "group_colour",
           "scale_class_colours"]

INK = "#1d2530"          # text, axes, outlines
MUTED = "#8a94a3"        # secondary text, vectors that were not selected
GRID = "#e4e8ee"         # grid lines
UNEXPLAINED = "#d5dae1"  # the unexplained fraction
SHARED = "#6c7687"       # fractions shared by several groups
HIGHLIGHT = "#e69f00"    # the chosen scheme / selected items when a second accent is needed

# one colour per explanatory group, in the order the groups are given
GROUP_COLOURS = ("#0072b2", "#d55e00", "#009e73", "#cc79a7")
# one colour code per scale class, the same in every figure and page (run report, design
# report): classes are ranked finest first; class k takes BAND_COLOURS[k] as a soft tint
# (behind bands on scale axes) and CLASS_COLOURS[k] as its strong colour (map frames, labels,
# table swatches)
BAND_COLOURS = ("#eaf2fa", "#fdf0e6", "#e8f5f0", "#f7eaf2", "#f2f2f2")
CLASS_COLOURS = ("#3f7fb8", "#d55e00", "#009e73", "#cc79a7", "#6c7687")

DIVERGING = LinearSegmentedColormap.from_list(
    "spatial_ev_diverging",
    ["#0b3c68", "#3f7fb8", "#a9cbe6", "#f6f6f4", "#f3c08f", "#cf6d1d", "#7a3400"])
SEQUENTIAL = matplotlib.colormaps["cividis"]

RC: dict[str, Any] = {
    "font.family": "DejaVu Sans",
    "font.size": 9.0,
    "axes.titlesize": 10.5,
    "axes.titleweight": "bold",
    "axes.titlelocation": "left",
    "axes.titlepad": 8.0,
    "axes.labelsize": 9.0,
    "axes.labelcolor": INK,
    "axes.edgecolor": "#9aa3b0",
    "axes.linewidth": 0.8,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": False,
    "axes.facecolor": "white",
    "figure.facecolor": "white",
    "grid.color": GRID,
    "grid.linewidth": 0.8,
    "xtick.color": "#4a5462",
    "ytick.color": "#4a5462",
    "xtick.labelsize": 8.0,
    "ytick.labelsize": 8.0,
    "text.color": INK,
    "legend.frameon": False,
    "legend.fontsize": 8.0,
    "hatch.color": "#5b6472",
    "hatch.linewidth": 0.8,
    "svg.fonttype": "none",
    "text.parse_math": False,  # user labels such as "sp. $1" are shown as typed
    "savefig.facecolor": "white",
}

F = TypeVar("F", bound=Callable[..., Any])


def styled(func: F) -> F:
    """Run a figure function inside the spatial_ev style (rcParams restored afterwards)."""

    @functools.wraps(func)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        with matplotlib.rc_context(RC):
            return func(*args, **kwargs)

    return wrapper  # type: ignore[return-value]


def group_colour(i: int) -> str:
    """Colour of the ``i``-th explanatory group (cycles after four)."""
    return GROUP_COLOURS[i % len(GROUP_COLOURS)]


def scale_class_colours(lower_bounds: Sequence[float]) -> list[tuple[str, str]]:
    """(tint, strong colour) of each scale class, given the classes' lower bounds.

    Classes are ranked finest first (smallest lower bound); the k-th finest takes
    ``BAND_COLOURS[k]`` and ``CLASS_COLOURS[k]`` (cycling after five), so a class keeps its
    colour in every figure that shows the same classes, whatever order they are listed in.

    Examples
    --------
    >>> scale_class_colours([400.0, 50.0])[1] == (BAND_COLOURS[0], CLASS_COLOURS[0])
    True
    """
    import numpy as np

    lows = np.asarray(list(lower_bounds), dtype=float)
    rank = np.argsort(np.argsort(lows, kind="stable"), kind="stable")
    return [(BAND_COLOURS[r % len(BAND_COLOURS)], CLASS_COLOURS[r % len(CLASS_COLOURS)])
            for r in rank]
