"""Report of a repeated-survey analysis: figures, tables, map layer, summary and run folder.

Figures (matplotlib, the package's style):

* :func:`change_map_figure` — where the community changed: two map panels side by side, losses
  on a white → vermillion ramp and gains on a white → bluish-green ramp, on one common scale so
  the panels compare directly; exceptional sites (Holm-adjusted p ≤ alpha) are ringed in black in
  both panels; scale bar and north arrow;
* :func:`loss_gain_figure` — losses against gains per site with the 1:1 line; above the line a
  site gained more than it lost; exceptional sites are filled and labelled.

:func:`change_summary` gives the JSON-safe ``summary.json`` record (NaN → null, floats rounded
to 12 significant digits so that results repeat byte for byte across BLAS thread counts);
:func:`render_change_report` the self-contained HTML page (template ``templates/change.html``,
figures embedded as data URIs); :func:`write_change_folder` writes the whole run folder inside
:func:`~spatial_ev.report.folder.atomic_folder`::

    summary.json     results (keys listed in change_summary)
    manifest.json    versions, inputs' SHA-256, parameters, seed
    report.html      the report page
    figures/         change_map and loss_gain as PNG and SVG
    tables/          space_time_tests.csv, within_surveys.csv, within_sites.csv, site_change.csv
    change.gpkg      layer ``site_change``: one point (or polygon) per site with its change
"""

from __future__ import annotations

import base64
import io
import json
import math
import os
import platform
import sys
import warnings
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import geopandas as gpd
import jinja2
import numpy as np
import pandas as pd
from matplotlib.colors import LinearSegmentedColormap, Normalize
from matplotlib.figure import Figure
from matplotlib.patheffects import withStroke

from spatial_ev import __version__
from spatial_ev.errors import InputError
from spatial_ev.input.io import file_sha256
from spatial_ev.pipeline.repeated import RepeatedAnalysis
from spatial_ev.report import _style as st
from spatial_ev.report.figures import save_figure, unit_symbol
from spatial_ev.report.folder import atomic_folder
from spatial_ev.report.layers import write_layers, write_table
from spatial_ev.report.maps import nice_scale_bar
from spatial_ev.report.run_folder import library_versions

__all__ = ["change_map_figure", "loss_gain_figure", "change_summary", "change_layer",
           "change_tables", "render_change_report", "write_change_folder", "LOSS_RAMP",
           "GAIN_RAMP"]

LOSS_RAMP = LinearSegmentedColormap.from_list("spatial_ev_losses",
                                              ["#fbf7f3", "#f0b27f", "#d55e00", "#7a2f00"])
GAIN_RAMP = LinearSegmentedColormap.from_list("spatial_ev_gains",
                                              ["#f4f9f7", "#8fd0b8", "#009e73", "#00513a"])


def _check_analysis(analysis: Any) -> RepeatedAnalysis:
    if not isinstance(analysis, RepeatedAnalysis):
        raise InputError(f"`analysis` must be a RepeatedAnalysis (analyse_repeated); got "
                         f"{type(analysis).__name__}")
    return analysis


def _check_change_frame(frame: Any, columns: tuple[str, ...]) -> pd.DataFrame:
    if not isinstance(frame, pd.DataFrame):
        raise InputError(f"`sites` must be a (Geo)DataFrame with columns {list(columns)}; got "
                         f"{type(frame).__name__}")
    missing = [c for c in columns if c not in frame.columns]
    if missing:
        raise InputError(f"`sites` lacks column(s) {missing}; it needs {list(columns)} (e.g. "
                         f"from change_layer(analysis))")
    return frame


# ------------------------------------------------------------------------------------ figures

def _scale_bar(ax: Any, unit: str) -> None:
    xlim, ylim = ax.get_xlim(), ax.get_ylim()
    width, height = xlim[1] - xlim[0], ylim[1] - ylim[0]
    length, label = nice_scale_bar(width, unit=unit)
    x0, y0 = xlim[0] + 0.04 * width, ylim[0] + 0.05 * height
    ax.plot([x0, x0 + length], [y0, y0], color=st.INK, lw=2.2, solid_capstyle="butt",
            zorder=10, gid="scale-bar")
    ax.text(x0 + length / 2, y0 + 0.02 * height, label, ha="center", va="bottom", fontsize=8,
            zorder=10, path_effects=[withStroke(linewidth=3, foreground="white")])
    ax.annotate("N", xy=(0.95, 0.95), xytext=(0.95, 0.84), xycoords="axes fraction",
                ha="center", va="top", fontsize=8.5, fontweight="bold",
                arrowprops=dict(arrowstyle="-|>", color=st.INK, lw=1.3), gid="north-arrow")


@st.styled
def change_map_figure(sites: gpd.GeoDataFrame, *, unit: str = "m",
                      title: str | None = None) -> Figure:
    """Two map panels of per-site losses and gains on one scale, exceptional sites ringed.

    Parameters
    ----------
    sites : GeoDataFrame
        Columns ``losses``, ``gains`` (fractions of the dissimilarity, in [0, 1]) and
        ``exceptional`` (bool); point or polygon geometry (polygons drawn at their
        representative point).
    unit : str
        Map-unit symbol for the scale bar.
    title : str, optional
        Period shown after each panel's name (e.g. ``"2022 to 2024"``).

    Returns
    -------
    matplotlib.figure.Figure

    Examples
    --------
    >>> import shapely
    >>> g = gpd.GeoDataFrame({"losses": [0.1, 0.6], "gains": [0.2, 0.0],
    ...                       "exceptional": [False, True]},
    ...                      geometry=[shapely.Point(0, 0), shapely.Point(10, 5)])
    >>> len(change_map_figure(g).axes)  # two panels and their colour bars
    4
    """
    frame = _check_change_frame(sites, ("losses", "gains", "exceptional"))
    if not isinstance(frame, gpd.GeoDataFrame) or len(frame) == 0:
        raise InputError("`sites` must be a non-empty GeoDataFrame with the site geometry")
    points = frame.geometry.representative_point()
    x, y = points.x.to_numpy(), points.y.to_numpy()
    losses = frame["losses"].to_numpy(dtype=float)
    gains = frame["gains"].to_numpy(dtype=float)
    flagged = frame["exceptional"].to_numpy(dtype=bool)
    if np.isnan(losses).all():
        raise InputError("`sites` has no losses/gains (the Hellinger and chord distances have "
                         "no decomposition); map the dissimilarity instead")
    top = float(np.nanmax(np.concatenate([losses, gains]))) or 1.0
    norm = Normalize(0.0, top)
    span = max(np.ptp(x), np.ptp(y), 1e-12)
    aspect = (np.ptp(y) + 0.1 * span) / (np.ptp(x) + 0.1 * span)
    fig = Figure(figsize=(10.0, max(3.2, min(8.0, 4.7 * aspect + 1.3))), layout="constrained")
    axes = fig.subplots(1, 2, sharex=True, sharey=True)
    size = float(np.clip(1.2e4 / len(x), 12, 90))
    for ax, values, ramp, name in ((axes[0], losses, LOSS_RAMP, "Losses"),
                                   (axes[1], gains, GAIN_RAMP, "Gains")):
        order = np.argsort(values)
        ax.scatter(x[order], y[order], c=values[order], cmap=ramp, norm=norm, s=size,
                   edgecolors="#9aa3b0", linewidths=0.3, zorder=3, gid=f"{name.lower()}-sites")
        if flagged.any():
            ax.scatter(x[flagged], y[flagged], s=size * 2.6, facecolors="none",
                       edgecolors=st.INK, linewidths=1.4, zorder=4, gid="exceptional")
        ax.set_title(f"{name}, {title}" if title else name)
        ax.set_aspect("equal")
        ax.set_xticks([])
        ax.set_yticks([])
        for spine in ax.spines.values():
            spine.set_visible(True)
            spine.set_color(st.GRID)
        pad = 0.05 * span
        ax.set_xlim(x.min() - pad, x.max() + pad)
        ax.set_ylim(y.min() - pad, y.max() + pad)
        fig.colorbar(ax.collections[0], ax=ax, orientation="horizontal", fraction=0.05,
                     pad=0.04, label=f"{name.lower()} (share of the change index)")
    _scale_bar(axes[0], unit)
    if flagged.any():
        axes[1].scatter([], [], s=size * 2.6, facecolors="none", edgecolors=st.INK,
                        linewidths=1.4, label="exceptional change")
        axes[1].legend(loc="upper left")
    return fig


@st.styled
def loss_gain_figure(table: pd.DataFrame, *, before: str = "first survey",
                     after: str = "second survey", n_labels: int = 8) -> Figure:
    """Losses against gains per site, with the 1:1 line; exceptional sites filled and named.

    Parameters
    ----------
    table : DataFrame
        Columns ``losses``, ``gains``, ``exceptional`` (index = site ids).
    before, after : str
        Survey labels for the axis titles.
    n_labels : int
        Label at most this many exceptional sites (largest change first).

    Returns
    -------
    matplotlib.figure.Figure

    Examples
    --------
    >>> t = pd.DataFrame({"losses": [0.1, 0.5], "gains": [0.2, 0.1],
    ...                   "exceptional": [False, True]}, index=["a", "b"])
    >>> loss_gain_figure(t).axes[0].get_xlabel()
    'losses from first survey to second survey'
    """
    frame = _check_change_frame(table, ("losses", "gains", "exceptional"))
    losses = frame["losses"].to_numpy(dtype=float)
    gains = frame["gains"].to_numpy(dtype=float)
    if np.isnan(losses).all():
        raise InputError("`table` has no losses/gains (Hellinger or chord distance)")
    flagged = frame["exceptional"].to_numpy(dtype=bool)
    top = max(float(np.nanmax(losses)), float(np.nanmax(gains)), 1e-9) * 1.08
    fig = Figure(figsize=(5.6, 5.2))
    ax = fig.subplots()
    ax.fill_between([0, top], [0, top], [top, top], color="#eef7f3", zorder=0, lw=0)
    ax.fill_between([0, top], [0, 0], [0, top], color="#fcf1e8", zorder=0, lw=0)
    ax.plot([0, top], [0, top], color=st.INK, lw=1.0, ls=(0, (4, 3)), zorder=1, gid="one-to-one")
    ax.text(0.03 * top, 0.95 * top, "more gains than losses", color="#00694c", fontsize=8,
            va="top")
    ax.text(0.97 * top, 0.55 * top, "more losses\nthan gains", color="#9a4300", fontsize=8,
            ha="right", va="top")
    ax.scatter(losses[~flagged], gains[~flagged], s=18, facecolors="white",
               edgecolors=st.MUTED, linewidths=0.9, zorder=2, label="site")
    if flagged.any():
        ax.scatter(losses[flagged], gains[flagged], s=34, color=st.INK, zorder=3,
                   label="exceptional change", gid="exceptional")
        total = losses + gains
        idx = np.flatnonzero(flagged)
        for i in idx[np.argsort(-total[idx])][:n_labels]:
            ax.annotate(str(frame.index[i]), (losses[i], gains[i]), xytext=(4, 3),
                        textcoords="offset points", fontsize=7,
                        path_effects=[withStroke(linewidth=2.5, foreground="white")])
    ax.set_xlim(0, top)
    ax.set_ylim(0, top)
    ax.set_aspect("equal")
    ax.set_xlabel(f"losses from {before} to {after}")
    ax.set_ylabel(f"gains from {before} to {after}")
    ax.set_title("Losses and gains per site")
    ax.legend(loc="upper right", bbox_to_anchor=(1.0, 0.9))
    return fig


# ----------------------------------------------------------------------- tables and summary

def change_layer(analysis: RepeatedAnalysis) -> gpd.GeoDataFrame:
    """Per-site change as a GeoDataFrame in the working CRS (the ``site_change`` layer).

    Examples
    --------
    >>> from spatial_ev.pipeline.repeated import _example_analysis
    >>> change_layer(_example_analysis())["exceptional"].dtype.kind
    'b'
    """
    a = _check_analysis(analysis)
    sites = a.survey.base.sites
    frame = a.to_frame().drop(columns=["x", "y"])
    return gpd.GeoDataFrame(frame.set_axis(sites.index), geometry=sites.geometry,
                            crs=sites.crs)


def change_tables(analysis: RepeatedAnalysis) -> dict[str, pd.DataFrame]:
    """The CSV tables of a change run folder, by file stem.

    Examples
    --------
    >>> from spatial_ev.pipeline.repeated import _example_analysis
    >>> sorted(change_tables(_example_analysis()))
    ['site_change', 'space_time_tests']
    """
    a = _check_analysis(analysis)
    out = {"space_time_tests": a.space_time.to_frame().rename_axis("term"),
           "site_change": a.to_frame()}
    if a.space_time.within_surveys is not None:
        out["within_surveys"] = a.space_time.within_surveys
    if a.space_time.within_sites is not None:
        out["within_sites"] = a.space_time.within_sites
    return out


def _json_safe(value: Any) -> Any:
    if isinstance(value, Mapping):
        return {str(k): _json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_safe(v) for v in value]
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float):
        if not math.isfinite(value):
            return None
        return float(f"{value:.12g}")
    return value


def change_summary(analysis: RepeatedAnalysis) -> dict[str, Any]:
    """The ``summary.json`` record of a repeated-survey run.

    Keys: ``n_sites``, ``n_species``, ``n_surveys``, ``surveys``, ``times``, ``time_unit``,
    ``crs``, ``distance_unit``, ``transformation``, ``space_time`` (``tests`` → ``space``,
    ``time``, ``interaction`` each with ``r2``, ``r2_adj``, ``df_model``, ``df_residual``,
    ``pseudo_f``, ``p_value``...; ``interaction_significant``; ``within_surveys``;
    ``within_sites``), ``change`` (``index``, ``before``, ``after``, ``n_exceptional``,
    ``exceptional_sites``, ``balance``...), ``notes``, ``parameters``, ``version``. Floats are
    rounded to 12 significant digits; NaN becomes null.

    Examples
    --------
    >>> from spatial_ev.pipeline.repeated import _example_analysis
    >>> change_summary(_example_analysis())["change"]["index"]
    'percentage_difference'
    """
    a = _check_analysis(analysis)
    return _json_safe({**a.summary(), "version": __version__})


# -------------------------------------------------------------------------------------- HTML

def _uri(fig: Figure) -> str:
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=110, bbox_inches="tight", metadata={"Software": None})
    return "data:image/png;base64," + base64.b64encode(buffer.getvalue()).decode("ascii")


def _fmt(value: Any, digits: int = 3) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "–"
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        return f"{float(value):.{digits}g}"
    return str(value)


def _p(value: Any) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "–"
    return "< 0.001" if value < 0.001 else f"{value:.3f}"


def _reading(a: RepeatedAnalysis) -> list[str]:
    st_ = a.space_time
    t = st_.table
    out = []
    if st_.interaction_significant is not None:
        p = t.loc["interaction", "p_value"]
        if st_.interaction_significant:
            out.append(f"The spatial pattern of the community changed between surveys "
                       f"(space–time interaction, p = {_p(p)}).")
        else:
            out.append(f"No evidence that the spatial pattern changed between surveys "
                       f"(space–time interaction, p = {_p(p)}).")
    out.append(f"Differences among sites (space): p = {_p(t.loc['space', 'p_value'])}; "
               f"overall change between surveys (time): p = {_p(t.loc['time', 'p_value'])}.")
    s = a.change.summary()
    if s["n_exceptional"]:
        out.append(f"{s['n_exceptional']} of {s['n_sites']} sites changed exceptionally between "
                   f"{s['before']} and {s['after']} ({s['exceptional_losing']} mostly by losses, "
                   f"{s['exceptional_gaining']} mostly by gains).")
    else:
        out.append(f"No site changed exceptionally between {s['before']} and {s['after']} "
                   f"after correction for testing {s['n_sites']} sites.")
    b = a.change.balance
    if b is not None:
        out.append(f"Across sites, {b.dominant} dominated on average (mean losses "
                   f"{b.mean_losses:.3f}, mean gains {b.mean_gains:.3f}; paired test p = "
                   f"{_p(b.p_permutation if math.isfinite(b.p_permutation) else b.p_parametric)}"
                   f").")
    return out


def render_change_report(analysis: RepeatedAnalysis, *, title: str | None = None,
                         figures: Mapping[str, Figure] | None = None,
                         illustrative: bool = False) -> str:
    """The repeated-survey report as one self-contained HTML page.

    Parameters
    ----------
    analysis : RepeatedAnalysis
    title : str, optional
    figures : mapping, optional
        Figures by key (``change_map``, ``loss_gain``); default drawn here.
    illustrative : bool
        Show a banner saying the data are invented.

    Returns
    -------
    str

    Examples
    --------
    >>> from spatial_ev.pipeline.repeated import _example_analysis
    >>> "space–time" in render_change_report(_example_analysis())
    True
    """
    a = _check_analysis(analysis)
    figures = dict(figures) if figures is not None else _figures(a)
    uris = {k: _uri(f) for k, f in figures.items()}
    t = a.space_time.table
    term_names = {"space": "Space (sites)", "time": "Time (surveys)",
                  "interaction": "Space × time interaction"}
    tests = [[term_names[k], _fmt(row["df_model"]), _fmt(row["df_residual"]),
              _fmt(row["r2_adj"]), _fmt(row["pseudo_f"]), _p(row["p_value"]),
              "surveys" if row["within"] == "survey" else
              "sites" if row["within"] == "site" else "all observations"]
             for k, row in t.iterrows()]
    within_surveys = None
    if a.space_time.within_surveys is not None:
        within_surveys = [[str(k), _fmt(r["r2_adj"]), _fmt(r["pseudo_f"]), _p(r["p_value"]),
                           _p(r["p_adjusted"]), _fmt(bool(r["significant"]))]
                          for k, r in a.space_time.within_surveys.iterrows()]
    within_sites = None
    if a.space_time.within_sites is not None:
        w = a.space_time.within_sites
        within_sites = {"n": int(w["p_value"].notna().sum()),
                        "significant": [str(s) for s in w.index[w["significant"].to_numpy()]]}
    table = a.change.table
    flagged = table[table["exceptional"]].sort_values("dissimilarity", ascending=False)
    exceptional = [[str(k), _fmt(r["dissimilarity"]), _fmt(r["losses"]), _fmt(r["gains"]),
                    r["direction"], _p(r["p_value"]), _p(r["p_adjusted"])]
                   for k, r in flagged.iterrows()]
    s = a.survey.summary()
    index_names = {"percentage_difference": "percentage difference (abundances)",
                   "ruzicka": "Ružička (abundances)", "sorensen": "Sørensen (presence–absence)",
                   "jaccard": "Jaccard (presence–absence)", "hellinger": "Hellinger distance",
                   "chord": "chord distance"}
    env = jinja2.Environment(loader=jinja2.PackageLoader("spatial_ev.report", "templates"),
                             autoescape=True, undefined=jinja2.StrictUndefined)
    return env.get_template("change.html").render(
        title=title or "Repeated survey: change in space and time",
        illustrative=illustrative, version=__version__, reading=_reading(a), data=s,
        tests=tests, within_surveys=within_surveys, within_sites=within_sites,
        exceptional=exceptional, change=a.change.summary(),
        index_name=index_names[a.change.index], alpha=a.change.alpha, figures=uris,
        notes=list(a.notes), transformation=a.transformation,
        n_space_vectors=len(a.space_time.space_vectors),
        n_time_vectors=a.space_time.n_time_vectors, parameters=a.parameters)


def _figures(a: RepeatedAnalysis) -> dict[str, Figure]:
    if a.change.balance is None:
        return {}
    unit = unit_symbol(a.survey.base.distance_unit)
    title = f"{a.change.before} to {a.change.after}"
    return {"change_map": change_map_figure(change_layer(a), unit=unit, title=title),
            "loss_gain": loss_gain_figure(a.change.table, before=a.change.before,
                                          after=a.change.after)}


# -------------------------------------------------------------------------------- run folder

def _manifest(a: RepeatedAnalysis, inputs: Mapping[str, Any] | None,
              parameters: Mapping[str, Any] | None) -> dict[str, Any]:
    versions = library_versions()
    files = {}
    for role, path in (dict(inputs) if inputs else {}).items():
        paths = path if isinstance(path, (list, tuple)) else [path]
        entries = [{"path": str(Path(p).resolve()), "sha256": file_sha256(Path(p)),
                    "bytes": Path(p).stat().st_size} for p in paths if Path(p).is_file()]
        if entries:
            files[role] = entries if isinstance(path, (list, tuple)) else entries[0]
    return _json_safe({
        "package": {"name": "spatial_ev", "version": __version__},
        "python": sys.version.split()[0], "platform": platform.platform(),
        "libraries": versions, "openblas_coretype": os.environ.get("OPENBLAS_CORETYPE"),
        "inputs": files,
        "parameters": {**a.parameters, **(dict(parameters) if parameters else {})},
        "seed": a.parameters.get("seed")})


def write_change_folder(analysis: RepeatedAnalysis, out: str | os.PathLike, *,
                        overwrite: bool = False, inputs: Mapping[str, Any] | None = None,
                        parameters: Mapping[str, Any] | None = None, title: str | None = None,
                        illustrative: bool = False) -> Path:
    """Write the run folder of a repeated-survey analysis, whole or not at all.

    Parameters
    ----------
    analysis : RepeatedAnalysis
    out : path
        Folder to create; an existing one is replaced only with ``overwrite=True``.
    inputs : mapping, optional
        Role → input file (or list of files), hashed into the manifest.
    parameters : mapping, optional
        Extra parameters recorded in the manifest (e.g. the command line).
    title : str, optional
    illustrative : bool
        Banner saying the data are invented (demo runs).

    Returns
    -------
    pathlib.Path

    Examples
    --------
    >>> import tempfile, pathlib
    >>> from spatial_ev.pipeline.repeated import _example_analysis
    >>> out = write_change_folder(_example_analysis(), pathlib.Path(tempfile.mkdtemp()) / "r")
    >>> (out / "summary.json").is_file()
    True
    """
    a = _check_analysis(analysis)
    out = Path(out)
    summary = change_summary(a)
    figures = _figures(a)
    manifest = _manifest(a, inputs, parameters)
    with atomic_folder(out, overwrite=overwrite) as tmp:
        (tmp / "summary.json").write_text(json.dumps(summary, indent=2, allow_nan=False) + "\n",
                                          encoding="utf-8")
        (tmp / "manifest.json").write_text(json.dumps(manifest, indent=2, allow_nan=False)
                                           + "\n", encoding="utf-8")
        tables = tmp / "tables"
        tables.mkdir()
        for name, table in change_tables(a).items():
            write_table(tables / f"{name}.csv", table)
        with warnings.catch_warnings():   # local planar coordinates have no CRS to write
            warnings.filterwarnings("ignore", message="'crs' was not provided")
            write_layers(tmp / "change.gpkg", {"site_change": change_layer(a)})
        if figures:
            folder = tmp / "figures"
            folder.mkdir()
            for name, fig in figures.items():
                save_figure(fig, folder, name)
        (tmp / "report.html").write_text(
            render_change_report(a, title=title, figures=figures, illustrative=illustrative),
            encoding="utf-8")
    return out
