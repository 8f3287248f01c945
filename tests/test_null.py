"""Tests of the null-distribution service (spatial_ev.inference.null): the p-value and tie rule
against exact enumeration of all n! permutations, the seed-block scheme (same draws whatever the
chunk size, thread count or engine) and the one validation of the run options."""

from __future__ import annotations

import dataclasses
import itertools

import numpy as np
import pytest
from scipy import sparse, stats

from spatial_ev.errors import InputError
from spatial_ev.inference.autocorrelation import morans_i
from spatial_ev.inference.lcbd import LCBD_BLOCK_SIZE, ColumnOrders
from spatial_ev.inference.null import (
    BLOCK_SIZE, DEFAULT_CHUNK, TIE_TOLERANCE, FreePermutations, RunOptions, SeedBlocks,
    SequentialRule, check_run_options, count_as_extreme, p_value_from_count,
    permutation_p_value, permutation_p_values, seed_blocks, sequential_decision)
from spatial_ev.space.moran import moran_inputs

SEED = 1_618_033_988

# A statistic with many exact ties: the sum of the first three of six integer values, computed
# in floating point on values / 10 so that equal sums differ in their last digits depending on
# the order of addition.
VALUES = np.array([3, 1, 4, 1, 5, 9])
ORDERS = np.array(list(itertools.permutations(range(6))))          # all 6! = 720 orders


def _exact_sums() -> np.ndarray:
    return np.array([sum(int(VALUES[i]) for i in order[:3]) for order in ORDERS])


def _float_sums() -> np.ndarray:
    tenths = VALUES / 10.0
    out = np.zeros(len(ORDERS))
    for position in range(3):               # added in the permuted order: rounding varies
        out = out + tenths[ORDERS[:, position]]
    return out


def _ring(n: int) -> sparse.csr_matrix:
    i = np.arange(n)
    return sparse.csr_matrix((np.ones(2 * n), (np.r_[i, i], np.r_[(i + 1) % n, (i - 1) % n])),
                             shape=(n, n))


class TestPValueRule:
    def test_counts_equal_exact_integer_enumeration(self):
        # Every one of the 720 orders taken as the observed data: the service's count over the
        # enumerated null (floating-point sums, rounding noise) equals the count with exact
        # integer arithmetic, for each alternative [derived: definition of the permutation
        # p-value, ties counted as "as extreme"].
        exact, floats = _exact_sums(), _float_sums()
        assert len(np.unique(floats)) > len(np.unique(exact))     # rounding splits some ties
        null = np.repeat(floats[:, None], len(floats), axis=1)    # (N, p): same null each column
        centre_exact, centre_float = 3 * VALUES.sum() / 6, 3 * VALUES.sum() / 60
        expected = {
            "greater": (exact[:, None] >= exact[None, :]).sum(axis=0),
            "less": (exact[:, None] <= exact[None, :]).sum(axis=0),
            "two_sided": (np.abs(exact[:, None] - centre_exact)
                          >= np.abs(exact[None, :] - centre_exact)).sum(axis=0),
        }
        for alternative, counts in expected.items():
            got = count_as_extreme(floats, null, alternative=alternative, centre=centre_float)
            np.testing.assert_array_equal(got, counts, err_msg=alternative)

    @pytest.mark.parametrize("n_permutations", [19, 99, 999])
    def test_p_value_is_valid_with_ties(self, n_permutations):
        # Phipson & Smyth 2010 (Stat. Appl. Genet. Mol. Biol. 9:39) [derived]: with N random
        # permutations drawn with replacement, the number B of them at least as extreme is
        # Binomial(N, p_t), p_t the exact enumeration p-value, and p = (B + 1)/(N + 1) gives
        # P(p <= alpha) <= alpha under exchangeability. Computed exactly over all 720 equally
        # likely observed orders, with p_t from the service's counts.
        floats = _float_sums()
        null = np.repeat(floats[:, None], len(floats), axis=1)
        p_exact = count_as_extreme(floats, null) / len(floats)
        strict = (floats[:, None] > floats[None, :] * (1 + TIE_TOLERANCE)).sum(axis=0) \
            / len(floats)                                         # ties counted as misses
        for alpha in (0.01, 0.05, 0.1, 0.2):
            largest_b = int(np.floor(alpha * (n_permutations + 1))) - 1   # p <= alpha ⇔ B <= it
            if largest_b < 0:
                continue
            level = stats.binom.cdf(largest_b, n_permutations, p_exact).mean()
            assert level <= alpha + 1e-12
            # the check can fail: counting ties as misses breaks the level on this statistic
            assert stats.binom.cdf(largest_b, n_permutations, strict).mean() > alpha

    def test_monte_carlo_count_is_binomial(self):
        # [derived] B ~ Binomial(N, p_t) for the service's free permutations (Phipson & Smyth
        # 2010): 4,000 replicate tests of N = 19 permutations each, drawn in seed blocks; the
        # rate of p <= 0.1 (B <= 1) matches scipy.stats.binom within 5 standard errors.
        tenths = VALUES / 10.0
        observed = tenths[[0, 1, 5]].sum()          # 3 + 1 + 9 = 13: p_t = 84/720
        p_t = (_exact_sums() >= 13).mean()
        reps, n = 4000, 19
        perms = seed_blocks(np.random.default_rng(SEED), FreePermutations(6)).rows(0, reps * n)
        null = tenths[perms[:, :3]].sum(axis=1).reshape(reps, n).T        # (N, replicates)
        p = permutation_p_values(np.full(reps, observed), null)
        rate, expected = np.mean(p <= 0.1), stats.binom.cdf(1, n, p_t)
        assert abs(rate - expected) < 5 * np.sqrt(expected * (1 - expected) / reps)

    def test_formula_and_empty_null(self):
        # (k + 1)/(N + 1), Phipson & Smyth 2010 [memory]
        assert permutation_p_value(2.0, np.array([1.0, 2.0, 3.0])) == 0.75
        assert permutation_p_value(100.0, np.arange(99.0)) == 0.01
        assert permutation_p_value(5.0, np.arange(99.0)) == 0.95       # 94 of 0..98 are >= 5
        assert np.isnan(permutation_p_value(1.0, np.zeros(0)))
        np.testing.assert_array_equal(p_value_from_count(np.array([0, 99]), 99), [0.01, 1.0])
        assert np.isnan(p_value_from_count(np.array([0]), 0)).all()


class TestTieRule:
    def test_relative_tolerance_both_signs(self):
        for observed in (0.37, -0.37, 1234.5, -1234.5):
            inside = observed - 0.5 * TIE_TOLERANCE * abs(observed)
            outside = observed - 2.0 * TIE_TOLERANCE * abs(observed)
            assert count_as_extreme(observed, np.array([observed, inside])) == 2, observed
            assert count_as_extreme(observed, np.array([outside])) == 0, observed

    def test_less_and_two_sided_are_the_same_rule(self):
        rng = np.random.default_rng(SEED)
        null = np.round(rng.normal(size=(500, 4)), 1)            # many exact ties
        observed = null[7] + np.array([0.0, 1e-14, -1e-14, 0.0])
        np.testing.assert_array_equal(count_as_extreme(observed, null, alternative="less"),
                                      count_as_extreme(-observed, -null))
        centre = np.array([0.1, -0.2, 0.0, 0.3])
        np.testing.assert_array_equal(
            count_as_extreme(observed, null, alternative="two_sided", centre=centre),
            count_as_extreme(np.abs(observed - centre), np.abs(null - centre)))

    def test_identity_permutation_counts_as_a_tie(self):
        # Moran's I of the unpermuted sites, recomputed the way permutations are, differs from
        # the observed value in its last digits only; the tie rule must count it.
        rng = np.random.default_rng(SEED)
        inputs = moran_inputs(rng.normal(size=(50, 3)), _ring(50))
        observed = inputs.statistic()
        identity = inputs.permuted_statistic(np.arange(50)[None, :])
        np.testing.assert_array_equal(count_as_extreme(observed, identity), [1, 1, 1])

    def test_shape_checked(self):
        with pytest.raises(InputError, match="`null` must have shape"):
            count_as_extreme(np.zeros(3), np.zeros((10, 2)))
        with pytest.raises(InputError, match="parameter `alternative` must be one of"):
            count_as_extreme(1.0, np.zeros(3), alternative="both")


class TestSeedBlocks:
    def test_rows_do_not_depend_on_chunking(self):
        blocks = seed_blocks(np.random.default_rng(SEED), FreePermutations(9))
        whole = blocks.rows(0, 700)
        for size in (1, 7, BLOCK_SIZE, 333):
            parts = [blocks.rows(a, min(a + size, 700)) for a in range(0, 700, size)]
            np.testing.assert_array_equal(np.concatenate(parts), whole)
        assert all(sorted(row) == list(range(9)) for row in whole[:50])

    @pytest.mark.parametrize("start,stop,size", [(0, 200, 5), (37, 190, 11), (64, 65, 1),
                                                 (100, 300, 64)])
    def test_pieces_join_into_rows_for_sequential_draws(self, start, stop, size):
        blocks = seed_blocks(np.random.default_rng(SEED), ColumnOrders(6, 4),
                             block_size=LCBD_BLOCK_SIZE)
        pieces = list(blocks.pieces(start, stop, size))
        assert max(len(p) for p in pieces) <= size
        np.testing.assert_array_equal(np.concatenate(pieces), blocks.rows(start, stop))

    def test_spawned_blocks_are_the_sequence_children_and_reserve_them(self):
        # oracle: numpy's SeedSequence.spawn (children keyed parent key + (i,))
        rng = np.random.default_rng(SEED).spawn(3)[2]
        reference = np.random.SeedSequence(rng.bit_generator.seed_seq.entropy,
                                           spawn_key=(2,)).spawn(5)
        blocks = seed_blocks(rng, ColumnOrders(5, 3), block_size=10, derivation="spawn",
                             n_draws=45)
        for b, child in enumerate(reference):
            np.testing.assert_array_equal(blocks.block(b),
                                          ColumnOrders(5, 3)(np.random.default_rng(child), 10))
        after = rng.bit_generator.seed_seq.spawn(1)[0]
        assert after.spawn_key == (2, 5)                      # five blocks reserved
        before = rng.integers(0, 2 ** 63)
        assert before == np.random.default_rng(SEED).spawn(3)[2].integers(0, 2 ** 63)

    def test_derivation_checked(self):
        rng = np.random.default_rng(1)
        with pytest.raises(InputError, match="needs `n_draws`"):
            seed_blocks(rng, FreePermutations(3), derivation="spawn")
        with pytest.raises(InputError, match="parameter `derivation` must be one of"):
            seed_blocks(rng, FreePermutations(3), derivation="split")
        with pytest.raises(InputError, match="`rng` must be a numpy.random.Generator"):
            seed_blocks(5, FreePermutations(3))


@dataclasses.dataclass(frozen=True)
class _Rows:
    blocks: SeedBlocks

    def __call__(self, task):
        return self.blocks.rows(*task)


class TestRunOptions:
    def test_one_validation(self):
        with pytest.raises(InputError, match=r"parameter `n_permutations` must be >= 0; got -1"):
            RunOptions.checked(-1)
        with pytest.raises(InputError, match=r"parameter `n_randomisations` must be >= 0"):
            RunOptions.checked(-3, count_name="n_randomisations")
        with pytest.raises(InputError, match="chunk_size"):
            RunOptions.checked(9, chunk_size=0)
        with pytest.raises(InputError, match="parameter `engine` must be one of"):
            RunOptions.checked(9, engine="spark")
        with pytest.raises(InputError, match="only used with engine='dask'"):
            RunOptions.checked(9, scheduler="tcp://127.0.0.1:8786")
        with pytest.raises(InputError, match="engine='processes'"):
            RunOptions.checked(9, engine="processes", scheduler="tcp://127.0.0.1:8786")
        with pytest.raises(InputError, match="n_workers"):
            RunOptions.checked(9, n_workers=0)
        with pytest.raises(InputError, match="progress"):
            RunOptions.checked(9, progress="yes")
        with pytest.raises(InputError, match="seed"):
            RunOptions.checked(9, seed=-2)
        options = RunOptions.checked(0)
        assert (options.n_permutations, options.chunk_size, options.ranges()) == \
            (0, DEFAULT_CHUNK, [])
        with pytest.raises(dataclasses.FrozenInstanceError):
            options.n_permutations = 5
        assert check_run_options(99, None, "local", None) == (99, DEFAULT_CHUNK, "local")

    @pytest.mark.parametrize("chunk_size,n_workers", [(1, 1), (7, 2), (128, 2), (1000, 1)])
    def test_same_draws_whatever_chunk_and_threads(self, chunk_size, n_workers):
        calls = []
        options = RunOptions.checked(300, seed=SEED, chunk_size=chunk_size,
                                     n_workers=n_workers,
                                     progress=lambda done, total: calls.append((done, total)))
        blocks = seed_blocks(options.seed, FreePermutations(8))
        (parts,) = options.run([_Rows(blocks)])
        reference = seed_blocks(np.random.default_rng(SEED), FreePermutations(8)).rows(0, 300)
        np.testing.assert_array_equal(np.concatenate(parts), reference)
        assert calls[-1] == (len(options.ranges()),) * 2

    def test_moran_null_same_whatever_chunk_threads_or_engine(self):
        rng = np.random.default_rng(SEED)
        x, w = rng.normal(size=(40, 2)), _ring(40)
        base = morans_i(x, w, n_permutations=299, seed=SEED, alternative="two_sided")
        for options in ({"chunk_size": 1}, {"chunk_size": 50, "n_workers": 2},
                        {"engine": "dask", "n_workers": 2, "chunk_size": 100}):
            other = morans_i(x, w, n_permutations=299, seed=SEED, alternative="two_sided",
                             **options)
            np.testing.assert_array_equal(other.null_distribution, base.null_distribution)
            np.testing.assert_array_equal(other.p_permutation, base.p_permutation)
        # the two-sided p-value is the service's rule around E[I]
        far = np.abs(base.null_distribution - base.expected) >= \
            np.abs(base.statistic.to_numpy() - base.expected) * (1 - TIE_TOLERANCE)
        np.testing.assert_array_equal(base.p_permutation, (far.sum(axis=0) + 1) / 300)


class TestSequentialDecision:
    """Stopping rules of a test whose one use is the decision "p ≤ α?"."""

    def test_exceedance_limit_is_besag_clifford_h(self):
        # h = the smallest count with h/N > α, so that the Besag & Clifford (1991, Biometrika
        # 78:301–304) p-value h/L exceeds α at any stop L ≤ N, and any count ≥ h makes the
        # fixed-count p (k + 1)/(N + 1) exceed α as well [derived]
        for alpha in (0.01, 0.05, 0.0525, 0.1):
            for n_max in (19, 99, 199, 209, 999, 4999):
                h = SequentialRule(alpha).exceedances(n_max)
                assert h / n_max > alpha and (h - 1 == 0 or (h - 1) / n_max <= alpha)
                assert p_value_from_count(h, n_max) > alpha

    def test_significance_boundary_spends_at_most_the_risk(self):
        # each look's largest early count k has P(Bin(L, α) ≤ k) within its share of ε and is
        # the largest such count (scipy.stats.binom); shares follow ε·L/(L + 1000) (Gandy 2009,
        # JASA 104:1504–1511) and add up to less than ε
        rule = SequentialRule(0.05, risk=0.01)
        looks = np.array(rule.looks(2999)[:-1])
        spent = 0.01 * looks / (looks + 1000)
        shares = np.diff(np.r_[0.0, spent])
        counts = rule.significant_counts(2999)
        assert shares.sum() < 0.01
        for size, share, k in zip(looks, shares, counts):
            if k >= 0:
                assert stats.binom.cdf(k, size, 0.05) <= share
                assert (k + 1) / (size + 1) <= 0.05
            assert stats.binom.cdf(k + 1, size, 0.05) > share or (k + 2) / (size + 1) > 0.05

    def test_stops_agree_with_the_full_count(self):
        # Random null sequences: a "not significant" stop or a full run always gives the
        # decision of the fixed count over the same N draws [derived]; p at a Besag–Clifford
        # stop is h/L with L the draw of the h-th exceedance.
        rng = np.random.default_rng(SEED)
        rule = SequentialRule(0.05)
        for _ in range(400):
            null = rng.random(999)
            observed = rng.choice([rng.random(), rng.uniform(0.9, 1.0)])
            out = sequential_decision(lambda a, b: null[a:b], observed, 999, rule)
            fixed = permutation_p_value(observed, null)
            if out.stop == "significant":
                assert out.n_used in rule.looks(999)[:-1]
                k = int(count_as_extreme(observed, null[:out.n_used]))
                assert out.p_value == (k + 1) / (out.n_used + 1) <= 0.05
                continue
            assert (out.p_value <= 0.05) == (fixed <= 0.05)
            if out.stop == "not_significant":
                hits = np.flatnonzero(null >= observed * (1 - TIE_TOLERANCE))
                h = rule.exceedances(999)
                assert out.n_used == hits[h - 1] + 1 and out.p_value == h / out.n_used
            else:
                assert out.p_value == fixed and out.n_used == 999

    @pytest.mark.slow   # a seeded simulation of the decision risk; CI runs it
    def test_risk_bound_at_the_boundary(self):
        # p over all permutations exactly α (exceedances Bernoulli(α)): the chance of an early
        # significant stop is at most ε (Gandy 2009); 4000 streams, binomial 99.9 % margin
        rule = SequentialRule(0.05, risk=0.05)
        rng = np.random.default_rng(SEED + 1)
        early = 0
        for _ in range(4000):
            null = (rng.random(999) < 0.05).astype(float)     # 1 = exceedance of observed 0.5
            early += sequential_decision(lambda a, b: null[a:b], 0.5, 999,
                                         rule).stop == "significant"
        assert early / 4000 <= 0.05 + 3.3 * np.sqrt(0.05 * 0.95 / 4000)
        assert early > 0                      # the rule does stop early sometimes

    def test_bad_input(self):
        with pytest.raises(InputError, match=r"`alpha` must be"):
            SequentialRule.checked(1.5)
        with pytest.raises(InputError, match=r"`decision_risk` must be"):
            SequentialRule.checked(0.05, risk=0.7)
        with pytest.raises(InputError, match=r"`rule` must be a SequentialRule"):
            sequential_decision(lambda a, b: np.zeros(b - a), 1.0, 10, 0.05)
        with pytest.raises(InputError, match=r"returned 3 values; expected 10"):
            sequential_decision(lambda a, b: np.zeros(3), 1.0, 10, SequentialRule(0.05))
