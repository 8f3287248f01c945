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
units of the working CRS (``data["distance_unit"]``).

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
    ``"presence_absence"``, ``"standardise"``, ``"none"``); ``trend`` (``"none"``,
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
    One row per selected variable in selection order; columns ``variable``, ``r2_adj_cum``
    (adjusted R² of the model after adding it), ``p``.
``selected_space`` : DataFrame or None
    One row per selected spatial vector; columns ``vector``, ``moran_i``, ``scale`` (map
    units), ``p``, and *(optional)* ``scale_class``.
``scalogram`` : Mapping or None
    ``r2`` (Series by vector name), ``scale`` (Series by vector name, map units), ``selected``
    (list of names), ``classes`` (DataFrame ``name``, ``low``, ``high`` in map units, or None).
``basis_moran`` : Mapping or None
    ``moran_i`` (Series), ``scale`` (Series), ``selected`` (list), ``expected`` (float, E[I]).
``weighting`` : Mapping or None
    ``table`` (DataFrame ``scheme``, ``r2_adj``, ``p``), ``alpha``, ``corrected_alpha``,
    ``chosen``.
``scale_maps`` : Sequence[Mapping] or None
    One entry per scale class: ``name`` (str), ``scale_range`` ((low, high) map units),
    ``vectors`` (list of str), ``r2_adj`` (float or None), ``p`` (float or None), ``sites``
    (GeoDataFrame in the working CRS), ``column`` (name of the fitted-score column), and
    *(optional)* ``surface`` (Mapping ``x``, ``y``, ``values`` — see
    :func:`spatial_ev.report.maps.site_map_figure`).
``lcbd`` : Mapping or None
    ``sites`` (GeoDataFrame), ``column`` (str), *(optional)* ``p_column`` (str: permutation
    p-value per site) and ``alpha``.
``triplot`` : Mapping or None
    ``eigenvalues`` (Series by axis name), ``total_variance`` (float), ``n_labels``
    *(optional, int)*, and ``scaling_1`` / ``scaling_2`` (each a Mapping ``sites``,
    ``species``, ``variables`` of score DataFrames, as for
    :func:`spatial_ev.report.figures.triplot_figure`).
``limits`` : Mapping or None
    ``finest_scale`` (float: finest structure the design resolves, map units),
    ``broadest_scale`` (float), *(optional)* ``n_positive_vectors`` (int) and ``notes``
    (list of str: further caveats from the analysis).
"""

from __future__ import annotations

import base64
import io
import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import jinja2
import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from ..errors import InputError
from . import figures as figs
from . import maps

__all__ = ["render_report", "build_figures", "write_report", "example_context", "SECTIONS"]

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

REFERENCES: dict[str, str] = {
    "Bauman et al. 2018a": "Bauman, D., Drouet, T., Fortin, M.-J. & Dray, S. (2018a). Optimizing "
                           "the choice of a spatial weighting matrix in eigenvector-based "
                           "methods. Ecology 99: 2159–2166.",
    "Bauman et al. 2018b": "Bauman, D., Drouet, T., Dray, S. & Vleminckx, J. (2018b). "
                           "Disentangling good from bad practices in the selection of spatial "
                           "or phylogenetic eigenvectors. Ecography 41: 1638–1649.",
    "Blanchet et al. 2008": "Blanchet, F. G., Legendre, P. & Borcard, D. (2008). Forward "
                            "selection of explanatory variables. Ecology 89: 2623–2632.",
    "Borcard & Legendre 2002": "Borcard, D. & Legendre, P. (2002). All-scale spatial analysis "
                               "of ecological data by means of principal coordinates of "
                               "neighbour matrices. Ecological Modelling 153: 51–68.",
    "Borcard et al. 1992": "Borcard, D., Legendre, P. & Drapeau, P. (1992). Partialling out "
                           "the spatial component of ecological variation. Ecology 73: "
                           "1045–1055.",
    "Dray et al. 2006": "Dray, S., Legendre, P. & Peres-Neto, P. R. (2006). Spatial modelling: "
                        "a comprehensive framework for principal coordinate analysis of "
                        "neighbour matrices (PCNM). Ecological Modelling 196: 483–493.",
    "Freedman & Lane 1983": "Freedman, D. & Lane, D. (1983). A nonstochastic interpretation of "
                            "reported significance levels. Journal of Business & Economic "
                            "Statistics 1: 292–298.",
    "Gilbert & Bennett 2010": "Gilbert, B. & Bennett, J. R. (2010). Partitioning variation in "
                              "ecological communities: do the numbers add up? Journal of "
                              "Applied Ecology 47: 1071–1082.",
    "Legendre & De Cáceres 2013": "Legendre, P. & De Cáceres, M. (2013). Beta diversity as the "
                                  "variance of community data: dissimilarity coefficients and "
                                  "partitioning. Ecology Letters 16: 951–963.",
    "Legendre & Gallagher 2001": "Legendre, P. & Gallagher, E. D. (2001). Ecologically "
                                 "meaningful transformations for ordination of species data. "
                                 "Oecologia 129: 271–280.",
    "Legendre 2008": "Legendre, P. (2008). Studying beta diversity: ecological variation "
                     "partitioning by multiple regression and canonical analysis. Journal of "
                     "Plant Ecology 1: 3–8.",
    "Legendre et al. 2002": "Legendre, P., Dale, M. R. T., Fortin, M.-J., Gurevitch, J., "
                            "Hohn, M. & Myers, D. (2002). The consequences of spatial "
                            "structure for the design and analysis of ecological field "
                            "surveys. Ecography 25: 601–615.",
    "Legendre et al. 2012": "Legendre, P., Borcard, D. & Roberts, D. W. (2012). Variation "
                            "partitioning involving orthogonal spatial eigenfunction "
                            "submodels. Ecology 93: 1234–1240.",
    "Moran 1950": "Moran, P. A. P. (1950). Notes on continuous stochastic phenomena. "
                  "Biometrika 37: 17–23.",
    "Peres-Neto et al. 2006": "Peres-Neto, P. R., Legendre, P., Dray, S. & Borcard, D. (2006). "
                              "Variation partitioning of species data matrices: estimation "
                              "and comparison of fractions. Ecology 87: 2614–2625.",
    "Phipson & Smyth 2010": "Phipson, B. & Smyth, G. K. (2010). Permutation P-values should "
                            "never be zero: calculating exact P-values when permutations are "
                            "randomly drawn. Statistical Applications in Genetics and "
                            "Molecular Biology 9: article 39.",
}

_TRANSFORMS = {
    "hellinger": ("Species abundances were Hellinger-transformed (square root of each site's "
                  "relative abundances), which keeps double absences from making sites look "
                  "alike", ["Legendre & Gallagher 2001"]),
    "chord": ("Species abundances were chord-transformed (each site's profile scaled to unit "
              "length)", ["Legendre & Gallagher 2001"]),
    "chi_square": ("Species abundances were transformed to chi-square profiles",
                   ["Legendre & Gallagher 2001"]),
    "log_chord": ("Species abundances were log-transformed (log(y + 1)) and then "
                  "chord-transformed", ["Legendre & Gallagher 2001"]),
    "presence_absence": ("Species data were reduced to presence–absence", []),
    "standardise": ("Each response column was standardised to zero mean and unit variance, "
                    "which gives rare and common species equal weight", []),
    "none": ("The response table was analysed without transformation", []),
}
_TRENDS = {
    "none": "No linear trend on the coordinates was removed.",
    "removed": ("A linear trend on the site coordinates was regressed out of the response "
                "before spatial vectors were fitted, so that they describe structures finer "
                "than the whole study area."),
    "covariable": ("The linear trend on the site coordinates was kept as a conditioning "
                   "variable in the spatial models."),
}
_SELECTION = {
    "forward_double_stop": ("Variables were selected by forward selection, run only after a "
                            "significant global test and stopped when the next variable's p "
                            "exceeded α = {alpha:g} or when adjusted R² would exceed that of "
                            "the global model", ["Blanchet et al. 2008",
                                                 "Bauman et al. 2018b"]),
    "forward_global_only": ("Variables were selected by forward selection after a "
                            "significant global test, stopped when the next variable's p "
                            "exceeded α = {alpha:g}", ["Blanchet et al. 2008"]),
    "none": ("No variable selection was made: every candidate was kept", []),
}


# ----------------------------------------------------------------------------- helpers

def _num(value: Any, digits: int = 3) -> str:
    if value is None or (isinstance(value, float) and not np.isfinite(value)):
        return "–"
    if isinstance(value, (int, np.integer)):
        return f"{int(value):,}"
    v = float(value)
    if v != 0 and (abs(v) < 10 ** -(digits - 1) or abs(v) >= 10 ** 6):
        return f"{v:.{digits - 1}e}"
    return f"{v:.{digits}f}"


def _p(value: Any) -> str:
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return "–"
    v = float(value)
    return f"{v:.3f}" if v >= 0.001 else f"{v:.1e}"


def _distance(value: Any, unit: str) -> str:
    if value is None or (isinstance(value, float) and not np.isfinite(value)):
        return "–"
    v = float(value)
    if unit == "m" and abs(v) >= 1000:
        return f"{v / 1000:,.3g} km" if abs(v) < 100_000 else f"{v / 1000:,.0f} km"
    return f"{v:,.3g} {unit}" if abs(v) < 1000 else f"{v:,.0f} {unit}"


def _figure_uri(fig: Figure, *, dpi: int = 110) -> str:
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=dpi, bbox_inches="tight",
                metadata={"Software": None})
    return "data:image/png;base64," + base64.b64encode(buffer.getvalue()).decode("ascii")


def _get(mapping: Mapping | None, key: str, default: Any = None) -> Any:
    return default if mapping is None else mapping.get(key, default)


def _check_context(context: Any) -> Mapping:
    if not isinstance(context, Mapping):
        raise InputError(f"`context` must be a mapping (see spatial_ev.report.html for its "
                         f"keys); got {type(context).__name__}")
    if not isinstance(context.get("title"), str) or not context["title"].strip():
        raise InputError(f"`context['title']` must be a non-empty string; got "
                         f"{context.get('title')!r}")
    required = ("data", "methods", "partition", "selected_environment", "selected_space",
                "scalogram", "basis_moran", "weighting", "scale_maps", "lcbd", "triplot",
                "limits")
    missing = [k for k in required if k not in context]
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
    >>> sorted(build_figures(example_context()))[:3]
    ['basis_moran', 'lcbd_map', 'partition']
    """
    context = _check_context(context)
    unit = figs.unit_symbol(_get(context["data"], "distance_unit"))
    out: dict[str, Figure] = {}
    part = context["partition"]
    if part is not None:
        out["partition"] = figs.partition_figure(part["fractions"],
                                                 alpha=part.get("alpha", 0.05))
    sc = context["scalogram"]
    if sc is not None:
        out["scalogram"] = figs.scalogram_figure(sc["r2"], sc["scale"],
                                                 selected=sc.get("selected", ()),
                                                 classes=sc.get("classes"), unit=unit)
    bm = context["basis_moran"]
    if bm is not None:
        out["basis_moran"] = figs.moran_scale_figure(bm["moran_i"], bm["scale"],
                                                     selected=bm.get("selected", ()),
                                                     expected=bm.get("expected"), unit=unit)
    wt = context["weighting"]
    if wt is not None:
        out["weighting"] = figs.weighting_figure(wt["table"], alpha=wt.get("alpha", 0.05),
                                                 corrected_alpha=wt.get("corrected_alpha"),
                                                 chosen=wt.get("chosen"))
    for i, entry in enumerate(context["scale_maps"] or (), start=1):
        lo, hi = entry["scale_range"]
        out[f"scale_map_{i}"] = maps.site_map_figure(
            entry["sites"], column=entry["column"], palette="diverging",
            surface=entry.get("surface"), unit=unit,
            title=f"{entry['name']} scale ({_distance(lo, unit)} – {_distance(hi, unit)})",
            value_label="fitted score (centred)")
    lc = context["lcbd"]
    if lc is not None:
        sites, highlight, label = lc["sites"], None, "highlighted"
        if lc.get("p_column") is not None:
            alpha = lc.get("alpha", 0.05)
            sites = sites.assign(_significant=sites[lc["p_column"]].to_numpy() <= alpha)
            highlight, label = "_significant", f"LCBD p ≤ {alpha:g}"
        out["lcbd_map"] = maps.site_map_figure(sites, column=lc["column"],
                                               palette="sequential", unit=unit,
                                               title="Local contribution to beta diversity",
                                               value_label="LCBD (share of total)",
                                               highlight=highlight, highlight_label=label)
    tp = context["triplot"]
    if tp is not None:
        for scaling in (1, 2):
            scores = tp.get(f"scaling_{scaling}")
            if scores is None:
                continue
            out[f"triplot_scaling_{scaling}"] = figs.triplot_figure(
                scores["sites"], scores["species"], scores.get("variables"),
                tp["eigenvalues"], scaling=scaling, total_variance=tp.get("total_variance"),
                n_labels=tp.get("n_labels", 10))
    return out


# ----------------------------------------------------------------------------- text

class _Citations:
    """Collect author–year keys in order of first use."""

    def __init__(self) -> None:
        self.keys: list[str] = []

    def __call__(self, *keys: str) -> str:
        for k in keys:
            if k not in REFERENCES:
                raise KeyError(k)
            if k not in self.keys:
                self.keys.append(k)
        return f" ({'; '.join(keys)})" if keys else ""


def _methods_paragraphs(context: Mapping, cite: _Citations, unit: str) -> list[str]:
    """One paragraph per topic, built from the choices recorded in ``context["methods"]``."""
    m = context["methods"]
    if m is None:
        return []
    prep: list[str] = []
    space: list[str] = []
    selection: list[str] = []
    fractions: list[str] = []
    tests: list[str] = []
    text, refs = _TRANSFORMS.get(m.get("transformation"),
                                 (f"Response transformation: {m.get('transformation')}", []))
    prep.append(text + cite(*refs) + ".")
    prep.append(_TRENDS.get(m.get("trend"), f"Trend handling: {m.get('trend')}."))

    basis = m.get("basis") or {}
    sign = {"positive": "only vectors with positive Moran's I (positive spatial "
                        "autocorrelation) were kept",
            "negative": "only vectors with negative Moran's I were kept",
            "all": "vectors of both signs of Moran's I were kept"}.get(basis.get("sign"), "")
    sign = f"; {sign}" if sign else ""
    n_vectors = basis.get("n_vectors", "?")
    if basis.get("family") == "distance":
        refs_text = cite("Borcard & Legendre 2002", "Dray et al. 2006")
        space.append(f"Spatial predictors were {n_vectors} distance-based spatial eigenvectors "
                     f"(distance-based MEM){refs_text}, with distances truncated at "
                     f"{_distance(basis.get('threshold'), unit)}{sign}.")
    elif basis:
        graph = str(basis.get("method", "?")).replace("_", " ")
        weighting = str(basis.get("weighting", "?")).replace("_", " ")
        space.append(f"Spatial predictors were {n_vectors} spatial eigenvectors (Moran's "
                     f"eigenvector maps, MEM){cite('Dray et al. 2006')} of a {graph} neighbour "
                     f"graph with {weighting} edge weights{sign}. Moran's I"
                     f"{cite('Moran 1950')} measures each vector's spatial autocorrelation.")
    schemes = list(m.get("schemes_compared") or ())
    if len(schemes) > 1:
        corr = m.get("corrected_alpha")
        level = (f"a Šidák-corrected level α′ = {corr:.4g}" if corr is not None
                 else "an uncorrected level")
        space.append(f"The analysis compared {len(schemes)} candidate spatial weighting "
                     f"schemes ({', '.join(schemes)}); because trying several inflates false "
                     f"positives, each scheme's global test used {level}"
                     f"{cite('Bauman et al. 2018a')}. The scheme retained was "
                     f"{m.get('chosen_scheme', '?')}.")

    sel = m.get("selection")
    text, refs = _SELECTION.get(sel, (f"Selection rule: {sel}", []))
    selection.append(text.format(alpha=m.get("alpha", 0.05)) + cite(*refs) + ".")

    if context.get("partition") is not None:
        fractions.append("Community variation was divided into fractions measured by adjusted "
                         f"R²{cite('Borcard et al. 1992', 'Peres-Neto et al. 2006')}; unique "
                         "fractions were tested by partial redundancy analysis, shared "
                         f"fractions cannot be tested{cite('Legendre 2008')}.")
    if context.get("scalogram") is not None:
        fractions.append("Each spatial vector's share of community variation was placed at "
                         "its scale, and selected vectors were grouped into scale classes"
                         f"{cite('Legendre et al. 2012')}.")
    if context.get("lcbd") is not None:
        fractions.append("Local contributions to beta diversity (LCBD) were computed from the "
                         f"transformed table{cite('Legendre & De Cáceres 2013')}.")

    n_perm = m.get("n_permutations")
    if n_perm is not None:
        how = ("of the residuals of the reduced model" + cite("Freedman & Lane 1983")
               if m.get("permutation_method") == "reduced_residual"
               else "of the rows of the response table")
        seed = m.get("seed")
        repeat = (f" Random seed: {seed}, so the run can be repeated exactly."
                  if seed is not None else
                  " No seed was fixed, so p-values vary slightly between runs.")
        tests.append(f"Tests used {int(n_perm):,} random permutations {how}; p-values count "
                     "the observed statistic among the permuted ones"
                     f"{cite('Phipson & Smyth 2010')}.{repeat}")
    return [" ".join(p) for p in (prep, space, selection, fractions, tests) if p]


def _limits_items(context: Mapping, cite: _Citations, unit: str) -> list[str]:
    lim = context["limits"] or {}
    items = [
        "A significant fraction means its adjusted R² would be unlikely if sites were "
        "exchangeable (if the rows carried no structure). It does not show that the spatial "
        "pattern is caused by any particular process: dispersal, an unmeasured environmental "
        "variable and biotic interactions can all produce the same spatial fraction.",
        "The shared fraction (environment ∩ space) has no test of its own"
        f"{cite('Legendre 2008')}: it is the part of the variation that the groups cannot "
        "separate, often spatially structured environment.",
        "When the environment is itself spatially structured, the spatial fraction and the "
        "environmental test can both be inflated: spatial autocorrelation in both the response "
        "and a predictor inflates the type I error of classical tests"
        f"{cite('Legendre et al. 2002')}.",
        "Fractions built from spatial eigenvectors can be inflated whatever the selection "
        f"procedure{cite('Gilbert & Bennett 2010')}; treat their sizes as upper estimates.",
        "Negative adjusted R² fractions are possible and should be read as zero.",
    ]
    fine, broad = lim.get("finest_scale"), lim.get("broadest_scale")
    if fine is not None:
        items.append(f"This sampling design cannot resolve structures finer than about "
                     f"{_distance(fine, unit)}" + (f" or broader than about "
                                                   f"{_distance(broad, unit)}"
                                                   if broad is not None else "")
                     + "; patterns outside that range are invisible here, not absent.")
    if lim.get("n_positive_vectors") is not None:
        items.append(f"The design supports {int(lim['n_positive_vectors']):,} spatial vectors "
                     "with positive autocorrelation; more sites would resolve more scales.")
    items.extend(str(n) for n in lim.get("notes", ()) or ())
    return items


def _data_rows(data: Mapping | None, unit: str) -> list[tuple[str, str]]:
    if data is None:
        return []
    ext = data.get("extent") or {}
    sp = data.get("spacing") or {}
    rows = [("Sites", _num(data.get("n_sites"))),
            ("Geometry", str(data.get("geometry_type", "–"))),
            ("Species", _num(data.get("n_species"))),
            ("Environmental variables", _num(data.get("n_variables"))),
            ("Working coordinate system", str(data.get("crs", "–"))),
            ("Source coordinate system", str(data.get("source_crs") or "same as working")),
            ("Projection note", str(data.get("projection_note") or "–")),
            ("Distance unit", str(data.get("distance_unit", "–")))]
    if ext:
        w, h = ext["xmax"] - ext["xmin"], ext["ymax"] - ext["ymin"]
        rows.append(("Extent", f"{_distance(w, unit)} × {_distance(h, unit)} (x {ext['xmin']:,.0f}"
                               f" – {ext['xmax']:,.0f}, y {ext['ymin']:,.0f} – "
                               f"{ext['ymax']:,.0f})"))
    if sp:
        rows.append(("Spacing (nearest-neighbour distance)",
                     f"median {_distance(sp.get('nearest_median'), unit)}, range "
                     f"{_distance(sp.get('nearest_min'), unit)} – "
                     f"{_distance(sp.get('nearest_max'), unit)}"))
    for key, label in (("species_names", "Species names"), ("variable_names", "Variables")):
        names = [str(n) for n in data.get(key) or ()]
        if names:
            shown = ", ".join(names[:40]) + (f", … ({len(names) - 40} more)"
                                             if len(names) > 40 else "")
            rows.append((label, shown))
    for what, names in (data.get("dropped") or {}).items():
        if names:
            rows.append((f"Dropped {what}", ", ".join(map(str, names))))
    return rows


def _table(frame: pd.DataFrame | None, columns: Sequence[tuple[str, str, Any]]
           ) -> dict[str, Any] | None:
    if frame is None:
        return None
    headers = [h for _, h, _ in columns]
    rows = [[fmt(row[c]) if c in frame.columns else "–" for c, _, fmt in columns]
            for _, row in frame.iterrows()]
    return {"headers": headers, "rows": rows}


# ----------------------------------------------------------------------------- render

def _environment() -> jinja2.Environment:
    return jinja2.Environment(
        loader=jinja2.FileSystemLoader(Path(__file__).with_name("templates")),
        autoescape=True, undefined=jinja2.StrictUndefined, trim_blocks=True,
        lstrip_blocks=True)


def render_report(context: Mapping[str, Any], *,
                  figures: Mapping[str, Figure] | None = None) -> str:
    """Render the whole-analysis report as one self-contained HTML page.

    Parameters
    ----------
    context : mapping described in this module's docstring.
    figures : figures already drawn by :func:`build_figures` (to avoid drawing twice when
        they are also saved as files); drawn here when None.

    Returns
    -------
    str, the HTML page (UTF-8 text; no external resources).

    Examples
    --------
    >>> page = render_report(example_context())
    >>> page.startswith("<!DOCTYPE html>") and "Variation partition" in page
    True
    """
    context = _check_context(context)
    figures = build_figures(context) if figures is None else figures
    uris = {k: _figure_uri(f) for k, f in figures.items()}
    unit = figs.unit_symbol(_get(context["data"], "distance_unit"))
    cite = _Citations()
    reasons = dict(context.get("missing_reasons") or {})
    methods = _methods_paragraphs(context, cite, unit)
    limits = _limits_items(context, cite, unit)
    part = context["partition"]
    partition_table = None
    if part is not None:
        f = part["fractions"]
        partition_table = {"headers": ["fraction", "adjusted R²", "testable", "p"],
                           "rows": [[str(r["name"]), _num(r["r2_adj"]),
                                     "yes" if r["testable"] else "no",
                                     _p(r["p"]) if r["testable"] else "not testable"]
                                    for _, r in f.iterrows()]}
    env_table = _table(context["selected_environment"],
                       [("variable", "variable", str),
                        ("r2_adj_cum", "cumulative adjusted R²", _num), ("p", "p", _p)])
    space_table = _table(context["selected_space"],
                         [("vector", "vector", str), ("moran_i", "Moran's I", _num),
                          ("scale", f"scale ({unit})", lambda v: _distance(v, unit)),
                          ("scale_class", "scale class", str), ("p", "p", _p)])
    scale_maps = []
    for i, entry in enumerate(context["scale_maps"] or (), start=1):
        lo, hi = entry["scale_range"]
        scale_maps.append({
            "name": str(entry["name"]), "figure": uris.get(f"scale_map_{i}"),
            "caption": (f"{entry['name']} scale, {_distance(lo, unit)} to "
                        f"{_distance(hi, unit)}: vectors {', '.join(map(str, entry['vectors']))}"
                        f"; adjusted R² {_num(entry.get('r2_adj'))}"
                        + (f", p = {_p(entry.get('p'))}" if entry.get("p") is not None
                           else ""))})
    lcbd_note = None
    if context["lcbd"] is not None:
        lc = context["lcbd"]
        col = lc["sites"][lc["column"]]
        top = col.sort_values(ascending=False).head(5)
        lcbd_note = ("Highest contributions: " + ", ".join(
            f"site {idx} ({val:.3f})" for idx, val in top.items()) + ".")
        if lc.get("p_column") is not None:
            alpha = lc.get("alpha", 0.05)
            n_sig = int((lc["sites"][lc["p_column"]] <= alpha).sum())
            lcbd_note += (f" Ringed: the {n_sig} site(s) whose LCBD has p ≤ {alpha:g} in a "
                          "permutation test (not corrected for testing every site).")
    refs = [REFERENCES[k] for k in sorted(cite.keys)]
    view = {
        "title": context["title"], "subtitle": context.get("subtitle"),
        "illustrative": bool(context.get("illustrative", False)),
        "version": context.get("version"), "generated": context.get("generated"),
        "sections": SECTIONS, "reasons": reasons, "context": context,
        "data_rows": _data_rows(context["data"], unit), "methods": methods,
        "partition_table": partition_table, "env_table": env_table,
        "space_table": space_table, "figures": uris, "scale_maps": scale_maps,
        "lcbd_note": lcbd_note, "limits": limits, "references": refs,
    }
    return _environment().get_template("report.html").render(**view)


def write_report(context: Mapping[str, Any], folder: str | os.PathLike, *,
                 stem: str = "report") -> Path:
    """Write ``<stem>.html`` and every figure as PNG and SVG (``figures/``) into ``folder``.

    Use inside :func:`spatial_ev.report.folder.atomic_folder` so the output is whole or absent.

    Examples
    --------
    >>> import tempfile
    >>> path = write_report(example_context(), tempfile.mkdtemp())
    >>> path.name
    'report.html'
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise InputError(f"`folder` {str(folder)!r} is not an existing folder; create it first")
    figures = build_figures(context)
    (folder / "figures").mkdir(exist_ok=True)
    for name, fig in figures.items():
        figs.save_figure(fig, folder / "figures", name)
    path = folder / f"{stem}.html"
    path.write_text(render_report(context, figures=figures), encoding="utf-8")
    return path


from ._example import example_context  # noqa: E402  (kept apart: synthetic data, ~150 lines)
