"""``spatial-ev eigen``: build a spatial basis for a site file and write it (CSV + GeoPackage).

Output folder (written whole or not at all):

* ``spatial_vectors.csv`` — sites × vectors (``sv001`` …), indexed by site id;
* ``vector_properties.csv`` — one row per vector: eigenvalue, Moran's I, scale (map units);
* ``spatial_vectors.gpkg`` — layer ``spatial_vectors``: the site geometries with one column
  per vector, in the survey's working CRS, ready to map.

A summary (number of vectors, range of Moran's I and scales) is printed.
"""

from __future__ import annotations

import argparse
import sys

from spatial_ev.cli.common import add_survey_options, survey_from_args

__all__ = ["configure", "execute"]

_GRAPHS = ("distance_based", "delaunay", "gabriel", "relative_neighbourhood",
           "minimum_spanning_tree", "k_nearest", "distance_band", "contiguity")


def configure(parser: argparse.ArgumentParser) -> None:
    """Add the ``eigen`` options.

    Examples
    --------
    >>> p = argparse.ArgumentParser(); configure(p)
    >>> p.parse_args(["--sites", "s.gpkg", "--out", "o"]).graph
    'distance_based'
    """
    add_survey_options(parser, species="absent", environment=False)
    basis = parser.add_argument_group("spatial basis")
    basis.add_argument("--graph", choices=_GRAPHS, default="distance_based",
                       help="distance_based (truncated-distance MEM / PCNM, default) or a "
                            "neighbour graph for graph-based MEM")
    basis.add_argument("--weighting", choices=("binary", "linear", "concave_down",
                                               "concave_up"), default="binary",
                       help="edge weighting of a neighbour graph (default binary)")
    basis.add_argument("--exponent", type=float, default=None, metavar="A",
                       help="exponent of the concave weightings")
    basis.add_argument("--max-distance", type=float, default=None, metavar="DIST",
                       help="d_max of the linear / concave-down weightings (default: the "
                            "longest edge, which then gets weight 0)")
    basis.add_argument("--neighbours", type=int, default=None, metavar="K",
                       help="neighbours per site for --graph k_nearest")
    basis.add_argument("--threshold", type=float, default=None, metavar="DIST",
                       help="truncation / band distance in map units (default: longest edge "
                            "of the minimum spanning tree, the smallest that connects all sites)")
    basis.add_argument("--max-vectors", type=int, default=None, metavar="K",
                       help="keep at most K vectors, the broadest (needed above 3000 sites "
                            "unless --finest-scale is given)")
    basis.add_argument("--finest-scale", type=float, default=None, metavar="DIST",
                       help="keep vectors whose scale (equivalent wavelength, map units) is at "
                            "least DIST")
    basis.add_argument("--autocorrelation", choices=("positive", "negative", "all"),
                       default="positive",
                       help="keep vectors with positive Moran's I (default), negative, or all")
    out = parser.add_argument_group("output")
    out.add_argument("--out", required=True, metavar="DIR", help="output folder to create")
    out.add_argument("--overwrite", action="store_true",
                     help="replace the output folder if it exists")


def execute(args: argparse.Namespace) -> int:
    """Build the basis, write the output folder, print a summary; return 0.

    Examples
    --------
    >>> from spatial_ev.cli.main import main
    >>> main(["eigen", "--sites", "data_demo/sites.gpkg", "--out", "basis"])  # doctest: +SKIP
    0
    """
    import geopandas as gpd

    from spatial_ev.space.graphs import neighbour_graph
    from spatial_ev.space.eigen import distance_eigenvectors, graph_eigenvectors
    from spatial_ev.errors import InputError
    from spatial_ev.report.folder import atomic_folder
    from spatial_ev.report.layers import write_layers, write_table

    if args.max_distance is not None and args.graph != "distance_based" \
            and args.weighting not in ("linear", "concave_down"):
        raise InputError(f"--max-distance applies to --weighting linear or concave_down (the "
                         f"weightings that fall to 0 at that distance); got --weighting "
                         f"{args.weighting}; drop it")
    survey = survey_from_args(args)
    common = dict(max_vectors=args.max_vectors, finest_scale=args.finest_scale,
                  sign=args.autocorrelation)
    if args.graph == "distance_based":
        for name in ("exponent", "neighbours", "max_distance"):
            if getattr(args, name) is not None:
                raise InputError(f"--{name.replace('_', '-')} applies to neighbour graphs, not to "
                                 "--graph distance_based; drop it")
        if args.weighting != "binary":
            raise InputError("--weighting applies to neighbour graphs, not to "
                             "--graph distance_based; drop it")
        basis = distance_eigenvectors(survey, threshold=args.threshold, **common)
    else:
        graph = neighbour_graph(survey, args.graph, k=args.neighbours, threshold=args.threshold)
        basis = graph_eigenvectors(graph, weighting=args.weighting, exponent=args.exponent,
                                   max_distance=args.max_distance, **common)
    if basis.n_vectors == 0:
        raise InputError("no spatial vector met the request (sign / finest scale); relax "
                         "--finest-scale or choose --autocorrelation all")
    layer = gpd.GeoDataFrame(basis.vectors, geometry=survey.sites.geometry.reindex(
        basis.vectors.index), crs=survey.crs)
    with atomic_folder(args.out, overwrite=args.overwrite) as folder:
        write_table(folder / "spatial_vectors.csv", basis.vectors)
        write_table(folder / "vector_properties.csv", basis.to_frame())
        write_layers(folder / "spatial_vectors.gpkg", {"spatial_vectors": layer})
    _print_summary(basis, survey, args.out)
    return 0


def _print_summary(basis, survey, out) -> None:
    unit = getattr(survey, "distance_unit", "map units") or "map units"
    table = basis.to_frame()
    lines = [basis.summary(),
             f"scale = equivalent wavelength in {unit}; half of it is the size of a patch",
             f"{'vector':<8}{'eigenvalue':>14}{'Moran I':>10}{'scale':>14}"]
    shown = list(range(min(5, len(table))))
    if len(table) > 10:
        shown += list(range(len(table) - 3, len(table)))
    for pos, row in enumerate(table.itertuples()):
        if pos in shown:
            lines.append(f"{row.Index:<8}{row.eigenvalue:>14.6g}{row.moran_i:>10.4f}"
                         f"{row.scale:>14.6g}")
        elif pos == 5:
            lines.append(f"{'...':<8}")
    lines.append(f"written: {out}/spatial_vectors.csv, vector_properties.csv, "
                 "spatial_vectors.gpkg (layer spatial_vectors)")
    print("\n".join(lines), file=sys.stdout)
