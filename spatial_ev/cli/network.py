"""Directional-structure options of the commands: a river network layer, a current's bearing.

``run``, ``eigen`` and ``check`` take the same options (:func:`add_network_options`); the
network is read with :func:`spatial_ev.input.network.read_river_network` for the survey the
command read, and the library's messages about it are said in the options' words
(``--snap-tolerance``, ``--join-tolerance``, ``--flow`` ...), since several of its parameter
names (``layer``, ``crs``) would otherwise be mistaken for the site file's options.
"""

from __future__ import annotations

import argparse
from typing import Any

from spatial_ev.cli.common import in_option_words
from spatial_ev.errors import InputError, SpatialEVError

__all__ = ["add_network_options", "check_network_options", "directional_scheme_count",
           "network_from_args", "directional_arguments", "NETWORK_WORDS"]

#: read_river_network / analyse parameter -> option, for messages about the network
NETWORK_WORDS: dict[str, str] = {
    "path": "--network", "snap_tolerance": "--snap-tolerance",
    "node_tolerance": "--join-tolerance", "direction": "--flow", "outlet": "--outlet",
    "components": "--separate-catchments", "layer": "--network-layer",
    "crs": "--network-crs", "bearing": "--bearing", "weight_by": "--weight-by",
    "edge_weightings": "--edge-weighting", "weightings": "--edge-weighting",
    "orientations": "--against-flow",
}

_WEIGHTINGS = ("binary", "linear", "concave_down", "concave_up")


def add_network_options(parser: argparse.ArgumentParser, *, one_basis: bool = False
                        ) -> argparse.ArgumentParser:
    """Add the river-network and bearing options to a sub-command's parser.

    Parameters
    ----------
    parser : argparse.ArgumentParser
    one_basis : bool
        ``eigen`` builds one basis: ``--edge-weighting`` takes one value and
        ``--network-basis`` chooses AEM or along-network distances.

    Returns
    -------
    argparse.ArgumentParser

    Examples
    --------
    >>> p = add_network_options(argparse.ArgumentParser())
    >>> p.parse_args(["--network", "n.gpkg", "--snap-tolerance", "30"]).flow
    'digitised'
    """
    group = parser.add_argument_group(
        "directional structure (river networks, currents)")
    group.add_argument("--network", metavar="FILE", default=None,
                       help="river network: GeoPackage / GeoJSON / Shapefile of lines; its "
                            "directional bases (AEM with the flow, along-network distances) "
                            "join the spatial analysis")
    group.add_argument("--network-layer", metavar="NAME", default=None,
                       help="layer of a multi-layer network file (default: the only layer)")
    group.add_argument("--network-crs", metavar="CRS", default=None,
                       help="CRS of a network file that declares none (EPSG code or WKT)")
    group.add_argument("--flow", choices=("digitised", "outlet"), default="digitised",
                       help="flow direction: from the lines' digitised direction (first "
                            "vertex upstream; default) or towards the --outlet point(s)")
    group.add_argument("--outlet", metavar="X,Y", action="append", default=None,
                       help="outlet point in the survey's working CRS (with --flow outlet); "
                            "repeat for separate catchments")
    group.add_argument("--snap-tolerance", type=float, default=None, metavar="D",
                       help="largest distance (map units) from a site to its channel; "
                            "required with --network")
    group.add_argument("--join-tolerance", type=float, default=None, metavar="D",
                       help="line ends closer than D (map units) are joined (default: ends "
                            "that coincide up to rounding)")
    group.add_argument("--separate-catchments", action="store_true",
                       help="accept a network of several unconnected catchments (default: "
                            "one connected network)")
    if one_basis:
        group.add_argument("--network-basis", choices=("aem", "distance"), default="aem",
                           help="with --network: asymmetric eigenvector maps (default) or "
                                "distance-based eigenvectors of along-network distances")
        group.add_argument("--edge-weighting", metavar="W", default="binary",
                           help="edge weights of the AEM: binary (default), linear, "
                                "concave_down:A or concave_up:B")
    else:
        group.add_argument("--edge-weighting", metavar="W", nargs="+", default=None,
                           help="edge weightings of the AEM schemes compared (default: "
                                "binary linear); concave ones as concave_down:A")
    group.add_argument("--weight-by", choices=("edge_length", "network_distance"),
                       default="edge_length",
                       help="what a non-binary edge weighting decreases with: the edge's "
                            "length (default) or the along-network distance to the site")
    group.add_argument("--against-flow", action="store_true",
                       help="AEM for processes moving against the flow (or the bearing): "
                            + ("built instead of with the flow" if one_basis else
                               "compared besides the with-flow AEM"))
    group.add_argument("--bearing", type=float, default=None, metavar="DEG",
                       help="direction of a current or wind, degrees clockwise from grid "
                            "north: AEM of the Delaunay graph oriented along it"
                            + ("" if one_basis else " join the comparison"))
    return parser


def _weightings(args: argparse.Namespace) -> tuple[str, ...]:
    value = getattr(args, "edge_weighting", None)
    if value is None:
        return ("binary", "linear")
    return (value,) if isinstance(value, str) else tuple(str(v) for v in value)


def check_network_options(args: argparse.Namespace) -> None:
    """Refuse inconsistent network options before any file is read.

    Examples
    --------
    >>> p = add_network_options(argparse.ArgumentParser())
    >>> check_network_options(p.parse_args(["--network", "n.gpkg"]))
    Traceback (most recent call last):
    ...
    spatial_ev.errors.InputError: --network needs --snap-tolerance D: the largest distance \
(map units) from a site to its channel, e.g. a few times the GPS error
    """
    network = getattr(args, "network", None)
    if network is None:
        given = [o for o, v in (("--network-layer", args.network_layer),
                                ("--network-crs", args.network_crs),
                                ("--outlet", args.outlet),
                                ("--snap-tolerance", args.snap_tolerance),
                                ("--join-tolerance", args.join_tolerance),
                                ("--separate-catchments", args.separate_catchments or None),
                                ("--flow", None if args.flow == "digitised" else args.flow),
                                ("--weight-by", None if args.weight_by == "edge_length"
                                 else args.weight_by)) if v is not None]
        if given:
            raise InputError(f"{given[0]} applies to a river network; add --network FILE or "
                             f"drop {given[0]}")
    else:
        if args.snap_tolerance is None:
            raise InputError("--network needs --snap-tolerance D: the largest distance (map "
                             "units) from a site to its channel, e.g. a few times the GPS "
                             "error")
        if not args.snap_tolerance > 0:
            raise InputError(f"--snap-tolerance must be a positive distance; got "
                             f"{args.snap_tolerance:g}")
        if args.join_tolerance is not None and not args.join_tolerance > 0:
            raise InputError(f"--join-tolerance must be a positive distance; got "
                             f"{args.join_tolerance:g}")
        if args.flow == "outlet" and not args.outlet:
            raise InputError("--flow outlet needs --outlet X,Y (the outlet point in the "
                             "survey's CRS; repeat it for separate catchments)")
        if args.outlet and args.flow != "outlet":
            raise InputError("--outlet applies to --flow outlet; add --flow outlet or drop "
                             "--outlet")
        _outlets(args.outlet)
    for w in _weightings(args):
        name, _, exponent = w.partition(":")
        if name not in _WEIGHTINGS:
            raise InputError(f"--edge-weighting {w!r} is not one of {', '.join(_WEIGHTINGS)} "
                             f"(concave ones with their exponent, e.g. concave_down:0.5)")
        if exponent:
            try:
                float(exponent)
            except ValueError:
                raise InputError(f"--edge-weighting {w!r}: exponent {exponent!r} is not a "
                                 f"number; write e.g. concave_down:0.5") from None
    bearing = getattr(args, "bearing", None)
    if bearing is not None and not -360 <= bearing <= 360:
        raise InputError(f"--bearing is in degrees clockwise from grid north (0 to 360); "
                         f"got {bearing:g}")
    if network is None and bearing is None and (
            getattr(args, "against_flow", False)
            or getattr(args, "edge_weighting", None) not in (None, "binary")):
        raise InputError("--against-flow and --edge-weighting apply to directional bases; add "
                         "--network FILE or --bearing DEG, or drop them")


def _outlets(values: Any) -> list[tuple[float, float]] | None:
    if not values:
        return None
    out = []
    for v in values:
        parts = v if isinstance(v, (list, tuple)) else str(v).replace(";", ",").split(",")
        try:
            x, y = (float(p) for p in parts)
        except (TypeError, ValueError):
            raise InputError(f"--outlet {v!r} must be two numbers X,Y in the survey's CRS, "
                             f"e.g. --outlet 286000,5919478") from None
        out.append((x, y))
    return out


def directional_scheme_count(args: argparse.Namespace) -> int:
    """How many directional schemes ``run`` adds to the comparison (for the Šidák level).

    Examples
    --------
    >>> p = add_network_options(argparse.ArgumentParser())
    >>> directional_scheme_count(p.parse_args(["--network", "n.gpkg", "--against-flow"]))
    5
    """
    orientations = 2 if getattr(args, "against_flow", False) else 1
    count = 0
    if getattr(args, "network", None) is not None:
        count += orientations * len(_weightings(args)) + 1
    if getattr(args, "bearing", None) is not None:
        count += orientations * len(_weightings(args))
    return count


def network_from_args(args: argparse.Namespace, survey: Any) -> Any:
    """The river network of ``--network`` read for ``survey``, or None without it.

    Errors are said with the options' names.

    Examples
    --------
    >>> net = network_from_args(args, survey)  # doctest: +SKIP
    """
    path = getattr(args, "network", None)
    if path is None:
        return None
    from spatial_ev.input.network import read_river_network

    try:
        return read_river_network(
            path, survey, snap_tolerance=args.snap_tolerance, layer=args.network_layer,
            crs=args.network_crs, node_tolerance=args.join_tolerance, direction=args.flow,
            outlet=_outlets(args.outlet),
            components="several" if args.separate_catchments else "single")
    except SpatialEVError as exc:
        raise type(exc)(in_option_words(str(exc), NETWORK_WORDS)) from None


def directional_arguments(args: argparse.Namespace, network: Any) -> dict[str, Any]:
    """Keyword arguments of :func:`spatial_ev.analyse` for the directional options.

    Examples
    --------
    >>> p = add_network_options(argparse.ArgumentParser())
    >>> directional_arguments(p.parse_args(["--bearing", "90"]), None)["bearing"]
    90.0
    """
    orientations = ("with_flow", "against_flow") if getattr(args, "against_flow", False) \
        else ("with_flow",)
    return {"network": network, "bearing": getattr(args, "bearing", None),
            "orientations": orientations, "edge_weightings": _weightings(args),
            "weight_by": getattr(args, "weight_by", "edge_length")}
