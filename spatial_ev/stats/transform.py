"""Transformations of community tables and standardisation of environment tables.

Species tables (sites x species, abundances >= 0) are transformed before a linear, Euclidean
method such as redundancy analysis so that the Euclidean distance between transformed rows is
an ecologically meaningful distance (Legendre & Gallagher 2001, Oecologia 129:271-280):

* ``"hellinger"``: ``sqrt(y_ij / y_i+)``; Euclidean distance = Hellinger distance (<= sqrt 2).
* ``"chord"``: ``y_ij / ||y_i||``; Euclidean distance = chord distance (<= sqrt 2).
* ``"chi_square"``: chi-square *distance* profiles of Legendre & Gallagher (2001):
  ``sqrt(y_++) * y_ij / (y_i+ * sqrt(y_+j))``; Euclidean distance = chi-square distance.
  Rare species get large weights; use only when that is intended.
* ``"log_chord"``: ``log1p`` of the abundances, then the chord transformation (damps dominant
  species before the chord normalisation).
* ``"presence_absence"``: 1 where the species occurs (abundance > 0), else 0.
* ``"standardise"``: every column to mean 0 and standard deviation 1 (ddof = 1). Allowed on
  species data only as an explicit choice, with :class:`~spatial_ev.errors.
  StandardisedCountsWarning`: counts share one unit, and standardising gives a rare species the
  same weight as an abundant one.
* ``"none"``: the table as it is (checked, converted to float64).

Environment tables carry variables in different units; :func:`standardise_environment` puts
numeric columns on a common scale but leaves 0/1 indicator columns (coded categoricals) as they
are, so that their coefficients keep the meaning "difference between the category and the
reference".
"""

from __future__ import annotations

import warnings
from collections.abc import Callable

import numpy as np
import pandas as pd

from spatial_ev._validation import as_matrix, check_option
from spatial_ev.errors import InputError, StandardisedCountsWarning

__all__ = ["transform", "standardise_environment", "TRANSFORMATIONS"]

TRANSFORMATIONS = ("hellinger", "chord", "chi_square", "log_chord", "presence_absence",
                   "standardise", "none")

# methods that divide by a row total or row norm: an empty site cannot be transformed
_NEEDS_NONEMPTY_ROWS = {"hellinger", "chord", "chi_square", "log_chord"}
_NEEDS_NONNEGATIVE = {"hellinger", "chord", "chi_square", "log_chord", "presence_absence"}


def _hellinger(y: np.ndarray) -> np.ndarray:
    return np.sqrt(y / y.sum(axis=1, keepdims=True))


def _chord(y: np.ndarray) -> np.ndarray:
    return y / np.sqrt((y * y).sum(axis=1, keepdims=True))


def _chi_square(y: np.ndarray) -> np.ndarray:
    total = y.sum()
    return np.sqrt(total) * y / (y.sum(axis=1, keepdims=True) * np.sqrt(y.sum(axis=0)))


def _log_chord(y: np.ndarray) -> np.ndarray:
    return _chord(np.log1p(y))


def _presence_absence(y: np.ndarray) -> np.ndarray:
    return (y > 0).astype(np.float64)


def _standardise(y: np.ndarray) -> np.ndarray:
    return (y - y.mean(axis=0)) / y.std(axis=0, ddof=1)


def _none(y: np.ndarray) -> np.ndarray:
    return y


_METHODS: dict[str, Callable[[np.ndarray], np.ndarray]] = {
    "hellinger": _hellinger,
    "chord": _chord,
    "chi_square": _chi_square,
    "log_chord": _log_chord,
    "presence_absence": _presence_absence,
    "standardise": _standardise,
    "none": _none,
}


def _labels(index: pd.Index | None, positions: np.ndarray, limit: int = 5) -> str:
    names = [repr(index[i]) if index is not None else str(int(i)) for i in positions[:limit]]
    more = f" and {len(positions) - limit} more" if len(positions) > limit else ""
    return ", ".join(names) + more


def _check_transform(Y, method):
    method = check_option("method", method, TRANSFORMATIONS)
    y, rows, cols = as_matrix("Y", Y)
    if method in _NEEDS_NONNEGATIVE and (y < 0).any():
        r, c = np.argwhere(y < 0)[0]
        raise InputError(
            f"`Y` must hold abundances >= 0 for method={method!r}; site "
            f"{_labels(rows, np.array([r]))}, species {_labels(cols, np.array([c]))} has "
            f"{y[r, c]!r}. Use method='standardise' or 'none' for signed measurements")
    if method in _NEEDS_NONEMPTY_ROWS:
        empty = np.flatnonzero(y.sum(axis=1) <= 0)
        if empty.size:
            raise InputError(
                f"`Y` has sites where no species occurs (row total 0), which method={method!r} "
                f"cannot transform: sites {_labels(rows, empty)}. Remove these sites or analyse "
                "them separately")
    if method == "chi_square":
        absent = np.flatnonzero(y.sum(axis=0) <= 0)
        if absent.size:
            raise InputError(
                f"`Y` has species that occur at no site (column total 0), which the chi-square "
                f"transformation divides by: species {_labels(cols, absent)}. Remove them")
    if method == "standardise":
        sd = y.std(axis=0, ddof=1) if y.shape[0] > 1 else np.zeros(y.shape[1])
        flat = np.flatnonzero(~(sd > 0))
        if flat.size:
            raise InputError(
                f"`Y` has columns with the same value at every site, which cannot be "
                f"standardised: {_labels(cols, flat)}. Remove them")
    return y, rows, cols, method


def transform(Y: pd.DataFrame | np.ndarray, method: str = "hellinger") -> pd.DataFrame:
    """Transform a sites x species table for a Euclidean method such as RDA.

    Parameters
    ----------
    Y : DataFrame or array, shape (n_sites, n_species)
        Abundances (>= 0, finite). Row and column labels are kept.
    method : {"hellinger", "chord", "chi_square", "log_chord", "presence_absence",
              "standardise", "none"}
        See the module documentation for the formulas (Legendre & Gallagher 2001). The default,
        Hellinger, suits abundance data with many zeros: it gives low weight to rare species and
        its distance is bounded by sqrt(2). ``"standardise"`` issues
        :class:`~spatial_ev.errors.StandardisedCountsWarning` (species counts share one unit;
        standardising gives rare species the weight of abundant ones).

    Returns
    -------
    DataFrame, shape (n_sites, n_species)
        Transformed values (float64), with the input's index and columns (``0..n-1`` for
        plain arrays). The input is not modified.

    Raises
    ------
    InputError
        Negative or missing values, sites with no species (row total 0) for methods that divide
        by a row total or norm (the message names the sites), species absent everywhere for
        ``"chi_square"``, constant columns for ``"standardise"``.

    Examples
    --------
    >>> import numpy as np
    >>> transform(np.array([[10, 10, 20], [10, 15, 10]]), "chord").round(5).iloc[0].tolist()
    [0.40825, 0.40825, 0.8165]
    """
    y, rows, cols, method = _check_transform(Y, method)
    if method == "standardise":
        warnings.warn(
            "species data were standardised (method='standardise'): abundances share one unit, "
            "and standardising gives every species, however rare, the weight of the most "
            "abundant ones. Prefer 'hellinger' or 'chord' unless equal weights are intended",
            StandardisedCountsWarning, stacklevel=2)
    out = _METHODS[method](y)
    return pd.DataFrame(out, index=rows if rows is not None else pd.RangeIndex(len(out)),
                        columns=cols if cols is not None else pd.RangeIndex(out.shape[1]))


def _check_environment(X):
    x, rows, cols = as_matrix("environment", X)
    sd = x.std(axis=0, ddof=1) if x.shape[0] > 1 else np.zeros(x.shape[1])
    flat = np.flatnonzero(~(sd > 0))
    if flat.size:
        raise InputError(
            f"`environment` has variables with the same value at every site, which carry no "
            f"information and cannot be standardised: {_labels(cols, flat)}. Remove them")
    return x, rows, cols, sd


def standardise_environment(X: pd.DataFrame | np.ndarray) -> pd.DataFrame:
    """Standardise the numeric variables of an environment table; keep 0/1 indicators as they are.

    Numeric columns are centred and divided by their standard deviation (ddof = 1), because
    environmental variables come in different units and an RDA on raw values would be dominated
    by the variable with the largest numbers. Columns whose only values are 0 and 1 are taken to
    be indicator (dummy) columns of a categorical variable and are left unchanged, so that each
    still reads "this category versus the reference"; centring them would not change any RDA
    result (the model has an intercept), and scaling them would only rescale their coefficients.

    Parameters
    ----------
    X : DataFrame or array, shape (n_sites, n_variables)
        Numeric, finite, no constant column.

    Returns
    -------
    DataFrame, shape (n_sites, n_variables)
        Same labels as the input; the input is not modified.

    Examples
    --------
    >>> import pandas as pd
    >>> env = pd.DataFrame({"depth_m": [1.0, 2.0, 3.0], "sandy": [0.0, 1.0, 1.0]})
    >>> standardise_environment(env)["sandy"].tolist()
    [0.0, 1.0, 1.0]
    """
    x, rows, cols, sd = _check_environment(X)
    indicator = np.all((x == 0) | (x == 1), axis=0)
    out = np.where(indicator, x, (x - x.mean(axis=0)) / sd)
    return pd.DataFrame(out, index=rows if rows is not None else pd.RangeIndex(len(out)),
                        columns=cols if cols is not None else pd.RangeIndex(out.shape[1]))
