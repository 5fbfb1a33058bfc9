"""Reading the results store: canonical frames (all results, one patient's history), the wide
display table, the patient list, the import log and the log of replaced values. Owner data are
never read here."""
from __future__ import annotations

import math
import sqlite3

from ..errors import StoreError
from ..units import resolve_analyte
from .frames import (NotAggregated, aggregate_columns, aggregate_select, canonical_from_tables,
                     columns_from_rows, concat_columns)

__all__ = ["results", "history", "history_table", "patients", "imports", "replaced",
           "require_patient", "analyte_id"]

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


def _aggregated(conn, table: str, kinds: dict, where: list, args: tuple) -> dict:
    """One table's columns read as one string per column (:func:`.frames.aggregate_select`),
    the ``real`` columns as rows in primary-key order beside them; the aggregated columns are put
    in primary-key order too (SQLite aggregates in the order it scans)."""
    import numpy as np
    import pyarrow as pa

    reals = {c: k for c, k in kinds.items() if k == "real"}
    if where:  # a filtered read (one patient): aggregated at once
        ranges = [(" WHERE " + " AND ".join(where), args)]
    else:  # min and max apart: each is then one step down the primary key
        lo, hi = conn.execute(f"SELECT (SELECT min(pk) FROM {table}), (SELECT max(pk) FROM {table})").fetchone()
        ranges = [] if lo is None else [(" WHERE pk >= ? AND pk < ?", (a, min(a + _CHUNK_PKS, hi + 1)))
                                        for a in range(lo, hi + 1, _CHUNK_PKS)]
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


def _columns(conn, table: str, patient_pk: int | None, extra: str = "", params: tuple = ()) -> dict:
    """One table's rows (of one patient when ``patient_pk`` is given) as columns
    (:func:`.frames.aggregate_columns`), in primary-key order; read row by row when the
    aggregated read would not give them back exactly (:class:`.frames.NotAggregated`)."""
    kinds, by_patient = _TABLES[table]
    where = ([by_patient] if patient_pk is not None else []) + ([extra] if extra else [])
    args = ((patient_pk,) if patient_pk is not None else ()) + params
    try:
        return _aggregated(conn, table, kinds, where, args)
    except NotAggregated:
        pass
    except sqlite3.DataError as exc:  # SQLITE_TOOBIG: a string longer than SQLite allows
        if "too big" not in str(exc):
            raise
    cond = " WHERE " + " AND ".join(where) if where else ""
    return columns_from_rows(conn.execute(f"SELECT {_names(kinds)} FROM {table}{cond} ORDER BY pk",
                                          args).fetchall(), kinds)


def _frame(conn, patient_pk: int | None = None, analyte: str | None = None):
    """The canonical frame of the store (one patient's when ``patient_pk`` is given, one
    analyte's when ``analyte`` is), built from the three tables (:func:`.frames.canonical_from_tables`),
    all read in one snapshot (a read transaction unless the caller holds one)."""
    own = not conn.in_transaction
    if own:
        conn.execute("BEGIN")
    try:
        res = _columns(conn, "results", patient_pk, "analyte = ?" if analyte is not None else "",
                       (analyte,) if analyte is not None else ())
        files = dict(conn.execute("SELECT id, file FROM import_log").fetchall())
        pats, specs = _columns(conn, "patients", patient_pk), _columns(conn, "specimens", patient_pk)
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
