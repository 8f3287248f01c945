"""The whole-analysis HTML report: one self-contained page rendered from plain data.

:func:`render_report` turns a *context* (a mapping of plain numbers, strings, pandas and
geopandas objects) into one HTML page. Figures are drawn with :mod:`.figures` and :mod:`.maps`
and embedded as base64 PNG data URIs; the page has no external CSS, JavaScript or fonts, so it
can be e-mailed or archived as one file. All strings from the context are HTML-escaped (jinja2
autoescape). A section whose data is absent (key missing or None) is still shown, with a
sentence saying that it is not available and why (``missing_reasons``), never silently dropped.
Nothing here computes statistics: every number shown is read from the context.

Context contract
----------------
Keys marked *(optional)* may be absent; every other key must be present but may be ``None``
when the analysis did not produce that part (its section then says so). Distances are in map
units of the working CRS (``data["distance_unit"]``; "map units" when it is None). An entry
that breaks the contract raises :class:`spatial_ev.errors.InputError` naming the context key.

``title`` : str
    Page title.
``subtitle`` : str *(optional)*
    One line under the title (study area, date).
``illustrative`` : bool *(optional, default False)*
    True shows a banner saying the numbers are synthetic and illustrative.
``version`` : str *(optional)*
    spatial_ev version, shown in the footer.
``generated`` : str *(optional)*
    Creation time (ISO 8601 text), shown in the footer.
``missing_reasons`` : Mapping[str, str] *(optional)*
    Section key → why it is absent (e.g. ``{"partition": "no environmental table was
    supplied"}``); shown in that section instead of the generic sentence.
``data`` : Mapping or None
    ``n_sites`` (int), ``n_species`` (int), ``n_variables`` (int), ``crs`` (str, name of the
    working CRS or ``"local planar coordinates"``), ``source_crs`` (str or None),
    ``projection_note`` (str), ``distance_unit`` (str, e.g. ``"metre"``), ``geometry_type``
    (``"point"`` / ``"polygon"``), ``extent`` (Mapping ``xmin``, ``ymin``, ``xmax``, ``ymax``),
    ``spacing`` (Mapping ``nearest_min``, ``nearest_median``, ``nearest_max``: distance from
    each site to its nearest neighbour), *(optional)* ``species_names`` and
    ``variable_names`` (sequences of str), ``dropped`` (Mapping of what → list of names).
``methods`` : Mapping or None
    ``transformation`` (``"hellinger"``, ``"chord"``, ``"chi_square"``, ``"log_chord"``,
    ``"presence_absence"``, ``"standardise"``, ``"none"``); ``trend`` (``"none"`` — tested,
    not significant —, ``"not_modelled"``, ``"network"`` — not modelled on a river network —,
    ``"removed"`` — linear trend on the coordinates regressed out first — or ``"covariable"`` —
    kept as a conditioning variable); ``basis`` (Mapping: ``family`` ``"graph"`` or
    ``"distance"``, ``method`` (graph name, e.g. ``"gabriel"``), ``weighting`` (e.g.
    ``"binary"``), ``threshold`` (float or None), ``n_vectors`` (int), ``sign``
    (``"positive"``, ``"negative"``, ``"all"``)); ``schemes_compared`` (sequence of str);
    ``corrected_alpha`` (float or None); ``chosen_scheme`` (str); ``alpha`` (float);
    ``selection`` (``"forward_double_stop"``, ``"forward_global_only"`` or ``"none"``);
    ``n_permutations`` (int); ``permutation_method`` (``"reduced_residual"`` or ``"raw"``);
    ``seed`` (int or None).
``partition`` : Mapping or None
    ``fractions``: DataFrame with columns ``name``, ``members`` (tuple of group names; empty
    for the unexplained fraction), ``r2_adj``, ``testable`` (bool), ``p`` (float or None), one
    row per fraction in display order; ``alpha`` *(optional)*.
``selected_environment`` : DataFrame or None
    One row per selected variable in selection order; columns ``variable`` (or ``name``),
    ``r2_adj_cum`` (or ``r2_adj``: adjusted R² of the model after adding it), ``p``. An empty
    frame means "nothing was selected" and is reported as such.
``selected_space`` : DataFrame or None
    One row per selected spatial vector; columns ``vector`` (or ``name``, as in
    summary.json), ``moran_i``, ``scale`` (map units), ``p``, and *(optional)*
    ``scale_class`` (or ``class``).
``scalogram`` : Mapping or None
    ``r2`` (Series by vector name), ``scale`` (Series by vector name, map units), ``selected``
    (list of names), ``classes`` (DataFrame ``name``, ``low``, ``high`` in map units, or None).
``basis_moran`` : Mapping or None
    ``moran_i`` (Series), ``scale`` (Series), ``selected`` (list), ``expected`` (float, E[I]).
``weighting`` : Mapping or None
    ``table`` (DataFrame ``scheme``, ``r2_adj``, ``p``), ``alpha``, ``corrected_alpha``,
    ``chosen``.
``scale_maps`` : Sequence[Mapping] or None
    One entry per scale class (an empty list: nothing selected, nothing to map): ``name``
    (or ``class``, as in summary.json; str), ``scale_range`` ((low, high) map units),
    ``vectors`` (list of str), ``r2_adj`` (float or None), ``p`` (float or None), ``sites``
    (GeoDataFrame in the working CRS), ``column`` (name of the fitted-score column), and
    *(optional)* ``surface`` (Mapping ``x``, ``y``, ``values`` — see
    :func:`spatial_ev.report.maps.site_map_figure`), *(optional)* ``network``
    (GeoDataFrame of the river network's lines, drawn under the sites) and *(optional)*
    ``along`` (GeoDataFrame of points along the network) with ``along_column`` (the fitted
    score predicted there; instead of ``surface``).
``lcbd`` : Mapping or None
    ``sites`` (GeoDataFrame), ``column`` (str), *(optional)* ``p_column`` (str: permutation
    p-value per site), ``p_corrected_column`` (str: the same p corrected for testing every
    site, e.g. Holm; the map's heavy rings follow it), ``alpha`` and ``network`` (as for
    ``scale_maps``).
``triplot`` : Mapping or None
    ``eigenvalues`` (Series by axis name), ``total_variance`` (float), ``n_labels``
    *(optional, int)*, *(optional)* ``factors`` (categorical variable → Series of its level
    at each site: drawn as level centroids), and ``scaling_1`` / ``scaling_2`` (each a
    Mapping ``sites``,
    ``species``, ``variables`` of score DataFrames, as for
    :func:`spatial_ev.report.figures.triplot_figure`).
``limits`` : Mapping or None
    ``finest_scale`` (float: finest structure the design resolves, map units),
    ``broadest_scale`` (float), *(optional)* ``n_positive_vectors`` (int) and ``notes``
    (list of str: further caveats from the analysis; an author–year key of
    ``REFERENCES`` written in a note, e.g. "Wagner & Dray 2015", adds that work to the
    reference list).
"""

from __future__ import annotations

import base64
import contextlib
import io
import os
from collections.abc import Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any

import jinja2
import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from spatial_ev.errors import InputError
from spatial_ev.report import figures as figs
from spatial_ev.report import _style as st
from spatial_ev.report import maps
from spatial_ev.report._text import (REFERENCES, Citations, data_rows, distance, glance_items,
                                     limits_items, methods_paragraphs, num, pvalue)

__all__ = ["render_report", "build_figures", "write_report", "CONTEXT_PARTS", "SECTIONS",
           "REFERENCES", "class_colours", "lcbd_marks"]

# the context keys every report needs (each may be None: the section then says it is absent)
CONTEXT_PARTS: tuple[str, ...] = ("data", "methods", "partition", "selected_environment",
                                  "selected_space", "scalogram", "basis_moran", "weighting",
                                  "scale_maps", "lcbd", "triplot", "limits")

# section key -> heading, in page order
SECTIONS: dict[str, str] = {
    "data": "Data summary",
    "methods": "Methods",
    "partition": "Variation partition",
    "selected": "Selected explanatory variables and spatial vectors",
    "scalogram": "Variation by spatial scale",
    "weighting": "Spatial weighting schemes compared",
    "scale_maps": "Maps of spatial structure, one per scale class",
    "lcbd": "Sites that contribute most to beta diversity (LCBD)",
    "triplot": "Ordination triplots",
    "limits": "How to read this report, and its limits",
    "references": "References",
}

def figure_uri(fig: Figure, *, dpi: int = 110) -> str:
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=dpi, bbox_inches="tight",
                metadata={"Software": None})
    return "data:image/png;base64," + base64.b64encode(buffer.getvalue()).decode("ascii")


def _get(mapping: Mapping | None, key: str, default: Any = None) -> Any:
    return default if mapping is None else mapping.get(key, default)


@contextlib.contextmanager
def _reading(key: str) -> Iterator[None]:
    """Name the context entry in any error raised while drawing or tabulating it."""
    try:
        yield
    except InputError as exc:
        raise InputError(f"context[{key!r}]: {exc}") from exc
    except KeyError as exc:
        raise InputError(f"context[{key!r}] lacks the entry {exc.args[0]!r}; see the context "
                         "contract in spatial_ev.report.html") from None


def _class_name(entry: Mapping[str, Any]) -> str:
    return str(entry["name"] if "name" in entry else entry["class"])


def _check_context(context: Any) -> Mapping:
    if not isinstance(context, Mapping):
        raise InputError(f"`context` must be a mapping (see spatial_ev.report.html for its "
                         f"keys); got {type(context).__name__}")
    if not isinstance(context.get("title"), str) or not context["title"].strip():
        raise InputError(f"`context['title']` must be a non-empty string; got "
                         f"{context.get('title')!r}")
    missing = [k for k in CONTEXT_PARTS if k not in context]
    if missing:
        raise InputError(f"`context` lacks key(s) {missing}; pass None for a part the analysis "
                         "did not produce, so the report can say so")
    return context


# ----------------------------------------------------------------------------- figures

def build_figures(context: Mapping[str, Any]) -> dict[str, Figure]:
    """Draw every figure the context has data for.

    Keys of the result: ``partition``, ``scalogram``, ``basis_moran``, ``weighting``,
    ``scale_map_1`` … ``scale_map_k`` (one per scale class, in order), ``lcbd_map``,
    ``triplot_scaling_1``, ``triplot_scaling_2``; a key is absent when its data is.

    Examples
    --------
    >>> import pandas as pd
    >>> context = {"title": "Partition only", **dict.fromkeys(CONTEXT_PARTS)}
    >>> context["partition"] = {"fractions": pd.DataFrame({
    ...     "name": ["[a] environment only", "[b] shared", "[c] space only", "[d] unexplained"],
    ...     "members": [("environment",), ("environment", "space"), ("space",), ()],
    ...     "r2_adj": [0.14, 0.09, 0.12, 0.65], "testable": [True, False, True, False],
    ...     "p": [0.001, None, 0.001, None]})}
    >>> sorted(build_figures(context))
    ['partition']
    """
    context = _check_context(context)
    unit = figs.unit_symbol(_get(context["data"], "distance_unit"))
    out: dict[str, Figure] = {}
    part = context["partition"]
    if part is not None:
        with _reading("partition"):
            out["partition"] = figs.partition_figure(part["fractions"],
                                                     alpha=part.get("alpha", 0.05))
    sc = context["scalogram"]
    if sc is not None:
        with _reading("scalogram"):
            out["scalogram"] = figs.scalogram_figure(sc["r2"], sc["scale"],
                                                     selected=sc.get("selected", ()),
                                                     classes=sc.get("classes"), unit=unit)
    bm = context["basis_moran"]
    if bm is not None:
        with _reading("basis_moran"):
            out["basis_moran"] = figs.moran_scale_figure(
                bm["moran_i"], bm["scale"], selected=bm.get("selected", ()),
                expected=bm.get("expected"), unit=unit)
    wt = context["weighting"]
    if wt is not None:
        with _reading("weighting"):
            out["weighting"] = figs.weighting_figure(
                wt["table"], alpha=wt.get("alpha", 0.05),
                corrected_alpha=wt.get("corrected_alpha"), chosen=wt.get("chosen"))
    colours = class_colours(context)
    for i, entry in enumerate(context["scale_maps"] or (), start=1):
        with _reading(f"scale_maps'][{i - 1}"):
            lo, hi = entry["scale_range"]
            name = _class_name(entry)
            out[f"scale_map_{i}"] = maps.site_map_figure(
                entry["sites"], column=entry["column"], palette="diverging",
                surface=entry.get("surface"), unit=unit, network=entry.get("network"),
                along=entry.get("along"), along_column=entry.get("along_column"),
                title=f"{name} scale ({distance(lo, unit)} – {distance(hi, unit)})",
                value_label="fitted score (centred)",
                wavelength=float(lo) if float(lo) > 0 else None,
                class_colour=colours.get(name, (None, None))[1])
    lc = context["lcbd"]
    if lc is not None:
        with _reading("lcbd"):
            sites, marks = lc["sites"], lcbd_marks(lc)
            highlight = weak = None
            label = weak_label = ""
            if marks is not None:
                sites = sites.assign(_corrected=marks["corrected"], _uncorrected=marks["weak"])
                if marks["method"] is not None:  # listed even with no site: "(0 sites)"
                    highlight, label = "_corrected", marks["corrected_label"]
                if marks["weak"].any():
                    weak, weak_label = "_uncorrected", marks["weak_label"]
            out["lcbd_map"] = maps.site_map_figure(
                sites, column=lc["column"], palette="sequential", unit=unit,
                title="Local contribution to beta diversity",
                value_label="LCBD (share of total)", highlight=highlight,
                highlight_label=label, weak_highlight=weak, weak_label=weak_label,
                network=lc.get("network"))
    tp = context["triplot"]
    if tp is not None:
        for scaling in (1, 2):
            scores = tp.get(f"scaling_{scaling}")
            if scores is None:
                continue
            with _reading("triplot"):
                out[f"triplot_scaling_{scaling}"] = figs.triplot_figure(
                    scores["sites"], scores["species"], scores.get("variables"),
                    tp["eigenvalues"], scaling=scaling,
                    total_variance=tp.get("total_variance"), n_labels=tp.get("n_labels", 10),
                    factors=tp.get("factors"))
    return out


# ----------------------------------------------------------------------------- tables

def _table(key: str, frame: Any, columns: Sequence[tuple[tuple[str, ...], str, Any]]
           ) -> dict[str, Any] | None:
    """Rows of formatted strings; each column is taken from the first of its names present."""
    if frame is None:
        return None
    with _reading(key):
        if not isinstance(frame, pd.DataFrame):
            raise InputError(f"must be a DataFrame or None; got {type(frame).__name__}")
        picked = [next((n for n in names if n in frame.columns), None) for names, _, _ in columns]
        if picked[0] is None:
            raise InputError(f"needs a column {' or '.join(map(repr, columns[0][0]))}; it has "
                             f"{list(map(str, frame.columns))}")
        rows = [[fmt(row[c]) if c is not None else "–" for c, (_, _, fmt) in zip(picked, columns)]
                for _, row in frame.iterrows()]
    return {"headers": [h for _, h, _ in columns], "rows": rows}


def _tables(context: Mapping[str, Any], unit: str) -> dict[str, Any]:
    part = context["partition"]
    partition = None
    if part is not None:
        with _reading("partition"):
            partition = {"headers": ["fraction", "adjusted R²", "testable", "p"],
                         "rows": [[str(r["name"]), num(r["r2_adj"]),
                                   "yes" if r["testable"] else "no",
                                   pvalue(r["p"]) if r["testable"] else "not testable"]
                                  for _, r in part["fractions"].iterrows()]}
    environment = _table("selected_environment", context["selected_environment"], [
        (("variable", "name"), "variable", str),
        (("r2_adj_cum", "r2_adj"), "cumulative adjusted R²", num),
        (("p",), "p at entry", pvalue)])
    space = _table("selected_space", context["selected_space"], [
        (("vector", "name"), "vector", str), (("moran_i",), "Moran's I", num),
        (("scale",), f"scale ({unit})", lambda v: distance(v, unit)),
        (("scale_class", "class"), "scale class", str), (("p",), "p at entry", pvalue)])
    return {"partition_table": partition, "env_table": environment, "space_table": space}


def _scale_map_captions(context: Mapping[str, Any], unit: str, uris: Mapping[str, str]
                        ) -> list[dict[str, Any]]:
    out = []
    for i, entry in enumerate(context["scale_maps"] or (), start=1):
        with _reading(f"scale_maps'][{i - 1}"):
            lo, hi = entry["scale_range"]
            name = _class_name(entry)
            vectors = ", ".join(map(str, entry.get("vectors", ()))) or "none listed"
            p = entry.get("p")
            out.append({"name": name, "figure": uris.get(f"scale_map_{i}"),
                        "caption": f"{name} scale, {distance(lo, unit)} to "
                                   f"{distance(hi, unit)}: vectors {vectors}; adjusted R² "
                                   f"{num(entry.get('r2_adj'))}"
                                   + (f", p = {pvalue(p)}" if p is not None else "")})
    return out


# what the p column of the selection tables means (shown under both tables)
ENTRY_NOTE = ("p at entry: the permutation p-value of each variable or vector at the step of "
              "forward selection where it entered, given those chosen before it. These values "
              "decided the selection; they are not tests of the final model and are not "
              "corrected for the many candidates tried, so read them as a record of the "
              "selection, not as evidence on their own.")
# the one description of "scale" used by the report
SCALE_WORDS = ("Scale is a vector's equivalent wavelength in map units: the distance over "
               "which its pattern repeats once; half of it is roughly the size of one patch.")


def _moran_note(context: Mapping[str, Any], cite: Citations) -> str | None:
    """A sentence on Moran's I above 1, when a listed vector has one."""
    values = []
    space = context.get("selected_space")
    if isinstance(space, pd.DataFrame) and "moran_i" in space.columns:
        values.extend(pd.to_numeric(space["moran_i"], errors="coerce").dropna().tolist())
    bm = context.get("basis_moran")
    if isinstance(bm, Mapping) and bm.get("moran_i") is not None:
        values.extend(pd.Series(bm["moran_i"], dtype=float).dropna().tolist())
    if not values or max(values) <= 1.0:
        return None
    return ("Moran's I can exceed 1 here: its bounds are not −1 and 1 but depend on the "
            "spatial weights (the extreme eigenvalues of the weighting matrix)"
            f"{cite('de Jong et al. 1984')}, and spatial eigenvectors sit at those extremes "
            "by construction.")


def _triplot_constrained(tp: Mapping[str, Any] | None) -> bool:
    """True when the ordination has explanatory variables to draw (a triplot)."""
    if tp is None:
        return False
    for scaling in (1, 2):
        scores = tp.get(f"scaling_{scaling}")
        if scores is not None:
            v = scores.get("variables")
            return v is not None and len(v) > 0
    return False


def class_colours(context: Mapping[str, Any]) -> dict[str, tuple[str, str]]:
    """(tint, strong colour) of each scale class named in the context, by class name.

    Classes are ranked finest first over the scalogram's classes when given (so every class
    keeps its colour even when one has no map), else over the scale maps' ranges; colours come
    from :func:`spatial_ev.report._style.scale_class_colours`.

    Examples
    --------
    >>> import pandas as pd
    >>> ctx = {"scalogram": {"classes": pd.DataFrame({"name": ["broad", "fine"],
    ...                                               "low": [300.0, 40.0],
    ...                                               "high": [900.0, 300.0]})}}
    >>> class_colours(ctx)["fine"][1] == st.CLASS_COLOURS[0]
    True
    """
    sc = context.get("scalogram")
    classes = sc.get("classes") if isinstance(sc, Mapping) else None
    if isinstance(classes, pd.DataFrame) and len(classes):
        names = [str(n) for n in classes["name"]]
        lows = [float(v) for v in classes["low"]]
    else:
        entries = context.get("scale_maps") or ()
        names = [_class_name(e) for e in entries]
        lows = [float(e["scale_range"][0]) for e in entries]
    return dict(zip(names, st.scale_class_colours(lows)))


def lcbd_marks(lc: Mapping[str, Any]) -> dict[str, Any] | None:
    """Which sites the LCBD map rings, and the legend words, from the context's p columns.

    With ``p_corrected_column`` (e.g. Holm-corrected p, as in the LCBD table), a heavy ring
    marks sites whose corrected p ≤ alpha and a thin dashed ring those at or below alpha only
    before the correction; with the uncorrected ``p_column`` alone, only thin rings, labelled as
    uncorrected. Legend labels carry the counts. None when the context has no p column.

    Examples
    --------
    >>> import pandas as pd
    >>> lc = {"sites": pd.DataFrame({"p": [0.01, 0.2], "p_holm": [0.02, 0.4]}),
    ...       "p_column": "p", "p_corrected_column": "p_holm", "alpha": 0.05}
    >>> lcbd_marks(lc)["corrected_label"]
    'Holm-corrected p ≤ 0.05 (1 site)'
    """
    if lc.get("p_column") is None:
        return None
    alpha = float(lc.get("alpha", 0.05))
    sites = lc["sites"]
    raw = sites[lc["p_column"]].to_numpy(dtype=float) <= alpha
    column = lc.get("p_corrected_column")
    if column is not None:
        corrected = sites[column].to_numpy(dtype=float) <= alpha
        weak = raw & ~corrected
        weak_words = "before correction only"
    else:
        corrected = np.zeros(len(sites), dtype=bool)
        weak = raw
        weak_words = "uncorrected for testing every site"

    def count(k: int) -> str:
        return f"{k} site" + ("" if k == 1 else "s")

    return {"corrected": corrected, "weak": weak, "alpha": alpha,
            "method": None if column is None else "Holm",
            "corrected_label": f"Holm-corrected p ≤ {alpha:g} ({count(int(corrected.sum()))})",
            "weak_label": f"p ≤ {alpha:g} {weak_words} ({count(int(weak.sum()))})"}


def _lcbd_note(lc: Mapping[str, Any] | None) -> str | None:
    if lc is None:
        return None
    with _reading("lcbd"):
        top = lc["sites"][lc["column"]].sort_values(ascending=False).head(5)
        note = ("Highest contributions: "
                + ", ".join(f"site {idx} ({val:.3f})" for idx, val in top.items()) + ".")
        marks = lcbd_marks(lc)
        if marks is not None:
            alpha, n_weak = marks["alpha"], int(marks["weak"].sum())
            if marks["method"] is not None:
                n_sig = int(marks["corrected"].sum())
                note += (f" Heavy rings: the {n_sig} site(s) whose LCBD keeps p ≤ {alpha:g} "
                         "after the Holm correction for testing every site (the p_holm column "
                         f"of the LCBD table); thin dashed rings: the {n_weak} further site(s) "
                         f"with p ≤ {alpha:g} before the correction only, which may be chance "
                         "results among so many tests.")
            else:
                note += (f" Thin dashed rings: the {n_weak} site(s) whose LCBD has p ≤ "
                         f"{alpha:g} in a permutation test, not corrected for testing every "
                         "site (some may be chance results).")
    return note


# ----------------------------------------------------------------------------- render

def _environment() -> jinja2.Environment:
    return jinja2.Environment(
        loader=jinja2.FileSystemLoader(Path(__file__).with_name("templates")),
        autoescape=True, undefined=jinja2.StrictUndefined, trim_blocks=True,
        lstrip_blocks=True)


def render_report(context: Mapping[str, Any], *,
                  figures: Mapping[str, Figure] | None = None,
                  figure_pngs: Mapping[str, bytes] | None = None) -> str:
    """Render the whole-analysis report as one self-contained HTML page.

    Parameters
    ----------
    context : mapping described in this module's docstring.
    figures : figures already drawn by :func:`build_figures` (to avoid drawing twice when
        they are also saved as files); drawn here when None.
    figure_pngs : PNG bytes of those figures already rendered (e.g. the files just saved), to
        embed as they are instead of rendering each figure once more.

    Returns
    -------
    str, the HTML page (UTF-8 text; no external resources).

    Examples
    --------
    >>> page = render_report({"title": "No analysis yet", **dict.fromkeys(CONTEXT_PARTS)})
    >>> page.startswith("<!DOCTYPE html>") and "Variation partition" in page
    True
    """
    context = _check_context(context)
    figures = build_figures(context) if figures is None else figures
    pngs = figure_pngs or {}
    uris = {k: ("data:image/png;base64," + base64.b64encode(pngs[k]).decode("ascii"))
            if k in pngs else figure_uri(f) for k, f in figures.items()}
    unit = figs.unit_symbol(_get(context["data"], "distance_unit"))
    cite = Citations()
    reasons = dict(context.get("missing_reasons") or {})
    methods = methods_paragraphs(context, cite, unit)
    limits = limits_items(context, cite, unit)
    tables = _tables(context, unit)  # validates the tabular entries first
    scale_maps = _scale_map_captions(context, unit, uris)
    glance = glance_items(context, unit)
    moran_note = _moran_note(context, cite)
    refs = [REFERENCES[k] for k in sorted(cite.keys)]
    view = {
        "title": context["title"], "subtitle": context.get("subtitle"),
        "illustrative": bool(context.get("illustrative", False)),
        "version": context.get("version"), "generated": context.get("generated"),
        "sections": SECTIONS, "reasons": reasons, "context": context,
        "data_rows": data_rows(context["data"], unit), "methods": methods,
        "glance": glance,
        "figures": uris, "scale_maps": scale_maps,
        "lcbd_note": _lcbd_note(context["lcbd"]), "limits": limits, "references": refs,
        "entry_note": ENTRY_NOTE, "scale_words": SCALE_WORDS, "moran_note": moran_note,
        "triplot_constrained": _triplot_constrained(context["triplot"]),
        "along_network": any(isinstance(e, Mapping) and e.get("along") is not None
                             for e in context["scale_maps"] or ()),
        **tables,
    }
    return _environment().get_template("report.html").render(**view)


def write_report(context: Mapping[str, Any], folder: str | os.PathLike, *,
                 stem: str = "report") -> Path:
    """Write ``<stem>.html`` and every figure as PNG and SVG (``figures/``) into ``folder``.

    Use inside :func:`spatial_ev.report.folder.atomic_folder` so the output is whole or absent.

    Examples
    --------
    >>> import tempfile
    >>> context = {"title": "No analysis yet", **dict.fromkeys(CONTEXT_PARTS)}
    >>> path = write_report(context, tempfile.mkdtemp())
    >>> path.name
    'report.html'
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise InputError(f"`folder` {str(folder)!r} is not an existing folder; create it first")
    figures = build_figures(context)
    (folder / "figures").mkdir(exist_ok=True)
    pngs = {}
    for name, fig in figures.items():
        saved = figs.save_figure(fig, folder / "figures", name)
        pngs[name] = saved["png"].read_bytes()  # embedded as saved: each figure drawn once
    path = folder / f"{stem}.html"
    path.write_text(render_report(context, figures=figures, figure_pngs=pngs),
                    encoding="utf-8")
    return path
