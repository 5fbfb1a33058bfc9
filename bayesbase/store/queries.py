"""Reading the results store: canonical frames (all results, one patient's history), the wide
display table, the patient list, the import log and the log of replaced values. Owner data are
never read here. The whole-store read takes every chunk of primary keys that has a columnar copy
from it (:func:`_whole_table`); :func:`refresh_columns` makes the missing copies inside each
store write transaction."""
from __future__ import annotations

import math
import sqlite3

from ..errors import StoreError
from ..units import resolve_analyte
from .frames import (NotAggregated, aggregate_columns, aggregate_select, canonical_from_tables,
                     columns_format, columns_from_rows, concat_columns, decode_columns,
                     encode_columns)
from .schema import COLUMNS_CHUNK_BITS, COLUMNS_TABLES

__all__ = ["results", "history", "history_table", "patients", "imports", "replaced",
           "require_patient", "analyte_id", "refresh_columns"]

_SELECT = (
    "SELECT p.id AS patient, p.species, p.breed, p.sex, p.birth_date, s.id AS specimen, "
    "s.collected_at, r.analyte, r.value, r.unit, r.reported_value, r.reported_unit, "
    "r.censor, r.method, r.replicate, s.fasted, s.haemolysis, s.lipaemia, s.icterus, "
    "s.state, coalesce(r.source_file, l.file) AS source_file, r.source_row "
    "FROM results r JOIN specimens s ON s.pk = r.specimen "
    "JOIN patients p ON p.pk = s.patient LEFT JOIN import_log l ON l.id = r.import")

#: the canonical frame is read one table at a time (patients and specimens once each, not once
#: per result): every column by kind (:func:`.frames.aggregate_select`), and the filter by patient
#: of :func:`_frame`
_TABLES = {
    "patients": ({"pk": "int", "id": "text", "species": "text", "breed": "text?", "sex": "text?",
                  "birth_date": "text?"}, "pk = ?"),
    "specimens": ({"pk": "int", "patient": "int", "id": "text", "collected_at": "text", "fasted": "int?",
                   "haemolysis": "real", "lipaemia": "real", "icterus": "real", "state": "text"},
                  "patient = ?"),
    "results": ({"pk": "int", "specimen": "int", "analyte": "text", "value": "real", "unit": "text",
                 "reported_value": "text", "reported_unit": "text", "censor": "text", "method": "text?",
                 "replicate": "int", "import": "int?", "source_file": "text?", "source_row": "int?"},
                "specimen IN (SELECT pk FROM specimens WHERE patient = ?)"),
}
#: rows of a whole table aggregated in one string per column (by primary-key range), so no
#: string approaches SQLite's length limit; a filtered read is aggregated at once
_CHUNK_PKS = 1 << 20


def _records(cur):
    """The rows of an executed cursor as a frame with the cursor's column names."""
    import pandas as pd

    return pd.DataFrame.from_records(cur.fetchall(), columns=[d[0] for d in cur.description])


def _names(kinds: dict) -> str:
    return ", ".join(f'"{c}"' for c in kinds)


def _reals(cur, k: int):
    """The rows of ``k`` REAL columns of an executed cursor as an (n, k) float64 array, NaN for
    NULL (one column is read without a list of rows)."""
    import numpy as np

    if k == 1:
        return np.fromiter((math.nan if v is None else v for (v,) in cur), dtype=np.float64).reshape(-1, 1)
    return np.array(cur.fetchall(), dtype=np.float64).reshape(-1, k)


def _pk_bounds(conn, table: str) -> tuple:
    """(min, max) primary key of a table, (None, None) when it is empty (min and max asked apart:
    each is then one step down the primary key)."""
    return conn.execute(f"SELECT (SELECT min(pk) FROM {table}), (SELECT max(pk) FROM {table})").fetchone()


def _aggregated(conn, table: str, kinds: dict, where: list, args: tuple, bounds=None) -> dict:
    """One table's columns read as one string per column (:func:`.frames.aggregate_select`),
    the ``real`` columns as rows in primary-key order beside them; the aggregated columns are put
    in primary-key order too (SQLite aggregates in the order it scans). Without ``where``, the
    rows of primary keys ``bounds`` (lo, hi: lo <= pk < hi; the whole table when None)."""
    import numpy as np
    import pyarrow as pa

    reals = {c: k for c, k in kinds.items() if k == "real"}
    if where:  # a filtered read (one patient): aggregated at once
        ranges = [(" WHERE " + " AND ".join(where), args)]
    else:
        if bounds is None:
            lo, hi = _pk_bounds(conn, table)
            bounds = (0, 0) if lo is None else (lo, hi + 1)
        ranges = [(" WHERE pk >= ? AND pk < ?", (a, min(a + _CHUNK_PKS, bounds[1])))
                  for a in range(bounds[0], bounds[1], _CHUNK_PKS)]
    parts = []
    for cond, cargs in ranges:
        agg = conn.execute(f"SELECT {aggregate_select(kinds)} FROM {table}{cond}", cargs).fetchone()

        def null_pks(column, cond=cond, cargs=cargs):
            got = conn.execute(f'SELECT group_concat(pk) FROM {table}{cond} AND "{column}" IS NULL',
                               cargs).fetchone()[0]
            return np.array(got.split(","), dtype=np.int64) if got else np.zeros(0, dtype=np.int64)

        part = aggregate_columns(agg, kinds, null_pks)
        pk = part["pk"].to_numpy()
        if np.any(pk[1:] <= pk[:-1]):
            at = pa.array(np.argsort(pk, kind="stable"))
            part = {c: v.take(at) for c, v in part.items()}
        if reals:
            vals = _reals(conn.execute(f"SELECT {_names(reals)} FROM {table}{cond} ORDER BY pk", cargs), len(reals))
            if len(vals) != len(pk):
                raise NotAggregated(f"{table}: {len(vals)} rows beside {len(pk)}")
            part.update({c: vals[:, j].copy() for j, c in enumerate(reals)})
        parts.append(part)
    return concat_columns(parts, kinds)


def _columns(conn, table: str, patient_pk: int | None, extra: str = "", params: tuple = (),
             bounds=None) -> dict:
    """One table's rows (of one patient when ``patient_pk`` is given; of primary keys
    lo <= pk < hi with ``bounds``) as columns (:func:`.frames.aggregate_columns`), in primary-key
    order; read row by row when the aggregated read would not give them back exactly
    (:class:`.frames.NotAggregated`)."""
    kinds, by_patient = _TABLES[table]
    where = ([by_patient] if patient_pk is not None else []) + ([extra] if extra else [])
    args = ((patient_pk,) if patient_pk is not None else ()) + params
    try:
        return _aggregated(conn, table, kinds, where, args, bounds)
    except NotAggregated:
        pass
    except sqlite3.DataError as exc:  # SQLITE_TOOBIG: a string longer than SQLite allows
        if "too big" not in str(exc):
            raise
    if bounds is not None and not where:
        where, args = ["pk >= ? AND pk < ?"], tuple(bounds)
    cond = " WHERE " + " AND ".join(where) if where else ""
    return columns_from_rows(conn.execute(f"SELECT {_names(kinds)} FROM {table}{cond} ORDER BY pk",
                                          args).fetchall(), kinds)


def _copies(conn, table: str, data: bool) -> dict:
    """The chunks of ``table`` holding a columnar copy in this code's format (schema version 3:
    :data:`.schema.COLUMNS_TABLES`): chunk -> the copy's bytes (None without ``data``); empty
    for a store without copies, or when a copy is longer than this connection allows."""
    fmt = columns_format(_TABLES[table][0])
    try:
        return dict(conn.execute(f"SELECT chunk, {'data' if data else 'NULL'} FROM {table}_columns "
                                 "WHERE format = ?", (fmt,)).fetchall())
    except sqlite3.OperationalError as exc:
        if "no such table" not in str(exc):
            raise
    except sqlite3.DataError as exc:  # SQLITE_TOOBIG under a lowered length limit
        if "too big" not in str(exc):
            raise
    return {}


def _chunk_bounds(chunk: int) -> tuple:
    return chunk << COLUMNS_CHUNK_BITS, (chunk + 1) << COLUMNS_CHUNK_BITS


def _whole_table(conn, table: str) -> dict:
    """Every row of a table as columns, in primary-key order: each chunk of primary keys from
    its columnar copy (:func:`.frames.decode_columns`) when it has one, else from the table
    (:func:`_columns`). The caller holds the read snapshot; a copy present is never stale (the
    triggers of schema version 3 delete it with any change to its rows)."""
    kinds = _TABLES[table][0]
    lo, hi = _pk_bounds(conn, table)
    if lo is None:
        return columns_from_rows([], kinds)
    copies, parts = _copies(conn, table, True), []
    for chunk in range(lo >> COLUMNS_CHUNK_BITS, (hi >> COLUMNS_CHUNK_BITS) + 1):
        part = None
        if chunk in copies:
            try:
                part = decode_columns(copies[chunk], kinds)
            except NotAggregated:
                part = None
        if part is None:
            a, b = _chunk_bounds(chunk)
            part = _columns(conn, table, None, bounds=(max(a, lo), min(b, hi + 1)))
        parts.append(part)
    return concat_columns(parts, kinds)


def refresh_columns(conn) -> None:
    """Make the columnar copy of every chunk of :data:`.schema.COLUMNS_TABLES` that has rows
    and no copy (a write removed it, or the store was migrated), inside the caller's write
    transaction (:func:`.transaction.write_transaction` calls this before its ``COMMIT``). A
    copy in another format is removed. A chunk whose copy cannot be made (a value of another
    type than its column's, a copy over SQLite's length limit) is left without one and read
    from its table. Nothing is done on a store without copies (before schema version 3)."""
    import pyarrow as pa

    for table in COLUMNS_TABLES:
        kinds = _TABLES[table][0]
        fmt = columns_format(kinds)
        try:
            conn.execute(f"DELETE FROM {table}_columns WHERE format <> ?", (fmt,))
        except sqlite3.OperationalError as exc:
            if "no such table" in str(exc):
                return
            raise
        lo, hi = _pk_bounds(conn, table)
        have = set(_copies(conn, table, False)) if lo is not None else set()
        for chunk in range(0 if lo is None else lo >> COLUMNS_CHUNK_BITS,
                           0 if hi is None else (hi >> COLUMNS_CHUNK_BITS) + 1):
            if chunk in have:
                continue
            try:
                part = _columns(conn, table, None, bounds=_chunk_bounds(chunk))
                if len(part["pk"]):
                    conn.execute(f"INSERT INTO {table}_columns (chunk, format, data) VALUES (?, ?, ?)",
                                 (chunk, fmt, encode_columns(part, kinds)))
            except (pa.ArrowException, TypeError, ValueError, OverflowError, sqlite3.DataError):
                continue  # no copy: this chunk is read from its table


def _frame(conn, patient_pk: int | None = None, analyte: str | None = None):
    """The canonical frame of the store (one patient's when ``patient_pk`` is given, one
    analyte's when ``analyte`` is), built from the three tables (:func:`.frames.canonical_from_tables`),
    all read in one snapshot (a read transaction unless the caller holds one)."""
    own = not conn.in_transaction
    if own:
        conn.execute("BEGIN")
    try:
        if patient_pk is None and analyte is None:  # the whole store: columnar copies first
            res, pats, specs = (_whole_table(conn, t) for t in ("results", "patients", "specimens"))
        else:
            res = _columns(conn, "results", patient_pk, "analyte = ?" if analyte is not None else "",
                           (analyte,) if analyte is not None else ())
            pats, specs = _columns(conn, "patients", patient_pk), _columns(conn, "specimens", patient_pk)
        files = dict(conn.execute("SELECT id, file FROM import_log").fetchall())
    finally:
        if own:
            conn.execute("COMMIT")
    return canonical_from_tables(pats, specs, res, files)


def require_patient(conn, path, patient) -> int:
    """The patient's pk; :class:`~bayesbase.errors.StoreError` naming the file when absent."""
    row = conn.execute("SELECT pk FROM patients WHERE id = ?", (str(patient),)).fetchone()
    if row is None:
        raise StoreError(f"{path}: no patient {patient!r} in the store")
    return row[0]


def analyte_id(analyte: str) -> str:
    """The registry id of an analyte name or alias; an unknown name is used as given."""
    try:
        return resolve_analyte(analyte)
    except KeyError:
        return analyte


def results(conn, path, patient: str | None = None):
    """Canonical results frame (all patients, or one), ready for :func:`bayesbase.assess`."""
    if patient is None:
        return _frame(conn)
    return _frame(conn, require_patient(conn, path, patient))


def history(conn, path, patient: str, analyte: str | None = None):
    """Canonical frame of one patient's results (optionally one analyte), in time order."""
    pk = require_patient(conn, path, patient)
    return _frame(conn, pk, None if analyte is None else analyte_id(analyte))


def history_table(h):
    """Wide display table of a history frame: one row per specimen (collection time order),
    one column per analyte headed ``analyte (unit)``; cells show the canonical value with
    ``<``/``>`` for a censored value and replicates joined by `` / ``. For display only."""
    import pandas as pd

    if h.empty:
        return pd.DataFrame(columns=["collected_at", "specimen"])
    prefix = h["censor"].map({"left": "<", "right": ">"}).fillna("")
    cell = prefix + h["value"].map(lambda v: f"{v:.6g}")
    h = h.assign(_cell=cell, _col=h["analyte"] + " (" + h["unit"] + ")")
    wide = (h.groupby(["collected_at", "specimen", "_col"], sort=True)["_cell"]
            .agg(" / ".join).unstack("_col"))
    wide.columns.name = None
    wide = wide.reset_index()
    order = list(dict.fromkeys(h.sort_values(["analyte"])["_col"]))
    return wide[["collected_at", "specimen", *order]].astype({c: "str" for c in order})


def patients(conn):
    """One row per patient: id, species, breed, sex, birth_date, specimens, results, first and
    last collection time. Owner data are not included."""
    import pandas as pd

    df = _records(conn.execute(
        "SELECT p.id AS patient, p.species, p.breed, p.sex, p.birth_date, "
        "(SELECT count(*) FROM specimens s WHERE s.patient = p.pk) AS specimens, "
        "(SELECT count(*) FROM results r JOIN specimens s ON s.pk = r.specimen "
        " WHERE s.patient = p.pk) AS results, "
        "(SELECT min(collected_at) FROM specimens s WHERE s.patient = p.pk) AS first, "
        "(SELECT max(collected_at) FROM specimens s WHERE s.patient = p.pk) AS last "
        "FROM patients p ORDER BY p.id"))
    for name in ("patient", "species", "breed", "sex"):
        df[name] = df[name].astype("string")
    for name in ("birth_date", "first", "last"):
        df[name] = pd.to_datetime(df[name], format="ISO8601").astype("datetime64[ns]")
    for name in ("specimens", "results"):
        df[name] = df[name].astype("int64")
    return df


def imports(conn):
    """The import log as a frame."""
    return _records(conn.execute("SELECT * FROM import_log ORDER BY id"))


def replaced(conn):
    """What imports with ``replace`` changed: one row per changed field."""
    return _records(conn.execute(
        "SELECT x.import, p.id AS patient, x.entity, x.specimen, x.analyte, x.replicate, "
        "x.field, x.old_value, x.new_value FROM replaced x "
        "LEFT JOIN patients p ON p.pk = x.patient ORDER BY x.id"))
