"""Central guarantees of the public API, checked for every public function in
``spatial_ev.__all__`` (a new public name fails :class:`TestRegistry` until it has an entry).

For each function: its public name resolves to the function; everything after the data is
keyword-only, hinted and documented with an example; inputs are not modified; the library
prints nothing; the same seed repeats the result; site ids (the caller's index labels, here
non-contiguous integers) are preserved in outputs; results are frozen dataclasses (or pandas
objects) and survive pickling (needed by the dask engine and by users caching results);
invalid arguments raise :class:`~spatial_ev.errors.InputError` naming the argument.
"""

from __future__ import annotations

import dataclasses
import importlib
import inspect
import json
import math
import pickle
import subprocess
import sys
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
import pytest
from scipy import sparse

import spatial_ev
from spatial_ev import errors

SEED = 2_718_281_828


# ------------------------------------------------------------------------------ test data

@pytest.fixture(scope="module")
def data(tmp_path_factory) -> dict:
    """A small survey keyed by non-contiguous integer site ids, in files and frames."""
    from spatial_ev.space.graphs import neighbour_graph
    from spatial_ev.space.eigen import distance_eigenvectors
    from spatial_ev.input.network import read_river_network
    from spatial_ev.input.survey import Survey
    from spatial_ev.stats.transform import transform

    rng = np.random.default_rng(SEED)
    n = 30
    ids = pd.Index(rng.choice(np.arange(100, 1000), n, replace=False), name="station")
    xy = rng.uniform(0, 800, (n, 2))
    coords = pd.DataFrame(xy, index=ids, columns=["x", "y"])
    grad = (xy[:, 0] - 400) / 400
    counts = rng.poisson(np.exp(1.0 + np.outer(grad, rng.normal(0, 1.2, 7))))
    counts[:, 0] += 1
    species = pd.DataFrame(counts.astype(float), index=ids,
                           columns=pd.Index([f"taxon_{j}" for j in range(7)], name="species"))
    env = pd.DataFrame({"depth": grad + rng.normal(0, 0.3, n), "silt": rng.normal(0, 1, n),
                        "ph": rng.normal(7, 0.2, n)}, index=ids)
    folder = tmp_path_factory.mktemp("contract")
    sites = coords.assign(x=coords["x"] + 400_000, y=coords["y"] + 5_500_000)
    sites.to_csv(folder / "sites.csv")
    species.to_csv(folder / "species.csv")
    env.to_csv(folder / "environment.csv")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", errors.SpatialEVWarning)
        survey = Survey.from_frames(sites, species, env, crs="EPSG:32631")
        Y = transform(species, "hellinger")
        graph = neighbour_graph(coords, "gabriel")
        basis = distance_eigenvectors(coords)
        from spatial_ev.pipeline.analysis import analyse

        pilot = analyse(survey, spatial_weighting="single", schemes="distance",
                        n_permutations=49, seed=SEED)
    # a comb-shaped river under the sites: a trunk along x = 0 flowing south, one branch from
    # the east every 100 m, digitised downstream; every site lies within 50 m of a line
    import geopandas as gpd
    import shapely

    ox, oy = 400_000, 5_500_000
    stops = [900.0, *np.arange(750.0, -1.0, -100.0), -50.0]
    trunk = [shapely.LineString([(ox, oy + a), (ox, oy + b)])
             for a, b in zip(stops[:-1], stops[1:])]
    branches = [shapely.LineString([(ox + 850, oy + y), (ox, oy + y)])
                for y in np.arange(750.0, -1.0, -100.0)]
    gpd.GeoDataFrame(geometry=trunk + branches, crs="EPSG:32631").to_file(
        folder / "network.gpkg", engine="pyogrio")
    network = read_river_network(folder / "network.gpkg", survey, snap_tolerance=60.0)
    return {"ids": ids, "coords": coords, "species": species, "env": env, "Y": Y,
            "graph": graph, "basis": basis, "survey": survey, "folder": folder, "pilot": pilot,
            "network": network,
            "paths": {k: folder / f"{k}.csv" for k in ("sites", "species", "environment")}}


# ------------------------------------------------------------------------- the registry

@dataclass
class Contract:
    """How to call one public function, and what it promises."""

    call: Callable[[dict], Any]
    positional: tuple[str, ...]  # the data (and documented leading option) parameters
    labels: Callable[[Any, dict], list] = lambda result, d: []  # (obtained, expected) pairs
    bad: Callable[[dict], Any] | None = None  # a call that must raise
    bad_match: str = ""
    seeded: bool = False
    extra_inputs: Callable[[dict], dict] = field(default=lambda d: {})


def _f(name):
    """The public function from its defining module (see test_public_name_is_the_function)."""
    return getattr(importlib.import_module(f"spatial_ev.{spatial_ev._PUBLIC[name]}"), name)


CONTRACTS: dict[str, Contract] = {
    "read_survey": Contract(
        lambda d: _f("read_survey")(d["paths"]["sites"], d["paths"]["species"],
                                    d["paths"]["environment"], crs="EPSG:32631"),
        ("sites", "species", "environment"),
        labels=lambda r, d: [(r.site_ids, d["ids"]), (r.species.index, d["ids"])],
        bad=lambda d: _f("read_survey")(d["paths"]["sites"], crs="EPSG:32631",
                                        incomplete_sites="ignore"),
        bad_match=r"incomplete_sites"),
    "read_river_network": Contract(
        lambda d: _f("read_river_network")(d["folder"] / "network.gpkg", d["survey"],
                                           snap_tolerance=60.0),
        ("path", "sites"),
        labels=lambda r, d: [(r.site_ids, d["ids"])],
        bad=lambda d: _f("read_river_network")(d["folder"] / "network.gpkg", d["survey"],
                                               snap_tolerance=-1.0),
        bad_match=r"snap_tolerance"),
    "aem_eigenvectors": Contract(
        lambda d: _f("aem_eigenvectors")(d["network"], weighting="linear"), ("graph",),
        labels=lambda r, d: [(r.vectors.index, d["ids"])],
        bad=lambda d: _f("aem_eigenvectors")(d["network"], orientation="sideways"),
        bad_match=r"orientation"),
    "neighbour_graph": Contract(
        lambda d: _f("neighbour_graph")(d["coords"], "gabriel"), ("coords", "method"),
        labels=lambda r, d: [(r.site_ids, d["ids"])],
        bad=lambda d: _f("neighbour_graph")(d["coords"], "gabriell"), bad_match=r"method"),
    "distance_eigenvectors": Contract(
        lambda d: _f("distance_eigenvectors")(d["coords"]), ("coords",),
        labels=lambda r, d: [(r.vectors.index, d["ids"])],
        bad=lambda d: _f("distance_eigenvectors")(d["coords"], threshold=-1.0),
        bad_match=r"threshold"),
    "graph_eigenvectors": Contract(
        lambda d: _f("graph_eigenvectors")(d["graph"], weighting="binary"), ("graph",),
        labels=lambda r, d: [(r.vectors.index, d["ids"])],
        bad=lambda d: _f("graph_eigenvectors")(d["graph"], weighting="cubic"),
        bad_match=r"weighting"),
    "morans_i": Contract(
        lambda d: _f("morans_i")(d["Y"], d["graph"], n_permutations=49, seed=SEED),
        ("values", "weights"), seeded=True,
        labels=lambda r, d: [(r.statistic.index, d["Y"].columns)],
        bad=lambda d: _f("morans_i")(d["Y"].iloc[:-1], d["graph"]), bad_match=r"weights|values"),
    "moran_correlogram": Contract(
        lambda d: _f("moran_correlogram")(d["Y"].iloc[:, 0], d["coords"], n_classes=5,
                                          n_permutations=19, seed=SEED),
        ("values", "coords"), seeded=True,
        bad=lambda d: _f("moran_correlogram")(d["Y"].iloc[:, 0], d["coords"], n_classes=0),
        bad_match=r"n_classes"),
    "transform": Contract(
        lambda d: _f("transform")(d["species"], "hellinger"), ("Y", "method"),
        labels=lambda r, d: [(r.index, d["ids"]), (r.columns, d["species"].columns)],
        bad=lambda d: _f("transform")(d["species"], "helinger"), bad_match=r"method"),
    "redundancy_analysis": Contract(
        lambda d: _f("redundancy_analysis")(d["Y"], d["env"], conditioning=d["coords"]),
        ("Y", "X"),
        labels=lambda r, d: [(r.site_scores(2).index, d["ids"]),
                             (r.species_scores(2).index, d["Y"].columns),
                             (r.biplot_scores(2).index, d["env"].columns)],
        bad=lambda d: _f("redundancy_analysis")(d["Y"], d["env"].iloc[:-2]),
        bad_match=r"`X`"),
    "permutation_test": Contract(
        lambda d: _f("permutation_test")(d["Y"], d["env"], n_permutations=99, seed=SEED),
        ("Y", "X"), seeded=True,
        bad=lambda d: _f("permutation_test")(d["Y"], d["env"], chunk_size=0),
        bad_match=r"chunk_size"),
    "forward_selection": Contract(
        lambda d: _f("forward_selection")(d["Y"], d["basis"].vectors.iloc[:, :8],
                                          n_permutations=99, seed=SEED),
        ("Y", "candidates"), seeded=True,
        labels=lambda r, d: [(r.selected, [c for c in r.selected
                                           if c in d["basis"].vectors.columns])],
        bad=lambda d: _f("forward_selection")(d["Y"], d["env"], alpha=1.5), bad_match=r"alpha"),
    "compare_weighting_schemes": Contract(
        lambda d: _f("compare_weighting_schemes")(d["Y"], d["coords"],
                                                  schemes=["distance", "gabriel/binary"],
                                                  n_permutations=49, seed=SEED),
        ("Y", "coords"), seeded=True,
        labels=lambda r, d: [] if r.basis is None else [(r.basis.vectors.index, d["ids"])],
        bad=lambda d: _f("compare_weighting_schemes")(d["Y"], d["coords"],
                                                      schemes=["triangles/binary"]),
        bad_match=r"scheme"),
    "select_by_residual_moran": Contract(
        lambda d: _f("select_by_residual_moran")(d["Y"], d["basis"].vectors.iloc[:, :8],
                                                 d["graph"], n_permutations=49, seed=SEED),
        ("Y", "candidates", "weights"), seeded=True,
        bad=lambda d: _f("select_by_residual_moran")(d["Y"], d["basis"].vectors, d["graph"],
                                                     alpha=0.0),
        bad_match=r"alpha"),
    "beta_diversity": Contract(
        lambda d: _f("beta_diversity")(d["Y"], n_permutations=49, seed=SEED), ("Y",),
        seeded=True,
        labels=lambda r, d: [(r.lcbd.index, d["ids"]), (r.scbd.index, d["Y"].columns),
                             (r.p_value.index, d["ids"])],
        bad=lambda d: _f("beta_diversity")(d["Y"], n_permutations=-5),
        bad_match=r"n_permutations"),
    "scalogram": Contract(
        lambda d: _f("scalogram")(d["Y"], d["basis"].vectors, scales=d["basis"].scale),
        ("Y", "vectors"),
        labels=lambda r, d: [(r.index, d["basis"].vectors.columns)],
        bad=lambda d: _f("scalogram")(d["Y"], d["basis"].vectors.iloc[:-3]),
        bad_match=r"vectors|rows|sites"),
    "classify_scales": Contract(
        lambda d: _f("classify_scales")(d["basis"].scale, list(d["basis"].vectors.columns[:4])),
        ("scales", "selected"),
        bad=lambda d: _f("classify_scales")(d["basis"].scale, ["no_such_vector"]),
        bad_match=r"no_such_vector"),
    "partition_variation": Contract(
        lambda d: _f("partition_variation")(
            d["Y"], {"environment": d["env"], "space": d["basis"].vectors.iloc[:, :4]},
            n_permutations=49, seed=SEED),
        ("Y", "groups"), seeded=True,
        bad=lambda d: _f("partition_variation")(d["Y"], {"environment": d["env"]}),
        bad_match=r"groups"),
    "analyse": Contract(
        lambda d: _f("analyse")(d["survey"], spatial_weighting="single", schemes="distance",
                                n_permutations=49, seed=SEED),
        ("survey",), seeded=True,
        labels=lambda r, d: [(r.response.index, d["ids"]), (r.beta.lcbd.index, d["ids"]),
                             (r.basis.vectors.index, d["ids"])],
        bad=lambda d: _f("analyse")(d["survey"], n_permutations=5), bad_match=r"n_permutations"),
    "spectral_randomisation_test": Contract(
        lambda d: _f("spectral_randomisation_test")(d["Y"], d["env"], d["graph"],
                                                    n_randomisations=49, seed=SEED),
        ("Y", "environment", "spatial"), seeded=True,
        bad=lambda d: _f("spectral_randomisation_test")(d["Y"], d["env"], d["graph"],
                                                        n_randomisations=-1),
        bad_match=r"n_randomisations"),
    "spectral_coverage": Contract(
        lambda d: _f("spectral_coverage")(d["pilot"], ["thin:every=2"]), ("pilot", "layouts"),
        bad=lambda d: _f("spectral_coverage")(d["pilot"], ["hexagons:size=3"]),
        bad_match=r"layout|hexagons"),
    "evaluate_design": Contract(
        lambda d: _f("evaluate_design")(d["pilot"], ["thin:every=2"], n_simulations=3,
                                        n_permutations=19, seed=SEED, reference="none"),
        ("pilot", "layouts"), seeded=True,
        bad=lambda d: _f("evaluate_design")(d["pilot"], ["thin:every=2"], n_simulations=0),
        bad_match=r"n_simulations"),
}
CLASSES = {"Survey": "from_frames", "NeighbourGraph": None, "SpatialBasis": None}
FUNCTIONS = sorted(CONTRACTS)


# ------------------------------------------------------------------------------ helpers

def assert_same(a, b, path="result"):
    """Deep equality of results: dataclasses, pandas, numpy, sparse, containers."""
    if dataclasses.is_dataclass(a) and not isinstance(a, type):
        assert type(a) is type(b), path
        for f in dataclasses.fields(a):
            assert_same(getattr(a, f.name), getattr(b, f.name), f"{path}.{f.name}")
    elif isinstance(a, pd.DataFrame):
        pd.testing.assert_frame_equal(a, b, obj=path)
    elif isinstance(a, pd.Series):
        pd.testing.assert_series_equal(a, b, obj=path)
    elif isinstance(a, pd.Index):
        pd.testing.assert_index_equal(a, b, obj=path)
    elif sparse.issparse(a):
        assert a.shape == b.shape and (a != b).nnz == 0, path
    elif isinstance(a, np.ndarray):
        np.testing.assert_array_equal(a, b, err_msg=path)
    elif isinstance(a, dict):
        assert list(a) == list(b), path
        for k in a:
            assert_same(a[k], b[k], f"{path}[{k!r}]")
    elif isinstance(a, (list, tuple)):
        assert len(a) == len(b), path
        for i, (x, y) in enumerate(zip(a, b)):
            assert_same(x, y, f"{path}[{i}]")
    elif isinstance(a, float) and math.isnan(a):
        assert isinstance(b, float) and math.isnan(b), path
    elif callable(a):
        pass  # functions held by results (none expected) are not compared
    else:
        assert a == b, f"{path}: {a!r} != {b!r}"


def snapshot(d: dict) -> dict:
    out = {}
    for k, v in d.items():
        if isinstance(v, (pd.DataFrame, pd.Series, pd.Index)):
            out[k] = v.copy(deep=True)
        elif k == "paths":
            out[k] = {role: p.read_bytes() for role, p in v.items()}
        elif k == "survey":
            out[k] = {f: getattr(v, f).copy(deep=True) for f in
                      ("sites", "coords", "species", "environment")}
        elif k == "graph":
            out[k] = v.lengths.copy()
        elif k == "basis":
            out[k] = (v.vectors.copy(deep=True), v.eigenvalues.copy(), v.weights.copy())
    return out


def assert_unchanged(d: dict, before: dict) -> None:
    for k, v in before.items():
        if k == "paths":
            for role, content in v.items():
                assert d["paths"][role].read_bytes() == content, role
        elif k == "survey":
            for f, frame in v.items():
                pd.testing.assert_frame_equal(getattr(d["survey"], f), frame)
        elif k == "graph":
            assert (d["graph"].lengths != v).nnz == 0
        elif k == "basis":
            pd.testing.assert_frame_equal(d["basis"].vectors, v[0])
            np.testing.assert_array_equal(d["basis"].eigenvalues, v[1])
            assert (d["basis"].weights != v[2]).nnz == 0
        elif isinstance(v, pd.DataFrame):
            pd.testing.assert_frame_equal(d[k], v)
        elif isinstance(v, pd.Series):
            pd.testing.assert_series_equal(d[k], v)
        else:
            pd.testing.assert_index_equal(d[k], v)


def run(name: str, d: dict):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", errors.SpatialEVWarning)
        return CONTRACTS[name].call(d)


@pytest.fixture(scope="module")
def results(data) -> dict:
    """Each public function's result, computed once (inputs checked in TestInputs)."""
    return {name: run(name, data) for name in FUNCTIONS}


# -------------------------------------------------------------------------------- tests

class TestRegistry:
    def test_every_public_name_has_a_contract(self):
        public = {n for n in spatial_ev.__all__ if n != "__version__"}
        assert public == set(CONTRACTS) | set(CLASSES), \
            f"add a Contract for: {public - set(CONTRACTS) - set(CLASSES)}"

    def test_version(self):
        assert isinstance(spatial_ev.__version__, str) and spatial_ev.__version__.count(".") >= 1

    @pytest.fixture(scope="class")
    @staticmethod
    def public_kinds() -> dict:
        """What each public name is in a fresh interpreter after the whole package (analysis,
        command line) has been imported."""
        code = ("import inspect, json, spatial_ev, spatial_ev.pipeline.analysis, spatial_ev.cli.main; "
                "print(json.dumps({n: type(getattr(spatial_ev, n)).__name__ "
                "for n in spatial_ev.__all__}))")
        proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                              timeout=120)
        assert proc.returncode == 0, proc.stderr
        return json.loads(proc.stdout.strip().splitlines()[-1])

    @pytest.mark.parametrize("name", FUNCTIONS)
    def test_public_name_is_the_function(self, name, public_kinds):
        """A public name must stay the function even after its defining module has been
        imported (a submodule of the same name replaces the package attribute)."""
        assert public_kinds[name] == "function"

    @pytest.mark.parametrize("name", sorted(CLASSES))
    def test_public_class(self, name, public_kinds):
        assert public_kinds[name] in ("type", "ABCMeta")

    def test_core_import_stays_light(self):
        code = ("import sys, spatial_ev; [getattr(spatial_ev, n) for n in spatial_ev.__all__]; "
                "heavy = [m for m in ('matplotlib', 'jinja2', 'dask', 'distributed') "
                "if m in sys.modules]; print(heavy); assert not heavy")
        proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                              timeout=120)
        assert proc.returncode == 0, proc.stdout + proc.stderr


class TestSignatures:
    @pytest.mark.parametrize("name", FUNCTIONS)
    def test_keyword_only_after_the_data(self, name):
        func = _f(name)
        params = list(inspect.signature(func).parameters.values())
        positional = [p.name for p in params if p.kind is p.POSITIONAL_OR_KEYWORD]
        assert tuple(positional) == CONTRACTS[name].positional
        assert all(p.kind in (p.POSITIONAL_OR_KEYWORD, p.KEYWORD_ONLY) for p in params)

    @pytest.mark.parametrize("name", FUNCTIONS)
    def test_documented_with_example(self, name):
        func = _f(name)
        doc = inspect.getdoc(func) or ""
        for section in ("Parameters", "Examples"):
            assert section in doc, f"{name}: no {section} section"
        assert ">>> " in doc
        sig = inspect.signature(func)
        assert sig.return_annotation is not inspect.Signature.empty, f"{name}: return hint"


class TestInputs:
    @pytest.mark.parametrize("name", FUNCTIONS)
    def test_inputs_not_modified_and_nothing_printed(self, name, data, capsys):
        before = snapshot(data)
        run(name, data)
        assert_unchanged(data, before)
        out, err = capsys.readouterr()
        assert out == "" and err == "", f"{name} printed: {out!r} {err!r}"


class TestResults:
    @pytest.mark.parametrize("name", FUNCTIONS)
    def test_picklable(self, name, results):
        result = results[name]
        assert_same(result, pickle.loads(pickle.dumps(result)))

    @pytest.mark.parametrize("name", FUNCTIONS)
    def test_frozen_or_pandas(self, name, results):
        result = results[name]
        items = result if isinstance(result, list) else [result]
        for item in items:
            if isinstance(item, (pd.DataFrame, pd.Series)):
                continue
            assert dataclasses.is_dataclass(item), f"{name}: {type(item).__name__}"
            first = dataclasses.fields(item)[0].name
            with pytest.raises(dataclasses.FrozenInstanceError):
                setattr(item, first, None)

    @pytest.mark.parametrize("name", [n for n in FUNCTIONS if CONTRACTS[n].seeded])
    def test_same_seed_same_result(self, name, data, results):
        assert_same(results[name], run(name, data))

    @pytest.mark.parametrize("name", FUNCTIONS)
    def test_site_ids_preserved(self, name, data, results):
        for obtained, expected in CONTRACTS[name].labels(results[name], data):
            assert list(obtained) == list(expected), name

    def test_seed_generator_accepted(self, data):
        a = spatial_ev.morans_i(data["Y"], data["graph"], n_permutations=49,
                                seed=np.random.default_rng(SEED))
        b = spatial_ev.morans_i(data["Y"], data["graph"], n_permutations=49,
                                seed=np.random.default_rng(SEED))
        assert_same(a, b)


class TestMessages:
    @pytest.mark.parametrize("name", FUNCTIONS)
    def test_bad_argument_raises_input_error_naming_it(self, name, data):
        contract = CONTRACTS[name]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", errors.SpatialEVWarning)
            with pytest.raises(errors.InputError, match=contract.bad_match):
                contract.bad(data)

    @pytest.mark.parametrize("name", ["transform", "redundancy_analysis", "permutation_test",
                                      "beta_diversity", "morans_i"])
    def test_missing_values_rejected(self, name, data):
        """A missing cell is an error naming where it is, never a NaN result."""
        Y = data["Y"].copy()
        Y.iloc[3, 2] = np.nan
        calls = {
            "transform": lambda: _f("transform")(data["species"].where(Y.notna()), "hellinger"),
            "redundancy_analysis": lambda: _f("redundancy_analysis")(Y, data["env"]),
            "permutation_test": lambda: _f("permutation_test")(Y, data["env"], n_permutations=19),
            "beta_diversity": lambda: _f("beta_diversity")(Y, n_permutations=19),
            "morans_i": lambda: _f("morans_i")(Y, data["graph"]),
        }
        with pytest.raises(errors.InputError) as info:
            calls[name]()
        text = str(info.value)
        site, column = str(data["ids"][3]), str(Y.columns[2])
        assert site in text or "row 4" in text or "row 3" in text, text
        assert column in text or "column 3" in text or "column 2" in text, text


class TestSurveyFromFrames:
    """``Survey.from_frames``: the in-memory entry point of the public ``Survey`` class."""

    def test_contract(self, data, capsys):
        from spatial_ev.input.survey import Survey

        sites = data["coords"].assign(x=data["coords"]["x"] + 400_000)
        tables = {"sites": sites, "species": data["species"], "env": data["env"]}
        before = {k: v.copy(deep=True) for k, v in tables.items()}
        survey = Survey.from_frames(sites, data["species"].iloc[::-1], data["env"],
                                    crs="EPSG:32631")
        for k, v in tables.items():
            pd.testing.assert_frame_equal(v, before[k])
        assert capsys.readouterr() == ("", "")
        assert list(survey.site_ids) == list(data["ids"])
        assert survey.site_ids.name == "station"
        assert list(survey.species.index) == list(data["ids"])
        assert list(survey.species.columns) == list(data["species"].columns)
        assert_same(survey.coords, pickle.loads(pickle.dumps(survey)).coords)
        with pytest.raises(dataclasses.FrozenInstanceError):
            survey.coords = None
        with pytest.raises(errors.InputError, match=r"`sites` must be a \(Geo\)DataFrame"):
            Survey.from_frames(sites.to_numpy(), crs="EPSG:32631")
