"""Words of the HTML report: methods paragraphs, limits, data facts, references, number formats.

Everything here turns plain values from the report context into sentences; nothing computes
statistics. Citations are collected in order of use so the reference list holds exactly the
works the text cites (author–year keys of :data:`REFERENCES`).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

__all__ = ["REFERENCES", "Citations", "methods_paragraphs", "limits_items", "data_rows",
           "glance_items", "num", "pvalue", "distance"]

REFERENCES: dict[str, str] = {
    "Bauman et al. 2018a": "Bauman, D., Drouet, T., Fortin, M.-J. & Dray, S. (2018a). Optimizing "
                           "the choice of a spatial weighting matrix in eigenvector-based "
                           "methods. Ecology 99: 2159–2166.",
    "Bauman et al. 2018b": "Bauman, D., Drouet, T., Dray, S. & Vleminckx, J. (2018b). "
                           "Disentangling good from bad practices in the selection of spatial "
                           "or phylogenetic eigenvectors. Ecography 41: 1638–1649.",
    "Blanchet, Legendre & Borcard 2008": "Blanchet, F. G., Legendre, P. & Borcard, D. (2008). "
                                  "Modelling directional spatial processes in ecological "
                                  "data. Ecological Modelling 215: 325–336.",
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
    "de Jong et al. 1984": "de Jong, P., Sprenger, C. & van Veen, F. (1984). On extreme values "
                           "of Moran's I and Geary's c. Geographical Analysis 16: 17–24.",
    "Peres-Neto et al. 2006": "Peres-Neto, P. R., Legendre, P., Dray, S. & Borcard, D. (2006). "
                              "Variation partitioning of species data matrices: estimation "
                              "and comparison of fractions. Ecology 87: 2614–2625.",
    "Wagner & Dray 2015": "Wagner, H. H. & Dray, S. (2015). Generating spatially constrained "
                          "null models for irregularly spaced data using Moran spectral "
                          "randomization methods. Methods in Ecology and Evolution 6: "
                          "1169–1178.",
    "Clappe et al. 2018": "Clappe, S., Dray, S. & Peres-Neto, P. R. (2018). Beyond neutrality: "
                          "disentangling the effects of species sorting and spurious "
                          "correlations in community analysis. Ecology 99: 1737–1747.",
    "Griffith & Peres-Neto 2006": "Griffith, D. A. & Peres-Neto, P. R. (2006). Spatial "
                                  "modeling in ecology: the flexibility of eigenfunction "
                                  "spatial analyses. Ecology 87: 2603–2613.",
    "Legendre et al. 2011": "Legendre, P., Oksanen, J. & ter Braak, C. J. F. (2011). Testing "
                            "the significance of canonical axes in redundancy analysis. "
                            "Methods in Ecology and Evolution 2: 269–277.",
    "Anderson & Legendre 1999": "Anderson, M. J. & Legendre, P. (1999). An empirical "
                                "comparison of permutation methods for tests of partial "
                                "regression coefficients in a linear model. Journal of "
                                "Statistical Computation and Simulation 62: 271–303.",
    "Dungan et al. 2002": "Dungan, J. L., Perry, J. N., Dale, M. R. T., Legendre, P., "
                          "Citron-Pousty, S., Fortin, M.-J., Jakomulska, A., Miriti, M. & "
                          "Rosenberg, M. S. (2002). A balanced view of scale in spatial "
                          "statistical analysis. Ecography 25: 626–640.",
    "Bellehumeur & Legendre 1998": "Bellehumeur, C. & Legendre, P. (1998). Multiscale sources "
                                   "of variation in ecological variables: modeling spatial "
                                   "dispersion, elaborating sampling designs. Landscape "
                                   "Ecology 13: 15–25.",
    "Phipson & Smyth 2010": "Phipson, B. & Smyth, G. K. (2010). Permutation P-values should "
                            "never be zero: calculating exact P-values when permutations are "
                            "randomly drawn. Statistical Applications in Genetics and "
                            "Molecular Biology 9: article 39.",
    "Besag & Clifford 1991": "Besag, J. & Clifford, P. (1991). Sequential Monte Carlo "
                             "p-values. Biometrika 78: 301–304.",
    "Gandy 2009": "Gandy, A. (2009). Sequential implementation of Monte Carlo tests with "
                  "uniformly bounded resampling risk. Journal of the American Statistical "
                  "Association 104: 1504–1511.",
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
    "none": ("A linear trend on the coordinates was tested and not significant; none was "
             "removed."),
    "not_modelled": "No linear trend on the coordinates was modelled (trend rule 'ignore').",
    "network": ("No linear trend on the coordinates was modelled: along a river network a "
                "plane through the coordinates would put side-by-side tributaries on one "
                "gradient, and the upstream–downstream structure is left to the directional "
                "vectors (trend rule 'auto')."),
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

def num(value: Any, digits: int = 3) -> str:
    if value is None or (isinstance(value, float) and not np.isfinite(value)):
        return "–"
    if isinstance(value, (int, np.integer)):
        return f"{int(value):,}"
    v = float(value)
    if v != 0 and (abs(v) < 10 ** -(digits - 1) or abs(v) >= 10 ** 6):
        return f"{v:.{digits - 1}e}"
    return f"{v:.{digits}f}"


def pvalue(value: Any) -> str:
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return "–"
    v = float(value)
    return f"{v:.3f}" if v >= 0.001 else f"{v:.1e}"


def distance(value: Any, unit: str) -> str:
    if value is None or (isinstance(value, float) and not np.isfinite(value)):
        return "–"
    v = float(value)
    if unit == "m" and abs(v) >= 1000:
        return f"{v / 1000:,.3g} km" if abs(v) < 100_000 else f"{v / 1000:,.0f} km"
    return f"{v:,.3g} {unit}" if abs(v) < 1000 else f"{v:,.0f} {unit}"


class Citations:
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

    def scan(self, text: str) -> str:
        """Record every known author–year key that ``text`` (free text) mentions."""
        for key in REFERENCES:
            if key in text:
                self(key)
        return text


def methods_paragraphs(context: Mapping, cite: Citations, unit: str) -> list[str]:
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
    if basis.get("family") == "network":
        method = basis.get("method")
        weighting = str(basis.get("weighting", "?")).replace("_", " ")
        if method == "network_distance_based":
            space.append(f"Spatial predictors were {n_vectors} distance-based spatial "
                         f"eigenvectors of along-network distances (shortest paths along the "
                         f"channels){cite('Borcard & Legendre 2002', 'Dray et al. 2006')}, "
                         f"truncated at {distance(basis.get('threshold'), unit)}{sign}; their "
                         f"scales are lengths along the network.")
        else:
            along = ("along the river network, " + ("against the flow" if basis.get(
                "orientation") == "against_flow" else "with the flow")
                if method == "aem_river" else "along the declared bearing")
            space.append(f"Spatial predictors were {n_vectors} asymmetric eigenvector maps "
                         f"(AEM){cite('Blanchet, Legendre & Borcard 2008')}, built from the edges "
                         f"that lie upstream of each site ({along}) with {weighting} edge "
                         f"weights{sign}; they describe a process travelling one way. Moran's "
                         f"I{cite('Moran 1950')} is computed on the network neighbours"
                         + ("; scales are lengths along the network." if method == "aem_river"
                            else "."))
    elif basis.get("family") == "distance":
        refs_text = cite("Borcard & Legendre 2002", "Dray et al. 2006")
        space.append(f"Spatial predictors were {n_vectors} distance-based spatial eigenvectors "
                     f"(distance-based MEM){refs_text}, with distances truncated at "
                     f"{distance(basis.get('threshold'), unit)}{sign}.")
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
                     f"{cite('Bauman et al. 2018a')}. " + (
                         f"The scheme retained was {m.get('chosen_scheme', '?')}."
                         if m.get("chosen_scheme") not in (None, "none") else
                         "No scheme passed its corrected global test, so none was retained."))

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
        if m.get("step_tests") == "shared":
            tests.append("The steps of each forward selection were tested on one shared set "
                         "of permutations, updated as the model grew; each step is the same "
                         "residual permutation test, and its p-value counts the observed "
                         "statistic among those permutations.")
        if m.get("step_tests") == "sequential":
            tests.append("Forward-selection step tests stopped drawing permutations once the "
                         "decision p ≤ α was settled, with a resampling risk of at most 0.001"
                         f"{cite('Besag & Clifford 1991', 'Gandy 2009')}; each step's p-value "
                         "rests on the permutations it drew (step tables, column "
                         "'permutations'); global and fraction tests drew the full count.")
    return [" ".join(p) for p in (prep, space, selection, fractions, tests) if p]


def limits_items(context: Mapping, cite: Citations, unit: str) -> list[str]:
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
                     f"{distance(fine, unit)}" + (f" or broader than about "
                                                   f"{distance(broad, unit)}"
                                                   if broad is not None else "")
                     + "; patterns outside that range are invisible here, not absent.")
    if lim.get("n_positive_vectors") is not None:
        items.append(f"The design supports {int(lim['n_positive_vectors']):,} spatial vectors "
                     "with positive autocorrelation; more sites would resolve more scales.")
    items.extend(cite.scan(str(n)) for n in lim.get("notes", ()) or ())
    return items


def data_rows(data: Mapping | None, unit: str) -> list[tuple[str, str]]:
    if data is None:
        return []
    ext = data.get("extent") or {}
    sp = data.get("spacing") or {}
    rows = [("Sites", num(data.get("n_sites"))),
            ("Geometry", str(data.get("geometry_type", "–"))),
            ("Species", num(data.get("n_species"))),
            ("Environmental variables", num(data.get("n_variables"))),
            ("Working coordinate system", str(data.get("crs", "–"))),
            ("Source coordinate system", str(data.get("source_crs") or "same as working")),
            ("Projection note", str(data.get("projection_note") or "–")),
            ("Distance unit", str(data.get("distance_unit", "–")))]
    if ext:
        w, h = ext["xmax"] - ext["xmin"], ext["ymax"] - ext["ymin"]
        rows.append(("Extent", f"{distance(w, unit)} × {distance(h, unit)} (x {ext['xmin']:,.0f}"
                               f" – {ext['xmax']:,.0f}, y {ext['ymin']:,.0f} – "
                               f"{ext['ymax']:,.0f})"))
    if sp:
        rows.append(("Spacing (nearest-neighbour distance)",
                     f"median {distance(sp.get('nearest_median'), unit)}, range "
                     f"{distance(sp.get('nearest_min'), unit)} – "
                     f"{distance(sp.get('nearest_max'), unit)}"))
    for key, label in (("species_names", "Species names"), ("variable_names", "Variables")):
        names = list(data.get(key) or ())
        if names:
            rows.append((label, _name_list(names)))
    for what, names in (data.get("dropped") or {}).items():
        if names:
            rows.append((f"Dropped {what} ({len(names):,})", _name_list(list(names))))
    return rows


def _name_list(names: list, limit: int = 40) -> str:
    shown = ", ".join(map(str, names[:limit]))
    return shown + (f", … ({len(names) - limit:,} more)" if len(names) > limit else "")


def glance_items(context: Mapping, unit: str) -> list[str]:
    """Plain-language key results read from the context (partition, selections, scales)."""
    items = []
    part = context.get("partition")
    if part is not None:
        alpha = part.get("alpha", 0.05)
        for _, row in part["fractions"].iterrows():
            share = float(row["r2_adj"])
            text = f"{row['name']}: {max(share, 0.0):.1%} of the variation in composition"
            if share < 0:
                text += f" (adjusted R² {share:.3f}, read as zero)"
            if row["testable"]:
                p = row["p"]
                if p is None or (isinstance(p, float) and np.isnan(p)):
                    text += ", not tested"
                else:
                    verdict = "significant" if float(p) <= alpha else "not significant"
                    text += f", {verdict} (p = {pvalue(p)})"
            items.append(text + ".")
    env = context.get("selected_environment")
    if env is not None:
        col = "variable" if "variable" in env.columns else "name"
        items.append(f"{len(env)} environmental variable(s) kept: "
                     f"{', '.join(map(str, env[col])) or 'none'}." if len(env) else
                     "No environmental variable was kept.")
    space = context.get("selected_space")
    if space is not None:
        col = "vector" if "vector" in space.columns else "name"
        items.append(f"{len(space)} spatial vector(s) kept: {', '.join(map(str, space[col]))}."
                     if len(space) else "No spatial vector was kept.")
    maps = context.get("scale_maps")
    if maps:
        parts = [f"{m.get('name', m.get('class'))} ({distance(m['scale_range'][0], unit)}–"
                 f"{distance(m['scale_range'][1], unit)}, adjusted R² {num(m.get('r2_adj'))})"
                 for m in maps]
        items.append("Spatial structure was found at these scales: " + "; ".join(parts) + ".")
    elif maps is not None:
        items.append("No spatial structure was selected at any scale.")
    return items

