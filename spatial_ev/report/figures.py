"""Non-map figures of the report: variation partition, scalogram, triplot, weighting schemes,
Moran's I against scale.

Every function takes plain data (numbers, pandas objects), computes no statistics, and returns
a :class:`matplotlib.figure.Figure` built through matplotlib's object interface (no pyplot, no
global figure state), drawn in the spatial_ev style of :mod:`spatial_ev.report._style`.
:func:`save_figure` writes a figure as PNG and SVG.

Artists that tests and callers may want to find carry a ``gid`` (e.g. ``"fraction-bar"``,
``"selected-vector"``, ``"variable-arrow"``, ``"corrected-level"``).
"""

from __future__ import annotations

import os
import re
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path

import matplotlib
import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patheffects import withStroke
from matplotlib.ticker import FixedLocator, FuncFormatter, NullFormatter
from matplotlib.transforms import blended_transform_factory

from spatial_ev._validation import check_option, check_real
from spatial_ev.errors import InputError
from spatial_ev.report import _checks as ck
from spatial_ev.report import _style as st
from spatial_ev.report.labels import repel_labels, thin_tick_labels

__all__ = ["save_figure", "partition_figure", "scalogram_figure", "triplot_figure",
           "weighting_figure", "moran_scale_figure", "unit_symbol"]

_UNIT_SYMBOLS = {"metre": "m", "meter": "m", "m": "m", "metres": "m", "meters": "m",
                 "kilometre": "km", "kilometer": "km", "km": "km", "foot": "ft", "feet": "ft",
                 "ft": "ft", "us survey foot": "ft (US)", "degree": "°"}


def unit_symbol(distance_unit: str | None) -> str:
    """Short label of a distance unit (``"metre"`` → ``"m"``; None → ``"map units"``).

    Examples
    --------
    >>> unit_symbol("metre"), unit_symbol(None)
    ('m', 'map units')
    """
    if distance_unit is None or not str(distance_unit).strip():
        return "map units"
    return _UNIT_SYMBOLS.get(str(distance_unit).strip().lower(), str(distance_unit))


def log_axis(axis, lo: float, hi: float) -> None:
    """Logarithmic axis with plain-number ticks at 1, 2, 5 × 10^k (or 10^k on wide ranges)."""
    exps = np.arange(np.floor(np.log10(lo)), np.ceil(np.log10(hi)) + 1)
    ticks = np.array([m * 10.0 ** e for e in exps for m in (1, 2, 5)])
    ticks = ticks[(ticks >= lo) & (ticks <= hi)]
    if len(ticks) < 4:  # less than a decade: finer round numbers
        ticks = np.array([m * 10.0 ** e for e in exps for m in (1, 1.5, 2, 3, 4, 5, 7)])
        ticks = ticks[(ticks >= lo) & (ticks <= hi)]
    if len(ticks) > 8:
        ticks = ticks[np.isclose(np.log10(ticks) % 1, 0) | np.isclose(np.log10(ticks) % 1, 1)]
    axis.set_major_locator(FixedLocator(ticks))
    axis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:,.0f}" if v >= 1 else f"{v:g}"))
    axis.set_minor_formatter(NullFormatter())


def _format_p(p: float | None) -> str:
    return "" if p is None else (f"p = {p:.3f}" if p >= 0.001 else f"p = {p:.1e}")


# ----------------------------------------------------------------------------- saving

def save_figure(fig: Figure, folder: str | os.PathLike, stem: str, *,
                formats: Sequence[str] = ("png", "svg"), dpi: int = 150) -> dict[str, Path]:
    """Write ``fig`` into ``folder`` as ``<stem>.png`` and ``<stem>.svg``.

    Parameters
    ----------
    fig : Figure
    folder : path of an existing folder (usually the one :func:`atomic_folder` yields).
    stem : file name without extension: letters, digits, ``_`` and ``-`` only.
    formats : any of ``"png"``, ``"svg"``, ``"pdf"``.
    dpi : resolution of raster output.

    Returns
    -------
    dict mapping each format to the written path.

    Examples
    --------
    >>> import tempfile
    >>> from matplotlib.figure import Figure
    >>> paths = save_figure(Figure(), tempfile.mkdtemp(), "empty")
    >>> sorted(paths)
    ['png', 'svg']
    """
    if not isinstance(fig, Figure):
        raise InputError(f"`fig` must be a matplotlib Figure; got {type(fig).__name__}")
    folder = Path(folder)
    if not folder.is_dir():
        raise InputError(f"`folder` {str(folder)!r} is not an existing folder; create it first")
    if not isinstance(stem, str) or not re.fullmatch(r"[A-Za-z0-9_\-]+", stem):
        raise InputError(f"`stem` must contain only letters, digits, '_' and '-'; got {stem!r}")
    out = {}
    for fmt in formats:
        if fmt not in ("png", "svg", "pdf"):
            raise InputError(f"`formats` entries must be 'png', 'svg' or 'pdf'; got {fmt!r}")
        path = folder / f"{stem}.{fmt}"
        # no creation date or software stamp, fixed SVG ids: the same figure gives the same
        # bytes, so output folders can be compared by checksum
        metadata = {"png": {"Software": None}, "svg": {"Date": None},
                    "pdf": {"CreationDate": None}}[fmt]
        with matplotlib.rc_context({"svg.fonttype": "none", "svg.hashsalt": "spatial_ev"}):
            fig.savefig(path, format=fmt, dpi=dpi, bbox_inches="tight", metadata=metadata)
        out[fmt] = path
    return out


# ----------------------------------------------------------------------------- partition

def _check_fractions(fractions: object) -> tuple[pd.DataFrame, list[str] | None]:
    frame = ck.check_frame("fractions", fractions, ("name", "r2_adj", "testable", "p"))
    # adjusted R² fractions are shares of total variation, but with few sites and many
    # predictors they can fall below -1; any finite value is drawn as given
    values = ck.check_numeric("fractions['r2_adj']", frame["r2_adj"])
    rows = []
    for name, v, testable, p in zip(frame["name"], values, frame["testable"], frame["p"]):
        rows.append({"name": str(name), "r2_adj": float(v), "testable": bool(testable),
                     "p": ck.check_p(p)})
    clean = pd.DataFrame(rows)
    groups = None
    if "members" in frame.columns:
        members = []
        for name, m in zip(frame["name"], frame["members"]):
            if m is None or (isinstance(m, float) and np.isnan(m)):
                m = ()
            elif isinstance(m, str):
                m = tuple(x.strip() for x in m.split("+") if x.strip())
            members.append(tuple(str(x) for x in m))
        clean["members"] = members
        groups = list(dict.fromkeys(g for m in members for g in m))
        if not 2 <= len(groups) <= 4:
            raise InputError(f"`fractions['members']` must name 2 to 4 explanatory groups; "
                             f"found {groups}")
    return clean, groups


@st.styled
def partition_figure(fractions: pd.DataFrame, *, alpha: float = 0.05,
                     title: str = "How community variation divides") -> Figure:
    """Draw a variation partition as one bar per fraction, with group membership dots.

    Each fraction (adjusted R², a share of total variation) is a horizontal bar from zero.
    Unique fractions take their group's colour, shared fractions a neutral grey, the
    unexplained fraction a pale grey. When a ``members`` column is given, a dot matrix on the
    left shows which groups each fraction involves. Negative fractions (possible for adjusted
    R²) are drawn hatched to the left of zero and explained in a note; they should be read as
    zero. Testable fractions show their permutation p-value, marked ``*`` when ``p <= alpha``;
    shared fractions are labelled "not testable".

    Parameters
    ----------
    fractions : DataFrame, one row per fraction in display order, columns ``name`` (str),
        ``r2_adj`` (float), ``testable`` (bool), ``p`` (float in (0, 1] or None/NaN), and
        optionally ``members`` (tuple of group names, or names joined by ``"+"``; empty for
        the unexplained fraction). 2–4 groups.
    alpha : significance level used for the ``*`` mark.
    title : figure title.

    Returns
    -------
    Figure; bars carry ``gid="fraction-bar"`` in row order.

    Examples
    --------
    >>> import pandas as pd
    >>> table = pd.DataFrame({"name": ["[a] environment only", "[b] shared",
    ...                                "[c] space only", "[d] unexplained"],
    ...                       "r2_adj": [0.21, -0.02, 0.12, 0.69],
    ...                       "testable": [True, False, True, False],
    ...                       "p": [0.001, None, 0.004, None],
    ...                       "members": [("environment",), ("environment", "space"),
    ...                                   ("space",), ()]})
    >>> fig = partition_figure(table)
    >>> sum(p.get_gid() == "fraction-bar" for p in fig.axes[-1].patches)
    4
    """
    table, groups = _check_fractions(fractions)
    alpha = check_real("alpha", alpha, low=0.0, high=1.0, low_inclusive=False)
    n = len(table)
    y = np.arange(n)[::-1].astype(float)
    fig = Figure(figsize=(8.0, 1.5 + 0.42 * n), layout="constrained")
    if groups is not None:
        gs = fig.add_gridspec(1, 2, width_ratios=[0.32 * len(groups) + 0.4, 6.0])
        ax_m = fig.add_subplot(gs[0, 0])
        ax = fig.add_subplot(gs[0, 1], sharey=ax_m)
    else:
        ax_m, ax = None, fig.add_subplot()

    colours, members = [], table["members"] if groups is not None else [None] * n
    for i, (name, m) in enumerate(zip(table["name"], members)):
        if m is None:
            unexplained = "unexplained" in name.lower() or "residual" in name.lower()
            colours.append(st.UNEXPLAINED if unexplained else st.group_colour(i))
        elif len(m) == 0:
            colours.append(st.UNEXPLAINED)
        elif len(m) == 1:
            colours.append(st.group_colour(groups.index(m[0])))  # type: ignore[union-attr]
        else:
            colours.append(st.SHARED)

    values = table["r2_adj"].to_numpy()
    ax.axvline(0.0, color=st.INK, lw=0.9, zorder=3)
    ax.grid(axis="x", zorder=0)
    for yi, v, c, (_, row) in zip(y, values, colours, table.iterrows()):
        negative = v < 0
        bar = ax.barh(yi, v, height=0.62, color="white" if negative else c,
                      edgecolor=c if not negative else st.SHARED, linewidth=1.0,
                      hatch="////" if negative else None, zorder=2)[0]
        bar.set_gid("fraction-bar")
        bar.set_label(row["name"])
        text = f"{v:+.3f}" if negative else f"{v:.3f}"
        if not row["testable"]:
            text += "   not testable"
        elif row["p"] is not None:
            text += f"   {_format_p(row['p'])}" + ("  *" if row["p"] <= alpha else "")
        else:
            text += "   not tested"
        if negative:
            text += "  (negative: read as 0)"
        ax.text(max(v, 0.0) + 0.012, yi, text, va="center", ha="left", fontsize=8.5,
                color=st.INK, fontweight="bold" if (row["p"] or 1) <= alpha else "normal")
    lo = min(0.0, values.min()) - 0.02
    hi = max(values.max(), 0.05)
    ax.set_xlim(lo - 0.05 * (hi - lo), hi + 0.55 * (hi - lo))
    ax.set_xlabel("adjusted R²  (share of total community variation)")
    ax.spines["left"].set_visible(False)
    ax.tick_params(axis="y", left=False, labelleft=ax_m is None)
    if ax_m is None:
        ax.set_yticks(y, table["name"])
    ax.set_title(title)

    if ax_m is not None:
        gx = np.arange(len(groups))  # type: ignore[arg-type]
        for yi, m in zip(y, table["members"]):
            on = [groups.index(g) for g in m]  # type: ignore[union-attr]
            ax_m.scatter(gx, np.full(len(gx), yi), s=46, facecolor="white",
                         edgecolor=st.GRID, linewidth=1.2, zorder=2)
            if len(on) > 1:
                ax_m.plot([min(on), max(on)], [yi, yi], color=st.SHARED, lw=2.0, zorder=2)
            if on:
                ax_m.scatter(on, [yi] * len(on), s=46, zorder=3,
                             color=[st.group_colour(k) for k in on])
        ax_m.set_xticks(gx, groups, rotation=35, ha="left", fontsize=8)
        ax_m.xaxis.tick_top()
        ax_m.set_xlim(-0.6, len(gx) - 0.4)
        ax_m.set_yticks(y, table["name"])
        ax_m.tick_params(axis="both", length=0)
        for side in ("left", "bottom", "top", "right"):
            ax_m.spines[side].set_visible(False)
    ax.set_ylim(-0.7, n - 0.3)

    notes = [f"* p ≤ {alpha:g} in a permutation test. Shared fractions have no test of their "
             "own; the unexplained fraction is what none of the groups accounts for."]
    if np.any(values < 0):
        notes.append("Hatched bars left of zero are negative adjusted R² fractions: they arise "
                     "by chance or when groups suppress each other's effect; read them as zero.")
    fig.get_layout_engine().set(h_pad=0.08)
    fig.supxlabel("\n".join(notes), fontsize=7.5, color=st.MUTED, ha="left", x=0.01)
    return fig


# ----------------------------------------------------------------------------- scalogram

def _check_classes(classes: object) -> pd.DataFrame | None:
    if classes is None:
        return None
    frame = ck.check_frame("classes", classes, ("name", "low", "high"))
    low = ck.check_numeric("classes['low']", frame["low"])
    high = ck.check_numeric("classes['high']", frame["high"])
    if np.any(low <= 0) or np.any(high <= low):
        raise InputError("`classes` need 0 < low < high in map units for every class; got "
                         f"low={low.tolist()}, high={high.tolist()}")
    return pd.DataFrame({"name": frame["name"].astype(str).to_numpy(), "low": low,
                         "high": high})


@st.styled
def scalogram_figure(r2: pd.Series, scale: pd.Series, *, selected: Iterable[str] = (),
                     classes: pd.DataFrame | None = None, unit: str = "m",
                     title: str = "Community variation by spatial scale") -> Figure:
    """Draw the share of community variation carried by each spatial vector against its scale.

    Vectors are placed at their scale in map units on a logarithmic axis (fine structures on
    the left, broad on the right); each is a stem whose height is its R² (share of the total
    variation of the transformed community table). Selected vectors are coloured and named
    (only the ten with the largest R² when more than fifteen are selected); the others are
    grey. Scale classes, when given, are shaded bands with their names on top.

    Parameters
    ----------
    r2 : Series indexed by vector name, R² of each vector (≥ 0).
    scale : Series indexed by vector name (at least the names of ``r2``), scale in map units.
    selected : names of the vectors kept by selection.
    classes : DataFrame with columns ``name``, ``low``, ``high`` (map units), one row per class.
    unit : unit symbol for the axis label (see :func:`unit_symbol`).
    title : figure title.

    Examples
    --------
    >>> import pandas as pd
    >>> names = ["sv001", "sv002", "sv003"]
    >>> fig = scalogram_figure(pd.Series([0.10, 0.04, 0.01], index=names),
    ...                        pd.Series([4000.0, 2000.0, 800.0], index=names),
    ...                        selected=["sv001"])
    >>> fig.axes[0].get_xscale()
    'log'
    """
    r2, scale = ck.check_series_pair("r2", r2, "scale", scale)
    if (r2 < -1e-12).any():
        raise InputError(f"`r2` must be ≥ 0; vector {r2.idxmin()!r} has {r2.min()!r}")
    if (scale <= 0).any():
        raise InputError(f"`scale` must be > 0 map units; vector {scale.idxmin()!r} has "
                         f"{scale.min()!r}")
    sel = ck.check_selected(selected, r2.index, "selected")
    bands = _check_classes(classes)
    fig = Figure(figsize=(8.0, 3.6), layout="constrained")
    ax = fig.add_subplot()
    ax.set_xscale("log")
    top = float(r2.max()) * 1.28 if r2.max() > 0 else 1.0
    class_labels = []
    if bands is not None:
        trans = blended_transform_factory(ax.transData, ax.transAxes)
        colours = st.scale_class_colours(bands["low"].tolist())
        for row, (tint, strong) in zip(bands.itertuples(), colours):
            ax.axvspan(row.low, row.high, color=tint, zorder=0, lw=0)
            for edge in (row.low, row.high):
                ax.axvline(edge, color="#c3cad4", lw=0.8, ls=(0, (3, 3)), zorder=0.5)
            class_labels.append(ax.text(np.sqrt(row.low * row.high), 0.985, row.name,
                                        transform=trans, ha="center", va="top", fontsize=8,
                                        color=strong, fontweight="bold", gid="class-label"))
    mask = r2.index.isin(sel)
    ax.vlines(scale[~mask], 0, r2[~mask], color=st.MUTED, lw=1.0, zorder=2)
    ax.scatter(scale[~mask], r2[~mask], s=12, color=st.MUTED, zorder=3, gid="other-vector")
    accent = st.group_colour(1)
    ax.vlines(scale[mask], 0, r2[mask], color=accent, lw=2.0, zorder=4)
    ax.scatter(scale[mask], r2[mask], s=34, color=accent, zorder=5, gid="selected-vector",
               edgecolor="white", linewidth=0.6)
    named = sel if len(sel) <= 15 else list(r2[sel].nlargest(10).index)  # avoid clutter
    names = [ax.annotate(str(name), (scale[name], r2[name]), xytext=(0, 5),
                         textcoords="offset points", ha="center", fontsize=7, color=accent,
                         gid="vector-label",
                         arrowprops=dict(arrowstyle="-", color=accent, lw=0.4, alpha=0.6,
                                         shrinkA=0, shrinkB=3))
             for name in sorted(named, key=lambda v: scale[v])]
    lo, hi = float(scale.min()), float(scale.max())
    if bands is not None:
        lo, hi = min(lo, bands["low"].min()), max(hi, bands["high"].max())
    ax.set_xlim(lo / 1.25, hi * 1.25)
    log_axis(ax.xaxis, lo / 1.25, hi * 1.25)
    ax.set_ylim(0, top)
    ax.grid(axis="y", zorder=0)
    ax.set_xlabel(f"scale ({unit}, logarithmic)   fine  ←  →  broad")
    ax.set_ylabel("R²  (share of variation)")
    legend = ax.legend(handles=[Line2D([], [], marker="o", color=accent, lw=2,
                                       label="selected"),
                                Line2D([], [], marker="o", color=st.MUTED, lw=1,
                                       label="not selected")],
                       loc="upper left", bbox_to_anchor=(0.0, 0.9))
    ax.set_title(title)
    thin_tick_labels(fig, ax.xaxis)
    repel_labels(fig, names, obstacles=[legend, *class_labels])
    return fig


# ----------------------------------------------------------------------------- triplot

def _check_scores(name: str, frame: object, axes: Sequence[int], columns: pd.Index | None
                  ) -> pd.DataFrame | None:
    if frame is None:
        return None
    if not isinstance(frame, pd.DataFrame):
        raise InputError(f"`{name}` must be a DataFrame (rows × canonical axes); got "
                         f"{type(frame).__name__}")
    if columns is not None and list(frame.columns[:len(columns)]) != list(columns):
        raise InputError(f"`{name}` columns {list(frame.columns)} must start with the axes of "
                         f"`site_scores` {list(columns)}")
    if frame.shape[1] <= max(axes):
        raise InputError(f"`{name}` has {frame.shape[1]} axes; axes {tuple(axes)} requested")
    ck.check_numeric(name, frame.iloc[:, list(axes)])
    return frame


def _check_factors(factors: object, sites: pd.DataFrame) -> dict[str, pd.Series]:
    if factors is None:
        return {}
    if not isinstance(factors, Mapping):
        raise InputError("`factors` must map each categorical variable's name to a Series of "
                         f"its level at every site; got {type(factors).__name__}")
    out = {}
    for name, labels in factors.items():
        if not isinstance(labels, pd.Series) or not labels.index.equals(sites.index):
            raise InputError(f"`factors[{name!r}]` must be a Series indexed like "
                             "`site_scores` (the level of that variable at each site)")
        out[str(name)] = labels.astype(str)
    return out


@st.styled
def triplot_figure(site_scores: pd.DataFrame, species_scores: pd.DataFrame,
                   variable_scores: pd.DataFrame | None, eigenvalues: pd.Series, *,
                   scaling: int, total_variance: float | None = None,
                   axes: tuple[int, int] = (0, 1), n_labels: int = 10,
                   species_stretch: str = "auto", title: str | None = None,
                   factors: Mapping[str, pd.Series] | None = None) -> Figure:
    """Draw an ordination of sites (points) and species (triangles), with the explanatory
    variables kept: numeric ones as arrows, categorical ones as the centroids of their levels.

    The scores are drawn as given, already in the requested scaling. Only the ``n_labels``
    species farthest from the origin in the plotted plane are named, and labels are nudged
    apart so none overlaps another. Arrows (and, when they huddle at the origin, species) are
    stretched by one common factor so they span the cloud of points; their directions and
    relative lengths are what matters (the factor is printed in the corner). A categorical
    variable (``factors``) is drawn as one diamond per level at the mean position of the sites
    of that level, its reference level included and marked "(reference)"; its indicator
    columns in ``variable_scores`` (named ``variable[level]``) are then not drawn as arrows.
    Without ``variable_scores`` the figure is an unconstrained ordination (no environmental
    variable kept) and is titled as such. In scaling 1 read distances among sites (they
    approximate their distances in the transformed community table); in scaling 2 read angles
    among species and variable arrows (they approximate correlations).

    Parameters
    ----------
    site_scores : DataFrame, sites × axes (columns are axis names; they are labelled
        "axis 1", "axis 2" … in order). With a single constrained axis, pass the first residual
        axis as the second column, with its eigenvalue in ``eigenvalues``.
    species_scores : DataFrame, species × the same axes.
    variable_scores : DataFrame, explanatory variables × the same axes, or None (no
        environmental variable kept: an unconstrained ordination).
    eigenvalues : Series indexed by axis name (at least the plotted axes), variance of each axis.
    scaling : 1 or 2, used in the title and the reading note.
    total_variance : total variance of the (transformed) community table; axis labels then give
        the percentage of total variation. Without it, the percentage of the eigenvalues given.
    axes : positions of the two axes to plot.
    n_labels : number of species named.
    species_stretch : ``"auto"`` multiplies all species scores by one common factor when
        their cloud is under 40 % of the sites' extent (common in scaling 2), so that they can
        be read; angles and length ratios among species are unchanged and the factor is
        printed in the corner. ``"none"`` draws them as given.
    title : replaces the default title.
    factors : categorical variable name → Series of its level at each site (indexed like
        ``site_scores``), or None.

    Examples
    --------
    >>> import numpy as np, pandas as pd
    >>> rng = np.random.default_rng(20260512)
    >>> ax_names = ["canonical_1", "canonical_2"]
    >>> sites = pd.DataFrame(rng.normal(size=(20, 2)), columns=ax_names)
    >>> species = pd.DataFrame(rng.normal(size=(8, 2)), columns=ax_names,
    ...                        index=[f"sp{i}" for i in range(8)])
    >>> env = pd.DataFrame([[0.8, 0.1], [-0.2, 0.7]], columns=ax_names, index=["pH", "depth"])
    >>> fig = triplot_figure(sites, species, env, pd.Series([0.3, 0.1], index=ax_names),
    ...                      scaling=2, total_variance=1.0, n_labels=3)
    >>> fig.axes[0].get_xlabel()
    'axis 1 (30.0 % of total variation)'
    """
    if scaling not in (1, 2):
        raise InputError(f"`scaling` must be 1 or 2; got {scaling!r}")
    if (len(axes) != 2 or any(not isinstance(a, (int, np.integer)) or a < 0 for a in axes)
            or axes[0] == axes[1]):
        raise InputError(f"`axes` must be two different non-negative positions; got {axes!r}")
    check_option("species_stretch", species_stretch, ("auto", "none"))
    if isinstance(n_labels, bool) or not isinstance(n_labels, (int, np.integer)) or n_labels < 0:
        raise InputError(f"`n_labels` must be a non-negative integer; got {n_labels!r}")
    sites = _check_scores("site_scores", site_scores, axes, None)
    cols = sites.columns  # type: ignore[union-attr]
    species = _check_scores("species_scores", species_scores, axes, cols)
    variables = _check_scores("variable_scores", variable_scores, axes, cols)
    levels_at = _check_factors(factors, sites)  # type: ignore[arg-type]
    if not isinstance(eigenvalues, pd.Series):
        raise InputError("`eigenvalues` must be a Series indexed by axis name")
    names = [cols[a] for a in axes]
    missing = [a for a in names if a not in eigenvalues.index]
    if missing:
        raise InputError(f"`eigenvalues` has no value for axis {missing[0]!r}")
    lam = ck.check_numeric("eigenvalues", eigenvalues)
    if total_variance is None:
        denom, what = float(lam.sum()), "of the axes shown"
    else:
        denom, what = float(total_variance), "of total variation"
        if not np.isfinite(denom) or denom <= 0:
            raise InputError(f"`total_variance` must be > 0; got {total_variance!r}")
    constrained = variables is not None and len(variables) > 0

    fig = Figure(figsize=(6.6, 6.2), layout="constrained")
    ax = fig.add_subplot()
    ax.axhline(0, color=st.GRID, lw=1.0, zorder=0)
    ax.axvline(0, color=st.GRID, lw=1.0, zorder=0)
    s_xy = sites.iloc[:, list(axes)].to_numpy(float)  # type: ignore[union-attr]
    p_xy = species.iloc[:, list(axes)].to_numpy(float)  # type: ignore[union-attr]
    notes = []
    site_radius = float(np.max(np.hypot(s_xy[:, 0], s_xy[:, 1]))) if len(s_xy) else 0.0
    species_radius = float(np.max(np.hypot(p_xy[:, 0], p_xy[:, 1]))) if len(p_xy) else 0.0
    if (species_stretch == "auto" and species_radius > 0
            and species_radius < 0.4 * site_radius):
        # a cloud of species squeezed at the origin cannot be read; one common factor keeps
        # every angle and every ratio of lengths among species
        factor = 0.8 * site_radius / species_radius
        p_xy = p_xy * factor
        notes.append(f"species × {factor:.3g}")
    ax.scatter(s_xy[:, 0], s_xy[:, 1], s=16 if len(s_xy) <= 2000 else 3,
               color=st.group_colour(0), alpha=0.75, edgecolor="white",
               linewidth=0.4 if len(s_xy) <= 2000 else 0.0, zorder=2, gid="site-scores",
               label="sites", rasterized=len(s_xy) > 5000)
    ax.scatter(p_xy[:, 0], p_xy[:, 1], s=22, marker="^", color=st.group_colour(2),
               zorder=3, gid="species-scores", label="species")
    halo = [withStroke(linewidth=2.5, foreground="white")]
    labels = []
    length = np.hypot(p_xy[:, 0], p_xy[:, 1])
    for i in np.argsort(-length, kind="stable")[:n_labels]:
        labels.append(ax.annotate(
            str(species.index[i]), p_xy[i], xytext=(3, 3),  # type: ignore[union-attr]
            textcoords="offset points", fontsize=7.5, color="#00684c", gid="species-label",
            path_effects=halo, arrowprops=dict(arrowstyle="-", color="#00684c", lw=0.4,
                                               alpha=0.6, shrinkA=0, shrinkB=2)))
    radius = float(np.max(np.abs(np.vstack([s_xy, p_xy])))) or 1.0
    accent = st.group_colour(1)
    indicator_names: set[str] = set()
    if constrained:
        kept = [str(v) for v in variables.index]  # type: ignore[union-attr]
        for name, at in levels_at.items():
            shown = [v for v in kept if v.startswith(f"{name}[") and v.endswith("]")]
            if not shown:
                continue
            indicator_names.update(shown)
            present = {v[len(name) + 1:-1] for v in shown}
            for level in pd.unique(at.to_numpy()):
                inside = (at == level).to_numpy()
                if not inside.any():
                    continue
                cx, cy = s_xy[inside].mean(axis=0)
                reference = level not in present
                ax.scatter([cx], [cy], marker="D", s=48, color=accent, edgecolor="white",
                           linewidth=0.8, zorder=5, gid="level-centroid")
                labels.append(ax.annotate(
                    f"{name}: {level}" + (" (reference)" if reference else ""), (cx, cy),
                    xytext=(5, -9), textcoords="offset points", fontsize=8, color=accent,
                    fontweight="bold", fontstyle="italic" if reference else "normal",
                    gid="level-label", path_effects=[withStroke(linewidth=3,
                                                                foreground="white")],
                    arrowprops=dict(arrowstyle="-", color=accent, lw=0.4, alpha=0.6,
                                    shrinkA=0, shrinkB=3)))
        arrows = variables.loc[[v for v in kept  # type: ignore[union-attr]
                                if v not in indicator_names]]
        if len(arrows):
            v_xy = arrows.iloc[:, list(axes)].to_numpy(float)
            longest = float(np.max(np.hypot(v_xy[:, 0], v_xy[:, 1]))) or 1.0
            stretch = 0.85 * radius / longest
            for (name, (vx, vy)) in zip(arrows.index, v_xy * stretch):
                ax.annotate("", xy=(vx, vy), xytext=(0, 0), zorder=4, gid="variable-arrow",
                            arrowprops=dict(arrowstyle="-|>", color=accent, lw=1.4,
                                            shrinkA=0, shrinkB=0))
                norm = float(np.hypot(vx, vy)) or 1.0
                labels.append(ax.annotate(
                    str(name), (vx, vy), xytext=(8 * vx / norm, 8 * vy / norm),
                    textcoords="offset points", color=accent, fontsize=8.5,
                    fontweight="bold", ha="center", va="center", zorder=5,
                    gid="variable-label",
                    path_effects=[withStroke(linewidth=3, foreground="white")]))
            notes.append(f"arrows × {stretch:.3g}")
    lim = radius * 1.18
    ax.set_xlim(-lim, lim)
    ax.set_ylim(-lim, lim)
    ax.set_aspect("equal")
    for k, (name, a) in enumerate(zip(names, ("x", "y"))):
        pct = 100.0 * float(eigenvalues[name]) / denom
        getattr(ax, f"set_{a}label")(f"axis {axes[k] + 1} ({pct:.1f} % {what})")
    if scaling == 1:
        reading = "distances between sites approximate their community differences"
    elif constrained:
        reading = "angles between species and arrows approximate their correlations"
    else:
        reading = "angles between species approximate their correlations"
    ax.set_title(reading, fontsize=8.5, fontweight="normal", color=st.MUTED)
    default = (f"Triplot, scaling {scaling}" if constrained else
               f"Unconstrained ordination (no environmental variable kept), scaling {scaling}")
    fig.suptitle(title or default, x=0.02, ha="left", fontsize=10.5, fontweight="bold")
    handles, _ = ax.get_legend_handles_labels()
    if indicator_names:
        handles.append(Line2D([], [], marker="D", ls="", color=accent,
                              label="level centroids"))
    legend = ax.legend(handles=handles, loc="lower left", fontsize=7.5)
    obstacles: list = [legend]
    if notes:
        obstacles.append(ax.text(0.99, 0.01, ", ".join(notes), transform=ax.transAxes,
                                 ha="right", va="bottom", fontsize=7, color=st.MUTED,
                                 gid="stretch-note"))
    repel_labels(fig, labels, obstacles=obstacles)
    return fig


# ----------------------------------------------------------------------------- weighting

@st.styled
def weighting_figure(table: pd.DataFrame, *, alpha: float = 0.05,
                     corrected_alpha: float | None = None, chosen: str | None = None,
                     title: str = "Candidate spatial weighting schemes") -> Figure:
    """Compare candidate spatial weighting schemes: adjusted R² and p-value side by side.

    Left panel: adjusted R² of the spatial model built with each scheme (the chosen one in
    colour). Right panel: its p-value on a log axis with the nominal level ``alpha`` (dotted)
    and the level corrected for trying several schemes (solid, ``gid="corrected-level"``). A
    scheme counts only if its p is at or below the corrected level; the correction is computed
    by the statistics code and only drawn here.

    Parameters
    ----------
    table : DataFrame with columns ``scheme`` (str), ``r2_adj`` (float; NaN for a scheme under
        which nothing was selected: no bar, labelled "none selected"), ``p`` (float in (0, 1];
        NaN for a scheme that could not be built: no point, labelled "not built").
    alpha : nominal level.
    corrected_alpha : corrected level (e.g. Šidák for the number of schemes), or None.
    chosen : name of the retained scheme, or None.
    title : figure title.

    Examples
    --------
    >>> import pandas as pd
    >>> t = pd.DataFrame({"scheme": ["gabriel/binary", "delaunay/linear"],
    ...                   "r2_adj": [0.12, 0.09], "p": [0.002, 0.03]})
    >>> fig = weighting_figure(t, corrected_alpha=0.025321, chosen="gabriel/binary")
    >>> [l.get_xdata()[0] for l in fig.axes[1].lines if l.get_gid() == "corrected-level"]
    [0.025321]
    """
    frame = ck.check_frame("table", table, ("scheme", "r2_adj", "p"))
    alpha = check_real("alpha", alpha, low=0.0, high=1.0, low_inclusive=False)
    if corrected_alpha is not None:
        corrected_alpha = check_real("corrected_alpha", corrected_alpha, low=0.0, high=alpha,
                                     low_inclusive=False)
    r2 = ck.check_numeric("table['r2_adj']", frame["r2_adj"], finite=False)
    if np.isinf(r2).any():
        raise InputError("`table['r2_adj']` has an infinite value; use NaN for a scheme under "
                         "which nothing was selected")
    p = np.array([np.nan if ck.check_p(v) is None else ck.check_p(v) for v in frame["p"]],
                 dtype=float)
    schemes = [str(s) for s in frame["scheme"]]
    if chosen is not None and chosen not in schemes:
        raise InputError(f"`chosen` {chosen!r} is not one of the schemes {schemes}")
    level = corrected_alpha if corrected_alpha is not None else alpha
    n = len(schemes)
    y = np.arange(n)[::-1]
    fig = Figure(figsize=(8.0, 1.3 + 0.36 * n), layout="constrained")
    ax_r, ax_p = fig.subplots(1, 2, sharey=True, width_ratios=[1.2, 1.0])
    colours = [st.group_colour(1) if s == chosen else st.MUTED for s in schemes]
    drawn = np.isfinite(r2)
    ax_r.barh(y[drawn], r2[drawn], color=[c for c, d in zip(colours, drawn) if d], height=0.6,
              zorder=2)
    for yy, has_bar, has_p in zip(y, drawn, np.isfinite(p)):
        if not has_bar:
            ax_r.text(0, yy, "  none selected" if has_p else "  not built", va="center",
                      ha="left", fontsize=8, color=st.MUTED, gid="no-bar-label")
    ax_r.axvline(0, color=st.INK, lw=0.8)
    ax_r.set_yticks(y, schemes)
    ax_r.set_xlabel("adjusted R² of the spatial model")
    ax_r.xaxis.set_label_coords(0.5, -0.12)
    ax_r.grid(axis="x", zorder=0)
    filled = p <= level
    above = np.isfinite(p) & ~filled
    ax_p.scatter(p[filled], y[filled], s=40, color=[c for c, f in zip(colours, filled) if f],
                 zorder=3, gid="p-below-level", label="p at or below the level used")
    ax_p.scatter(p[above], y[above], s=40, facecolor="white", zorder=3,
                 edgecolor=[c for c, f in zip(colours, above) if f], gid="p-above-level",
                 label="p above it")
    ax_p.set_xscale("log")
    ax_p.axvline(alpha, color=st.MUTED, ls=":", lw=1.2, label=f"nominal α = {alpha:g}")
    if corrected_alpha is not None:
        ax_p.axvline(corrected_alpha, color=st.INK, lw=1.3, gid="corrected-level",
                     label=f"corrected α′ = {corrected_alpha:.4g}")
    lo = min(np.nanmin(p) if np.isfinite(p).any() else level, level) / 3
    ax_p.set_xlim(lo, 1.5)
    log_axis(ax_p.xaxis, lo, 1.5)
    ax_p.set_xlabel("p-value (log axis)")
    ax_p.xaxis.set_label_coords(0.5, -0.12)
    ax_p.grid(axis="x", which="major", zorder=0)
    handles = [h for h in ax_p.get_legend_handles_labels()[0]
               if not (hasattr(h, "get_offsets") and len(h.get_offsets()) == 0)]
    ax_p.legend(handles=handles, loc="lower left", bbox_to_anchor=(0.0, 1.0), ncols=2,
                fontsize=7.5, borderaxespad=0.2)
    ax_p.tick_params(axis="y", left=False)
    fig.suptitle(title, x=0.01, ha="left", fontsize=10.5, fontweight="bold")
    thin_tick_labels(fig, ax_p.xaxis)
    thin_tick_labels(fig, ax_r.xaxis)
    return fig


# ----------------------------------------------------------------------------- Moran vs scale

@st.styled
def moran_scale_figure(moran_i: pd.Series, scale: pd.Series, *, selected: Iterable[str] = (),
                       expected: float | None = None, unit: str = "m",
                       title: str = "Spatial vectors: autocorrelation against scale") -> Figure:
    """Plot each spatial vector's Moran's I against its scale in map units (log axis).

    A quick check of the basis: broad vectors should have high positive I, fine ones low I.
    Selected vectors are coloured; ``expected`` (Moran's I expected without autocorrelation,
    −1/(n − 1)) is drawn as a reference line when given.

    Parameters
    ----------
    moran_i : Series indexed by vector name.
    scale : Series indexed by vector name (at least those of ``moran_i``), map units.
    selected : names of selected vectors.
    expected : reference value of I, or None for no line.
    unit : unit symbol for the axis label.
    title : figure title.

    Examples
    --------
    >>> import pandas as pd
    >>> names = ["sv001", "sv002"]
    >>> fig = moran_scale_figure(pd.Series([0.9, 0.4], index=names),
    ...                          pd.Series([3000.0, 900.0], index=names), expected=-1 / 49)
    >>> len(fig.axes)
    1
    """
    moran_i, scale = ck.check_series_pair("moran_i", moran_i, "scale", scale)
    if (scale <= 0).any():
        raise InputError(f"`scale` must be > 0 map units; got minimum {scale.min()!r}")
    sel = ck.check_selected(selected, moran_i.index, "selected")
    mask = moran_i.index.isin(sel)
    fig = Figure(figsize=(6.0, 3.4), layout="constrained")
    ax = fig.add_subplot()
    ax.set_xscale("log")
    ax.scatter(scale[~mask], moran_i[~mask], s=14, color=st.MUTED, zorder=2,
               label="not selected")
    ax.scatter(scale[mask], moran_i[mask], s=36, color=st.group_colour(1), zorder=3,
               edgecolor="white", linewidth=0.6, label="selected", gid="selected-vector")
    if expected is not None:
        ax.axhline(float(expected), color=st.INK, lw=0.9, ls=(0, (4, 3)),
                   label=f"no autocorrelation (I = {float(expected):.3f})")
    ax.grid(zorder=0)
    lo, hi = float(scale.min()) / 1.25, float(scale.max()) * 1.25
    ax.set_xlim(lo, hi)
    log_axis(ax.xaxis, lo, hi)
    ax.set_xlabel(f"scale ({unit}, logarithmic)")
    ax.set_ylabel("Moran's I")
    ax.legend(loc="upper left")
    ax.set_title(title)
    return fig
