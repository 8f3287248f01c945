"""Input checks shared by the report's figure and map functions.

Each helper returns the cleaned value or raises :class:`spatial_ev.errors.InputError` naming
the argument, the rule and the value received.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence

import numpy as np
import pandas as pd

from spatial_ev.errors import InputError

__all__ = ["check_frame", "check_numeric", "check_p", "check_series_pair", "check_selected"]


def check_frame(name: str, frame: object, required: Sequence[str]) -> pd.DataFrame:
    if not isinstance(frame, pd.DataFrame):
        raise InputError(f"`{name}` must be a pandas DataFrame with columns "
                         f"{', '.join(required)}; got {type(frame).__name__}")
    missing = [c for c in required if c not in frame.columns]
    if missing:
        raise InputError(f"`{name}` lacks column(s) {', '.join(map(repr, missing))}; it has "
                         f"{', '.join(map(repr, map(str, frame.columns)))}")
    if len(frame) == 0:
        raise InputError(f"`{name}` has no rows; nothing to draw")
    return frame


def check_numeric(name: str, values: object, *, finite: bool = True) -> np.ndarray:
    try:
        arr = np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError):
        raise InputError(f"`{name}` must be numeric; got {values!r}") from None
    if finite and not np.isfinite(arr).all():
        bad = int(np.flatnonzero(~np.isfinite(arr.ravel()))[0])
        raise InputError(f"`{name}` has a missing or infinite value at position {bad}; "
                         f"drop or fill it before drawing")
    return arr


def check_p(value: object) -> float | None:
    if value is None or (isinstance(value, float) and np.isnan(value)) or value is pd.NA:
        return None
    p = float(value)  # type: ignore[arg-type]
    if not 0.0 < p <= 1.0:
        raise InputError(f"p-values must lie in (0, 1]; got {p!r}")
    return p


def check_series_pair(a_name: str, a: object, b_name: str, b: object) -> tuple[pd.Series,
                                                                                pd.Series]:
    for nm, s in ((a_name, a), (b_name, b)):
        if not isinstance(s, pd.Series):
            raise InputError(f"`{nm}` must be a pandas Series indexed by vector name; "
                             f"got {type(s).__name__}")
    missing = [k for k in a.index if k not in b.index]  # type: ignore[union-attr]
    if missing:
        raise InputError(f"`{b_name}` has no value for vector(s) {missing[:5]}; both series "
                         f"must be indexed by the same vector names")
    a = pd.Series(check_numeric(a_name, a), index=a.index)  # type: ignore[union-attr]
    b = pd.Series(check_numeric(b_name, b.loc[a.index]), index=a.index)  # type: ignore
    return a, b


def check_selected(selected: Iterable[str], index: pd.Index, name: str) -> list:
    selected = list(selected)
    unknown = [s for s in selected if s not in index]
    if unknown:
        raise InputError(f"`{name}` names vector(s) {unknown[:5]} that are not in the data; "
                         f"known names start {list(index[:5])}")
    return selected
