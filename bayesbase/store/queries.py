"""Reading the results store: canonical frames (all results, one patient's history), the wide
display table, the patient list, the import log and the log of replaced values. Owner data are
never read here."""
from __future__ import annotations

from ..errors import StoreError
from ..units import resolve_analyte
from .frames import canonical_from_tables

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
#: per result), each as columns; the filters of :func:`_frame` by patient and analyte
_TABLES = {
    "patients": ("SELECT pk, id, species, breed, sex, birth_date FROM patients", "pk = ?"),
    "specimens": ("SELECT pk, patient, id, collected_at, fasted, haemolysis, lipaemia, icterus, state "
                  "FROM specimens", "patient = ?"),
    "results": ("SELECT specimen, analyte, value, unit, reported_value, reported_unit, censor, method, "
                "replicate, import, source_file, source_row FROM results",
                "specimen IN (SELECT pk FROM specimens WHERE patient = ?)"),
}


def _records(cur):
    """The rows of an executed cursor as a frame with the cursor's column names."""
    import pandas as pd

    return pd.DataFrame.from_records(cur.fetchall(), columns=[d[0] for d in cur.description])


def _columns(conn, table: str, patient_pk: int | None, extra: str = "", params: tuple = ()) -> dict:
    """One table's rows (of one patient when ``patient_pk`` is given) as {column: tuple}."""
    sql, by_patient = _TABLES[table]
    where = ([by_patient] if patient_pk is not None else []) + ([extra] if extra else [])
    args = ((patient_pk,) if patient_pk is not None else ()) + params
    cur = conn.execute(sql + (" WHERE " + " AND ".join(where) if where else ""), args)
    names = [d[0] for d in cur.description]
    rows = cur.fetchall()
    cols = list(zip(*rows)) if rows else [()] * len(names)
    return dict(zip(names, cols))


def _frame(conn, patient_pk: int | None = None, analyte: str | None = None):
    """The canonical frame of the store (one patient's when ``patient_pk`` is given, one
    analyte's when ``analyte`` is), built from the three tables (:func:`.frames.canonical_from_tables`)."""
    res = _columns(conn, "results", patient_pk, "analyte = ?" if analyte is not None else "",
                   (analyte,) if analyte is not None else ())
    files = dict(conn.execute("SELECT id, file FROM import_log").fetchall())
    return canonical_from_tables(_columns(conn, "patients", patient_pk), _columns(conn, "specimens", patient_pk),
                                 res, files)


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
