"""Small conversions and comparisons between pandas and SQLite for the results store.

Every missing value (None, NaN, NaT, ``pd.NA``, whatever the dtype) becomes SQL NULL on the way
in, never the text of a missing value; a frame read back gets the canonical dtypes, column order
and row order (:func:`coerce_canonical`).
"""
from __future__ import annotations

import math
from datetime import datetime, timezone

from ..contract import CANONICAL_COLUMNS, CANONICAL_DTYPES

__all__ = ["VALUE_RTOL", "CANONICAL_SORT", "is_missing", "py", "col", "blank_to_none", "iso",
           "same", "differs", "coerce_canonical", "now_utc"]

#: Relative tolerance under which two canonical values are the same value (float round-off of a
#: unit conversion; modelling choice of this project).
VALUE_RTOL = 1e-9
#: Row order of a canonical frame read from the store.
CANONICAL_SORT = ["patient", "collected_at", "specimen", "analyte", "replicate"]


def now_utc() -> str:
    """The current UTC time, to the second, in ISO 8601."""
    return datetime.now(timezone.utc).replace(microsecond=0).isoformat()


def is_missing(v) -> bool:
    if v is None:
        return True
    try:
        import pandas as pd
        return bool(pd.isna(v))
    except (TypeError, ValueError):
        return False


def py(v):
    """A value SQLite can bind (None for missing)."""
    if is_missing(v):
        return None
    if hasattr(v, "item") and not isinstance(v, (str, bytes)):
        try:
            return v.item()
        except (AttributeError, ValueError):
            pass
    return v


def col(frame, name, kind="str"):
    """Column as a Python list ready for executemany; every missing value (None, NaN, NaT,
    pd.NA, whatever the dtype) becomes None, i.e. SQL NULL, never the text of a missing value;
    vectorised enough for a million rows."""
    s = frame[name]
    if kind == "float":
        return [None if x != x else x
                for x in s.to_numpy(dtype="float64", na_value=math.nan).tolist()]
    missing = s.isna().to_numpy(dtype=bool)
    arr = s.to_numpy(dtype=object)
    if kind == "time":
        return [None if m else iso(x) for x, m in zip(arr, missing)]
    if kind == "int":
        return [None if m else int(x) for x, m in zip(arr, missing)]
    if kind == "bool":
        return [None if m else int(bool(x)) for x, m in zip(arr, missing)]
    return [None if m else (x if type(x) is str else str(x)) for x, m in zip(arr, missing)]


def blank_to_none(values: list) -> list:
    """An empty optional text ('' as a file says "nothing") stored as NULL."""
    return [None if v == "" else v for v in values]


def iso(ts) -> str:
    import pandas as pd
    ts = pd.Timestamp(ts)
    return ts.isoformat()


def same(a, b, *, numeric=False) -> bool:
    if numeric:
        a, b = float(a), float(b)
        return a == b or math.isclose(a, b, rel_tol=VALUE_RTOL, abs_tol=0.0)
    return a == b


def differs(stored, new, *, numeric=False, blank_is_missing=False) -> str:
    """'' when nothing changes, 'fill' when an empty stored field gets a value, 'conflict'."""
    if blank_is_missing:
        stored = None if stored == "" else stored
        new = None if new == "" else new
    if is_missing(new):
        return ""
    if is_missing(stored):
        return "fill"
    return "" if same(stored, new, numeric=numeric) else "conflict"


def coerce_canonical(frame):
    """Give a frame built from stored rows the canonical dtypes
    (:data:`bayesbase.contract.CANONICAL_DTYPES`), column order and row order."""
    import pandas as pd

    out = {}
    for name in CANONICAL_COLUMNS:
        s = frame[name]
        dt = CANONICAL_DTYPES[name]
        if dt.startswith("datetime64"):
            s = pd.to_datetime(s, format="ISO8601").astype(dt)
        elif dt == "boolean":
            s = s.map(lambda x: pd.NA if is_missing(x) else bool(x)).astype("boolean")
        else:
            s = s.astype(dt)
        out[name] = s
    df = pd.DataFrame(out)
    return df.sort_values(CANONICAL_SORT, kind="mergesort").reset_index(drop=True)
