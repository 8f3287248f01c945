"""Small input-validation helpers shared by the public functions.

Each helper returns the cleaned value or raises :class:`spatial_ev.errors.InputError` with a
message naming the parameter, the rule, the value received and, where possible, the fix.
"""

from __future__ import annotations

import numbers
from collections.abc import Iterable
from typing import Any

import numpy as np
import pandas as pd

from spatial_ev.errors import InputError

__all__ = [
    "check_rng",
    "check_option",
    "check_int",
    "check_real",
    "as_matrix",
    "significant",
]


def check_rng(seed: None | int | np.random.Generator, name: str = "seed") -> np.random.Generator:
    """Turn ``None``, a non-negative integer or a Generator into a ``numpy.random.Generator``.

    Examples
    --------
    >>> check_rng(12345).integers(10) == check_rng(12345).integers(10)
    True
    """
    if isinstance(seed, np.random.Generator):
        return seed
    if seed is None:
        return np.random.default_rng()
    if isinstance(seed, (bool, np.bool_)) or not isinstance(seed, numbers.Integral) or seed < 0:
        raise InputError(f"parameter `{name}` must be a non-negative integer, None or a "
                         f"numpy Generator; got {seed!r}")
    return np.random.default_rng(int(seed))


def check_option(name: str, value: Any, allowed: Iterable[str]) -> str:
    """Check that ``value`` is one of the allowed strings; return it.

    Examples
    --------
    >>> check_option("method", "gabriel", ["gabriel", "delaunay"])
    'gabriel'
    """
    allowed = list(allowed)
    if not isinstance(value, str) or value not in allowed:
        raise InputError(f"parameter `{name}` must be one of {', '.join(map(repr, allowed))}; "
                         f"got {value!r}")
    return value


def check_int(name: str, value: Any, *, low: int | None = None, high: int | None = None) -> int:
    """Check an integer parameter against inclusive bounds; return it as ``int``.

    Examples
    --------
    >>> check_int("n_permutations", 999, low=0)
    999
    """
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Integral):
        raise InputError(f"parameter `{name}` must be an integer; got {value!r}")
    value = int(value)
    if (low is not None and value < low) or (high is not None and value > high):
        rule = _interval_text(low, high, True, True)
        raise InputError(f"parameter `{name}` must be {rule}; got {value}")
    return value


def check_real(name: str, value: Any, *, low: float | None = None, high: float | None = None,
               low_inclusive: bool = True, high_inclusive: bool = True) -> float:
    """Check a finite real parameter against bounds; return it as ``float``.

    Examples
    --------
    >>> check_real("alpha", 0.05, low=0, high=1, low_inclusive=False)
    0.05
    """
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Real) \
            or not np.isfinite(value):
        raise InputError(f"parameter `{name}` must be a finite number; got {value!r}")
    value = float(value)
    bad_low = low is not None and (value < low if low_inclusive else value <= low)
    bad_high = high is not None and (value > high if high_inclusive else value >= high)
    if bad_low or bad_high:
        rule = _interval_text(low, high, low_inclusive, high_inclusive)
        raise InputError(f"parameter `{name}` must be {rule}; got {value!r}")
    return value


def _interval_text(low, high, low_inc, high_inc) -> str:
    parts = []
    if low is not None:
        parts.append(f"{'>=' if low_inc else '>'} {low}")
    if high is not None:
        parts.append(f"{'<=' if high_inc else '<'} {high}")
    return " and ".join(parts)


def as_matrix(name: str, data: Any, *, min_rows: int = 1, min_cols: int = 1,
              allow_vector: bool = True) -> tuple[np.ndarray, pd.Index | None, pd.Index | None]:
    """Convert array-like data to a finite 2-D float64 array, keeping pandas labels.

    Returns ``(array, row_index, column_index)``; the labels are ``None`` for plain arrays.
    The input is never modified (a copy is made when conversion is not lossless-free).

    Examples
    --------
    >>> a, rows, cols = as_matrix("Y", [[1, 2], [3, 4]])
    >>> a.shape, rows is None
    ((2, 2), True)
    """
    rows = cols = None
    if isinstance(data, pd.Series):
        rows, cols = data.index, pd.Index([data.name if data.name is not None else name])
        data = data.to_frame()
    if isinstance(data, pd.DataFrame):
        rows, cols = data.index, data.columns
        bad = [c for c in data.columns if not pd.api.types.is_numeric_dtype(data[c])]
        if bad:
            raise InputError(f"`{name}` column {bad[0]!r} is not numeric "
                             f"(dtype {data[bad[0]].dtype}); convert or remove it")
        arr = data.to_numpy(dtype=np.float64, copy=True)
    else:
        try:
            arr = np.array(data, dtype=np.float64, copy=True)
        except (TypeError, ValueError) as exc:
            raise InputError(f"`{name}` must be numeric; could not convert it ({exc})") from None
    if arr.ndim == 1 and allow_vector:
        arr = arr[:, None]
    if arr.ndim != 2:
        raise InputError(f"`{name}` must be 2-D (sites x variables); got {arr.ndim} dimensions")
    if arr.shape[0] < min_rows or arr.shape[1] < min_cols:
        raise InputError(f"`{name}` needs at least {min_rows} rows and {min_cols} columns; "
                         f"got shape {arr.shape}")
    finite = np.isfinite(arr)
    if not finite.all():
        r, c = (int(i) for i in np.argwhere(~finite)[0])
        rlab = rows[r] if rows is not None else r
        clab = cols[c] if cols is not None else c
        raise InputError(f"`{name}` has a missing or infinite value at row {rlab!r}, "
                         f"column {clab!r}; remove or fill it")
    return arr, rows, cols


def significant(value: float, digits: int = 3) -> str:
    """``value`` rounded to ``digits`` significant figures, for text shown to people.

    Whole numbers of ``digits`` figures or more are written in full with thousands
    separators (never in exponent form); non-finite values as Python writes them.

    Examples
    --------
    >>> [significant(v) for v in (6.21289, 26.497, 255.99, 999.7, 15.0032, 0.000123456)]
    ['6.21', '26.5', '256', '1,000', '15', '0.000123']
    >>> significant(19.794, 4), significant(123456.7, 4)
    ('19.79', '123,500')
    """
    digits = check_int("digits", digits, low=1)
    value = float(value)
    if not np.isfinite(value) or value == 0:
        return f"{value:g}"
    rounded = float(f"{value:.{digits}g}")
    if abs(rounded) >= 10 ** (digits - 1):
        return f"{rounded:,.0f}"
    return f"{rounded:.{digits}g}"
