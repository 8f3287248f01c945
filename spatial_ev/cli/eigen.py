"""``spatial-ev eigen``: build a spatial basis for a site file and write it (CSV + GeoPackage).

Output folder (written whole or not at all):

* ``spatial_vectors.csv`` — sites × vectors (``sv001`` …), indexed by site id;
* ``vector_properties.csv`` — one row per vector: eigenvalue, Moran's I, scale (map units);
* ``spatial_vectors.gpkg`` — layer ``spatial_vectors``: the site geometries with one column
  per vector, in the survey's working CRS, ready to map; with ``--network`` also the layers
  ``river_network`` (the lines, oriented with the flow) and ``spatial_vectors_along_network``
  (the vectors' values at points spaced along the channels).

With ``--network`` the basis is the river network's AEM (``aem001`` …) or, with
``--network-basis distance``, the distance-based eigenvectors of along-network distances; with
``--bearing`` the AEM of the sites' Delaunay graph oriented along the bearing.

A summary (number of vectors, range of Moran's I and scales) is printed.
"""

from __future__ import annotations

import argparse
import sys

from spatial_ev.cli.common import add_survey_options, survey_from_args
from spatial_ev.cli.network import add_network_options, check_network_options, network_from_args

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
    basis.add_argument("--keep", choices=("positive", "negative", "all"),
                       default="positive",
                       help="which vectors to keep by the sign of their Moran's I: positive "
                            "(default: patches and gradients), negative (contrasts between "
                            "neighbours) or all")
    add_network_options(parser, one_basis=True)
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
    check_network_options(args)
    directional = args.network is not None or args.bearing is not None
    if directional:
        _refuse_straight_line_options(args)
    survey = survey_from_args(args)
    common = dict(max_vectors=args.max_vectors, finest_scale=args.finest_scale,
                  keep=args.keep)
    network = network_from_args(args, survey)
    if directional:
        basis = _directional_basis(args, survey, network)
    elif args.graph == "distance_based":
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
        raise InputError("no spatial vector met the request (--keep / --finest-scale); relax "
                         "--finest-scale or choose --keep all")
    layer = gpd.GeoDataFrame(basis.vectors, geometry=survey.sites.geometry.reindex(
        basis.vectors.index), crs=survey.crs)
    layers = {"spatial_vectors": layer}
    if network is not None:
        layers.update(_network_layers(basis, network, survey.crs))
    with atomic_folder(args.out, overwrite=args.overwrite) as folder:
        write_table(folder / "spatial_vectors.csv", basis.vectors)
        write_table(folder / "vector_properties.csv", basis.to_frame())
        write_layers(folder / "spatial_vectors.gpkg", layers)
    _print_summary(basis, survey, args.out)
    return 0


def _refuse_straight_line_options(args: argparse.Namespace) -> None:
    from spatial_ev.errors import InputError

    what = "--network" if args.network is not None else "--bearing"
    if args.network is not None and args.bearing is not None:
        raise InputError("give --network (a river network) or --bearing (a current's "
                         "direction), not both: eigen builds one basis")
    if args.graph != "distance_based":
        raise InputError(f"--graph {args.graph} does not apply with {what}"
                         + (": the network is the graph; drop --graph" if args.network
                            else ": a bearing orients the sites' Delaunay graph; drop --graph"))
    if args.weighting != "binary":
        raise InputError(f"--weighting is the edge weighting of straight-line graphs; with "
                         f"{what} use --edge-weighting")
    for name in ("neighbours", "finest_scale", "exponent"):
        if getattr(args, name) is not None:
            raise InputError(f"--{name.replace('_', '-')} does not apply with {what}; drop it"
                             + (" (give the exponent as --edge-weighting concave_down:A)"
                                if name == "exponent" else ""))
    if args.threshold is not None and not (args.network is not None
                                           and args.network_basis == "distance"):
        raise InputError(f"--threshold applies with {what} only to --network-basis distance; "
                         f"drop it")


def _directional_basis(args: argparse.Namespace, survey, network):
    from spatial_ev.space.directional import (
        aem_eigenvectors,
        bearing_graph,
        network_distance_eigenvectors,
    )
    from spatial_ev.space.graphs import neighbour_graph

    name, _, exp_text = args.edge_weighting.partition(":")
    exponent = float(exp_text) if exp_text else None
    orientation = "against_flow" if args.against_flow else "with_flow"
    if network is not None and args.network_basis == "distance":
        return network_distance_eigenvectors(network, threshold=args.threshold,
                                             keep=args.keep,
                                             max_vectors=args.max_vectors)
    graph = network if network is not None else bearing_graph(
        neighbour_graph(survey, "delaunay"), bearing=args.bearing,
        distance_unit=survey.distance_unit)
    return aem_eigenvectors(graph, orientation=orientation, weighting=name, exponent=exponent,
                            weight_by=args.weight_by, max_distance=args.max_distance,
                            keep=args.keep, max_vectors=args.max_vectors)


def _network_layers(basis, network, crs) -> dict:
    import geopandas as gpd

    from spatial_ev.space.directional import points_along_network

    edges = network.edges
    lines = gpd.GeoDataFrame(
        {"upstream_node": edges["upstream_node"].to_numpy(),
         "downstream_node": edges["downstream_node"].to_numpy(),
         "length": edges["length"].to_numpy(dtype=float)},
        geometry=edges.geometry.to_numpy(), crs=crs)
    points = points_along_network(network, spacing=network.total_length / 2000)
    values = basis.extend(points)
    along = gpd.GeoDataFrame(
        values.assign(edge=points["edge"].to_numpy(), offset=points["offset"].to_numpy()),
        geometry=gpd.points_from_xy(points["x"], points["y"]), crs=crs)
    return {"river_network": lines, "spatial_vectors_along_network": along}


def _print_summary(basis, survey, out) -> None:
    from spatial_ev._validation import significant

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
            lines.append(f"{row.Index:<8}{significant(row.eigenvalue, 4):>14}"
                         f"{row.moran_i:>10.4f}{significant(row.scale):>14}")
        elif pos == 5:
            lines.append(f"{'...':<8}")
    lines.append(f"written: {out}/spatial_vectors.csv, vector_properties.csv, "
                 "spatial_vectors.gpkg (layer spatial_vectors)")
    print("\n".join(lines), file=sys.stdout)
