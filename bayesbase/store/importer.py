"""One import, in three stages:

1. :func:`prepare`: a canonical frame from the input (validated when raw), the ``owner`` column
   split off, and the store's own checks (:mod:`bayesbase.store.checks`);
2. :func:`plan`: compared with the stored rows, what the import would do, as an
   :class:`ImportPlan` (rows to add, rows already stored, rows to replace, conflicts); it
   writes nothing to the database (it stages the input in TEMP tables);
3. :func:`apply`: write the plan, in the same transaction as the plan was made.

:meth:`bayesbase.store.Store.import_frame` runs them in one ``BEGIN IMMEDIATE`` transaction;
a dry run stops after the plan. Both stages must run on one connection inside one transaction
(the plan is only true of the stored rows it was computed on); :func:`drop_staging` removes the
TEMP tables afterwards.
"""
from __future__ import annotations

import hashlib
from dataclasses import dataclass
from typing import NamedTuple

from ..contract import HIL_INDICES, is_canonical
from ..errors import Problem, ValidationError
from ..io.parquet import file_sha256  # one file hash for imports, datasets and scores
from .checks import PATIENT_FIELDS, internal_problems, non_finite_problems
from .connection import write_transaction
from .frames import VALUE_RTOL, blank_to_none, col, differs, is_missing, now_utc, py, same
from .summaries import Conflict, ImportConflict, ImportSummary

__all__ = ["ImportPlan", "ResultUpdate", "prepare", "plan", "apply", "import_chunks",
           "import_file_chunked", "drop_staging", "file_sha256", "frame_sha256", "owner_map",
           "SPECIMEN_FIELDS"]

#: Specimen attributes an import compares with the stored ones.
SPECIMEN_FIELDS = ("collected_at", "state", "fasted", "haemolysis", "lipaemia", "icterus",
                   "laboratory")
_STAGING = ("_tmp_patients", "_tmp_specimens", "_tmp_results")


def frame_sha256(frame) -> str:
    """SHA-256 of a frame's CSV text (for frames imported without a file)."""
    return hashlib.sha256(frame.to_csv(index=False).encode("utf-8")).hexdigest()


def _norm(name) -> str:
    return str(name).strip().lower()


def owner_map(frame) -> dict | None:
    """patient -> owner from a frame's ``owner`` column (None without one)."""
    cols = {_norm(c): c for c in frame.columns}
    if "owner" not in cols:
        return None
    pcol = cols.get("patient")
    if pcol is None:
        return None
    sub = frame[[pcol, cols["owner"]]].dropna()
    out = {}
    for p, o in zip(sub[pcol], sub[cols["owner"]]):
        if str(o).strip():
            out[str(p).strip()] = str(o).strip()
    return out


def drop_owner_columns(frame):
    """The frame without its ``owner`` column(s) (owner identity never reaches the results)."""
    return frame.drop(columns=[c for c in frame.columns if _norm(c) == "owner"])


# ---------------------------------------------------------------------------------------------
# stage 1: prepare
# ---------------------------------------------------------------------------------------------
def prepare(frame, source: str, owners: dict | None = None):
    """``(canonical frame, owners)`` for an import: a raw frame is validated
    (:func:`bayesbase.data.validate`), a canonical one used as it is; ``owners`` defaults to the
    frame's ``owner`` column. Raises :class:`~bayesbase.errors.ValidationError` for a value the
    store refuses or an input that contradicts itself."""
    if owners is None:
        owners = owner_map(frame)
    if not is_canonical(frame):
        from ..validate import validate

        frame = validate(drop_owner_columns(frame), source=source)
    problems = non_finite_problems(frame, source) + internal_problems(frame, source)
    if problems:
        raise ValidationError(problems)
    return frame, owners or {}


# ---------------------------------------------------------------------------------------------
# stage 2: plan
# ---------------------------------------------------------------------------------------------
class ResultUpdate(NamedTuple):
    """A stored result an import changes: its pk, the new canonical row, the changed fields
    ``(field, stored, new)``, whether it counts as a replaced row (False: only an empty method
    is filled), and the stored reported value and unit."""

    pk: int
    row: object
    diffs: tuple
    replaces: bool
    old_reported_value: str
    old_reported_unit: str


class _Part(NamedTuple):
    new: list        # rows to insert
    updates: list    # (field, new value, pk)
    conflicts: list  # Conflict
    changes: list    # rows for `replaced`: (patient pk, entity, specimen, analyte, replicate,
                     # field, old, new)


@dataclass(frozen=True)
class ImportPlan:
    """What one import would do to the store (computed by :func:`plan`, written by
    :func:`apply`). ``rows_added + rows_skipped + rows_replaced`` = rows in the input."""

    n_rows: int
    new_patients: tuple       # (id, species, breed, sex, birth_date)
    patient_updates: tuple    # (field, new value, patient pk)
    new_specimens: tuple      # (patient id, id, collected_at, state, fasted, H, L, I, laboratory)
    specimen_updates: tuple   # (field, new value, specimen pk)
    new_results: object       # canonical rows to insert (a frame)
    result_updates: tuple     # ResultUpdate
    changes: tuple            # patient and specimen fields changed: rows for `replaced`
    conflicts: tuple          # Conflict, in the order patients, specimens, results

    @property
    def rows_added(self) -> int:
        return len(self.new_results)

    @property
    def rows_replaced(self) -> int:
        return sum(1 for u in self.result_updates if u.replaces)

    @property
    def rows_skipped(self) -> int:
        return self.n_rows - self.rows_added - self.rows_replaced

    def summary(self, source: str, import_id: int | None = None, *,
                dry_run: bool = False) -> ImportSummary:
        """The :class:`ImportSummary` of this plan once applied (``import_id``) or of a dry run."""
        return ImportSummary(self.rows_added, self.rows_skipped, self.rows_replaced,
                             self.conflicts, import_id, source, len(self.new_patients),
                             len(self.new_specimens), dry_run)


def _patient_rows(canon) -> list[tuple]:
    # the first non-missing value of each patient field, as for specimens (the input's checks
    # allow one value per field and patient, missing rows say nothing): which row comes first
    # then never matters, so a file imported whole or in chunks stores the same
    pat = canon.groupby("patient", sort=False)[list(PATIENT_FIELDS)].first().reset_index()
    return list(zip(col(pat, "patient"), col(pat, "species"), blank_to_none(col(pat, "breed")),
                    blank_to_none(col(pat, "sex")), col(pat, "birth_date", "time")))


def _same_time_or_conflict(old, new) -> str:
    import pandas as pd

    return "" if pd.Timestamp(old) == pd.Timestamp(new) else "conflict"


def _plan_patients(conn, canon, created: int | None = None) -> _Part:
    """The patients part of the plan; a stored patient whose pk is above ``created`` was made
    by this import (an earlier chunk): a field it fills is not a change for `replaced`."""
    rows = _patient_rows(canon)
    conn.execute("CREATE TEMP TABLE _tmp_patients (id TEXT PRIMARY KEY, species TEXT, "
                 "breed TEXT, sex TEXT, birth_date TEXT)")
    conn.executemany("INSERT INTO _tmp_patients VALUES (?, ?, ?, ?, ?)", rows)
    stored = {r[1]: r for r in conn.execute(
        "SELECT p.pk, p.id, p.species, p.breed, p.sex, p.birth_date "
        "FROM _tmp_patients t JOIN patients p ON p.id = t.id")}
    part = _Part([r for r in rows if r[0] not in stored], [], [], [])
    for row in rows:
        s = stored.get(row[0])
        if s is None:
            continue
        for j, f in enumerate(PATIENT_FIELDS, start=1):
            new, old = row[j], s[j + 1]
            if f == "birth_date" and old is not None and new is not None:
                kind = _same_time_or_conflict(old, new)
            else:
                kind = differs(old, new)
            if kind == "conflict":
                part.conflicts.append(Conflict("patient", row[0], None, None, None, f, old, new))
            if kind:
                part.updates.append((f, new, s[0]))
                if created is None or s[0] <= created:
                    part.changes.append((s[0], "patient", None, None, None, f, old, new))
    return part


def _specimen_rows(canon) -> list[tuple]:
    spec = canon.drop_duplicates(["patient", "specimen"])
    # the first non-missing value of each specimen-level field (missing rows say nothing)
    spec_vals = canon.groupby(["patient", "specimen"], sort=False)[
        [f for f in ("state", "fasted", *HIL_INDICES) if f in canon]].first()
    spec = spec[["patient", "specimen", "collected_at"]].merge(
        spec_vals.reset_index(), on=["patient", "specimen"], how="left")
    if "laboratory" in canon:
        lab = canon.groupby(["patient", "specimen"], sort=False)["laboratory"].first()
        spec = spec.merge(lab.reset_index(), on=["patient", "specimen"], how="left")
    else:
        spec["laboratory"] = None
    return list(zip(
        col(spec, "patient"), col(spec, "specimen"), col(spec, "collected_at", "time"),
        [s or "" for s in col(spec, "state")], col(spec, "fasted", "bool"),
        col(spec, "haemolysis", "float"), col(spec, "lipaemia", "float"),
        col(spec, "icterus", "float"), blank_to_none(col(spec, "laboratory"))))


def _plan_specimens(conn, canon, created: int | None = None) -> tuple[_Part, dict]:
    """The specimens part of the plan, and the stored specimens the input names:
    (patient id, specimen id) -> (pk, patient id, id, collected_at, state, fasted, H, L, I,
    laboratory, patient pk). ``created`` as for :func:`_plan_patients`."""
    rows = _specimen_rows(canon)
    conn.execute("CREATE TEMP TABLE _tmp_specimens (patient TEXT, id TEXT, collected_at TEXT, "
                 "state TEXT, fasted INTEGER, haemolysis REAL, lipaemia REAL, icterus REAL, "
                 "laboratory TEXT, PRIMARY KEY (patient, id))")
    conn.executemany("INSERT INTO _tmp_specimens VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)", rows)
    stored = {(r[1], r[2]): r for r in conn.execute(
        "SELECT s.pk, p.id, s.id, s.collected_at, s.state, s.fasted, s.haemolysis, "
        "s.lipaemia, s.icterus, s.laboratory, p.pk "
        "FROM _tmp_specimens t JOIN patients p ON p.id = t.patient "
        "JOIN specimens s ON s.patient = p.pk AND s.id = t.id")}
    part = _Part([r for r in rows if (r[0], r[1]) not in stored], [], [], [])
    for row in rows:
        s = stored.get((row[0], row[1]))
        if s is None:
            continue
        for j, f in enumerate(SPECIMEN_FIELDS, start=2):
            new, old = row[j], s[j + 1]
            if f == "collected_at":
                kind = _same_time_or_conflict(old, new)
            else:
                kind = differs(old, new, numeric=f in HIL_INDICES, blank_is_missing=f == "state")
            if kind == "conflict":
                part.conflicts.append(Conflict("specimen", row[0], row[1], None, None, f, old, new))
            if kind:
                part.updates.append((f, new, s[0]))
                if f == "state" and old == "":
                    old = None  # a blank state is an empty field: logged as NULL
                if created is None or s[0] <= created:
                    part.changes.append((s[10], "specimen", row[1], None, None, f, old, new))
    return part, stored


def _stage_results(conn, rows, stored_spec: dict) -> None:
    """The input's results on stored specimens, in a TEMP table (``i`` = position in ``rows``)."""
    spk = [stored_spec[(a, b)][0] for a, b in
           zip(rows["patient"].astype(str), rows["specimen"].astype(str))]
    conn.execute("CREATE TEMP TABLE _tmp_results (i INTEGER PRIMARY KEY, specimen INTEGER, "
                 "analyte TEXT, replicate INTEGER, value REAL, unit TEXT, censor TEXT, "
                 "method TEXT)")
    conn.executemany("INSERT INTO _tmp_results VALUES (?, ?, ?, ?, ?, ?, ?, ?)", zip(
        range(len(rows)), spk, col(rows, "analyte"), col(rows, "replicate", "int"),
        col(rows, "value", "float"), col(rows, "unit"), col(rows, "censor"),
        blank_to_none(col(rows, "method"))))


_DIFFERING_RESULTS = (
    "SELECT t.i, r.pk, r.value, r.unit, r.censor, r.method, "
    "t.value, t.unit, t.censor, t.method, r.reported_value, r.reported_unit "
    "FROM _tmp_results t JOIN results r ON r.specimen = t.specimen "
    "AND r.analyte = t.analyte AND r.replicate = t.replicate "
    "WHERE abs(r.value - t.value) > ? * max(abs(r.value), abs(t.value)) "
    "OR r.unit IS NOT t.unit OR r.censor IS NOT coalesce(t.censor, '') "
    "OR (t.method IS NOT NULL AND r.method IS NOT t.method)")
_UNMATCHED_RESULTS = (
    "SELECT t.i FROM _tmp_results t WHERE NOT EXISTS (SELECT 1 FROM results r "
    "WHERE r.specimen = t.specimen AND r.analyte = t.analyte "
    "AND r.replicate = t.replicate) ORDER BY t.i")


def _result_change(stored: tuple) -> tuple[list, str]:
    """Changed fields ``(field, stored, new)`` of one stored result (``stored``: its stored
    value, unit, censor, method, then the new ones), and how its method changes ('', 'fill' or
    'conflict')."""
    ov, ou, oc, om, nv, nu, nc, nm = stored
    diffs = []
    if not same(ov, nv, numeric=True):
        diffs.append(("value", ov, nv))
    if oc != (nc or ""):
        diffs.append(("censor", oc, nc))
    if ou != nu:
        diffs.append(("unit", ou, nu))
    method = differs(om, nm)
    if method == "conflict":
        diffs.append(("method", om, nm))
    return diffs, method


def _result_updates(conn, rows) -> tuple[list, list]:
    """Stored results the input changes (:class:`ResultUpdate`) and the conflicts among them."""
    updates, conflicts = [], []
    for i, rpk, *stored, orv, oru in conn.execute(_DIFFERING_RESULTS, (VALUE_RTOL,)).fetchall():
        row = rows.iloc[i]
        diffs, method = _result_change(tuple(stored))
        if not diffs:
            if method == "fill":
                updates.append(ResultUpdate(rpk, row, (("method", stored[3], stored[7]),),
                                            False, orv, oru))
            continue
        for f, o, nw in diffs:
            conflicts.append(Conflict("result", str(row["patient"]), str(row["specimen"]),
                                      str(row["analyte"]), int(row["replicate"]), f,
                                      f"{orv} {oru}" if f == "value" else o,
                                      f"{row['reported_value']} {row['reported_unit']}"
                                      if f == "value" else nw))
        updates.append(ResultUpdate(rpk, row, tuple(diffs), True, orv, oru))
    return updates, conflicts


def _plan_results(conn, canon, stored_spec: dict):
    """``(rows to insert, ResultUpdate list, conflicts)`` for the input's results: every row on
    a new specimen is new; a row on a stored specimen is new, the same (skipped) or changed."""
    import numpy as np
    import pandas as pd

    keys = zip(canon["patient"].astype(str).to_numpy(), canon["specimen"].astype(str).to_numpy())
    in_old = np.fromiter((k in stored_spec for k in keys), dtype=bool, count=len(canon))
    new_rows = canon[~in_old]
    old_part = canon[in_old]
    if not len(old_part):
        return new_rows, [], []
    _stage_results(conn, old_part, stored_spec)
    updates, conflicts = _result_updates(conn, old_part)
    unmatched = [r[0] for r in conn.execute(_UNMATCHED_RESULTS)]
    if unmatched:
        new_rows = pd.concat([new_rows, old_part.iloc[unmatched]])
    return new_rows, updates, conflicts


def plan(conn, canon, created: tuple[int, int] | None = None) -> ImportPlan:
    """What importing the canonical frame ``canon`` would do, compared with the stored rows.
    Reads the database and writes only TEMP tables (drop them with :func:`drop_staging`).
    ``created``: (patient pk, specimen pk) above which stored rows were made by this import
    (a chunked import's earlier chunks): the fields they fill are not logged in `replaced`."""
    drop_staging(conn)
    created = created or (None, None)
    patients = _plan_patients(conn, canon, created[0])
    specimens, stored_spec = _plan_specimens(conn, canon, created[1])
    new_rows, updates, result_conflicts = _plan_results(conn, canon, stored_spec)
    return ImportPlan(
        n_rows=len(canon), new_patients=tuple(patients.new),
        patient_updates=tuple(patients.updates), new_specimens=tuple(specimens.new),
        specimen_updates=tuple(specimens.updates), new_results=new_rows,
        result_updates=tuple(updates), changes=tuple(patients.changes + specimens.changes),
        conflicts=tuple(patients.conflicts + specimens.conflicts + result_conflicts))


def drop_staging(conn) -> None:
    """Remove the TEMP tables a plan staged its input in."""
    for t in _STAGING:
        conn.execute(f"DROP TABLE IF EXISTS temp.{t}")


# ---------------------------------------------------------------------------------------------
# stage 3: apply
# ---------------------------------------------------------------------------------------------
def _write_patients(conn, p: ImportPlan) -> dict:
    """Insert new patients, update changed ones; patient id -> pk for every input patient."""
    conn.executemany("INSERT INTO patients (id, species, breed, sex, birth_date) "
                     "VALUES (?, ?, ?, ?, ?)", p.new_patients)
    for f, v, pk in p.patient_updates:
        conn.execute(f"UPDATE patients SET {f} = ? WHERE pk = ?", (v, pk))
    return dict(conn.execute("SELECT t.id, p.pk FROM _tmp_patients t "
                             "JOIN patients p ON p.id = t.id").fetchall())


def _write_specimens(conn, p: ImportPlan, pat_pk: dict) -> dict:
    """Insert new specimens, update changed ones; (patient id, id) -> pk for every input
    specimen."""
    conn.executemany(
        "INSERT INTO specimens (patient, id, collected_at, state, fasted, haemolysis, "
        "lipaemia, icterus, laboratory) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
        [(pat_pk[r[0]],) + r[1:] for r in p.new_specimens])
    for f, v, pk in p.specimen_updates:
        conn.execute(f"UPDATE specimens SET {f} = ? WHERE pk = ?",
                     ("" if (f == "state" and v is None) else v, pk))
    return {(a, b): pk for a, b, pk in conn.execute(
        "SELECT t.patient, t.id, s.pk FROM _tmp_specimens t JOIN patients p "
        "ON p.id = t.patient JOIN specimens s ON s.patient = p.pk AND s.id = t.id")}


def _insert_results(conn, rows, spec_pk: dict, import_id: int, source: str, result_rows) -> None:
    """Insert the new results (``result_rows`` wraps the iterator of row tuples)."""
    import pandas as pd

    n = len(rows)
    if not n:
        return
    keys = pd.DataFrame([(a, b, pk) for (a, b), pk in spec_pk.items()],
                        columns=["patient", "specimen", "_spk"])
    left = pd.DataFrame({"patient": rows["patient"].astype(str).to_numpy(),
                         "specimen": rows["specimen"].astype(str).to_numpy()})
    spks = left.merge(keys, on=["patient", "specimen"], how="left", sort=False)[
        "_spk"].astype("int64").tolist()
    tuples = zip(spks, col(rows, "analyte"), col(rows, "reported_value"),
                 col(rows, "reported_unit"), col(rows, "value", "float"), col(rows, "unit"),
                 [x or "" for x in col(rows, "censor")], col(rows, "replicate", "int"),
                 blank_to_none(col(rows, "method")), [import_id] * n,
                 col(rows, "source_row", "int"),
                 [None if f == source else f for f in col(rows, "source_file")])
    conn.executemany(
        "INSERT INTO results (specimen, analyte, reported_value, reported_unit, value, "
        "unit, censor, replicate, method, import, source_row, source_file) "
        "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)", result_rows(tuples))


def _update_results(conn, p: ImportPlan, pat_pk: dict, import_id: int, source: str) -> list:
    """Write the changed results; the rows for `replaced` they give."""
    changes = []
    for u in p.result_updates:
        row = u.row
        ppk = pat_pk[str(row["patient"])]
        where = (ppk, "result", str(row["specimen"]), str(row["analyte"]), int(row["replicate"]))
        if not u.replaces:  # method filled on an otherwise identical row
            conn.execute("UPDATE results SET method = ? WHERE pk = ?",
                         (py(row["method"]) or None, u.pk))
            changes.append(where + ("method", None, py(row["method"])))
            continue
        source_file = py(row["source_file"])
        conn.execute("UPDATE results SET reported_value = ?, reported_unit = ?, value = ?, "
                     "unit = ?, censor = ?, method = coalesce(?, method), import = ?, "
                     "source_row = ?, source_file = ? WHERE pk = ?",
                     (str(row["reported_value"]), str(row["reported_unit"]),
                      float(row["value"]), str(row["unit"]), str(row["censor"] or ""),
                      py(row["method"]) or None, import_id, py(row["source_row"]),
                      None if source_file == source else source_file, u.pk))
        for f, o, nw in u.diffs:
            if f == "value":
                o = f"{u.old_reported_value} {u.old_reported_unit} (= {o!r} {row['unit']})"
                nw = f"{row['reported_value']} {row['reported_unit']} (= {nw!r} {row['unit']})"
            changes.append(where + (f, o, nw))
    return changes


def _write_log(conn, p: ImportPlan, import_id: int, changes: list, pat_pk: dict,
               owners: dict) -> None:
    """The `replaced` rows, the import's patient links, owners and the import's counts."""
    conn.executemany(
        "INSERT INTO replaced (import, patient, entity, specimen, analyte, replicate, field, "
        "old_value, new_value) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
        [(import_id, ppk, ent, sp, an, rep, f, None if o is None else str(o),
          None if nw is None else str(nw)) for ppk, ent, sp, an, rep, f, o, nw in changes])
    conn.executemany("INSERT OR IGNORE INTO import_patients (import, patient) VALUES (?, ?)",
                     [(import_id, pk) for pk in pat_pk.values()])
    owner_rows = [(pat_pk[str(pt)], str(o)) for pt, o in owners.items() if str(pt) in pat_pk]
    conn.executemany("INSERT INTO owners (patient, owner) VALUES (?, ?) ON CONFLICT (patient) "
                     "DO UPDATE SET owner = excluded.owner", owner_rows)
    conn.execute("UPDATE import_log SET rows_added = ?, rows_skipped = ?, rows_replaced = ? "
                 "WHERE id = ?", (p.rows_added, p.rows_skipped, p.rows_replaced, import_id))


def apply(conn, p: ImportPlan, source: str, sha256: str, owners: dict | None = None, *,
          result_rows=iter, import_id: int | None = None) -> ImportSummary:
    """Write ``p`` (made by :func:`plan` in this transaction, its TEMP tables still there):
    the import log entry, new and changed patients, specimens and results, the `replaced` log,
    the import's patient links and owners. Returns the :class:`ImportSummary`. With
    ``import_id`` (a chunk of :func:`import_chunks`) the log entry is that import's."""
    if import_id is None:
        import_id = conn.execute(
            "INSERT INTO import_log (file, sha256, imported_at) VALUES (?, ?, ?)",
            (source, sha256, now_utc())).lastrowid
    pat_pk = _write_patients(conn, p)
    spec_pk = _write_specimens(conn, p, pat_pk)
    _insert_results(conn, p.new_results, spec_pk, import_id, source, result_rows)
    changes = list(p.changes) + _update_results(conn, p, pat_pk, import_id, source)
    _write_log(conn, p, import_id, changes, pat_pk, owners or {})
    return p.summary(source, import_id)


# ---------------------------------------------------------------------------------------------
# a large file, chunk by chunk, in one transaction
# ---------------------------------------------------------------------------------------------
#: What one chunked import remembers of the file across its chunks (TEMP tables): per patient
#: and per specimen the first non-missing value of each field the input's checks
#: (:func:`bayesbase.store.checks.internal_problems`) allow once.
_SEEN = (
    ("_tmp_patients", "_imp_patients", ("id",), PATIENT_FIELDS,
     "id TEXT PRIMARY KEY, species TEXT, breed TEXT, sex TEXT, birth_date TEXT"),
    ("_tmp_specimens", "_imp_specimens", ("patient", "id"),
     ("collected_at", "state", "fasted", *HIL_INDICES),
     "patient TEXT, id TEXT, collected_at TEXT, state TEXT, fasted INTEGER, haemolysis REAL, "
     "lipaemia REAL, icterus REAL, PRIMARY KEY (patient, id)"),
)


def _across_problem(canon, source: str, key: tuple, field: str, old, new) -> Problem:
    """A patient or specimen of this chunk whose ``field`` differs from an earlier chunk's."""
    mask = canon["patient"].astype(str).to_numpy() == key[0]
    if len(key) == 2:
        mask &= canon["specimen"].astype(str).to_numpy() == key[1]
    sub = canon.loc[mask]
    given = sub.loc[sub[field].notna(), "source_row"] if "source_row" in sub else ()
    row = int(given.iloc[0]) if len(given) and not is_missing(given.iloc[0]) else None
    label = f"patient {key[0]}" + (f", specimen {key[1]}" if len(key) == 2 else "")
    return Problem(source, row, field,
                   f"{label} has more than one {field} in this file: {old!r} in an earlier row "
                   f"and {new!r}", "one value per patient (specimen); correct the rows")


def _across_chunks(conn, canon, source: str) -> list[Problem]:
    """Compare the chunk staged by :func:`plan` with the earlier chunks of the file (what
    ``internal_problems`` checks within one frame), then remember its values."""
    problems = []
    for tmp, seen, keys, fields, _ in _SEEN:
        on = " AND ".join(f"s.{k} = t.{k}" for k in keys)
        differ = " OR ".join(f"(t.{f} IS NOT NULL AND s.{f} IS NOT NULL AND t.{f} <> s.{f})"
                             for f in fields)
        sel = ", ".join([f"t.{k}" for k in keys] + [f"t.{f}, s.{f}" for f in fields])
        for r in conn.execute(f"SELECT {sel} FROM {tmp} t JOIN {seen} s ON {on} "
                              f"WHERE {differ} LIMIT 200").fetchall():
            key, vals = r[:len(keys)], r[len(keys):]
            for j, f in enumerate(fields):
                new, old = vals[2 * j], vals[2 * j + 1]
                if new is not None and old is not None and new != old:
                    problems.append(_across_problem(canon, source, key, f, old, new))
        cols = ", ".join((*keys, *fields))
        fill = ", ".join(f"{f} = coalesce({seen}.{f}, excluded.{f})" for f in fields)
        conn.execute(f"INSERT INTO {seen} ({cols}) SELECT {cols} FROM {tmp} WHERE true "
                     f"ON CONFLICT ({', '.join(keys)}) DO UPDATE SET {fill}")
    return problems


def _write_owners(conn, owners: dict) -> None:
    """Owners of this chunk's rows (patient id -> owner, last one wins as in a whole-file
    import), for patients of this import only."""
    conn.executemany(
        "INSERT INTO owners (patient, owner) SELECT p.pk, ? FROM _imp_patients i "
        "JOIN patients p ON p.id = i.id WHERE i.id = ? "
        "ON CONFLICT (patient) DO UPDATE SET owner = excluded.owner",
        [(str(o), str(pt)) for pt, o in owners.items()])


class _Chunked:
    """State of one chunked import: totals, conflicts, problems, the import log id."""

    def __init__(self, conn, source: str, sha256: str, result_rows):
        self.conn, self.source, self.sha256, self.result_rows = conn, source, sha256, result_rows
        self.totals = [0, 0, 0, 0, 0]  # added, skipped, replaced, patients, specimens
        self.conflicts: list = []
        self.problems: list = []
        self.import_id = None
        self.created = tuple(conn.execute(f"SELECT coalesce(max(pk), 0) FROM {t}").fetchone()[0]
                             for t in ("patients", "specimens"))

    def chunk(self, chunk) -> None:
        frame, owners = chunk if isinstance(chunk, tuple) else (chunk, {})
        try:
            canon, _ = prepare(frame, self.source, {})
        except ValidationError as exc:
            self.problems += exc.problems
            return
        if self.problems:
            return  # keep checking the rest of the file; nothing more is planned
        conn = self.conn
        p = plan(conn, canon, self.created)
        self.problems += _across_chunks(conn, canon, self.source)
        if self.problems:
            return
        self.conflicts += p.conflicts
        s = apply(conn, p, self.source, self.sha256, result_rows=self.result_rows,
                  import_id=self.import_id)
        _write_owners(conn, owners or {})
        self.import_id = s.import_id
        for k, v in enumerate((s.rows_added, s.rows_skipped, s.rows_replaced,
                               s.patients_added, s.specimens_added)):
            self.totals[k] += v
        drop_staging(conn)

    def finish(self, failed: ValidationError | None) -> None:
        """Raise the problems of the whole file (the reader's and the import's) together."""
        problems = (list(failed.problems) if failed else []) + self.problems
        if problems:
            problems.sort(key=lambda q: -1 if q.row is None else q.row)
            raise ValidationError(problems)
        if self.import_id is not None:
            self.conn.execute("UPDATE import_log SET rows_added = ?, rows_skipped = ?, "
                              "rows_replaced = ? WHERE id = ?", (*self.totals[:3], self.import_id))

    def summary(self, dry_run: bool) -> ImportSummary:
        t = self.totals
        return ImportSummary(t[0], t[1], t[2], tuple(self.conflicts),
                             None if dry_run else self.import_id, self.source, t[3], t[4],
                             dry_run)


def import_chunks(conn, chunks, source: str, sha256: str, *, replace: bool = False,
                  dry_run: bool = False, result_rows=iter) -> ImportSummary:
    """Import a large results file chunk by chunk in ONE ``BEGIN IMMEDIATE`` transaction with
    one import log entry; memory is bounded by the chunk. ``chunks`` gives canonical (or raw)
    frames, or ``(frame, owners)`` pairs (patient id -> owner, as :func:`owner_map`), e.g.
    from :func:`bayesbase.io.iter_results`, which checks the rows across chunks; what one
    patient or specimen must carry once is checked here across chunks, so the store ends as a
    whole-file import of the same rows leaves it (``replaced`` holds only changes to rows
    stored before this import). All-or-nothing: a problem in any chunk (raised together at
    the end as one :class:`~bayesbase.errors.ValidationError`) or a conflict with a stored
    value (:class:`ImportConflict`, every one listed, unless ``replace``) rolls every chunk
    back. With ``dry_run`` the chunks are written and then rolled back (the write lock is held
    meanwhile: each chunk is planned against the rows the earlier chunks wrote to the store's
    own tables, and in WAL mode a deferred ``BEGIN`` would take the lock at the first write
    anyway, failing at once with SQLITE_BUSY_SNAPSHOT if another import committed after its
    snapshot): the summary says what the import would do and lists the conflicts."""
    saved = conn.execute("PRAGMA temp_store").fetchone()[0]
    conn.execute("PRAGMA temp_store = FILE")  # what is staged across chunks stays on disk
    try:
        with write_transaction(conn, cleanup=lambda: _drop_chunk_tables(conn)):
            for _, seen, _, _, ddl in _SEEN:
                conn.execute(f"CREATE TEMP TABLE {seen} ({ddl})")
            state = _Chunked(conn, source, sha256, result_rows)
            failed = None
            try:
                for chunk in chunks:
                    state.chunk(chunk)
            except ValidationError as exc:
                failed = exc
            state.finish(failed)
            if dry_run or (state.conflicts and not replace):
                conn.execute("ROLLBACK")
                if not dry_run:
                    raise ImportConflict(source, state.conflicts)
    finally:
        conn.execute(f"PRAGMA temp_store = {int(saved)}")
    return state.summary(dry_run)


def _drop_chunk_tables(conn) -> None:
    """Remove the staging tables and the across-chunk ``seen`` tables of :func:`import_chunks`."""
    drop_staging(conn)
    for _, seen, *_ in _SEEN:
        conn.execute(f"DROP TABLE IF EXISTS temp.{seen}")


def import_file_chunked(conn, path, chunksize: int, *, replace: bool = False,
                        dry_run: bool = False, result_rows=iter) -> ImportSummary:
    """Import a text results table (CSV/TSV/TXT) a chunk of ``chunksize`` rows at a time
    (:func:`bayesbase.io.iter_results`, then :func:`import_chunks`): the store ends as
    :meth:`bayesbase.store.Store.import_file` leaves it, ``owner`` column included."""
    from pathlib import Path

    from ..io.chunked import iter_results

    path = Path(path)
    sha = file_sha256(path)
    chunks = iter_results(path, chunksize=chunksize, keep=("owner",))
    pairs = ((frame, (owner_map(kept) or {}) if kept is not None else {})
             for frame, kept in chunks.with_kept())
    return import_chunks(conn, pairs, path.name, sha, replace=replace, dry_run=dry_run,
                         result_rows=result_rows)
