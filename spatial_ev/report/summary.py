"""The ``summary.json`` contract: the machine-readable record of an analysis.

:func:`summary_record` turns an :class:`~spatial_ev.pipeline.analysis.Analysis` into the
plain-JSON dictionary a run folder writes as ``summary.json`` (its keys are the public contract
of ``DESIGN.md``, plus the trend, the spectral test, scale-class bounds, weighting schemes,
LCBD, resolvable scales, notes and warnings; a run with a river network or a bearing adds
``network``, ``bearing`` and the basis's ``scheme`` and ``scale_measure``). Floats are
rounded to ``digits`` significant digits; non-finite values become ``null``.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import numpy as np

from spatial_ev import __version__
from spatial_ev._validation import check_int
from spatial_ev.errors import InputError
from spatial_ev.pipeline.analysis import Analysis
from spatial_ev.space.directional import NetworkBasis

__all__ = ["summary_record"]


def _rounder(digits: int) -> Callable[[Any], float | None]:
    def r(value: Any) -> float | None:
        if value is None:
            return None
        value = float(value)
        if not math.isfinite(value):
            return None
        return float(f"{value:.{digits}g}")
    return r


def _space_global(result: Analysis) -> tuple[float | None, float | None]:
    """Adjusted R² and p of the chosen scheme's global test (the smallest p when none)."""
    table = result.weighting.table
    if result.weighting.best is not None:
        row = table.loc[result.weighting.best]
        return float(result.space_selection.global_test.r2_adj), float(row["global_p"])
    if result.space_selection is None and len(table):
        best_p = table["global_p"].min()
        return None, float(best_p) if np.isfinite(best_p) else None
    return None, None


def summary_record(analysis: Analysis, *, digits: int = 10) -> dict[str, Any]:
    """The machine-readable summary of an analysis (the ``summary.json`` contract).

    Floats carry ``digits`` significant digits: results agree across BLAS thread counts only
    to about 1e-15 relative, so more digits would make identical runs differ.

    Parameters
    ----------
    analysis : Analysis
        From :func:`spatial_ev.analyse` (or :func:`spatial_ev.pipeline.rerun.load_pilot`).
    digits : int, keyword-only
        Significant digits of every float (default 10).

    Returns
    -------
    dict
        Plain JSON types only (``json.dumps(..., allow_nan=False)`` accepts it).

    Examples
    --------
    >>> record = summary_record(result)  # doctest: +SKIP
    >>> sorted(record["fractions"])  # doctest: +SKIP
    ['environment_only', 'shared', 'space_only', 'unexplained']
    """
    if not isinstance(analysis, Analysis):
        raise InputError(f"`analysis` must be an Analysis (from analyse() or load_pilot()); "
                         f"got {type(analysis).__name__}")
    digits = check_int("digits", digits, low=1, high=17)
    a, r = analysis, _rounder(digits)
    survey, settings = a.survey, a.settings
    env_test = None
    if a.environment_selection is not None and a.environment_selection.global_test is not None:
        g = a.environment_selection.global_test
        env_test = {"r2_adj": r(g.r2_adj), "p": r(g.p_value)}
    space_test = _space_global(a)
    spectral, only = a.environment_spectral, a.environment_only_spectral
    method = a.basis.method if isinstance(a.basis, NetworkBasis) else settings.chosen_scheme
    record = {
        "n_sites": int(survey.n_sites),
        "n_species": int(survey.n_species),
        "transformation": settings.transformation,
        "crs": settings.crs,
        "distance_unit": survey.distance_unit,
        "spatial_basis": {"method": method,
                          "threshold": r(a.basis.threshold),
                          "n_vectors": int(a.basis.n_vectors)},
        "global_tests": {
            "environment": env_test,
            "space": {"r2_adj": r(space_test[0]), "p": r(space_test[1])},
            "trend": None if a.trend is None else
            {"r2_adj": r(a.trend.r2_adj), "p": r(a.trend.p_value), "kept": a.trend_kept},
        },
        "selected": {
            "environment": list(a.selected_environment),
            "space": [{"name": row.vector, "moran_i": r(row.moran_i), "scale": r(row.scale),
                       "p": r(row.p), "scale_class": row.scale_class}
                      for row in a.space_table().itertuples()],
        },
        "fractions": None if a.fractions is None else
        {k: r(v) for k, v in a.fractions.items()},
        "fraction_tests": None if a.fraction_tests is None else
        {k: {"p": r(v)} for k, v in a.fraction_tests.items()},
        "environment_spectral_test": None if spectral is None else
        {"r2_adj": r(spectral.r2_adj), "p": r(spectral.p_value),
         "n_randomisations": int(spectral.n_randomisations),
         "weighting": "distance_decay",
         "environment_only": None if only is None else
         {"r2_adj": r(only.r2_adj), "p": r(only.p_value)}},
        "scales": [{"class": fit.scale_class.name, "vectors": list(fit.scale_class.vectors),
                    "r2_adj": r(fit.r2_adj), "p": r(fit.p_value),
                    "scale_range": None if fit.scale_class.scale_range is None
                    else [r(v) for v in fit.scale_class.scale_range],
                    "bounds": [r(b) if math.isfinite(b) else None
                               for b in fit.scale_class.bounds]}
                   for fit in a.scale_fits],
        "weighting_schemes": {"compared": list(a.weighting.table.index),
                              "alpha_corrected": r(a.weighting.alpha_corrected),
                              "chosen": a.weighting.best},
        "lcbd": {"beta_total": r(a.beta.total),
                 "n_significant_holm": int((a.beta.p_holm <= settings.alpha).sum())
                 if a.beta.p_holm is not None else None},
        "resolvable_scales": {"finest": r(float(a.basis.scale.min())),
                              "broadest": r(float(a.basis.scale.max()))},
        "permutations": int(settings.n_permutations),
        "seed": int(settings.seed),
        "alpha": r(settings.alpha),
        "notes": list(a.notes),
        "warnings": list(a.warnings),
        "version": __version__,
    }
    directional = getattr(settings, "directional", None)
    if directional is not None:        # only directional runs carry these keys
        basis = record["spatial_basis"]
        basis["scheme"] = settings.chosen_scheme
        basis["scale_measure"] = "along_network" if method in ("aem_river",
                                                               "network_distance_based") \
            else "straight_line"
        net = getattr(a, "network", None)
        record["network"] = None if net is None else _network_record(net, r)
        record["bearing"] = r(directional.get("bearing"))
    return record


def _network_record(net: Any, r: Callable[[Any], float | None]) -> dict[str, Any]:
    s = net.summary()
    return {"source": s["source"], "direction": s["direction"], "n_edges": s["n_edges"],
            "n_components": s["n_components"], "total_length": r(s["total_length"]),
            "snap_tolerance": r(s["snap_tolerance"]),
            "snap_distance_max": r(s["snap_distance"]["max"]),
            "farthest_site": s["snap_distance"]["farthest_site"]}
