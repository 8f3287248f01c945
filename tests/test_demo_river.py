"""Tests of spatial_ev.datasets.river: the invented river survey.

Determinism and the committed files (the generator's output, byte for byte for the CSV files),
the network geometry (shapely), the drift field being directional (checked with networkx on
the channels' own graph, independently of the package's network code), and the documented
fractions recomputed with scikit-learn.
"""

from __future__ import annotations

import json
import warnings

import networkx as nx
import numpy as np
import pandas as pd
import pyogrio
import pytest
import shapely
from sklearn.linear_model import LinearRegression
from sklearn.metrics import r2_score

from spatial_ev.datasets import river as R
from spatial_ev.errors import SpatialEVWarning
from spatial_ev.input.survey import read_survey


@pytest.fixture(scope="module")
def river():
    return R.generate_river_survey()


@pytest.fixture(scope="module")
def written(tmp_path_factory, river):
    return R.write_river_survey(tmp_path_factory.mktemp("river"), river=river)


def _r2_adj(Y: np.ndarray, X: np.ndarray) -> float:
    # pooled R² over responses = scikit-learn's variance-weighted multi-output R²; adjusted per
    # Ezekiel (1930) as in Peres-Neto, Legendre, Dray & Borcard (2006), Ecology 87:2614-2625
    n, m = X.shape
    fit = LinearRegression().fit(X, Y).predict(X)
    r2 = r2_score(Y, fit, multioutput="variance_weighted")
    return 1 - (1 - r2) * (n - 1) / (n - m - 1)


class TestGenerateRiverSurvey:
    def test_shape_and_scenario(self, river):
        assert river.species.shape == (120, 35) and river.species.index.name == "site_id"
        assert river.species.columns[0] == "RVT01"
        assert list(river.environment.columns) == ["altitude_m", "conductivity_us_cm",
                                                   "canopy_percent", "substrate"]
        assert set(river.environment["substrate"]) == {"sand", "gravel", "cobble"}
        assert river.sites.crs.to_epsg() == 32629 and river.channels.crs.to_epsg() == 32629
        assert len(river.channels) == 7
        assert (river.species.sum(axis=0) > 0).all() and (river.species.sum(axis=1) > 0).all()

    def test_deterministic(self, river):
        again = R.generate_river_survey()
        pd.testing.assert_frame_equal(again.species, river.species)
        pd.testing.assert_frame_equal(again.environment, river.environment)
        assert again.sites.geometry.geom_equals_exact(river.sites.geometry, tolerance=0).all()
        assert again.truth == river.truth

    def test_channels_form_a_dendritic_network_with_three_tributaries(self, river):
        g = nx.DiGraph()
        for line in river.channels.geometry:
            xy = shapely.get_coordinates(line)
            g.add_edge(tuple(xy[0]), tuple(xy[-1]))
        assert nx.is_tree(g.to_undirected())
        assert sum(1 for v in g if g.in_degree(v) == 0) == 4            # 4 headwater ends
        assert sum(1 for v in g if g.in_degree(v) == 2) == 3            # 3 confluences
        sinks = [v for v in g if g.out_degree(v) == 0]
        assert sinks == [tuple(river.truth["outlet_utm_m"])]
        lines = river.channels.geometry.to_numpy()
        assert shapely.is_simple(lines).all()

    def test_sites_close_to_their_reach(self, river):
        lines = river.channels.set_index("reach").geometry
        d = shapely.distance(river.sites.geometry.to_numpy(),
                             lines.loc[river.sites["reach"]].to_numpy())
        assert d.max() <= 12 * np.sqrt(2) and np.median(d) > 0.5       # GPS error, clipped

    def test_drift_recomputed_from_the_channel_geometry(self, river):
        """The raw drift equals Σ strength·exp(−d/λ) over the inputs upstream of each site,
        with reachability and along-channel distances taken from a networkx flow graph of the
        reaches built from the line geometry (independently of the generator's reach chain)."""
        reaches = R._reach_lines()
        rng = np.random.default_rng(R.SEED)
        site_reach, site_pos, _ = R._sites(reaches, rng)
        dto = R._distance_to_outlet(reaches, site_reach, site_pos)
        state = rng.bit_generator.state
        raw = R._fields(reaches, site_reach, site_pos, dto, rng)["drift_raw"]
        rng.bit_generator.state = state                      # replay the inputs' draws
        f = R.PARAMETERS["drift"]
        lengths = np.array([reaches[r].length for r in R._REACHES])
        u = rng.uniform(0.0, lengths.sum(), f["inputs"])
        strength = rng.normal(0.0, f["strength_sd"], f["inputs"])
        in_reach = np.searchsorted(np.cumsum(lengths), u, side="right")
        in_pos = u - np.concatenate([[0.0], np.cumsum(lengths)])[in_reach]
        # reach r flows into reach q when r's last vertex is q's first vertex
        flow = nx.DiGraph()
        ends = {r: shapely.get_coordinates(reaches[r].line)[[0, -1]] for r in R._REACHES}
        for r in R._REACHES:
            flow.add_node(r)
            for q in R._REACHES:
                if q != r and tuple(ends[r][1]) == tuple(ends[q][0]):
                    flow.add_edge(r, q, length=reaches[r].length)
        expected = np.zeros(len(site_reach))
        for i in range(f["inputs"]):
            a = R._REACHES[in_reach[i]]
            for s_idx in range(len(site_reach)):
                b = R._REACHES[site_reach[s_idx]]
                if a == b:
                    d = site_pos[s_idx] - in_pos[i]
                    if d < 0:
                        continue
                elif nx.has_path(flow, a, b):
                    # rest of the input's reach, whole reaches between, then into the site's
                    between = nx.shortest_path_length(flow, a, b, weight="length")
                    d = between - in_pos[i] + site_pos[s_idx]
                else:
                    continue
                expected[s_idx] += strength[i] * np.exp(-d / f["decay_m"])
        np.testing.assert_allclose(raw, expected, rtol=1e-10, atol=1e-12)
        assert (expected != 0).sum() > 80               # most sites receive some drift (95)
        # the shipped field is that raw field made orthogonal to the altitude gradient
        z = (dto - dto.mean()) / dto.std()
        res = raw - np.column_stack([np.ones_like(z), z]) @ np.linalg.lstsq(
            np.column_stack([np.ones_like(z), z]), raw, rcond=None)[0]
        shipped = np.array(list(river.truth["drift_at_sites"].values()))
        assert abs(np.corrcoef(res, shipped)[0, 1]) == pytest.approx(1.0, abs=1e-8)

    def test_expected_fractions(self, river):
        f = river.truth["expected_fractions"]
        assert f["environment_only"] > 0.3 and f["space_only"] > 0.2
        assert sum(f.values()) == pytest.approx(1.0, abs=2e-4)
        realised = river.truth["realised_fractions"]
        sd = river.truth["expected_fractions_sd"]
        for name in f:
            assert abs(realised[name] - f[name]) < 4 * sd[name] + 1e-3

    def test_realised_fractions_recomputed_with_scikit_learn(self, river):
        from spatial_ev.datasets.mudflat import hellinger_rows

        Y = hellinger_rows(river.species.to_numpy())
        env = river.environment
        X = np.column_stack([(env["altitude_m"] - env["altitude_m"].mean()),
                             np.log(env["conductivity_us_cm"]),
                             env["substrate"] == "gravel", env["substrate"] == "cobble"]
                            ).astype(float)
        W = pd.Series(river.truth["drift_at_sites"]).reindex(river.species.index).to_numpy()
        W = W[:, None]
        r_x, r_w, r_xw = _r2_adj(Y, X), _r2_adj(Y, W), _r2_adj(Y, np.hstack([X, W]))
        got = {"environment_only": r_xw - r_w, "shared": r_x + r_w - r_xw,
               "space_only": r_xw - r_x, "unexplained": 1 - r_xw}
        for name, value in got.items():
            assert value == pytest.approx(river.truth["realised_fractions"][name], abs=1e-4)


class TestWriteRiverSurvey:
    def test_committed_files_equal_generator_output(self, repo_root, written):
        committed = repo_root / "data_demo" / "river"
        for name in ("species.csv", "environment.csv"):
            assert (committed / name).read_bytes() == written[name.split(".")[0]].read_bytes()
        for key, file in (("network", "network.gpkg"), ("sites", "sites.gpkg")):
            a = pyogrio.read_dataframe(committed / file)
            b = pyogrio.read_dataframe(written[key])
            pd.testing.assert_frame_equal(a.drop(columns="geometry"), b.drop(columns="geometry"))
            assert a.geometry.geom_equals_exact(b.geometry, tolerance=0).all()
            assert a.crs == b.crs
        assert json.loads((committed / "truth.json").read_text()) == \
            json.loads(written["truth"].read_text())

    def test_files_read_cleanly_as_a_survey(self, written):
        with warnings.catch_warnings():
            warnings.simplefilter("error", SpatialEVWarning)
            s = read_survey(written["sites"], written["species"], written["environment"])
        assert s.n_sites == 120 and s.n_species == 35 and s.distance_unit == "metre"
        assert all(not v for v in s.dropped.values())
