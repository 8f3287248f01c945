"""Change in composition of each site between two surveys, split into losses and gains.

For site i observed before (row ``a``) and after (row ``b``), with ``A = Σ min(a_j, b_j)`` (what
the two surveys share), ``B = Σ (a_j − min)`` (what was lost) and ``C = Σ (b_j − min)`` (what was
gained) (Legendre 2019, Ecology and Evolution 9:3500–3514):

* ``"percentage_difference"`` (abundances): D = (B + C)/(2A + B + C); losses = B/(2A + B + C),
  gains = C/(2A + B + C), so that losses + gains = D;
* ``"ruzicka"`` (abundances): D = (B + C)/(A + B + C), losses = B/(A + B + C), gains likewise;
* ``"sorensen"`` and ``"jaccard"``: the same two formulas on presence–absence (a_j > 0), where A,
  B, C count species shared, lost and gained;
* ``"hellinger"`` and ``"chord"``: Euclidean distance between the Hellinger- or chord-
  transformed rows (Legendre & Gallagher 2001, Oecologia 129:271–280); these distances have no
  loss/gain decomposition, so losses and gains are NaN.

Everything is vectorised over any leading dimensions (sites, permutations): inputs of shape
``(..., n_species)`` give outputs of shape ``(...)``. Two empty rows are identical (D = 0); an
empty row against a non-empty one has D = 1 for every index (the transformed empty row is
taken as the zero vector, whose distance to a unit-length profile is 1).
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from spatial_ev._validation import check_option
from spatial_ev.errors import InputError

__all__ = ["CHANGE_INDICES", "DECOMPOSABLE", "ChangeComponents", "change_components"]

CHANGE_INDICES = ("percentage_difference", "ruzicka", "sorensen", "jaccard", "hellinger",
                  "chord")
DECOMPOSABLE = ("percentage_difference", "ruzicka", "sorensen", "jaccard")


class ChangeComponents(NamedTuple):
    """Dissimilarity between two surveys and its loss and gain parts (arrays of one shape)."""

    dissimilarity: np.ndarray
    losses: np.ndarray
    gains: np.ndarray


def _profiles(y: np.ndarray, method: str) -> np.ndarray:
    if method == "hellinger":
        total = y.sum(axis=-1, keepdims=True)
        return np.sqrt(y / np.where(total > 0, total, 1.0))
    norm = np.sqrt((y * y).sum(axis=-1, keepdims=True))
    return y / np.where(norm > 0, norm, 1.0)


def change_components(before: np.ndarray, after: np.ndarray, *,
                      index: str = "percentage_difference") -> ChangeComponents:
    """Dissimilarity of each row of ``before`` to the same row of ``after``, with losses/gains.

    Parameters
    ----------
    before, after : array, shape (..., n_species)
        Non-negative abundances (or presence–absence) of the same sites at two surveys.
    index : {"percentage_difference", "ruzicka", "sorensen", "jaccard", "hellinger", "chord"}
        Dissimilarity (module notes). Sørensen and Jaccard use presence–absence.

    Returns
    -------
    ChangeComponents
        ``dissimilarity``, ``losses`` and ``gains``, each of shape ``before.shape[:-1]``;
        losses and gains are NaN for the Hellinger and chord distances.

    Examples
    --------
    >>> c = change_components(np.array([[4., 2, 0]]), np.array([[2., 2, 2]]))
    >>> [round(float(v[0]), 4) for v in c]
    [0.3333, 0.1667, 0.1667]
    """
    index = check_option("index", index, CHANGE_INDICES)
    a = np.asarray(before, dtype=np.float64)
    b = np.asarray(after, dtype=np.float64)
    if a.shape != b.shape or a.ndim < 1:
        raise InputError(f"`before` and `after` must have the same shape (..., n_species); got "
                         f"{a.shape} and {b.shape}; align the two surveys' sites and species")
    if not (np.isfinite(a).all() and np.isfinite(b).all()) or (a < 0).any() or (b < 0).any():
        raise InputError("`before` and `after` must hold finite values >= 0 (abundances or "
                         "presence-absence); remove missing or negative values")
    if index in ("hellinger", "chord"):
        diff = _profiles(a, index) - _profiles(b, index)
        d = np.sqrt((diff * diff).sum(axis=-1))
        nan = np.full(d.shape, np.nan)
        return ChangeComponents(d, nan, nan.copy())
    if index in ("sorensen", "jaccard"):
        a, b = (a > 0).astype(np.float64), (b > 0).astype(np.float64)
    shared = np.minimum(a, b)
    big_a = shared.sum(axis=-1)
    big_b = (a - shared).sum(axis=-1)
    big_c = (b - shared).sum(axis=-1)
    weight = 2.0 if index in ("percentage_difference", "sorensen") else 1.0
    den = weight * big_a + big_b + big_c
    safe = np.where(den > 0, den, 1.0)
    losses, gains = big_b / safe, big_c / safe
    return ChangeComponents(losses + gains, losses, gains)
