"""Tests of spatial_ev.selection.weighting (Šidák level, comparison of spatial weighting schemes)."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from spatial_ev.errors import DisconnectedGraphWarning, InputError
from spatial_ev.selection.weighting import (DEFAULT_SCHEMES, WeightingComparison,
                                         compare_weighting_schemes, sidak_level)


class TestSidakLevel:
    @pytest.mark.parametrize("k, expected", [(1, 0.05), (2, 0.025321), (5, 0.010206),
                                             (10, 0.005116)])
    def test_check_values(self, k, expected):
        # Šidák correction for choosing a weighting scheme among k (Bauman, Drouet, Fortin &
        # Dray 2018, Ecology 99:2159–2166); values of REFERENCES.md [derived].
        assert sidak_level(0.05, k) == pytest.approx(expected, abs=5e-7)

    def test_validation(self):
        with pytest.raises(InputError, match=r"`n_tests` must be >= 1; got 0"):
            sidak_level(0.05, 0)
        with pytest.raises(InputError, match=r"`alpha` must be > 0 and < 1; got 1.0"):
            sidak_level(1.0, 3)


def _broad_scale_survey(n: int, seed: int, signal: float):
    rng = np.random.default_rng(seed)
    xy = pd.DataFrame(rng.uniform(0, 1000, size=(n, 2)), columns=["x", "y"],
                      index=pd.Index([f"st{i:03d}" for i in range(n)], name="station"))
    wave = np.sin(xy["x"].to_numpy() / 180) + np.cos(xy["y"].to_numpy() / 240)
    Y = pd.DataFrame(signal * np.outer(wave, [1.0, -0.5, 0.8]) + rng.normal(size=(n, 3)),
                     index=xy.index, columns=["sp1", "sp2", "sp3"])
    return xy, Y


class TestCompareWeightingSchemes:
    SCHEMES = ["gabriel/binary", "delaunay/linear", "distance"]

    def test_best_scheme_and_corrected_level(self):
        xy, Y = _broad_scale_survey(50, 1029384756, signal=1.5)
        out = compare_weighting_schemes(Y, xy, schemes=self.SCHEMES, n_permutations=199,
                                        seed=777)
        assert isinstance(out, WeightingComparison)
        # Bauman et al. 2018: each global test judged at α' = 1 − (1 − α)^(1/k) [derived]
        assert out.alpha_corrected == pytest.approx(1 - 0.95 ** (1 / 3), rel=1e-12)
        table = out.table
        assert list(table.index) == self.SCHEMES
        assert (table["significant"] == (table["global_p"] <= out.alpha_corrected)).all()
        assert np.allclose(table["global_p_sidak"], 1 - (1 - table["global_p"]) ** 3)
        significant = table[table["significant"]]
        assert out.best == significant["r2_adj"].idxmax()
        assert table.loc[out.best, "chosen"] and table["chosen"].sum() == 1
        assert set(out.selection.selected) <= set(out.basis.vectors.columns)
        assert out.selection.r2_adj == pytest.approx(table.loc[out.best, "r2_adj"])
        assert (table["n_vectors"] > 0).all()
        again = compare_weighting_schemes(Y, xy, schemes=self.SCHEMES, n_permutations=199,
                                          seed=777)
        pd.testing.assert_frame_equal(again.table, out.table)
        assert "Chosen:" in out.summary()

    def test_default_schemes_stay_connected(self):
        assert len(DEFAULT_SCHEMES) == 8 and DEFAULT_SCHEMES[-1] == "distance"
        assert "gabriel/linear" in DEFAULT_SCHEMES
        assert "minimum_spanning_tree/linear" not in DEFAULT_SCHEMES   # a tree would split
        xy, Y = _broad_scale_survey(60, 90210, signal=1.0)
        with warnings.catch_warnings():
            warnings.simplefilter("error", DisconnectedGraphWarning)
            out = compare_weighting_schemes(Y, xy, n_permutations=199, seed=11)
        assert list(out.table.index) == list(DEFAULT_SCHEMES)
        assert out.alpha_corrected == pytest.approx(1 - 0.95 ** (1 / 8), rel=1e-12)

    def test_split_weighted_graph_is_noted(self):
        # Linear weights give the longest edge weight 0: a spanning tree always splits.
        xy, Y = _broad_scale_survey(40, 1122, signal=1.0)
        with pytest.warns(DisconnectedGraphWarning):
            out = compare_weighting_schemes(Y, xy, schemes=["minimum_spanning_tree/linear"],
                                            n_permutations=99, seed=3)
        assert out.table.loc["minimum_spanning_tree/linear", "note"].startswith(
            "weighted graph disconnected")

    def test_scheme_results_do_not_depend_on_the_other_schemes(self):
        xy, Y = _broad_scale_survey(40, 31337, signal=0.5)
        alone = compare_weighting_schemes(Y, xy, schemes=["distance"], n_permutations=99,
                                          seed=9)
        along = compare_weighting_schemes(Y, xy, schemes=["gabriel/binary", "distance"],
                                          n_permutations=99, seed=9)
        assert alone.table.loc["distance", "global_p"] == along.table.loc["distance",
                                                                          "global_p"]
        other = compare_weighting_schemes(Y, xy, schemes=["distance"], n_permutations=99,
                                          seed=10)
        assert other.table.loc["distance", "global_pseudo_f"] == pytest.approx(
            alone.table.loc["distance", "global_pseudo_f"])

    def test_prebuilt_bases_by_name(self):
        from spatial_ev.space.graphs import neighbour_graph
        from spatial_ev.space.eigen import graph_eigenvectors
        xy, Y = _broad_scale_survey(45, 5150, signal=1.5)
        knn = graph_eigenvectors(neighbour_graph(xy, method="k_nearest", k=5))
        out = compare_weighting_schemes(Y, xy, schemes={"five nearest": knn, "pcnm": "distance"},
                                        n_permutations=199, seed=21)
        assert list(out.table.index) == ["five nearest", "pcnm"]
        assert out.table.loc["five nearest", "n_vectors"] == knn.vectors.shape[1]
        assert out.best in ("five nearest", "pcnm")

    def test_no_structure_gives_no_best(self):
        xy, Y = _broad_scale_survey(40, 5647382910, signal=0.0)
        out = compare_weighting_schemes(Y, xy, schemes=self.SCHEMES[:2], n_permutations=199,
                                        seed=4321)
        assert (out.table["global_p"] > out.alpha_corrected).all()
        assert out.best is None and out.selection is None
        assert "no spatial structure was detected" in out.summary()

    def test_summary_when_significant_scheme_keeps_nothing(self):
        table = pd.DataFrame({"n_vectors": [12], "global_pseudo_f": [3.1], "global_p": [0.002],
                              "global_p_sidak": [0.002], "significant": [True],
                              "n_selected": [0], "r2_adj": [0.0], "chosen": [False],
                              "note": [""]}, index=pd.Index(["distance"], name="scheme"))
        out = WeightingComparison(table=table, best=None, selection=None, basis=None,
                                  alpha=0.05, alpha_corrected=0.05, n_schemes=1)
        assert "selection kept no vector" in out.summary()

    @pytest.mark.slow
    def test_family_wise_error_under_null(self):
        # Bauman et al. 2018: with the Šidák correction, choosing among k schemes keeps the
        # family-wise type I error at or below alpha (tests are positively dependent). Count of
        # false detections must not exceed the binomial 99% upper bound around alpha.
        reps, alpha = 150, 0.05
        rng = np.random.default_rng(8080808080)
        hits = 0
        for _ in range(reps):
            xy = rng.uniform(0, 1000, size=(30, 2))
            y = rng.normal(size=(30, 1))
            out = compare_weighting_schemes(y, xy, schemes=self.SCHEMES, n_permutations=99,
                                            seed=int(rng.integers(2**32)))
            hits += out.best is not None
        assert hits <= stats.binom.interval(0.99, reps, alpha)[1]


def _assert_same_comparison(other, base):
    """Same table (p-values, counts and choices exactly; statistics to 1e-12 relative, since
    one-thread and multi-thread BLAS sum in different orders), same choice and selection."""
    exact = ["global_p", "significant", "n_selected", "chosen", "note", "n_vectors"]
    pd.testing.assert_frame_equal(other.table[exact], base.table[exact], check_exact=True)
    pd.testing.assert_frame_equal(other.table, base.table, check_exact=False, rtol=1e-12)
    assert other.best == base.best
    if base.selection is None:
        assert other.selection is None and other.basis is None
        return
    assert other.selection.selected == base.selection.selected
    pd.testing.assert_frame_equal(other.selection.steps, base.selection.steps,
                                  check_exact=False, rtol=1e-12)
    pd.testing.assert_frame_equal(other.basis.vectors, base.basis.vectors, check_exact=False,
                                  rtol=1e-10, atol=1e-12)


@pytest.fixture(scope="module")
def broad_data():
    return _broad_scale_survey(60, 90210, signal=1.0)


@pytest.fixture(scope="module")
def sequential(broad_data):
    xy, Y = broad_data
    return compare_weighting_schemes(Y, xy, n_permutations=199, seed=11)


@pytest.fixture(scope="module")
def client():
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  dashboard_address=":0") as cluster, \
            distributed.Client(cluster) as c:
        yield c


class TestSchemesInParallel:
    """Each scheme is an independent task on worker processes or dask; the comparison must be
    the sequential one, whatever the engine and number of workers."""

    def test_sequential_reference_is_not_trivial(self, sequential):
        # several schemes significant with vectors kept, so the choice is a real comparison
        assert sequential.table["n_selected"].gt(0).sum() >= 2 and sequential.best is not None

    @pytest.mark.parametrize("n_workers", [1, 2])
    def test_processes(self, broad_data, sequential, n_workers):
        xy, Y = broad_data
        out = compare_weighting_schemes(Y, xy, n_permutations=199, seed=11,
                                        engine="processes", n_workers=n_workers)
        _assert_same_comparison(out, sequential)

    def test_dask(self, broad_data, sequential, client):
        xy, Y = broad_data
        out = compare_weighting_schemes(Y, xy, n_permutations=199, seed=11, engine="dask",
                                        scheduler=client)
        _assert_same_comparison(out, sequential)

    def test_warnings_and_progress_come_back(self):
        xy, Y = _broad_scale_survey(40, 1122, signal=1.0)
        messages = []
        with pytest.warns(DisconnectedGraphWarning):
            out = compare_weighting_schemes(Y, xy, schemes=["minimum_spanning_tree/linear",
                                                            "distance"],
                                            n_permutations=99, seed=3, engine="processes",
                                            n_workers=2, progress=messages.append)
        assert out.table.loc["minimum_spanning_tree/linear", "note"].startswith(
            "weighted graph disconnected")
        assert messages == ["weighting schemes: 1 of 2 compared",
                            "weighting schemes: 2 of 2 compared"]

    def test_execution_options_validated(self, broad_data):
        xy, Y = broad_data
        with pytest.raises(InputError, match=r"`engine` must be one of 'local', 'processes', "
                                             r"'dask'; got 'ray'"):
            compare_weighting_schemes(Y, xy, engine="ray")
        with pytest.raises(InputError, match=r"`n_workers` must be >= 1; got 0"):
            compare_weighting_schemes(Y, xy, engine="processes", n_workers=0)
        with pytest.raises(InputError, match=r"`scheduler` is only used with engine='dask'"):
            compare_weighting_schemes(Y, xy, engine="processes", scheduler="tcp://h:8786")


class TestSequentialStepTests:
    """Sequential step decisions inside the scheme comparison: the same choices as drawing the
    full count (the rule's risk is 0.001 per decision), fewer permutations, and the same
    outcome on every engine."""

    @pytest.fixture(scope="class")
    def early(self, broad_data):
        xy, Y = broad_data
        return compare_weighting_schemes(Y, xy, n_permutations=199, seed=11,
                                         sequential_steps=True)

    def test_same_choices_fewer_permutations(self, early, sequential):
        # the global tests draw the full count: their columns are unchanged
        cols = ["global_pseudo_f", "global_p", "significant"]
        pd.testing.assert_frame_equal(early.table[cols], sequential.table[cols])
        assert early.best == sequential.best
        assert early.selection.selected == sequential.selection.selected
        assert early.selection.sequential and not sequential.selection.sequential
        drawn = early.selection.steps["permutations"]
        assert drawn.max() <= 199 and drawn.min() < 199
        assert early.selection.step_permutations < 199 * len(drawn)

    def test_same_on_worker_processes(self, broad_data, early):
        xy, Y = broad_data
        out = compare_weighting_schemes(Y, xy, n_permutations=199, seed=11,
                                        sequential_steps=True, engine="processes",
                                        n_workers=2)
        _assert_same_comparison(out, early)

    def test_shared_permutations_same_on_every_engine(self, broad_data, sequential):
        xy, Y = broad_data
        local = compare_weighting_schemes(Y, xy, n_permutations=199, seed=11,
                                          shared_steps=True)
        assert local.selection.shared and not local.selection.sequential
        # global tests are unchanged; steps rest on the full count of shared permutations
        cols = ["global_pseudo_f", "global_p", "significant"]
        pd.testing.assert_frame_equal(local.table[cols], sequential.table[cols])
        p = local.selection.steps["p_value"].dropna().to_numpy()
        np.testing.assert_allclose(p * 200, np.round(p * 200), atol=1e-9)
        out = compare_weighting_schemes(Y, xy, n_permutations=199, seed=11, shared_steps=True,
                                        engine="processes", n_workers=2)
        _assert_same_comparison(out, local)

    def test_validation(self, broad_data):
        xy, Y = broad_data
        with pytest.raises(InputError, match="cannot both be on"):
            compare_weighting_schemes(Y, xy, sequential_steps=True, shared_steps=True)
        with pytest.raises(InputError, match="`sequential_steps` must be True or False"):
            compare_weighting_schemes(Y, xy, sequential_steps="yes")
        with pytest.raises(InputError, match="decision_risk"):
            compare_weighting_schemes(Y, xy, sequential_steps=True, decision_risk=0.9)


class TestCompareWeightingSchemesValidation:
    def setup_method(self):
        self.xy, self.Y = _broad_scale_survey(25, 1234, signal=1.0)

    def test_scheme_strings(self):
        with pytest.raises(InputError, match=r"entry 'gabriel' is not 'distance' or"):
            compare_weighting_schemes(self.Y, self.xy, schemes=["gabriel"])
        with pytest.raises(InputError, match=r"entry 'gabrial/binary': graph must be one of"):
            compare_weighting_schemes(self.Y, self.xy, schemes=["gabrial/binary"])
        with pytest.raises(InputError, match=r"exponent 'x' is not a number"):
            compare_weighting_schemes(self.Y, self.xy, schemes=["gabriel/concave_down:x"])
        with pytest.raises(InputError, match=r"lists a scheme twice"):
            compare_weighting_schemes(self.Y, self.xy, schemes=["distance", "distance"])
        with pytest.raises(InputError, match=r"`schemes` is empty"):
            compare_weighting_schemes(self.Y, self.xy, schemes=[])
        with pytest.raises(InputError, match=r"`schemes` must be a list"):
            compare_weighting_schemes(self.Y, self.xy, schemes="distance")
        with pytest.raises(InputError, match=r"entry 'mine' must be a scheme string or a "
                                             r"spatial basis.*got int"):
            compare_weighting_schemes(self.Y, self.xy, schemes={"mine": 3})

    def test_too_few_permutations_for_corrected_level(self):
        # Šidák level for k = 10 is 0.005116 (REFERENCES.md [derived]): 1/(N + 1) must reach it
        ten = list(DEFAULT_SCHEMES) + ["relative_neighbourhood/linear", "gabriel/concave_up:1"]
        with pytest.raises(InputError, match=r"n_permutations = 99 cannot reach the corrected "
                                             r"level 0.005116 for 10 schemes.*at least 195"):
            compare_weighting_schemes(self.Y, self.xy, schemes=ten, n_permutations=99)

    def test_site_count_mismatch(self):
        with pytest.raises(InputError, match=r"`coords` has 25 sites but `Y` has 24 rows"):
            compare_weighting_schemes(self.Y.iloc[:24], self.xy, schemes=["distance"],
                                      n_permutations=99)

    def test_site_order_mismatch(self):
        shuffled = self.Y.iloc[::-1]
        with pytest.raises(InputError, match=r"`coords` rows are not the sites of `Y`.*reindex"):
            compare_weighting_schemes(shuffled, self.xy, schemes=["distance"], n_permutations=99)


class TestMaxVectors:
    def test_keeps_only_broadest_vectors(self):
        # the broadest k vectors are the first k of the full basis (sorted by eigenvalue)
        rng = np.random.default_rng(1357911)
        xy = rng.uniform(0, 100, size=(60, 2))
        Y = np.sin(xy[:, :1] / 20) + 0.2 * rng.normal(size=(60, 1))
        full = compare_weighting_schemes(Y, xy, schemes=["distance"], n_permutations=99, seed=3)
        capped = compare_weighting_schemes(Y, xy, schemes=["distance"], n_permutations=99,
                                           seed=3, max_vectors=5)
        assert capped.table.loc["distance", "n_vectors"] == 5
        assert full.table.loc["distance", "n_vectors"] > 5

    def test_bad_value(self):
        with pytest.raises(InputError, match="max_vectors"):
            compare_weighting_schemes(np.ones((10, 1)) + np.arange(10)[:, None],
                                      np.arange(20.0).reshape(10, 2), max_vectors=0)
