"""Variation partitioning of a response matrix among two to four groups of explanatory variables.

The adjusted R² of every union of groups (2^k − 1 redundancy models) is combined by
inclusion–exclusion into the fractions of a Venn diagram: the part explained by each group alone,
the parts shared by each combination of groups, and the unexplained part (Borcard, Legendre &
Drapeau 1992, Ecology 73:1045–1055; adjusted R² after Peres-Neto, Legendre, Dray & Borcard 2006,
Ecology 87:2614–2625). Each group's unique fraction is tested by a partial redundancy analysis of
that group given all the others, with reduced-model residual permutation; shared fractions are not
testable because they are not the fit of any single model (Legendre 2008, J. Plant Ecol. 1:3–8).
"""

from __future__ import annotations

import itertools
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from spatial_ev._validation import as_matrix, check_int, check_option, check_rng
from spatial_ev.stats.linear import explained_fraction
from spatial_ev.inference.engines import ENGINES
from spatial_ev.errors import InputError
from spatial_ev.stats.linear import check_rows
from spatial_ev.inference.permutation import permutation_test

__all__ = ["partition_variation", "VariationPartition"]

_MAX_GROUPS = 4
_LETTERS_TWO_GROUPS = {(0,): "[a]", (0, 1): "[b]", (1,): "[c]", (): "[d]"}


@dataclass(frozen=True)
class VariationPartition:
    """Fractions of response variation explained by groups of explanatory variables.

    Attributes
    ----------
    fractions : pandas.DataFrame
        One row per fraction (index = ``key``, e.g. ``"environment_only"``,
        ``"environment_and_space"``, ``"unexplained"``; with a conditioning matrix also
        ``"conditioning"``). Columns: ``letter`` ("[a]" … "[d]" for two groups, empty
        otherwise), ``label`` (e.g. "environment only", "environment ∩ space"), ``groups``
        (tuple of group names sharing the fraction), ``r2_adj`` (the fraction, as a proportion of
        total variation; may be negative), ``testable`` (bool), ``pseudo_f``, ``p_value`` (NaN
        when not tested). The values in ``r2_adj`` sum to 1.
    models : pandas.DataFrame
        One row per union of groups (index = names joined by " + "): ``rank`` (number of
        independent predictors), ``r2`` and ``r2_adj`` (with a conditioning matrix: of the union
        *given* the conditioning variables, as fractions of the total variation,
        R²adj(union + conditioning) − R²adj(conditioning)).
    tests : dict[str, PermutationTest]
        The permutation test of each group's unique fraction, keyed like ``fractions``; empty
        when ``n_permutations`` was 0.
    group_names : tuple[str, ...]
        The groups in the order given.
    n_sites : int
        Number of sites (rows of the response).
    conditioning_r2_adj : float or None
        Adjusted R² of the conditioning variables alone (removed before partitioning).
    n_permutations : int
        Permutations per fraction test.
    """

    fractions: pd.DataFrame
    models: pd.DataFrame
    tests: dict = field(repr=False)
    group_names: tuple
    n_sites: int
    conditioning_r2_adj: float | None
    n_permutations: int

    def to_frame(self) -> pd.DataFrame:
        """Return a copy of the fraction table (one row per fraction)."""
        return self.fractions.copy()

    def summary(self) -> str:
        """Return a plain-text account of the fractions, their tests and how to read them."""
        lines = [f"Variation partitioning of {self.n_sites} sites among "
                 f"{len(self.group_names)} groups: {', '.join(self.group_names)}",
                 "Fractions are adjusted R² (proportions of total variation; they sum to 1)."]
        for key, row in self.fractions.iterrows():
            test = ""
            if row["testable"] and np.isfinite(row["p_value"]):
                test = f"  pseudo-F = {row['pseudo_f']:.3f}, p = {row['p_value']:.4f}"
            elif key not in ("unexplained", "conditioning") and not row["testable"]:
                test = "  (not testable)"
            letter = f"{row['letter']} " if row["letter"] else ""
            lines.append(f"  {letter}{row['label']:<40s} {row['r2_adj']: .4f}{test}")
        if self.conditioning_r2_adj is not None:
            lines.append("The conditioning variables were fitted first; their adjusted R² is "
                         "listed and every other fraction is net of them.")
        if (self.fractions["r2_adj"] < 0).any():
            lines.append("Negative fractions are reported as computed. A negative shared fraction "
                         "is not a negative variance: it means the groups' effects on the "
                         "response are not additive (e.g. one group suppresses or enhances the "
                         "other's effect, or the groups are correlated with opposite effects). A "
                         "small negative unique fraction means that group adds nothing beyond "
                         "the others; read it as zero.")
        lines.append("Assumptions: linear relations between response and predictors; sites "
                     "exchangeable under the null hypothesis of each test (spatially structured "
                     "residuals make permutation p-values too small); shared fractions cannot "
                     "be tested. Fractions built from spatial eigenvectors may be inflated "
                     "(Gilbert & Bennett 2010).")
        return "\n".join(lines)


def partition_variation(
    Y: Any,
    groups: Mapping[str, Any],
    *,
    conditioning: Any = None,
    n_permutations: int = 999,
    seed: None | int | np.random.Generator = None,
    engine: str = "local",
    scheduler: Any = None,
    progress: Callable[[str], None] | None = None,
) -> VariationPartition:
    """Partition response variation among 2–4 groups of explanatory variables.

    Parameters
    ----------
    Y : array-like or DataFrame, shape (n_sites, n_responses)
        Response (e.g. Hellinger-transformed community). Centred internally; not modified.
    groups : mapping of str to array-like or DataFrame
        Two to four named groups of explanatory variables, each (n_sites, n_variables), e.g.
        ``{"environment": env, "space": selected_vectors}``. Group names label the fractions.
    conditioning : array-like or DataFrame, optional
        Variables whose effect is removed before partitioning (partial partitioning).
    n_permutations : int, default 999
        Permutations for each unique-fraction test; 0 computes fractions only.
    seed : None, int or numpy.random.Generator
        Seed; each test gets its own stream derived reproducibly from it.
    engine, scheduler :
        Where permutation batches run (see :func:`spatial_ev.inference.permutation.permutation_test`).
    progress : callable, optional
        Called with a short message before each test.

    Returns
    -------
    VariationPartition

    Notes
    -----
    Fractions are differences of adjusted R² values (Ezekiel 1930), which makes them unbiased
    under linear models (Peres-Neto et al. 2006), so they can be negative by sampling error or
    when effects are not additive. Unique fractions are tested with a partial redundancy analysis
    (reduced-model residual permutation, Freedman & Lane 1983); shared fractions are not
    testable. Rows of all inputs must refer to the same sites in the same order.

    Examples
    --------
    >>> rng = np.random.default_rng(20240611)
    >>> env, space = rng.normal(size=(30, 2)), rng.normal(size=(30, 3))
    >>> Y = env @ rng.normal(size=(2, 4)) + rng.normal(size=(30, 4))
    >>> part = partition_variation(Y, {"environment": env, "space": space}, n_permutations=0)
    >>> round(float(part.fractions["r2_adj"].sum()), 10)
    1.0
    """
    Yc, blocks, names, cond, n = _check_partition(Y, groups, conditioning)
    n_permutations = check_int("n_permutations", n_permutations, low=0)
    check_option("engine", engine, ENGINES)
    rng = check_rng(seed)
    k = len(names)

    total_ss = float(np.sum(Yc * Yc))
    if total_ss <= 0:
        raise InputError("`Y` has no variation (every column is constant after centring); "
                         "nothing to partition")

    # adjusted R² of every union of groups, net of the conditioning variables if any
    subsets = [s for size in range(1, k + 1) for s in itertools.combinations(range(k), size)]
    fits = {s: explained_fraction(Yc, np.hstack([blocks[i] for i in s]), conditioning=cond)
            for s in subsets}
    r2_adj = {s: fit.r2_adj for s, fit in fits.items()}
    r2_adj[()] = 0.0
    cond_adj = explained_fraction(Yc, cond).r2_adj if cond is not None else None

    fractions = _venn_fractions(r2_adj, k)
    rows = []
    order = sorted(fractions, key=lambda t: (len(t), t))
    if k == 2:  # published order [a] [b] [c]
        order = [(0,), (0, 1), (1,)]
    for region in order:
        member_names = tuple(names[i] for i in region)
        rows.append({
            "key": "_and_".join(member_names) if len(region) > 1 else f"{member_names[0]}_only",
            "letter": _LETTERS_TWO_GROUPS.get(region, "") if k == 2 else "",
            "label": (" ∩ ".join(member_names) if len(region) > 1
                      else f"{member_names[0]} only"),
            "groups": member_names,
            "r2_adj": fractions[region],
            "testable": len(region) == 1,
        })
    full = tuple(range(k))
    if cond is not None:
        rows.append({"key": "conditioning", "letter": "", "label": "conditioning (removed first)",
                     "groups": (), "r2_adj": cond_adj, "testable": False})
    rows.append({"key": "unexplained", "letter": "[d]" if k == 2 else "", "label": "unexplained",
                 "groups": (), "r2_adj": 1.0 - r2_adj[full] - (cond_adj or 0.0),
                 "testable": False})
    table = pd.DataFrame(rows).set_index("key")
    table["pseudo_f"] = np.nan
    table["p_value"] = np.nan

    tests = {}
    if n_permutations > 0:
        streams = rng.spawn(k)
        for i in range(k):
            key = f"{names[i]}_only"
            others = [blocks[j] for j in range(k) if j != i] + ([cond] if cond is not None else [])
            if progress is not None:
                progress(f"testing fraction '{names[i]} only' ({n_permutations} permutations)")
            result = permutation_test(Yc, blocks[i], conditioning=np.hstack(others),
                                      n_permutations=n_permutations, seed=streams[i],
                                      engine=engine, scheduler=scheduler)
            tests[key] = result
            table.loc[key, "pseudo_f"] = float(result.statistic)
            table.loc[key, "p_value"] = float(result.p_value)

    models = pd.DataFrame(
        {"rank": [fits[s].rank for s in subsets], "r2": [fits[s].r2 for s in subsets],
         "r2_adj": [fits[s].r2_adj for s in subsets]},
        index=pd.Index([" + ".join(names[i] for i in s) for s in subsets], name="model"))
    return VariationPartition(fractions=table, models=models, tests=tests, group_names=names,
                              n_sites=n, conditioning_r2_adj=cond_adj,
                              n_permutations=n_permutations)


# --------------------------------------------------------------------------- algebra

def _venn_fractions(r2_adj: Mapping[tuple, float], k: int) -> dict[tuple, float]:
    """Fractions of every Venn region from the adjusted R² of every union of groups.

    ``r2_adj`` maps each subset (sorted tuple of group positions; ``()`` = conditioning only,
    0 without conditioning) to the adjusted R² of that union. With h(A) = R(all) − R(all ∖ A),
    the variation explained by the groups in A and by no other group, h(A) sums the regions
    inside A; Möbius inversion gives region(T) = Σ_{A ⊆ T} (−1)^{|T|−|A|} h(A). For two groups
    this is [a] = R(XW) − R(W), [b] = R(X) + R(W) − R(XW), [c] = R(XW) − R(X) (Borcard et al.
    1992); for three it reproduces the formulas of Peres-Neto et al. (2006).
    """
    everything = tuple(range(k))

    def h(a: tuple) -> float:
        rest = tuple(i for i in everything if i not in a)
        return r2_adj[everything] - r2_adj[rest]

    out = {}
    for size in range(1, k + 1):
        for region in itertools.combinations(everything, size):
            out[region] = sum((-1) ** (size - len(a)) * h(a)
                              for m in range(1, size + 1)
                              for a in itertools.combinations(region, m))
    return out


# --------------------------------------------------------------------------- validation

def _check_partition(Y, groups, conditioning):
    Yarr, y_rows, _ = as_matrix("Y", Y, min_rows=3)
    n = Yarr.shape[0]
    if not isinstance(groups, Mapping):
        raise InputError(f"`groups` must be a mapping of group name to a table of variables, "
                         f"e.g. {{'environment': env, 'space': vectors}}; got "
                         f"{type(groups).__name__}")
    if not 2 <= len(groups) <= _MAX_GROUPS:
        raise InputError(f"`groups` must hold 2 to {_MAX_GROUPS} groups; got {len(groups)}")
    names, blocks = [], []
    for name, data in groups.items():
        if not isinstance(name, str) or not name.strip():
            raise InputError(f"`groups` names must be non-empty strings; got {name!r}")
        arr, rows, _ = as_matrix(f"groups[{name!r}]", data)
        check_rows(f"groups[{name!r}]", arr, rows, n, y_rows)
        if np.allclose(arr, arr.mean(axis=0), rtol=0, atol=0):
            raise InputError(f"`groups[{name!r}]` has no variation (every column is constant); "
                             f"remove the group or supply varying variables")
        names.append(name)
        blocks.append(arr)
    cond = None
    if conditioning is not None:
        cond, rows, _ = as_matrix("conditioning", conditioning)
        check_rows("conditioning", cond, rows, n, y_rows)
    Yc = Yarr - Yarr.mean(axis=0)
    return Yc, blocks, tuple(names), cond, n


