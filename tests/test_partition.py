"""Tests of spatial_ev.selection.partition (variation partitioning among 2–4 groups)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats

from spatial_ev.errors import InputError
from spatial_ev.selection.partition import VariationPartition, partition_variation
from spatial_ev.inference.permutation import permutation_test


def _orthonormal_centred(n: int, k: int, seed: int) -> np.ndarray:
    a = np.random.default_rng(seed).normal(size=(n, k))
    a -= a.mean(axis=0)
    return np.linalg.qr(a)[0]


def _ols_r2_adj(y: np.ndarray, X: np.ndarray | None) -> float:
    """Adjusted R² of an ordinary regression with intercept (statsmodels as the oracle)."""
    if X is None:
        return 0.0
    return float(sm.OLS(y, sm.add_constant(X, has_constant="add")).fit().rsquared_adj)


class TestPartitionVariation:
    def test_two_group_check_value(self):
        # Borcard, Legendre & Drapeau 1992, Ecology 73:1045–1055; adjusted R² of Peres-Neto
        # et al. 2006, Ecology 87:2614–2625. Check value of REFERENCES.md [derived]: n = 20,
        # orthogonal groups of 2 and 3 variables with R² = 0.3 and 0.2 (union 0.5).
        Q = _orthonormal_centred(20, 6, 904172635)
        y = np.sqrt(0.3) * Q[:, 0] + np.sqrt(0.2) * Q[:, 2] + np.sqrt(0.5) * Q[:, 5]
        env, space = Q[:, :2], Q[:, 2:5]
        part = partition_variation(y, {"environment": env, "space": space}, n_permutations=0)
        f = part.fractions
        assert f.loc["environment_only", "r2_adj"] == pytest.approx(0.271429, abs=1e-6)
        assert f.loc["environment_and_space", "r2_adj"] == pytest.approx(-0.053782, abs=1e-6)
        assert f.loc["space_only", "r2_adj"] == pytest.approx(0.103782, abs=1e-6)
        assert f.loc["unexplained", "r2_adj"] == pytest.approx(1 - 0.321429, abs=1e-6)
        assert list(f["letter"]) == ["[a]", "[b]", "[c]", "[d]"]
        assert list(f["label"]) == ["environment only", "environment ∩ space", "space only",
                                    "unexplained"]
        assert part.models.loc["environment", "r2"] == pytest.approx(0.3)
        assert part.models.loc["environment + space", "r2"] == pytest.approx(0.5)
        assert "not additive" in part.summary()

    def test_three_groups_match_published_formulas(self):
        # Three-group formulas of REFERENCES.md (Borcard et al. 1992; Peres-Neto et al. 2006),
        # evaluated with statsmodels' adjusted R² as an outside oracle.
        rng = np.random.default_rng(31415926535)
        n = 40
        X, Wm = rng.normal(size=(n, 2)), rng.normal(size=(n, 3))
        Z = 0.6 * X[:, :1] + rng.normal(size=(n, 2))           # correlated with X
        y = X @ [1.0, -0.5] + Wm @ [0.4, 0.0, 0.3] + Z @ [0.5, 0.2] + rng.normal(size=n)
        part = partition_variation(y, {"X": X, "W": Wm, "Z": Z}, n_permutations=0)
        R = {name: _ols_r2_adj(y, np.hstack(blocks)) for name, blocks in {
            "X": [X], "W": [Wm], "Z": [Z], "XW": [X, Wm], "XZ": [X, Z], "WZ": [Wm, Z],
            "XWZ": [X, Wm, Z]}.items()}
        f = part.fractions["r2_adj"]
        assert f["X_only"] == pytest.approx(R["XWZ"] - R["WZ"], abs=1e-12)
        assert f["W_only"] == pytest.approx(R["XWZ"] - R["XZ"], abs=1e-12)
        assert f["Z_only"] == pytest.approx(R["XWZ"] - R["XW"], abs=1e-12)
        assert f["X_and_W"] == pytest.approx(R["XZ"] + R["WZ"] - R["Z"] - R["XWZ"], abs=1e-12)
        assert f["X_and_Z"] == pytest.approx(R["XW"] + R["WZ"] - R["W"] - R["XWZ"], abs=1e-12)
        assert f["W_and_Z"] == pytest.approx(R["XW"] + R["XZ"] - R["X"] - R["XWZ"], abs=1e-12)
        assert f["X_and_W_and_Z"] == pytest.approx(
            R["X"] + R["W"] + R["Z"] - R["XW"] - R["XZ"] - R["WZ"] + R["XWZ"], abs=1e-12)
        assert f["unexplained"] == pytest.approx(1 - R["XWZ"], abs=1e-12)
        assert f.sum() == pytest.approx(1.0, abs=1e-12)
        assert (part.fractions["letter"] == "").all()

    def test_four_groups_regions_add_up_to_each_model(self):
        # Venn-diagram identity [derived from Borcard et al. 1992]: the regions inside group g
        # add up to R²adj(g), the regions of all groups to R²adj(union); checked with statsmodels.
        rng = np.random.default_rng(27182818284)
        n = 50
        blocks = {name: rng.normal(size=(n, 2)) for name in ("A", "B", "C", "D")}
        blocks["C"] += 0.5 * blocks["A"]
        y = sum(b @ rng.normal(size=2) for b in blocks.values()) + rng.normal(size=n)
        part = partition_variation(y, blocks, n_permutations=0)
        f = part.fractions
        assert len(f) == 16                                      # 15 regions + unexplained
        assert f["r2_adj"].sum() == pytest.approx(1.0, abs=1e-12)
        for name, block in blocks.items():
            inside = f[f["groups"].map(lambda g, name=name: name in g)]["r2_adj"].sum()
            assert inside == pytest.approx(_ols_r2_adj(y, block), abs=1e-12)
        union = f.drop(index="unexplained")["r2_adj"].sum()
        assert union == pytest.approx(_ols_r2_adj(y, np.hstack(list(blocks.values()))),
                                      abs=1e-12)

    def test_multivariate_r2_is_the_variance_weighted_mean(self):
        # R² of a multivariate (RDA) model = explained / total sum of squares over all columns
        # (Legendre & Legendre, Numerical Ecology [memory]); oracle: statsmodels per column.
        rng = np.random.default_rng(5550123)
        n = 30
        X, Wm = rng.normal(size=(n, 2)), rng.normal(size=(n, 2))
        Y = X @ rng.normal(size=(2, 4)) + rng.normal(size=(n, 4)) * [1, 2, 3, 4]
        part = partition_variation(Y, {"X": X, "W": Wm}, n_permutations=0)
        ss = ((Y - Y.mean(axis=0)) ** 2).sum(axis=0)
        r2 = [sm.OLS(Y[:, j], sm.add_constant(X)).fit().rsquared for j in range(4)]
        assert part.models.loc["X", "r2"] == pytest.approx(np.dot(r2, ss) / ss.sum(), abs=1e-12)

    def test_conditioning_is_removed_first(self):
        # Partial partitioning: every fraction net of the conditioning variables C, with
        # R²adj(S | C) = R²adj(S + C) − R²adj(C) (Peres-Neto et al. 2006); oracle statsmodels.
        rng = np.random.default_rng(8675309)
        n = 35
        X, Wm, C = rng.normal(size=(n, 2)), rng.normal(size=(n, 2)), rng.normal(size=(n, 1))
        y = X[:, 0] + C[:, 0] + 0.5 * Wm[:, 1] + rng.normal(size=n)
        part = partition_variation(y, {"X": X, "W": Wm}, conditioning=C, n_permutations=0)
        f = part.fractions["r2_adj"]
        R = lambda *b: _ols_r2_adj(y, np.hstack(b))  # noqa: E731
        assert f["conditioning"] == pytest.approx(R(C), abs=1e-12)
        assert f["X_only"] == pytest.approx(R(X, Wm, C) - R(Wm, C), abs=1e-12)
        assert f["X_and_W"] == pytest.approx(R(X, C) + R(Wm, C) - R(C) - R(X, Wm, C), abs=1e-12)
        assert f["unexplained"] == pytest.approx(1 - R(X, Wm, C), abs=1e-12)
        assert f.sum() == pytest.approx(1.0, abs=1e-12)
        assert part.conditioning_r2_adj == pytest.approx(R(C), abs=1e-12)

    def test_unique_fractions_are_tested_by_partial_rda(self):
        # Testable fractions (Legendre 2008, J. Plant Ecol. 1:3–8): [a] is the partial RDA of X
        # given W; the test's adjusted R² is [a] itself. Shared fractions are not tested.
        rng = np.random.default_rng(1203948576)
        n = 30
        X, Wm = rng.normal(size=(n, 2)), rng.normal(size=(n, 3))
        Y = X @ rng.normal(size=(2, 3)) + rng.normal(size=(n, 3))
        part = partition_variation(Y, {"X": X, "W": Wm}, n_permutations=199, seed=77)
        f = part.fractions
        direct = permutation_test(Y, X, conditioning=Wm, n_permutations=0)
        assert f.loc["X_only", "pseudo_f"] == pytest.approx(direct.statistic, rel=1e-12)
        assert part.tests["X_only"].r2_adj == pytest.approx(f.loc["X_only", "r2_adj"], abs=1e-12)
        assert part.tests["X_only"].method == "reduced_residual"
        assert f.loc["X_only", "p_value"] == pytest.approx(0.005)
        assert np.isnan(f.loc["X_and_W", "p_value"]) and not f.loc["X_and_W", "testable"]
        assert f["testable"].tolist() == [True, False, True, False]
        again = partition_variation(Y, {"X": X, "W": Wm}, n_permutations=199, seed=77)
        pd.testing.assert_frame_equal(again.fractions, part.fractions)

    def test_same_result_on_dask_engine(self):
        rng = np.random.default_rng(4455667788)
        X, Wm = rng.normal(size=(30, 2)), rng.normal(size=(30, 2))
        Y = X @ rng.normal(size=(2, 3)) + rng.normal(size=(30, 3))
        local = partition_variation(Y, {"X": X, "W": Wm}, n_permutations=199, seed=5)
        remote = partition_variation(Y, {"X": X, "W": Wm}, n_permutations=199, seed=5,
                                     engine="dask")
        pd.testing.assert_frame_equal(local.fractions, remote.fractions)

    def test_labels_inputs_and_summary(self):
        rng = np.random.default_rng(99887766)
        sites = pd.Index([f"site{i}" for i in range(25)], name="site")
        Y = pd.DataFrame(rng.normal(size=(25, 3)), index=sites, columns=["sp1", "sp2", "sp3"])
        env = pd.DataFrame(rng.normal(size=(25, 2)), index=sites, columns=["ph", "depth"])
        space = pd.DataFrame(rng.normal(size=(25, 2)), index=sites, columns=["sv001", "sv002"])
        copies = [Y.copy(), env.copy(), space.copy()]
        part = partition_variation(Y, {"environment": env, "space": space}, n_permutations=0)
        for before, after in zip(copies, [Y, env, space]):
            pd.testing.assert_frame_equal(before, after)
        assert isinstance(part, VariationPartition)
        assert part.group_names == ("environment", "space")
        assert part.tests == {}
        assert part.to_frame().equals(part.fractions)
        text = part.summary()
        assert "environment only" in text and "(not testable)" in text

    @pytest.mark.slow
    def test_fractions_unbiased_under_null(self):
        # Peres-Neto et al. 2006 (Ecology 87:2614–2625): adjusted-R² fractions are unbiased;
        # raw R² is not (its mean under the null is m/(n − 1), Ezekiel 1930 [derived]).
        rng = np.random.default_rng(246813579)
        n, reps = 30, 1200
        raw, adj = np.empty(reps), np.empty((reps, 3))
        for r in range(reps):
            X, Wm = rng.normal(size=(n, 3)), rng.normal(size=(n, 4))
            X[:, 0] += Wm[:, 0]                                     # correlated groups
            y = rng.normal(size=(n, 2))
            part = partition_variation(y, {"X": X, "W": Wm}, n_permutations=0)
            adj[r] = part.fractions["r2_adj"].iloc[:3]
            raw[r] = part.models.loc["X", "r2"]
        se = adj.std(axis=0, ddof=1) / np.sqrt(reps)
        assert np.all(np.abs(adj.mean(axis=0)) < 4 * se)
        assert raw.mean() == pytest.approx(3 / (n - 1), rel=0.15)

    @pytest.mark.slow
    def test_unique_fraction_test_has_nominal_rate_under_null(self):
        # Y depends on W only, X correlated with W: the null of [a] holds. Reduced-model
        # residual permutation (Freedman & Lane 1983; Anderson & Legendre 1999) should reject at
        # rate alpha; accept counts inside the binomial 99% interval (scipy.stats.binom).
        rng = np.random.default_rng(135792468)
        n, reps, alpha = 30, 600, 0.05
        p = np.empty(reps)
        for r in range(reps):
            Wm = rng.normal(size=(n, 2))
            X = 0.7 * Wm[:, :1] + rng.normal(size=(n, 2))
            Y = Wm @ [[1.0, 0.5], [0.0, 1.0]] + rng.normal(size=(n, 2))
            part = partition_variation(Y, {"X": X, "W": Wm}, n_permutations=99,
                                       seed=int(rng.integers(2**32)))
            p[r] = part.fractions.loc["X_only", "p_value"]
        low, high = stats.binom.interval(0.99, reps, alpha)
        assert low <= np.sum(p <= alpha) <= high


class TestPartitionValidation:
    def setup_method(self):
        rng = np.random.default_rng(1029384756)
        self.Y = rng.normal(size=(20, 2))
        self.X = rng.normal(size=(20, 2))
        self.W = rng.normal(size=(20, 2))

    def test_group_count(self):
        with pytest.raises(InputError, match=r"`groups` must hold 2 to 4 groups; got 1"):
            partition_variation(self.Y, {"X": self.X}, n_permutations=0)
        many = {str(i): self.X for i in range(5)}
        with pytest.raises(InputError, match=r"2 to 4 groups; got 5"):
            partition_variation(self.Y, many, n_permutations=0)

    def test_groups_must_be_mapping(self):
        with pytest.raises(InputError, match=r"`groups` must be a mapping.*got list"):
            partition_variation(self.Y, [self.X, self.W], n_permutations=0)

    def test_group_names(self):
        with pytest.raises(InputError, match=r"names must be non-empty strings; got 3"):
            partition_variation(self.Y, {3: self.X, "W": self.W}, n_permutations=0)

    def test_row_mismatch(self):
        with pytest.raises(InputError, match=r"`groups\['W'\]` has 19 rows but `Y` has 20"):
            partition_variation(self.Y, {"X": self.X, "W": self.W[:19]}, n_permutations=0)

    def test_site_order_mismatch(self):
        Y = pd.DataFrame(self.Y, index=[f"s{i}" for i in range(20)])
        X = pd.DataFrame(self.X, index=[f"s{i}" for i in range(20)][::-1])
        with pytest.raises(InputError, match=r"row 0 is 's19' but `Y` has 's0'; reindex"):
            partition_variation(Y, {"X": X, "W": self.W}, n_permutations=0)

    def test_constant_group(self):
        with pytest.raises(InputError, match=r"`groups\['X'\]` has no variation"):
            partition_variation(self.Y, {"X": np.ones((20, 2)), "W": self.W}, n_permutations=0)

    def test_too_many_predictors(self):
        big = np.random.default_rng(5).normal(size=(20, 19))
        with pytest.raises(InputError, match=r"independent predictors for 20 sites"):
            partition_variation(self.Y, {"X": self.X, "W": big}, n_permutations=0)

    def test_constant_response(self):
        with pytest.raises(InputError, match=r"`Y` has no variation"):
            partition_variation(np.ones((20, 2)), {"X": self.X, "W": self.W}, n_permutations=0)

    def test_options(self):
        with pytest.raises(InputError, match=r"`n_permutations` must be >= 0; got -1"):
            partition_variation(self.Y, {"X": self.X, "W": self.W}, n_permutations=-1)
        with pytest.raises(InputError, match=r"`engine` must be one of 'local', 'processes', 'dask'"):
            partition_variation(self.Y, {"X": self.X, "W": self.W}, engine="cloud")
