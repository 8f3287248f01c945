"""Keeping text in figures apart: measured label boxes, nudging, and thinning tick labels.

Labels are measured with the Agg renderer after the figure's layout has settled (the layout
is then frozen so saving draws exactly what was measured). :func:`repel_labels` nudges
annotations placed in offset points away from each other and from fixed obstacles (legends,
other texts) until no two boxes overlap or the step budget runs out; :func:`thin_tick_labels`
blanks tick labels that would run into the previous one; :func:`overlapping_pairs` says which
boxes still overlap (used by the tests too).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.text import Annotation, Text
from matplotlib.ticker import FuncFormatter

from spatial_ev.errors import InputError

__all__ = ["settle_layout", "label_boxes", "overlapping_pairs", "repel_labels",
           "thin_tick_labels"]


def settle_layout(fig: Figure) -> Any:
    """Draw ``fig`` once with Agg (running its layout engine), freeze the layout, return the
    renderer.

    Examples
    --------
    >>> from matplotlib.figure import Figure
    >>> fig = Figure(layout="constrained"); _ = fig.add_subplot()
    >>> settle_layout(fig) is not None
    True
    """
    if not isinstance(fig, Figure):
        raise InputError(f"`fig` must be a matplotlib Figure; got {type(fig).__name__}")
    canvas = fig.canvas if isinstance(fig.canvas, FigureCanvasAgg) else FigureCanvasAgg(fig)
    canvas.draw()
    fig.set_layout_engine("none")
    return canvas.get_renderer()


def label_boxes(fig: Figure, artists: Sequence[Any]) -> np.ndarray:
    """Display-space boxes (x0, y0, x1, y1 in pixels) of visible artists with text, one row each.

    Examples
    --------
    >>> from matplotlib.figure import Figure
    >>> fig = Figure(); ax = fig.add_subplot(); t = ax.text(0.5, 0.5, "label")
    >>> label_boxes(fig, [t]).shape
    (1, 4)
    """
    canvas = fig.canvas if isinstance(fig.canvas, FigureCanvasAgg) else FigureCanvasAgg(fig)
    renderer = canvas.get_renderer()
    boxes = []
    for a in artists:
        if isinstance(a, Text) and (not a.get_visible() or not a.get_text()):
            boxes.append((np.nan,) * 4)
            continue
        # an annotation's own extent includes its leader line: measure the text alone
        bb = Text.get_window_extent(a, renderer) if isinstance(a, Annotation) \
            else a.get_window_extent(renderer)
        boxes.append((bb.x0, bb.y0, bb.x1, bb.y1))
    return np.asarray(boxes, dtype=float).reshape(len(boxes), 4)


def overlapping_pairs(boxes: np.ndarray, *, tolerance: float = 0.0) -> list[tuple[int, int]]:
    """Index pairs (i < j) of boxes that overlap by more than ``tolerance`` pixels both ways.

    Rows with NaN (hidden labels) never overlap.

    Examples
    --------
    >>> import numpy as np
    >>> overlapping_pairs(np.array([[0, 0, 10, 10], [5, 5, 15, 15], [20, 0, 30, 10.0]]))
    [(0, 1)]
    """
    b = np.asarray(boxes, dtype=float)
    if b.ndim != 2 or b.shape[1] != 4:
        raise InputError(f"`boxes` must be an (n, 4) array of x0, y0, x1, y1; got {b.shape}")
    ox = np.minimum(b[:, None, 2], b[None, :, 2]) - np.maximum(b[:, None, 0], b[None, :, 0])
    oy = np.minimum(b[:, None, 3], b[None, :, 3]) - np.maximum(b[:, None, 1], b[None, :, 1])
    hit = (ox > tolerance) & (oy > tolerance)
    i, j = np.nonzero(np.triu(hit, k=1))
    return [(int(a), int(c)) for a, c in zip(i, j)]


def repel_labels(fig: Figure, labels: Sequence[Annotation], *,
                 obstacles: Sequence[Any] = (), pad: float = 2.0, max_steps: int = 150
                 ) -> int:
    """Nudge annotations (text placed in offset points) until their boxes no longer overlap.

    Each step measures every box, and for each overlapping pair moves the two labels apart
    along the axis of least overlap (half each; a label overlapping an obstacle moves the
    whole way). Labels are kept inside their axes. Call after everything else is drawn: the
    layout is settled and frozen first (:func:`settle_layout`).

    Parameters
    ----------
    fig : the figure holding the labels.
    labels : annotations with ``textcoords="offset points"``.
    obstacles : artists that stay put (legends, titles, other texts).
    pad : gap to leave between boxes, pixels.
    max_steps : step budget.

    Returns
    -------
    Number of overlapping pairs left (0 when every label found room).

    Examples
    --------
    >>> from matplotlib.figure import Figure
    >>> fig = Figure(); ax = fig.add_subplot()
    >>> a = [ax.annotate(s, (0.5, 0.5), xytext=(0, 0), textcoords="offset points")
    ...      for s in ("first", "second")]
    >>> repel_labels(fig, a)
    0
    """
    for lab in labels:
        if not isinstance(lab, Annotation) or lab.anncoords != "offset points":
            raise InputError("`labels` must be annotations placed with textcoords='offset "
                             "points'")
    if not labels:
        return 0
    settle_layout(fig)
    to_points = 72.0 / fig.dpi
    fixed = label_boxes(fig, list(obstacles)) if obstacles else np.empty((0, 4))
    n = len(labels)
    left = 0
    for _ in range(max_steps):
        boxes = label_boxes(fig, labels)
        every = np.vstack([boxes, fixed])
        pairs = [(i, j) for i, j in overlapping_pairs(every, tolerance=-pad) if i < n]
        left = len(pairs)
        if not pairs:
            break
        shift = np.zeros((n, 2))
        for i, j in pairs:
            a, b = every[i], every[j]
            ca, cb = (a[:2] + a[2:]) / 2, (b[:2] + b[2:]) / 2
            ox = min(a[2], b[2]) - max(a[0], b[0]) + pad
            oy = min(a[3], b[3]) - max(a[1], b[1]) + pad
            d = ca - cb
            if oy <= ox:  # least overlap vertically: move up/down
                move = np.array([0.0, oy * (1.0 if d[1] >= 0 else -1.0)])
            else:
                move = np.array([ox * (1.0 if d[0] >= 0 else -1.0), 0.0])
            if np.allclose(d, 0):  # same place: spread by index
                move = np.array([0.0, oy])
            if j < n:
                shift[i] += move / 2
                shift[j] -= move / 2
            else:
                shift[i] += move
        for k, lab in enumerate(labels):
            if not shift[k].any():
                continue
            box = boxes[k]
            frame = lab.axes.get_window_extent() if lab.axes is not None else fig.bbox
            dx = np.clip(shift[k, 0], frame.x0 - box[0], frame.x1 - box[2])
            dy = np.clip(shift[k, 1], frame.y0 - box[1], frame.y1 - box[3])
            ox, oy = lab.xyann
            lab.xyann = (ox + dx * to_points, oy + dy * to_points)
    return left


def thin_tick_labels(fig: Figure, axis: Any, *, pad: float = 4.0) -> list[float]:
    """Blank the major tick labels of ``axis`` that would run into the previous shown one.

    The formatter is wrapped so that dropped ticks print nothing (the ticks themselves stay).
    Returns the tick values whose labels are kept.

    Examples
    --------
    >>> from matplotlib.figure import Figure
    >>> fig = Figure(figsize=(1.5, 1)); ax = fig.add_subplot()
    >>> _ = ax.set_xticks([0, 1, 2, 3, 4, 5], ["1000"] * 6)
    >>> len(thin_tick_labels(fig, ax.xaxis)) < 6
    True
    """
    renderer = settle_layout(fig)
    ticks = [t for t in axis.get_major_ticks() if t.label1.get_visible()]
    values = list(axis.get_majorticklocs())
    horizontal = axis.axis_name == "x"
    kept: list[float] = []
    last = None
    for value, tick in zip(values, ticks):
        text = tick.label1
        if not text.get_text():
            continue
        bb = text.get_window_extent(renderer)
        lo, hi = (bb.x0, bb.x1) if horizontal else (bb.y0, bb.y1)
        if last is None or lo >= last + pad:
            kept.append(float(value))
            last = hi
    base = axis.get_major_formatter()
    keep = set(kept)
    labels = {float(v): t.label1.get_text() for v, t in zip(values, ticks)}
    del base
    axis.set_major_formatter(FuncFormatter(
        lambda v, _: labels.get(float(v), "") if float(v) in keep else ""))
    return kept
