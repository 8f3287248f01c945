"""Figures, HTML page and output folder of a sampling-design evaluation.

:func:`coverage_figure` (scales each layout represents, against the pilot's scale classes),
:func:`power_figure` (simulated detection probability per objective and layout, against the
target power), :func:`layout_map_figure` (the candidate layouts over the pilot sites) and
:func:`write_design_folder`, which writes a design folder atomically::

    design.json          coverage + power + fractions per layout, parameters, seed
    coverage.csv         one row per (layout, pilot scale class)
    power.csv            one row per (layout, objective)
    fractions.csv        bias and spread of each fraction's estimate per layout
    selection_stops.csv  why simulated selections stopped, per layout
    layouts.csv          one row per layout: cost, basis, scale range
    figures/             coverage, power and layout maps as PNG and SVG
    design_report.html   self-contained page with a "how to read / limits" section
    layouts.gpkg         one point layer per layout

Nothing here computes statistics; every number is read from the
:class:`~spatial_ev.design.evaluate.DesignEvaluation`.
"""

from __future__ import annotations

import json
import math
import os
import re
from pathlib import Path
from typing import Any

import jinja2
import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.ticker import MaxNLocator

from spatial_ev.design.evaluate import DesignEvaluation
from spatial_ev.errors import InputError
from spatial_ev.pipeline.analysis import Analysis
from spatial_ev.report import _style as st
from spatial_ev.report.figures import log_axis, save_figure, unit_symbol
from spatial_ev.report.folder import atomic_folder
from spatial_ev.report.html import figure_uri
from spatial_ev.report.layers import write_layers, write_table

__all__ = ["HEADERS", "coverage_figure", "power_figure", "layout_map_figure",
           "render_design_report", "write_design_folder", "layer_name", "plain_header"]


def _check_evaluation(evaluation: Any) -> DesignEvaluation:
    if not isinstance(evaluation, DesignEvaluation):
        raise InputError(f"`evaluation` must be a DesignEvaluation (from evaluate_design); got "
                         f"{type(evaluation).__name__}")
    return evaluation


# ----------------------------------------------------------------------------- figures

@st.styled
def coverage_figure(layouts: pd.DataFrame, classes: pd.DataFrame,
                    scales: dict[str, pd.Series], *, unit: str = "m",
                    title: str = "Scales each layout can represent") -> Figure:
    """One row per layout: its vectors' scales as ticks over the pilot's scale classes.

    Parameters
    ----------
    layouts : DataFrame indexed by layout name with ``n_sites``.
    classes : DataFrame with ``scale_class``, ``lower``, ``upper``, ``pilot_significant``
        (one row per class; the first layout's rows suffice) and, per layout, ``status``.
    scales : layout name → Series of vector scales (map units).
    unit : axis unit label.
    title : figure title.

    Returns
    -------
    Figure; the tick collections carry ``gid="layout-vectors"``.

    Examples
    --------
    >>> lay = pd.DataFrame({"n_sites": [50]}, index=pd.Index(["grid"], name="layout"))
    >>> cls = pd.DataFrame({"layout": ["grid"], "scale_class": ["broad"], "lower": [50.0],
    ...                     "upper": [np.inf], "pilot_significant": [True],
    ...                     "status": ["resolved"]})
    >>> fig = coverage_figure(lay, cls, {"grid": pd.Series([300.0, 120.0, 60.0])})
    >>> len(fig.axes)
    1
    """
    if not isinstance(layouts, pd.DataFrame) or not len(layouts):
        raise InputError("`layouts` must be a non-empty DataFrame indexed by layout name")
    names = list(layouts.index)
    missing = [n for n in names if n not in scales]
    if missing:
        raise InputError(f"`scales` has no vector scales for layout(s) {missing}")
    every = np.concatenate([np.asarray(scales[n], dtype=float) for n in names])
    if not np.all(np.isfinite(every)) or np.any(every <= 0):
        raise InputError("`scales` must hold positive finite scales in map units")
    lo, hi = float(every.min()) / 1.5, float(every.max()) * 1.5
    fig = Figure(figsize=(8.0, 1.6 + 0.55 * len(names)), layout="constrained")
    ax = fig.add_subplot()
    ax.set_xscale("log")
    # the scale-class colour code shared with the run report (finest class first)
    first = classes.drop_duplicates("scale_class")
    colours = st.scale_class_colours(first["lower"])
    for row, (tint, strong) in zip(first.itertuples(), colours):
        a, b = max(row.lower, lo), min(row.upper, hi)
        if b <= a:
            continue
        ax.axvspan(a, b, color=tint, lw=0, zorder=0)
        label = row.scale_class + (" *" if row.pilot_significant else "")
        ax.text(math.sqrt(a * b), len(names) - 0.35, label, ha="center", va="bottom",
                fontsize=8, color=strong, fontweight="bold", gid="class-label")
    status_colour = {"resolved": st.group_colour(0), "partly": st.HIGHLIGHT,
                     "not resolved": st.MUTED}
    for k, name in enumerate(names):
        y = len(names) - 1 - k
        s = np.asarray(scales[name], dtype=float)
        ax.vlines(s, y - 0.28, y + 0.28, color=st.INK, lw=0.7, zorder=3, gid="layout-vectors")
        ax.plot([s.min(), s.max()], [y, y], color=st.INK, lw=0.6, alpha=0.4, zorder=2)
        mine = classes[classes["layout"] == name] if "layout" in classes else classes
        for j, row in enumerate(mine.itertuples()):
            a, b = max(row.lower, lo), min(row.upper, hi)
            ax.plot([a * 1.02, b / 1.02], [y - 0.38, y - 0.38], lw=3.0, solid_capstyle="butt",
                    color=status_colour.get(row.status, st.MUTED), zorder=2, gid="class-status")
    ax.set_yticks(range(len(names)), [f"{n}  ({int(layouts.loc[n, 'n_sites'])} sites)"
                                      for n in names][::-1])
    ax.set_ylim(-0.8, len(names) - 0.1)
    ax.set_xlim(lo, hi)
    log_axis(ax.xaxis, lo, hi)
    ax.set_xlabel(f"scale of each spatial vector ({unit}, logarithmic)   fine  ←  →  broad")
    ax.tick_params(axis="y", left=False)
    ax.legend(handles=[Line2D([], [], color=c, lw=3, label=f"class {k}")
                       for k, c in status_colour.items()],
              loc="upper left", bbox_to_anchor=(0.0, -0.18), ncols=3, fontsize=7.5)
    ax.set_title(title)
    fig.supxlabel("Ticks: the layout's spatial vectors (positive Moran's I). Bar under each "
                  "class: resolved = its band holds the largest share of such structure. "
                  "* class significant in the pilot.", fontsize=7.5, color=st.MUTED,
                  ha="left", x=0.01)
    return fig


@st.styled
def power_figure(power: pd.DataFrame, *, target: float = 0.8,
                 title: str = "Simulated probability of detection") -> Figure:
    """Detection probability per objective, layouts ordered by cost, with its uncertainty.

    Parameters
    ----------
    power : DataFrame with ``layout``, ``objective``, ``power``, ``mc_se``, ``n_sites`` and
        optionally ``ci_low``, ``ci_high`` (drawn as the bars; else ± 2 ``mc_se``).
    target : target power, drawn as a line (``gid="target-power"``).
    title : figure title.

    Examples
    --------
    >>> t = pd.DataFrame({"layout": ["a", "b"], "objective": ["environment"] * 2,
    ...                   "power": [0.4, 0.9], "mc_se": [0.05, 0.03], "n_sites": [40, 90]})
    >>> fig = power_figure(t)
    >>> [l.get_ydata()[0] for l in fig.axes[0].lines if l.get_gid() == "target-power"]
    [0.8]
    """
    for col in ("layout", "objective", "power", "mc_se", "n_sites"):
        if col not in power.columns:
            raise InputError(f"`power` lacks column {col!r}")
    order = power.drop_duplicates("layout").sort_values("n_sites", kind="stable")["layout"]
    objectives = list(dict.fromkeys(power["objective"]))
    x = np.arange(len(order))
    fig = Figure(figsize=(max(6.0, 1.3 * len(order) + 3), 3.8), layout="constrained")
    ax = fig.add_subplot()
    width = 0.7 / max(len(objectives), 1)
    for j, obj in enumerate(objectives):
        part = power[power["objective"] == obj].set_index("layout").reindex(order)
        xs = x - 0.35 + width * (j + 0.5)
        colour = st.group_colour(j)
        p = part["power"].to_numpy(float)
        if {"ci_low", "ci_high"} <= set(part.columns):  # Wilson interval: informative at 0, 1
            yerr = np.clip(np.vstack([p - part["ci_low"].to_numpy(float),
                                      part["ci_high"].to_numpy(float) - p]), 0.0, None)
        else:
            e = 2 * part["mc_se"].to_numpy(float)
            yerr = np.vstack([np.minimum(e, p), np.minimum(e, 1 - p)])  # stay in [0, 1]
        ax.errorbar(xs, p, yerr=yerr, fmt="o", color=colour,
                    ms=5, lw=1.2, capsize=2, label=obj.replace("scale:", "scale class "),
                    gid="power-points")
    ax.axhline(target, color=st.INK, lw=1.0, ls=(0, (4, 3)), gid="target-power")
    ax.text(x[-1] + 0.45, target, f"target {target:g}", va="bottom", ha="right", fontsize=7.5)
    sites = power.drop_duplicates("layout").set_index("layout")["n_sites"]
    ax.set_xticks(x, [f"{n}\n({int(sites[n])} sites)" for n in order], fontsize=7.5)
    ax.set_ylim(-0.03, 1.05)
    ax.set_xlim(-0.6, len(order) - 0.4)
    ax.set_ylabel("probability of detection")
    ax.grid(axis="y", zorder=0)
    ax.legend(loc="upper left", bbox_to_anchor=(1.0, 1.0), fontsize=7.5)
    ax.set_title(title)
    bars = ("95 % Wilson intervals" if {"ci_low", "ci_high"} <= set(power.columns)
            else "± 2 Monte Carlo standard errors")
    fig.supxlabel(f"Bars: {bars}. Layouts from cheapest (left) to "
                  "dearest by number of sites. Power is for the pilot model's effect sizes.",
                  fontsize=7.5, color=st.MUTED, ha="left", x=0.01)
    return fig


@st.styled
def layout_map_figure(pilot_xy: np.ndarray, layouts: dict[str, pd.DataFrame], *,
                      unit: str = "m", title: str = "Candidate layouts") -> Figure:
    """Small multiples: each layout's sites (coloured) over the pilot sites (grey).

    Examples
    --------
    >>> xy = np.random.default_rng(20261202).uniform(0, 100, (30, 2))
    >>> fig = layout_map_figure(xy, {"a": pd.DataFrame(xy[:10], columns=["x", "y"])})
    >>> len(fig.axes)
    1
    """
    pilot_xy = np.asarray(pilot_xy, dtype=float)
    if not layouts:
        raise InputError("`layouts` is empty; nothing to draw")
    k = len(layouts)
    cols = min(3, k)
    rows = math.ceil(k / cols)
    fig = Figure(figsize=(3.0 * cols + 0.4, 3.0 * rows + 0.5), layout="constrained")
    axes = np.atleast_1d(fig.subplots(rows, cols, squeeze=False).ravel())
    allxy = np.vstack([pilot_xy] + [f[["x", "y"]].to_numpy() for f in layouts.values()])
    pad = 0.04 * max(np.ptp(allxy, axis=0).max(), 1e-9)
    for ax, (name, frame) in zip(axes, layouts.items()):
        ax.scatter(pilot_xy[:, 0], pilot_xy[:, 1], s=4, color=st.UNEXPLAINED, zorder=1)
        ax.scatter(frame["x"], frame["y"], s=7, color=st.group_colour(0), zorder=2,
                   gid="layout-sites")
        ax.set_title(f"{name} ({len(frame)} sites)", fontsize=8.5)
        ax.set_xlim(allxy[:, 0].min() - pad, allxy[:, 0].max() + pad)
        ax.set_ylim(allxy[:, 1].min() - pad, allxy[:, 1].max() + pad)
        ax.set_aspect("equal")
        ax.ticklabel_format(useOffset=False, style="plain")
        ax.xaxis.set_major_locator(MaxNLocator(3))
        ax.yaxis.set_major_locator(MaxNLocator(4))
        ax.tick_params(labelsize=6.5)
    for ax in axes[k:]:
        fig.delaxes(ax)
    fig.suptitle(f"{title} (grey: pilot sites; axes in {unit})", x=0.01, ha="left",
                 fontsize=10.5, fontweight="bold")
    return fig


def _figures(evaluation: DesignEvaluation, unit: str, pilot_xy: np.ndarray) -> dict[str, Figure]:
    cov = evaluation.coverage
    scales = {name: b.scale for name, b in cov.bases.items()}
    return {
        "design_coverage": coverage_figure(cov.layouts, cov.classes, scales, unit=unit),
        "design_power": power_figure(evaluation.power,
                                     target=evaluation.settings.target_power),
        "design_layouts": layout_map_figure(pilot_xy, {lay.name: lay.coords
                                                       for lay in evaluation.layouts},
                                            unit=unit),
    }


# ----------------------------------------------------------------------------- HTML

_PAGE = """<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<title>{{ title }}</title>
<style>
body{font-family:"DejaVu Sans",Arial,sans-serif;color:#1d2530;max-width:60rem;margin:2rem auto;
padding:0 1rem;line-height:1.45;font-size:15px}
h1{font-size:1.5rem;margin-bottom:.2rem}h2{font-size:1.15rem;margin-top:2rem;
border-bottom:1px solid #e4e8ee;padding-bottom:.2rem}
table{border-collapse:collapse;font-size:.85rem;margin:.6rem 0}
th,td{border-bottom:1px solid #e4e8ee;padding:.25rem .5rem;text-align:left}
th{background:#f5f7fa}td.num{text-align:right;font-variant-numeric:tabular-nums}
img{max-width:100%}.muted{color:#8a94a3}.rec{background:#eaf2fa;padding:.5rem .8rem;
margin:.4rem 0;border-left:4px solid #0072b2}
@media print{body{max-width:none}}
</style></head><body>
<h1>{{ title }}</h1>
<p class="muted">{{ subtitle }}</p>
<h2 id="recommendations">Recommendations</h2>
{% for r in recommendations %}<p class="rec">{{ r }}</p>{% endfor %}
<h2 id="layouts">Candidate layouts</h2>
{{ tables.layouts }}
<img alt="candidate layouts" src="{{ figures.design_layouts }}">
<h2 id="coverage">Spectral coverage: which scales each layout resolves</h2>
<p>Each layout's spatial basis uses the pilot's weighting scheme ({{ scheme }}; distance-based
where that graph cannot be built). For each pilot scale class, a field with the class's
wavelengths is sampled at the layout's sites: "carried" is the share of its variation on the
layout's vectors whose scale lies in the class's band, "aliased" the share on its other vectors
(broader or finer ones that pick it up). A class is <b>resolved</b> when its own band holds the
largest share, <b>partly</b> when it holds at least a quarter of what the basis captures but
another band holds more, <b>not resolved</b> otherwise (or when no vector lies in the band). A
layout is never recommended for a class it does not resolve. The finest scale listed is the
5 % quantile of the layout's vector scales; the broadest is twice the long side of its
extent. As a rule of thumb the finest wavelength a layout resolves is 2–4 sampling
intervals.</p>
<img alt="spectral coverage" src="{{ figures.design_coverage }}">
{{ tables.coverage }}
<h2 id="power">Simulated power</h2>
<p>{{ n_simulations }} simulated surveys per layout, {{ n_permutations }} permutations per
test, seed {{ seed }}; {{ truth }}. Power = share of simulations in which the analysis detected
the objective (environmental fraction: selected and its unique fraction significant; scale
class: the layout's selected vectors whose own scale lies in the class's band, tested jointly
given the other selected vectors, significant at α = {{ alpha }} after Holm's adjustment
across classes; spatial global test at {{ space_level }}). Replicate r draws the same
landscape at every layout, so layouts are compared on the same simulated surveys.</p>
<img alt="simulated power" src="{{ figures.design_power }}">
{{ tables.power }}
<h3>Why selection stopped</h3>
<p>Share of the simulations whose forward selection ended for each reason; when the
adjusted-R² ceiling ends most spatial selections, power may be understated.</p>
{{ tables.stops }}
<h2 id="fractions">Fractions: bias and spread of the estimates</h2>
<p>"truth" is the mean adjusted-R² partition with the generating predictors at the layout's
sites; bias is the mean of (estimate − truth) per simulation; sd is the spread of the
estimate. "pilot" is the pilot analysis's own estimate.</p>
{{ tables.fractions }}
<h2 id="limits">How to read this report, and its limits</h2>
<ul>
<li>The simulation assumes the pilot model is right: the selected environmental variables,
with linear effects, and each scale class's structure, as a stationary random field with the
class's wavelengths, species loadings and (selection-corrected) variance. Power is for this
model's effect sizes; weaker real effects need more sampling.</li>
<li>Stationarity: the structure seen in the pilot area is assumed to hold wherever a layout
samples.</li>
<li>Residuals: {{ residual_model }}.</li>
<li>Environment at new sites: {{ environment_source }}.</li>
<li>Costs are the number of sites (and line length for transects); travel and processing
costs are not modelled.</li>
<li>Spatial-eigenvector fractions can be inflated whatever the design (Gilbert &amp; Bennett
2010, J. Appl. Ecol. 47:1071–1082); extent, grain and spacing set distinct limits
(Dungan et al. 2002, Ecography 25:626–640).</li>
{% for n in notes %}<li>{{ n }}</li>{% endfor %}
</ul>
<p class="muted">spatial_ev {{ version }}</p>
</body></html>
"""


#: plain column headers of the HTML tables (CSV files keep the machine names)
HEADERS = {"n_sites": "sites", "line_length": "line length", "n_vectors": "vectors",
           "finest_scale": "finest scale", "broadest_scale": "broadest scale",
           "scale_class": "scale class", "pilot_significant": "significant in pilot",
           "pilot_vectors": "vectors selected in pilot", "layout_vectors": "vectors in band",
           "mc_se": "Monte Carlo SE", "ci_low": "95 % low", "ci_high": "95 % high",
           "mean_estimate": "mean estimate", "sd": "SD", "environment_only": "environment only",
           "space_only": "space only"}


def plain_header(name: str) -> str:
    """A table column's reader-facing header: no underscores, no machine abbreviations.

    Examples
    --------
    >>> plain_header("mc_se"), plain_header("space_stop")
    ('Monte Carlo SE', 'space stop')
    """
    return HEADERS.get(str(name), str(name).replace("_", " "))


def _html_table(frame: pd.DataFrame) -> str:
    out = frame.copy()
    out.columns = [plain_header(c) for c in out.columns]
    if "fraction" in out.columns:
        out["fraction"] = out["fraction"].map(plain_header)
    for c in out.columns:
        if pd.api.types.is_float_dtype(out[c]):
            out[c] = out[c].map(lambda v: "–" if v is None or not np.isfinite(v)
                                else f"{v:.4g}")
        elif out[c].dtype == object:
            out[c] = out[c].map(lambda v: "–" if v is None or (isinstance(v, float)
                                                               and not np.isfinite(v)) else v)
    return out.to_html(index=False, border=0, na_rep="–", escape=True)


def render_design_report(evaluation: DesignEvaluation, *, figures: dict[str, Figure] | None = None,
                         unit: str = "map units", pilot_xy: np.ndarray | None = None,
                         title: str = "Sampling redesign") -> str:
    """The self-contained HTML page of a design evaluation.

    Examples
    --------
    >>> page = render_design_report(result)  # doctest: +SKIP
    """
    from spatial_ev import __version__

    ev = _check_evaluation(evaluation)
    if figures is None:
        if pilot_xy is None:
            raise InputError("`pilot_xy` is needed to draw the layout maps")
        figures = _figures(ev, unit, pilot_xy)
    uris = {k: figure_uri(f) for k, f in figures.items()}
    s = ev.settings
    layouts = ev.coverage.layouts.reset_index()[["layout", "kind", "n_sites", "line_length",
                                                  "scheme", "n_vectors", "finest_scale",
                                                  "broadest_scale"]]
    env = jinja2.Environment(autoescape=True, undefined=jinja2.StrictUndefined)
    return env.from_string(_PAGE).render(
        title=title, subtitle=f"{len(ev.layouts)} candidate layouts evaluated against the "
                              f"pilot analysis (seed {s.seed}); distances in {unit}",
        recommendations=ev.recommendations, figures=uris, scheme=s.scheme,
        tables={"layouts": _markup(_html_table(layouts)),
                "coverage": _markup(_html_table(ev.coverage.classes)),
                "power": _markup(_html_table(ev.power)),
                "fractions": _markup(_html_table(ev.fractions)),
                "stops": _markup(_html_table(ev.stops))},
        truth=("unconditional simulation: a new landscape like the pilot's each time"
               if s.truth == "unconditional" else
               "conditional simulation: the pilot's patches fixed in place"),
        n_simulations=s.n_simulations, n_permutations=s.n_permutations, seed=s.seed,
        alpha=s.alpha,
        space_level=f"{s.space_test_level:.4g} ({s.space_level}"
                    + (f", {s.global_space_permutations} permutations)"
                       if s.global_space_permutations else ")"),
        residual_model=s.residual_model, environment_source=s.environment_source,
        notes=ev.notes, version=__version__)


def _markup(text: str):
    from markupsafe import Markup

    return Markup(text)


# ----------------------------------------------------------------------------- folder

def layer_name(position: int, name: str) -> str:
    """GeoPackage layer name for a layout: ``layout_01_grid_spacing_30``.

    Examples
    --------
    >>> layer_name(1, "grid:spacing=30")
    'layout_01_grid_spacing_30'
    """
    slug = re.sub(r"[^A-Za-z0-9]+", "_", name).strip("_")[:40] or "layout"
    return f"layout_{position:02d}_{slug}"


def write_design_folder(evaluation: DesignEvaluation, out: str | os.PathLike, *,
                        pilot: Analysis, overwrite: bool = False,
                        parameters: dict | None = None,
                        title: str = "Sampling redesign") -> Path:
    """Write the design folder (see the module docstring) atomically.

    Parameters
    ----------
    evaluation : DesignEvaluation
    out : path of the folder to create (replaced only with ``overwrite=True``).
    pilot : Analysis
        The pilot (its CRS, distance unit and sites are used for maps and layers).
    parameters : dict, optional
        Extra parameters to record in ``design.json`` (e.g. the command line).
    title : report title.

    Examples
    --------
    >>> write_design_folder(result, "design-1", pilot=pilot)  # doctest: +SKIP
    PosixPath('design-1')
    """
    import geopandas as gpd

    ev = _check_evaluation(evaluation)
    if not isinstance(pilot, Analysis):
        raise InputError(f"`pilot` must be the Analysis the evaluation was made from; got "
                         f"{type(pilot).__name__}")
    out = Path(out)
    unit = unit_symbol(pilot.survey.distance_unit)
    pilot_xy = pilot.survey.coords.to_numpy()
    record = ev.to_dict()
    record["parameters"] = dict(parameters or {})
    record["pilot"] = {"n_sites": int(pilot.survey.n_sites), "crs": pilot.settings.crs,
                       "distance_unit": pilot.survey.distance_unit,
                       "fractions": pilot.fractions, "seed": pilot.settings.seed}
    with atomic_folder(out, overwrite=overwrite) as tmp:
        (tmp / "design.json").write_text(
            json.dumps(record, indent=2, allow_nan=False, default=_json_default) + "\n",
            encoding="utf-8")
        write_table(tmp / "coverage.csv", ev.coverage.classes, index=False)
        write_table(tmp / "power.csv", ev.power, index=False)
        write_table(tmp / "fractions.csv", ev.fractions, index=False)
        write_table(tmp / "selection_stops.csv", ev.stops, index=False)
        write_table(tmp / "layouts.csv", ev.coverage.layouts)
        figures = _figures(ev, unit, pilot_xy)
        (tmp / "figures").mkdir()
        for name, fig in figures.items():
            save_figure(fig, tmp / "figures", name)
        page = render_design_report(ev, figures=figures, unit=unit, title=title)
        (tmp / "design_report.html").write_text(page, encoding="utf-8")
        layers = {}
        for i, lay in enumerate(ev.layouts, start=1):
            frame = lay.coords
            layers[layer_name(i, lay.name)] = gpd.GeoDataFrame(
                {"layout": lay.name, "kind": lay.kind}, index=frame.index.rename("site"),
                geometry=gpd.points_from_xy(frame["x"], frame["y"]), crs=pilot.survey.crs)
        write_layers(tmp / "layouts.gpkg", layers)
    return out


def _json_default(value: Any) -> Any:
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (np.floating,)):
        v = float(value)
        return v if math.isfinite(v) else None
    if isinstance(value, (np.bool_,)):
        return bool(value)
    if isinstance(value, np.ndarray):
        return value.tolist()
    return str(value)
