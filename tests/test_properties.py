"""Property tests (hypothesis): what must not change when nothing real changes.

Exactly invariant (to floating-point rounding) under a reordering of the sites, applied to
every table at once: the transformed community (rows follow the sites), neighbour graphs,
eigenvalues, Moran's I, scales and the eigenvectors themselves (the sign rule -- largest
absolute entry positive -- does not depend on the order), R², adjusted R², canonical
eigenvalues, variation fractions and every observed test statistic. Permutation p-values are
invariant only in distribution: the same seed draws the same permutations of *positions*, so a
reordered table pairs them with other sites; they are not compared here (the determinism tests
check that the same input and seed give the same p-values).

Under a rigid motion (rotation + translation) of the coordinates, distances do not change:
graphs, eigenvalues, Moran's I, scales and fractions are identical and eigenvectors equal up
to sign (here exactly equal, as the sign rule depends on the vector only). A linear trend on
the coordinates spans the same space, so its statistic is identical too.

Under a change of map unit (coordinates × 1000): every length (graph edge lengths, distance
threshold, scales) is multiplied by 1000 and everything else is identical -- the db-MEM
weights 1 − (d / 4t)² and the linear graph weights 1 − d / d_max are ratios of lengths
(Dray, Legendre & Peres-Neto 2006, Ecol. Model. 196:483-493 [memory]).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from spatial_ev.stats.canonical import redundancy_analysis
from spatial_ev.space.graphs import neighbour_graph
from spatial_ev.space.eigen import distance_eigenvectors, graph_eigenvectors
from spatial_ev.inference.autocorrelation import morans_i
from spatial_ev.selection.partition import partition_variation
from spatial_ev.inference.permutation import permutation_test
from spatial_ev.input.survey import Survey
from spatial_ev.stats.transform import transform

SETTINGS = settings(max_examples=12, deadline=None, derandomize=True,
                    suppress_health_check=[HealthCheck.too_slow])
RTOL, ATOL = 1e-7, 1e-9

seeds = st.integers(min_value=0, max_value=2 ** 32 - 1)
sizes = st.integers(min_value=12, max_value=40)


def make_survey(seed: int, n: int):
    """Irregular sites (no symmetric layouts, so eigenvalues are distinct), a community with
    a broad gradient, two environmental variables."""
    rng = np.random.default_rng(seed)
    xy = rng.uniform(0, 1000, (n, 2))
    ids = pd.Index([f"q{i:03d}" for i in range(n)], name="site")
    coords = pd.DataFrame(xy, index=ids, columns=["x", "y"])
    grad = (xy[:, 0] + 0.5 * xy[:, 1]) / 1000
    counts = rng.poisson(np.exp(0.5 + np.outer(grad, rng.normal(0, 1.5, 6))))
    counts[:, 0] += 1
    species = pd.DataFrame(counts.astype(float), index=ids,
                           columns=[f"sp{j}" for j in range(6)])
    env = pd.DataFrame({"depth": rng.normal(2, 1, n), "silt": grad + rng.normal(0, 0.2, n)},
                       index=ids)
    return coords, species, env


def derived(coords: pd.DataFrame, species: pd.DataFrame, env: pd.DataFrame) -> dict:
    """Everything compared by the property tests, computed from one version of the survey."""
    Y = transform(species, "hellinger")
    basis = distance_eigenvectors(coords)
    graph = neighbour_graph(coords, "gabriel")
    gbasis = graph_eigenvectors(graph, weighting="linear")
    rda = redundancy_analysis(Y, env)
    space = basis.vectors.iloc[:, :3]
    part = partition_variation(Y, {"environment": env, "space": space}, n_permutations=0)
    trend = permutation_test(Y, coords - coords.mean(), n_permutations=19, seed=1)
    return {"Y": Y, "basis": basis, "graph": graph, "gbasis": gbasis, "rda": rda,
            "fractions": part.fractions["r2_adj"], "trend": trend,
            "moran": morans_i(Y, graph).statistic}


def edges(graph, ids) -> set:
    coo = graph.lengths.tocoo()
    return {(ids[i], ids[j]) for i, j in zip(coo.row, coo.col)}


def assert_same_basis(a, b, *, order=None, length_factor=1.0, up_to_sign=False):
    """b is a's basis after a reordering (``order``: b's site ids) / change of unit."""
    np.testing.assert_allclose(b.eigenvalues, a.eigenvalues, rtol=RTOL, atol=ATOL)
    np.testing.assert_allclose(b.moran_i.to_numpy(), a.moran_i.to_numpy(), rtol=RTOL, atol=ATOL)
    np.testing.assert_allclose(b.scale.to_numpy(), length_factor * a.scale.to_numpy(),
                               rtol=RTOL)
    assert list(b.vectors.columns) == list(a.vectors.columns)
    va = a.vectors.to_numpy() if order is None else a.vectors.loc[order].to_numpy()
    vb = b.vectors.to_numpy()
    if up_to_sign:
        vb = vb * np.sign(np.sum(va * vb, axis=0))
    np.testing.assert_allclose(vb, va, rtol=RTOL, atol=1e-7)
    if a.threshold is not None:
        assert b.threshold == pytest.approx(length_factor * a.threshold, rel=RTOL)


def assert_same_statistics(a: dict, b: dict) -> None:
    assert b["rda"].r2 == pytest.approx(a["rda"].r2, rel=RTOL)
    assert b["rda"].r2_adj == pytest.approx(a["rda"].r2_adj, rel=RTOL, abs=ATOL)
    np.testing.assert_allclose(np.asarray(b["rda"].canonical_eigenvalues),
                               np.asarray(a["rda"].canonical_eigenvalues), rtol=RTOL, atol=ATOL)
    np.testing.assert_allclose(b["fractions"].to_numpy(), a["fractions"].to_numpy(),
                               rtol=RTOL, atol=ATOL)
    assert b["trend"].statistic == pytest.approx(a["trend"].statistic, rel=RTOL)
    assert b["trend"].r2_adj == pytest.approx(a["trend"].r2_adj, rel=RTOL, abs=ATOL)


class TestSiteOrder:
    @SETTINGS
    @given(seed=seeds, n=sizes)
    def test_reordering_every_table(self, seed, n):
        coords, species, env = make_survey(seed, n)
        order = np.random.default_rng(seed + 1).permutation(n)
        a = derived(coords, species, env)
        pc, ps, pe = coords.iloc[order], species.iloc[order], env.iloc[order]
        b = derived(pc, ps, pe)
        ids = pc.index
        pd.testing.assert_frame_equal(b["Y"], a["Y"].loc[ids])
        assert_same_basis(a["basis"], b["basis"], order=ids)
        assert_same_basis(a["gbasis"], b["gbasis"], order=ids)
        assert edges(a["graph"], coords.index) == edges(b["graph"], ids)
        assert_same_statistics(a, b)
        np.testing.assert_allclose(b["moran"].to_numpy(), a["moran"].to_numpy(), rtol=RTOL,
                                   atol=ATOL)
        assert list(b["basis"].vectors.index) == list(ids)

    @SETTINGS
    @given(seed=seeds, n=sizes)
    def test_survey_reordering(self, seed, n):
        coords, species, env = make_survey(seed, n)
        sites = coords.assign(x=coords["x"] + 500_000, y=coords["y"] + 6_650_000)
        order = np.random.default_rng(seed + 2).permutation(n)
        # each table reordered on its own: alignment is by site id, not by row
        a = Survey.from_frames(sites, species, env, crs="EPSG:32633")
        b = Survey.from_frames(sites.iloc[order], species.iloc[::-1], env.iloc[order[::-1]],
                               crs="EPSG:32633")
        ids = b.site_ids
        assert list(ids) == list(sites.index[order])
        pd.testing.assert_frame_equal(b.coords, a.coords.loc[ids])
        pd.testing.assert_frame_equal(b.species, a.species.loc[ids])
        pd.testing.assert_frame_equal(b.environment, a.environment.loc[ids])


class TestRigidMotion:
    @SETTINGS
    @given(seed=seeds, n=sizes, angle=st.floats(0, 2 * np.pi),
           shift=st.tuples(st.floats(-1e6, 1e6), st.floats(-1e6, 1e6)))
    def test_rotation_and_translation(self, seed, n, angle, shift):
        coords, species, env = make_survey(seed, n)
        c, s = np.cos(angle), np.sin(angle)
        moved = coords.to_numpy() @ np.array([[c, s], [-s, c]]) + np.asarray(shift)
        moved = pd.DataFrame(moved, index=coords.index, columns=["x", "y"])
        a, b = derived(coords, species, env), derived(moved, species, env)
        assert_same_basis(a["basis"], b["basis"], up_to_sign=True)
        assert_same_basis(a["gbasis"], b["gbasis"], up_to_sign=True)
        assert edges(a["graph"], coords.index) == edges(b["graph"], coords.index)
        assert_same_statistics(a, b)
        np.testing.assert_allclose(b["moran"].to_numpy(), a["moran"].to_numpy(), rtol=RTOL,
                                   atol=ATOL)


@pytest.mark.filterwarnings("ignore::spatial_ev.errors.GeographicCoordinatesWarning")
class TestMapUnits:
    """(Coordinates × 0.001 fall in degree ranges; the planar reading is intended here.)"""

    @SETTINGS
    @given(seed=seeds, n=sizes, factor=st.sampled_from([1000.0, 0.001, 3.28084]))
    def test_change_of_unit(self, seed, n, factor):
        coords, species, env = make_survey(seed, n)
        a, b = derived(coords, species, env), derived(coords * factor, species, env)
        assert_same_basis(a["basis"], b["basis"], length_factor=factor)
        assert_same_basis(a["gbasis"], b["gbasis"], length_factor=factor)
        la, lb = a["graph"].lengths, b["graph"].lengths
        assert (la != 0).nnz == (lb != 0).nnz
        np.testing.assert_allclose(lb.toarray(), factor * la.toarray(), rtol=RTOL)
        assert_same_statistics(a, b)

    def test_survey_in_kilometres_and_metres(self):
        coords, species, env = make_survey(20261202, 25)
        metres = Survey.from_frames(coords, species, env, local_unit="metre")
        km = Survey.from_frames(coords / 1000, species, env, local_unit="km")
        assert km.distance_unit == "kilometre"
        a, b = distance_eigenvectors(metres), distance_eigenvectors(km)
        assert_same_basis(a, b, length_factor=1e-3)


def _snapshot(value):
    if isinstance(value, (pd.DataFrame, pd.Series)):
        return value.copy(deep=True)
    return np.array(value, copy=True)


class TestInputsUnchanged:
    @SETTINGS
    @given(seed=seeds, n=sizes)
    def test_no_function_modifies_its_inputs(self, seed, n):
        coords, species, env = make_survey(seed, n)
        xy = coords.to_numpy()
        inputs = {"coords": coords, "species": species, "env": env, "xy": xy}
        before = {k: _snapshot(v) for k, v in inputs.items()}
        Y = transform(species, "chord")
        y_before = Y.copy(deep=True)
        derived(coords, species, env)
        distance_eigenvectors(xy)
        graph = neighbour_graph(xy, "delaunay")
        lengths_before = graph.lengths.copy()
        graph_eigenvectors(graph, weighting="concave_down", exponent=0.5)
        morans_i(Y, graph, n_permutations=19, seed=seed)
        redundancy_analysis(Y, env, conditioning=coords)
        partition_variation(Y, {"a": env, "b": coords}, n_permutations=19, seed=seed)
        Survey.from_frames(coords, species, env, local_unit="metre")
        for key, value in inputs.items():
            if isinstance(value, pd.DataFrame):
                pd.testing.assert_frame_equal(value, before[key])
            else:
                np.testing.assert_array_equal(value, before[key])
        pd.testing.assert_frame_equal(Y, y_before)
        assert (graph.lengths != lengths_before).nnz == 0
