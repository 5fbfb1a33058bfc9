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
           "same", "differs", "coerce_canonical", "canonical_from_tables", "now_utc"]

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
            missing = pd.isna(s).to_numpy(dtype=bool)
            s = pd.Series(pd.array([None if m else bool(x) for x, m in zip(s.to_numpy(dtype=object), missing)],
                                   dtype="boolean"), index=s.index)
        else:
            s = s.astype(dt)
        out[name] = s
    df = pd.DataFrame(out)
    return df.sort_values(CANONICAL_SORT, kind="mergesort").reset_index(drop=True)


def _text(values, index=None):
    """A canonical text column (``string`` dtype) from str/None values (or an Arrow string array),
    taken at ``index`` (in Arrow: no Python object per row)."""
    import numpy as np
    import pandas as pd
    import pyarrow as pa

    arr = values if isinstance(values, pa.Array) else pa.array(values, type=pa.string())
    if index is not None:
        arr = arr.take(pa.array(np.asarray(index, dtype=np.int64)))
    return pd.array(arr, dtype="string")


def _ints(values) -> "np.ndarray":
    """An integer column (int64) of ints (every one present)."""
    return _int_column(values)[0]


def _int_column(values) -> tuple:
    """(int64 array with 0 where NULL, bool array of the NULLs or None when there is none) of a
    column of ints and None."""
    import numpy as np

    try:
        return np.fromiter(values, dtype=np.int64, count=len(values)), None
    except TypeError:  # a None among them
        obj = np.array(values, dtype=object)
        nulls = np.equal(obj, None)
        obj[nulls] = 0
        return obj.astype(np.int64), nulls


def _times(values):
    """ISO 8601 texts as canonical datetimes (as :func:`coerce_canonical` reads them)."""
    import pandas as pd

    return pd.to_datetime(pd.Series(list(values), dtype=object), format="ISO8601").astype("datetime64[ns]").to_numpy()


def _rank(values) -> "np.ndarray":
    """The rank of every text in code-point order (equal texts share a rank)."""
    import numpy as np
    import pandas as pd

    codes, uniq = pd.factorize(np.asarray(values, dtype=object))
    rank = np.empty(len(uniq), dtype=np.int64)
    rank[np.argsort(np.asarray(uniq, dtype=object), kind="stable")] = np.arange(len(uniq))
    return rank[codes]


def _positions(keys, pks) -> "np.ndarray":
    """Row of ``pks`` holding each of ``keys`` (every key is present: foreign keys)."""
    import numpy as np

    pks = _ints(pks)
    order = np.argsort(pks, kind="stable")
    return order[np.searchsorted(pks, _ints(keys), sorter=order)]


def _source(results: dict, files: dict):
    """The source file of every result: its own, else the file of its import (import log)."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.compute as pc

    own = pa.array(results["source_file"], type=pa.string())
    imp, no_imp = _int_column(results["import"])
    ids, inverse = np.unique(imp, return_inverse=True)
    logged = pa.array([files.get(int(k)) for k in ids], type=pa.string()).take(pa.array(inverse.astype(np.int64)))
    if no_imp is not None:
        logged = pc.if_else(pa.array(no_imp), pa.nulls(len(imp), pa.string()), logged)
    return pc.coalesce(own, logged)


def canonical_from_tables(patients: dict, specimens: dict, results: dict, files: dict):
    """The canonical frame from the store's tables read as columns ({column: tuple}; see
    :mod:`.queries`): each result row joined to its specimen and patient, the source file taken
    from the import log when the row names none; canonical dtypes, column order and row order
    (:data:`CANONICAL_SORT`), as :func:`coerce_canonical` gives them. Text columns are taken
    in Arrow and integers gathered with numpy: no Python object is made per row here."""
    import numpy as np
    import pandas as pd

    n = len(results["specimen"])
    s_row = _positions(results["specimen"], specimens["pk"]) if n else np.zeros(0, dtype=np.intp)
    p_of_s = _positions(specimens["patient"], patients["pk"]) if len(specimens["pk"]) else np.zeros(0, np.intp)
    p_row = p_of_s[s_row]
    s_time = _times(specimens["collected_at"])
    replicate = _ints(results["replicate"]) if n else np.zeros(0, dtype=np.int64)
    order = np.lexsort((
        replicate, _rank(results["analyte"]),
        _rank(specimens["id"])[s_row], s_time.astype("int64")[s_row], _rank(patients["id"])[p_row],
    )) if n else np.zeros(0, dtype=np.intp)
    s_row, p_row = s_row[order], p_row[order]
    row, no_row = _int_column(results["source_row"])
    src_row = pd.arrays.IntegerArray(row[order], np.zeros(n, dtype=bool) if no_row is None else no_row[order])
    fasted = pd.array([None if v is None else bool(v) for v in specimens["fasted"]], dtype="boolean")
    cols = {
        "patient": _text(patients["id"], p_row), "species": _text(patients["species"], p_row),
        "breed": _text(patients["breed"], p_row), "sex": _text(patients["sex"], p_row),
        "birth_date": _times(patients["birth_date"])[p_row], "specimen": _text(specimens["id"], s_row),
        "collected_at": s_time[s_row], "analyte": _text(results["analyte"], order),
        "value": np.asarray(results["value"], dtype="float64")[order] if n else np.zeros(0),
        "unit": _text(results["unit"], order),
        "reported_value": _text(results["reported_value"], order),
        "reported_unit": _text(results["reported_unit"], order), "censor": _text(results["censor"], order),
        "method": _text(results["method"], order),
        "replicate": pd.array(replicate[order], dtype="Int64"), "fasted": fasted.take(s_row),
        **{k: np.asarray(specimens[k], dtype="float64")[s_row] for k in ("haemolysis", "lipaemia", "icterus")},
        "state": _text(specimens["state"], s_row), "source_file": _text(_source(results, files), order),
        "source_row": src_row,
    }
    return pd.DataFrame(cols, columns=list(CANONICAL_COLUMNS)).astype(CANONICAL_DTYPES)
