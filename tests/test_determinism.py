"""Same seed, same result: across repeated runs, chunk sizes, worker counts, BLAS threads and
execution engines (threads, local worker processes, dask) (DESIGN.md, "identical results for the same seed whatever the batch size,
thread count or engine").

``summary.json`` floats are rounded to 10 significant digits so that results that agree to
~1e-15 relative (different BLAS thread counts sum in different orders) compare equal; the
summaries are compared as whole dictionaries. The permutation engine itself is compared on its
null distributions (to 1e-12 relative) and p-values (exactly).

``analyse`` takes no ``chunk_size``; the chunk-size invariance is tested where chunks are
chosen, in :func:`spatial_ev.inference.permutation.permutation_test`, :func:`axis_tests` and
:func:`term_tests`, which every test of the analysis goes through.
"""

from __future__ import annotations

from spatial_ev.report.summary import summary_record

import json
import warnings

import numpy as np
import pandas as pd
import pytest
from threadpoolctl import threadpool_info, threadpool_limits

from conftest import make_small_survey_tables
from spatial_ev import analyse
from spatial_ev.cli.main import main
from spatial_ev.errors import SpatialEVWarning
from spatial_ev.inference.permutation import axis_tests, permutation_test, term_tests
from spatial_ev.input.survey import Survey
from spatial_ev.stats.transform import transform

SEED = 3_141_592_653
FAST = dict(spatial_weighting="single", schemes="distance", n_permutations=99)


@pytest.fixture(scope="module")
def survey() -> Survey:
    sites, species, env = make_small_survey_tables(n_side=6, n_species=8)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SpatialEVWarning)
        return Survey.from_frames(sites.set_index("site"), species.set_index("site"),
                                  env.set_index("site"), x="easting", y="northing",
                                  crs="EPSG:32633")


@pytest.fixture(scope="module")
def reference(survey) -> dict:
    return summary_record(analyse(survey, seed=SEED, **FAST))


@pytest.fixture(scope="module")
def model(survey):
    """Response, a conditioning table and three explanatory columns of the small survey."""
    Y = transform(survey.species, "hellinger")
    xy = survey.coords - survey.coords.mean()
    X = survey.environment.assign(xy=xy["x"] * xy["y"] / 1e4)
    return Y, X, xy


class TestRepeatedRuns:
    def test_same_seed_same_summary(self, survey, reference):
        again = summary_record(analyse(survey, seed=SEED, **FAST))
        assert again == reference
        # the summary is not trivially constant: p-values carry the permutation draws
        assert reference["selected"]["space"] and reference["fractions"] is not None

    def test_other_seed_other_draws(self, survey):
        a = analyse(survey, seed=SEED, **FAST)
        b = analyse(survey, seed=SEED + 1, **FAST)
        c = analyse(survey, seed=SEED, **FAST)
        for result in (b, c):  # the observed statistic does not depend on the seed
            assert result.trend.statistic == a.trend.statistic
        np.testing.assert_array_equal(c.trend.null_distribution, a.trend.null_distribution)
        assert not np.array_equal(b.trend.null_distribution, a.trend.null_distribution)
        pd.testing.assert_series_equal(c.beta.p_value, a.beta.p_value)

    @pytest.mark.slow   # two whole runs on two engines; CI runs it
    def test_run_folder_summary_json_identical(self, tmp_path, cluster):
        """Two local runs, one on a dask cluster and two on 1 and 2 local worker processes
        write the same summary.json, byte for byte (the engine is recorded in manifest.json,
        not in the summary)."""
        sites, species, env = make_small_survey_tables(n_side=6, n_species=8)
        for name, frame in (("sites", sites), ("species", species), ("environment", env)):
            frame.to_csv(tmp_path / f"{name}.csv", index=False)
        texts = []
        engines = (["--engine", "local"], ["--engine", "local"],
                   ["--engine", "dask", "--scheduler", cluster.scheduler_address],
                   ["--engine", "processes", "--workers", "1"],
                   ["--engine", "processes", "--workers", "2"])
        for k, engine in enumerate(engines):
            out = tmp_path / f"run{k}"
            args = ["run", "--sites", str(tmp_path / "sites.csv"),
                    "--species", str(tmp_path / "species.csv"),
                    "--environment", str(tmp_path / "environment.csv"),
                    "--crs", "EPSG:32633", "--weighting", "distance", "--permutations", "49",
                    "--seed", str(SEED), "--out", str(out), "--quiet", *engine]
            assert main(args) == 0
            texts.append((out / "summary.json").read_bytes())
        assert all(text == texts[0] for text in texts[1:])
        assert json.loads(texts[0])["seed"] == SEED


class TestChunkSizes:
    """The permutation engine draws permutations in fixed blocks keyed by the seed, so the
    chunking of the matrix products cannot change which permutations are used."""

    @pytest.mark.parametrize("chunk_size", [1, 7, 64, 500])
    def test_permutation_test(self, model, chunk_size):
        Y, X, _ = model
        base = permutation_test(Y, X, n_permutations=199, seed=SEED)
        other = permutation_test(Y, X, n_permutations=199, seed=SEED, chunk_size=chunk_size)
        np.testing.assert_allclose(other.null_distribution, base.null_distribution,
                                   rtol=1e-12)
        assert other.p_value == base.p_value and other.statistic == base.statistic

    @pytest.mark.parametrize("chunk_size", [3, 128])
    def test_partial_test_and_term_tests(self, model, chunk_size):
        Y, X, xy = model
        base = permutation_test(Y, X, conditioning=xy, n_permutations=199, seed=SEED)
        other = permutation_test(Y, X, conditioning=xy, n_permutations=199, seed=SEED,
                                 chunk_size=chunk_size)
        assert base.method == "reduced_residual"
        np.testing.assert_allclose(other.null_distribution, base.null_distribution,
                                   rtol=1e-12)
        assert other.p_value == base.p_value
        terms = {"environment": X, "space": xy}
        a = term_tests(Y, terms, n_permutations=99, seed=SEED)
        b = term_tests(Y, terms, n_permutations=99, seed=SEED, chunk_size=chunk_size)
        assert a.equals(b)

    def test_axis_tests(self, model):
        Y, X, _ = model
        a = axis_tests(Y, X, n_permutations=99, seed=SEED)
        b = axis_tests(Y, X, n_permutations=99, seed=SEED, chunk_size=5)
        np.testing.assert_allclose(a.select_dtypes("number").to_numpy(),
                                   b.select_dtypes("number").to_numpy(), rtol=1e-12)

    def test_lcbd_test(self, model):
        from spatial_ev.inference.lcbd import beta_diversity

        Y, _, _ = model
        base = beta_diversity(Y, n_permutations=99, seed=SEED)
        for chunk_size in (1, 5, 200):
            other = beta_diversity(Y, n_permutations=99, seed=SEED, chunk_size=chunk_size)
            pd.testing.assert_series_equal(other.p_value, base.p_value)

    @pytest.mark.parametrize("n_workers", [1, 2])
    def test_worker_count(self, model, n_workers):
        Y, X, _ = model
        base = permutation_test(Y, X, n_permutations=299, seed=SEED, n_workers=1)
        other = permutation_test(Y, X, n_permutations=299, seed=SEED, n_workers=n_workers,
                                 chunk_size=32)
        np.testing.assert_allclose(other.null_distribution, base.null_distribution,
                                   rtol=1e-12)
        assert other.p_value == base.p_value

    def test_generator_seed_equals_int_seed(self, model):
        Y, X, _ = model
        a = permutation_test(Y, X, n_permutations=99, seed=SEED)
        b = permutation_test(Y, X, n_permutations=99, seed=np.random.default_rng(SEED))
        assert a.p_value == b.p_value
        np.testing.assert_array_equal(a.null_distribution, b.null_distribution)


class TestBlasThreads:
    def test_one_or_two_blas_threads(self, survey, reference):
        summaries = []
        for threads in (1, 2):
            with threadpool_limits(limits=threads, user_api="blas"):
                summaries.append(summary_record(analyse(survey, seed=SEED, **FAST)))
        assert summaries[0] == summaries[1] == reference

    def test_limit_restored(self, survey):
        before = [(p["internal_api"], p["num_threads"]) for p in threadpool_info()]
        with threadpool_limits(limits=1, user_api="blas"):
            analyse(survey, seed=SEED, **FAST)
        analyse(survey, seed=SEED, **FAST)
        after = [(p["internal_api"], p["num_threads"]) for p in threadpool_info()]
        assert after == before


@pytest.fixture(scope="module")
def cluster():
    """An in-process dask cluster of two single-thread workers."""
    import distributed

    with distributed.LocalCluster(processes=False, n_workers=2, threads_per_worker=1,
                                  dashboard_address=":0") as cluster:
        yield cluster


class TestEngines:
    def test_dask_scheduler_address(self, survey, reference, cluster):
        result = analyse(survey, seed=SEED, engine="dask", scheduler=cluster.scheduler_address,
                         **FAST)
        assert summary_record(result) == reference
        assert result.settings["engine"] == "dask"

    @pytest.mark.parametrize("n_workers", [1, 2])
    def test_worker_processes(self, survey, reference, n_workers):
        result = analyse(survey, seed=SEED, engine="processes", n_workers=n_workers, **FAST)
        assert summary_record(result) == reference
        assert result.settings["engine"] == "processes"

    def test_schemes_compared_on_every_engine(self, survey, cluster):
        """The full comparison of the 8 default schemes (each a task on the worker engines)
        gives the same summary locally, on 2 worker processes and on dask."""
        options = dict(seed=SEED, n_permutations=199, trend="ignore")
        base = analyse(survey, **options)
        assert base.weighting.table["n_selected"].gt(0).sum() >= 2   # a real choice
        records = [summary_record(base)]
        records.append(summary_record(analyse(survey, engine="processes", n_workers=2,
                                              **options)))
        records.append(summary_record(analyse(survey, engine="dask",
                                              scheduler=cluster.scheduler_address,
                                              **options)))
        assert records[1] == records[0] and records[2] == records[0]

    def test_dask_client(self, model, cluster):
        from distributed import Client

        Y, X, _ = model
        base = permutation_test(Y, X, n_permutations=299, seed=SEED, chunk_size=40)
        on_processes = permutation_test(Y, X, n_permutations=299, seed=SEED, chunk_size=40,
                                        engine="processes", n_workers=2)
        np.testing.assert_allclose(on_processes.null_distribution, base.null_distribution,
                                   rtol=1e-12)
        assert on_processes.p_value == base.p_value
        with Client(cluster) as client:
            other = permutation_test(Y, X, n_permutations=299, seed=SEED, chunk_size=40,
                                     engine="dask", scheduler=client)
        np.testing.assert_allclose(other.null_distribution, base.null_distribution,
                                   rtol=1e-12)
        assert other.p_value == base.p_value
