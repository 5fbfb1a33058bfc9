"""Small conversions and comparisons between pandas and SQLite for the results store.

Every missing value (None, NaN, NaT, ``pd.NA``, whatever the dtype) becomes SQL NULL on the way
in, never the text of a missing value; a frame read back gets the canonical dtypes, column order
and row order (:func:`coerce_canonical`).

Reading a whole store fast: SQLite concatenates each integer or text column of a table into one
string (:func:`aggregate_select`; no Python object per cell, which was most of the read time),
split here with numpy into Arrow arrays (:func:`aggregate_columns`); REAL columns are read as rows
(SQLite's text form of a double is not guaranteed to give the same double back). A text holding
the separator, a value of another type than its column's or a string over SQLite's length limit
sends that table to the row-by-row read (:func:`columns_from_rows`); the frame is the same either
way (tests/test_store_read_speed_equivalence.py).

The whole-store read mostly skips both: each chunk of a table with a columnar copy in the store
(schema version 3) is decoded from one Arrow IPC stream (:func:`encode_columns` /
:func:`decode_columns`: narrow integers, doubles as their 8 bytes, texts with few distinct
values dictionary-encoded and kept so until one string copy in :func:`canonical_from_tables`)
(tests/test_store_read_columnar_copy.py).
"""
from __future__ import annotations

import math
from datetime import datetime, timezone

from ..contract import CANONICAL_COLUMNS, CANONICAL_DTYPES

__all__ = ["VALUE_RTOL", "CANONICAL_SORT", "AGG_SEP", "NotAggregated", "is_missing", "py", "col",
           "blank_to_none", "iso", "same", "differs", "coerce_canonical", "aggregate_select",
           "aggregate_columns", "columns_from_rows", "concat_columns", "canonical_from_tables",
           "columns_format", "encode_columns", "decode_columns", "now_utc"]

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


#: Separator of one column's texts in one aggregated string (the ASCII unit separator): a text
#: holding it splits into more pieces than there are rows, which is detected
#: (:class:`NotAggregated`), and the table is then read row by row.
AGG_SEP = "\x1f"


class NotAggregated(Exception):
    """An aggregated read (:func:`aggregate_select`) would not give these rows back exactly (a
    text holding :data:`AGG_SEP`, a value of another type than its column's, a string longer
    than SQLite allows): the caller reads the table row by row instead."""


def aggregate_select(kinds: dict) -> str:
    """The select list that reads a table's columns as one string per column (``group_concat``
    in SQLite: no Python object per cell), the row count first. ``kinds`` maps every column to
    ``int``, ``int?`` (NULL allowed), ``text`` or ``text?``; ``real`` columns are left out (their
    text form in SQLite does not always give the same double back; they are read as rows).
    A nullable text column gives its texts without the NULLs, then the count of texts (where
    the NULLs are is asked apart, only when there are some: :func:`aggregate_columns`)."""
    parts = ["count(*)"]
    for name, kind in kinds.items():
        q = f'"{name}"'
        if kind == "int":
            parts.append(f"group_concat({q})")
        elif kind == "int?":
            parts.append(f"group_concat(ifnull({q}, ''))")
        elif kind == "text":
            parts.append(f"group_concat({q}, '{AGG_SEP}')")
        elif kind == "text?":
            parts += [f"group_concat({q}, '{AGG_SEP}')", f"count({q})"]
    return ", ".join(parts)


def _pieces(text, sep: str, n: int):
    """The ``n`` pieces of one aggregated string as an Arrow large_string array, built from the
    string's UTF-8 bytes with numpy (the separator, an ASCII byte, never occurs inside a
    multi-byte character); :class:`NotAggregated` when they are not ``n`` (a text held the
    separator)."""
    import numpy as np
    import pyarrow as pa

    if n == 0:
        return pa.array([], type=pa.large_string())
    if text is None:  # every value NULL in a column that allows none
        raise NotAggregated(f"no text for {n} rows")
    raw = np.frombuffer(text.encode("utf-8"), dtype=np.uint8)
    is_sep = raw == ord(sep)
    cuts = np.flatnonzero(is_sep)
    if len(cuts) != n - 1:
        raise NotAggregated(f"a text holds the separator ({len(cuts) + 1} pieces for {n} rows)")
    offsets = np.empty(n + 1, dtype=np.int64)
    offsets[0], offsets[n] = 0, len(raw) - (n - 1)
    offsets[1:n] = cuts - np.arange(n - 1)
    data = raw[~is_sep]
    return pa.LargeStringArray.from_buffers(n, pa.py_buffer(offsets), pa.py_buffer(data))


def aggregate_columns(row, kinds: dict, null_pks=None) -> dict:
    """The columns of one row of :func:`aggregate_select` as Arrow arrays (int64 and
    large_string, NULL where SQL had NULL), in the order SQLite aggregated the rows. For a
    ``text?`` column holding some NULLs, ``null_pks(column)`` gives the primary keys of those
    rows (``kinds`` then starts with ``pk``)."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.compute as pc

    n = int(row[0])
    out, i = {}, 1
    for name, kind in kinds.items():
        if kind == "real":
            continue
        if kind.startswith("int"):
            pieces = _pieces(row[i], ",", n)
            if kind == "int?":
                pieces = pc.if_else(pc.equal(pieces, ""), pa.scalar(None, pa.large_string()), pieces)
            try:
                out[name] = pc.cast(pieces, pa.int64())
            except (pa.ArrowInvalid, pa.ArrowNotImplementedError) as exc:  # a value not an integer
                raise NotAggregated(f"column {name}: {exc}") from exc
        elif kind == "text":
            out[name] = _pieces(row[i], AGG_SEP, n)
        else:
            i += 1
            out[name] = texts = _pieces(row[i - 1], AGG_SEP, int(row[i]))
            if len(texts) < n:
                null = np.isin(out["pk"].to_numpy(), null_pks(name))
                at = np.cumsum(~null) - 1
                out[name] = texts.take(pa.array(at, mask=null))
        i += 1
    return out


def columns_from_rows(rows, kinds: dict) -> dict:
    """The columns of rows fetched one by one (``SELECT`` of every column of ``kinds``, in that
    order) as :func:`aggregate_columns` gives them, ``real`` ones as float64 with NaN for NULL."""
    import numpy as np
    import pyarrow as pa

    cols = list(zip(*rows)) if rows else [()] * len(kinds)
    out = {}
    for (name, kind), values in zip(kinds.items(), cols):
        if kind == "real":
            out[name] = np.array([math.nan if v is None else v for v in values], dtype=np.float64)
        else:
            out[name] = pa.array(values, type=pa.int64() if kind.startswith("int") else pa.large_string())
    return out


def concat_columns(parts: list, kinds: dict) -> dict:
    """Chunks of columns (each as :func:`aggregate_columns` / :func:`columns_from_rows` give
    them, with the ``real`` ones) as one set of columns."""
    import numpy as np
    import pyarrow as pa

    if not parts:
        return columns_from_rows([], kinds)
    if len(parts) == 1:
        return parts[0]

    def texts(arrays):  # dictionary-encoded chunks (columnar copies) stay so, under one dictionary
        if all(pa.types.is_dictionary(a.type) for a in arrays):
            return pa.chunked_array(arrays).unify_dictionaries().combine_chunks()
        return pa.concat_arrays([_plain(a) for a in arrays])

    return {name: (np.concatenate([p[name] for p in parts]) if kind == "real"
                   else texts([p[name] for p in parts]) if kind.startswith("text")
                   else pa.concat_arrays([p[name] for p in parts])) for name, kind in kinds.items()}


def _plain(values):
    """A text column as a plain Arrow string array (a dictionary-encoded one decoded)."""
    import pyarrow as pa

    if isinstance(values, pa.Array) and pa.types.is_dictionary(values.type):
        return values.dictionary.take(values.indices)
    return values


def columns_format(kinds: dict) -> str:
    """The ``format`` of a columnar copy of a table with these columns (names and kinds, in
    order): a copy in another format is not used (:func:`decode_columns`)."""
    return "arrow-ipc-1 " + ",".join(f"{name}:{kind}" for name, kind in kinds.items())


def _narrow(values, kind: str):
    """One column as stored in a columnar copy: integers in the narrowest Arrow integer type
    holding them, texts with few distinct values dictionary-encoded, doubles as they are."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.compute as pc

    if kind == "real":
        return pa.array(np.asarray(values, dtype=np.float64), type=pa.float64())
    if kind.startswith("int"):
        lo, hi = (pc.min_max(values)[k].as_py() for k in ("min", "max"))
        for t in (pa.int8(), pa.int16(), pa.int32()):
            info = np.iinfo(t.to_pandas_dtype())
            if lo is None or (info.min <= lo and hi <= info.max):
                return values.cast(t)
        return values.cast(pa.int64())
    if pc.count_distinct(values).as_py() * 4 > len(values):
        return values
    enc = values.dictionary_encode()
    k = len(enc.dictionary)
    small = pa.int8() if k < 128 else pa.int16() if k < 32768 else pa.int32()
    return pa.DictionaryArray.from_arrays(enc.indices.cast(small), enc.dictionary)


def encode_columns(cols: dict, kinds: dict) -> bytes:
    """A chunk of a table's columns (as :func:`aggregate_columns` / :func:`columns_from_rows`
    give them, every column of ``kinds``) as the bytes of one Arrow IPC stream."""
    import pyarrow as pa

    batch = pa.RecordBatch.from_arrays([_narrow(cols[k], kind) for k, kind in kinds.items()],
                                       names=list(kinds))
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, batch.schema) as writer:
        writer.write_batch(batch)
    return sink.getvalue().to_pybytes()


def decode_columns(blob: bytes, kinds: dict) -> dict:
    """The columns of :func:`encode_columns`' bytes, as :func:`aggregate_columns` gives them
    (int64 and large_string Arrow arrays, ``real`` ones as float64 with NaN for NULL);
    :class:`NotAggregated` when the stream does not hold exactly the columns of ``kinds``."""
    import pyarrow as pa

    try:
        reader = pa.ipc.open_stream(blob)
        batches = list(reader)
    except (pa.ArrowInvalid, OSError) as exc:
        raise NotAggregated(f"unreadable columnar copy: {exc}") from exc
    if len(batches) != 1 or batches[0].schema.names != list(kinds):
        raise NotAggregated("columnar copy of other columns")
    batch, out = batches[0], {}
    for i, (name, kind) in enumerate(kinds.items()):
        v = batch.column(i)
        if kind == "real":
            if v.type != pa.float64() or v.null_count:
                raise NotAggregated(f"column {name}: {v.type}")
            out[name] = v.to_numpy(zero_copy_only=False)
        elif kind.startswith("int"):
            if not pa.types.is_integer(v.type):
                raise NotAggregated(f"column {name}: {v.type}")
            out[name] = v.cast(pa.int64())
        else:
            d = v.dictionary if pa.types.is_dictionary(v.type) else v
            if not (pa.types.is_string(d.type) or pa.types.is_large_string(d.type)):
                raise NotAggregated(f"column {name}: {v.type}")
            out[name] = (pa.DictionaryArray.from_arrays(v.indices.cast(pa.int32()), d.cast(pa.large_string()))
                         if d is not v else v.cast(pa.large_string()))
    return out


def _text(values, index=None):
    """A canonical text column (``string`` dtype) of an Arrow string array taken at ``index``
    (no Python object per row)."""
    import numpy as np
    import pandas as pd
    import pyarrow as pa

    arr = values if isinstance(values, (pa.Array, pa.ChunkedArray)) else pa.array(values, type=pa.string())
    at = None if index is None else pa.array(np.asarray(index, dtype=np.int64))
    if isinstance(arr, pa.Array) and pa.types.is_dictionary(arr.type):  # one string copy only
        arr = arr.dictionary.take(arr.indices if at is None else arr.indices.take(at))
    elif at is not None:
        arr = arr.take(at)
    return pd.array(arr, dtype="string")


def _ints(values) -> "np.ndarray":
    """An integer column (int64) of an Arrow int64 array with no NULL."""
    return _int_column(values)[0]


def _int_column(values) -> tuple:
    """(int64 array with 0 where NULL, bool array of the NULLs or None when there is none) of an
    Arrow int64 array."""
    import numpy as np
    import pyarrow.compute as pc

    if values.null_count == 0:
        return np.asarray(values.to_numpy(zero_copy_only=False), dtype=np.int64), None
    return (np.asarray(pc.fill_null(values, 0).to_numpy(zero_copy_only=False), dtype=np.int64),
            values.is_null().to_numpy(zero_copy_only=False))


def _times(values):
    """ISO 8601 texts (Arrow) as canonical datetimes (as :func:`coerce_canonical` reads them)."""
    import numpy as np
    import pandas as pd
    import pyarrow as pa

    if pa.types.is_dictionary(values.type):  # each distinct text parsed once
        idx, nulls = _int_column(values.indices.cast(pa.int64()))
        out = np.concatenate([_times(values.dictionary), np.array(["NaT"], dtype="datetime64[ns]")])
        return out[np.where(nulls, len(values.dictionary), idx) if nulls is not None else idx]
    return pd.to_datetime(pd.Series(values.to_pylist(), dtype=object),
                          format="ISO8601").astype("datetime64[ns]").to_numpy()


def _rank(values) -> "np.ndarray":
    """The rank of every text (Arrow) in code-point order (equal texts share a rank; UTF-8 byte
    order is code-point order)."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.compute as pc

    if pa.types.is_dictionary(values.type):  # a columnar copy's: the distinct texts ranked once
        rank = pc.rank(values.dictionary, sort_keys="ascending", tiebreaker="dense").to_numpy()
        return np.asarray(rank, dtype=np.int64)[values.indices.to_numpy(zero_copy_only=False)]
    enc = pc.dictionary_encode(values)
    rank = np.empty(len(enc.dictionary), dtype=np.int64)
    rank[pc.sort_indices(enc.dictionary).to_numpy()] = np.arange(len(enc.dictionary))
    return rank[enc.indices.to_numpy(zero_copy_only=False)]


def _positions(keys, pks) -> "np.ndarray":
    """Row of ``pks`` holding each of ``keys`` (every key is present: foreign keys)."""
    import numpy as np

    pks, keys = _ints(pks), _ints(keys)
    if len(pks) and pks.min() >= 0 and max(pks.max(), keys.max(initial=0)) < 4 * len(pks) + 1024:
        at = np.zeros(int(pks.max()) + 1, dtype=np.intp)  # dense keys: one lookup table
        at[pks] = np.arange(len(pks))
        return at[keys]
    order = np.argsort(pks, kind="stable")
    return order[np.searchsorted(pks, keys, sorter=order)]


def _source(results: dict, files: dict):
    """The source file of every result: its own, else the file of its import (import log)."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.compute as pc

    own = results["source_file"]
    imp, no_imp = _int_column(results["import"])
    if len(imp) and imp.min() >= 0 and imp.max() < (1 << 24):  # import ids: small integers
        ids = np.flatnonzero(np.bincount(imp))
        at = np.zeros(int(imp.max()) + 1, dtype=np.int64)
        at[ids] = np.arange(len(ids))
        inverse = at[imp]
    else:
        ids, inverse = np.unique(imp, return_inverse=True)
    names = pa.array([files.get(int(k)) for k in ids], type=pa.large_string())
    if pa.types.is_dictionary(own.type):  # a columnar copy's: chosen by index, no string copied
        idx, own_null = _int_column(own.indices.cast(pa.int64()))
        if own_null is None:
            return own
        idx = np.where(own_null, len(own.dictionary) + np.asarray(inverse, dtype=np.int64), idx)
        null = own_null & no_imp if no_imp is not None else None
        return pa.DictionaryArray.from_arrays(pa.array(idx, mask=null),
                                              pa.concat_arrays([own.dictionary, names]))
    logged = names.cast(own.type).take(pa.array(inverse.astype(np.int64)))
    if no_imp is not None:
        logged = pc.if_else(pa.array(no_imp), pa.nulls(len(imp), own.type), logged)
    return pc.coalesce(own, logged)


def _fasted(values):
    """The fasting flag (0/1/NULL in SQL) as a ``boolean`` array."""
    import pandas as pd

    import numpy as np

    v, nulls = _int_column(values)
    return pd.arrays.BooleanArray(v != 0, np.zeros(len(v), dtype=bool) if nulls is None else nulls)


def canonical_from_tables(patients: dict, specimens: dict, results: dict, files: dict):
    """The canonical frame from the store's tables read as columns (see :mod:`.queries`:
    integers and texts as Arrow arrays, ``real`` columns as float64): each result row joined to
    its specimen and patient, the source file taken from the import log when the row names none;
    canonical dtypes, column order and row order (:data:`CANONICAL_SORT`), as
    :func:`coerce_canonical` gives them. Texts are taken in Arrow and integers gathered with
    numpy: no Python object is made per result row here."""
    import numpy as np
    import pandas as pd

    n = len(results["specimen"])
    s_row = _positions(results["specimen"], specimens["pk"]) if n else np.zeros(0, dtype=np.intp)
    p_of_s = _positions(specimens["patient"], patients["pk"]) if len(specimens["pk"]) else np.zeros(0, np.intp)
    p_row = p_of_s[s_row]
    s_time = _times(specimens["collected_at"])
    replicate = _ints(results["replicate"])
    # specimens in canonical order first (patient id, time, specimen id: unique, as the schema's
    # UNIQUE constraints make them), then the results by that position, analyte and replicate
    s_pos = np.empty(len(p_of_s), dtype=np.int64)
    s_pos[np.lexsort((_rank(specimens["id"]), s_time.astype("int64"), _rank(patients["id"])[p_of_s]))] = \
        np.arange(len(p_of_s))
    order = (np.lexsort((replicate, _rank(results["analyte"]), s_pos[s_row])) if n
             else np.zeros(0, dtype=np.intp))
    s_row, p_row = s_row[order], p_row[order]
    row, no_row = _int_column(results["source_row"])
    src_row = pd.arrays.IntegerArray(row[order], np.zeros(n, dtype=bool) if no_row is None else no_row[order])
    cols = {
        "patient": _text(patients["id"], p_row), "species": _text(patients["species"], p_row),
        "breed": _text(patients["breed"], p_row), "sex": _text(patients["sex"], p_row),
        "birth_date": _times(patients["birth_date"])[p_row], "specimen": _text(specimens["id"], s_row),
        "collected_at": s_time[s_row], "analyte": _text(results["analyte"], order),
        "value": results["value"][order], "unit": _text(results["unit"], order),
        "reported_value": _text(results["reported_value"], order),
        "reported_unit": _text(results["reported_unit"], order), "censor": _text(results["censor"], order),
        "method": _text(results["method"], order),
        "replicate": pd.array(replicate[order], dtype="Int64"), "fasted": _fasted(specimens["fasted"]).take(s_row),
        **{k: specimens[k][s_row] for k in ("haemolysis", "lipaemia", "icterus")},
        "state": _text(specimens["state"], s_row), "source_file": _text(_source(results, files), order),
        "source_row": src_row,
    }
    return pd.DataFrame(cols, columns=list(CANONICAL_COLUMNS)).astype(CANONICAL_DTYPES)
