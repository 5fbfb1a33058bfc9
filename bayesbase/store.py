"""Patient results store: an embedded SQLite database (standard library ``sqlite3``).

Layer 4: imports only ``bayesbase.constants``, ``errors``, ``units`` and ``data`` (and
``bayesbase.fhir``, its sibling in the same layer).

Where the database lives
------------------------
Every function and :class:`Store` take a ``db`` path. Without one, :func:`default_db_path` is
used: the ``BAYESBASE_DB`` environment variable if set; else ``$XDG_DATA_HOME/bayesbase/
results.sqlite`` when ``XDG_DATA_HOME`` is set; else, on macOS and Windows, the per-user data
directory from ``platformdirs`` when it is installed; else ``~/.local/share/bayesbase/
results.sqlite``.

Tables (schema version 2)
-------------------------
``patients``   one row per animal: ``id`` (as given), species, breed, sex, birth_date.
``owners``     owner identity, kept out of the analytical tables: one row per patient, filled
               only when an imported file has an ``owner`` column. Owners are never exported,
               never returned by :meth:`Store.results`, and removed by :meth:`Store.forget`.
``specimens``  one row per blood draw: patient, ``id`` (unique within its patient),
               collected_at, state, fasted, haemolysis, lipaemia, icterus, laboratory.
``results``    one row per measured value: specimen, analyte, reported_value, reported_unit,
               value (canonical unit), unit, censor, replicate, method, the import that stored
               it and its source row (and source file, only when it differs from the import's
               file); ``UNIQUE(specimen, analyte, replicate)``.
               ``method`` lives here rather than on ``specimens`` because the canonical frame
               carries it per result (two analysers may measure one specimen).
``import_log`` one row per import: file (its name; blanked when a patient it touched is
               forgotten), sha256, imported_at (UTC), rows_added, rows_skipped,
               rows_replaced. ``import_patients`` links an import to the patients it touched.
``replaced``   every stored value an import changed: entity (patient / specimen / result),
               its key, the field, old and new values, and the import id. A field that was
               empty and is filled by a later import is recorded here too (old value NULL).
``meta``       key/value pairs: the per-store random salt used for pseudonyms.
``schema_version`` the version reached by the forward migrations in :data:`MIGRATIONS`
               (version 2 rewrites texts of missing values left by earlier versions to NULL).

A missing optional attribute (breed, sex, birth date, method, fasting, sample-quality index,
laboratory) is stored as SQL NULL, never as the text of a missing value ('NaT', 'nan', ...);
a blank state is stored as ''.

Indexes: ``specimens(patient, collected_at)``; ``results(specimen, analyte, replicate)`` (the
UNIQUE index, whose leading column serves every lookup by specimen, so no second index on
``results(specimen)`` is kept).

Import rules
------------
* One transaction per import (``BEGIN IMMEDIATE`` ... ``COMMIT``): every row is stored or none.
* Input goes through :func:`bayesbase.data.validate` (unless it already is a canonical frame):
  a :class:`~bayesbase.errors.ValidationError` lists every bad row and nothing is stored. The
  store itself refuses a value (or a given sample-quality index) that is not a finite number,
  naming the file, row and column, whatever way the frame arrived.
* A row already stored with the same canonical content is skipped (re-importing a file adds 0
  rows: ``ImportSummary.nothing_new``).
* A conflict (same specimen + analyte + replicate with a different canonical value, censoring,
  unit or method; a patient whose species, breed, sex or birth date differs from the stored one;
  a specimen whose collection time, state, fasting or sample-quality index differs) raises
  :class:`ImportConflict` (a :class:`~bayesbase.errors.StoreError`) listing every conflict,
  unless ``replace=True``: then the new values overwrite the stored ones and the old and new
  values go to ``replaced``. An empty field in the new input never conflicts (the stored value
  is kept; missing compares equal to missing); an empty stored field is filled from the new
  input.

Concurrency
-----------
WAL journal (readers are not blocked by a writer), ``PRAGMA busy_timeout`` (30 s by default) so a
second writer waits for the first instead of failing, ``synchronous=FULL`` (a committed import
survives a crash of the process or of the machine), foreign keys on. Opening a store is bounded
by the busy timeout as a whole: switching a new file to WAL does not call SQLite's busy handler,
so it is retried on SQLITE_BUSY until the timeout; the schema is created and migrated in one
``BEGIN IMMEDIATE`` transaction (concurrent first imports create it once); an up-to-date store
is only read when opened, so a reader never waits for a writer.

Pseudonyms
----------
Exports are pseudonymised by default: a patient id becomes ``P-`` + the first 10 hex digits of
HMAC-SHA256(salt, "patient:" + id), a specimen id ``S-`` + 10 hex digits of
HMAC-SHA256(salt, "specimen:" + patient + "|" + specimen). The salt is 32 random bytes made when
the store is created and kept in ``meta``; the same store always gives the same pseudonym, another
store a different one, and the pseudonym cannot be reversed without the salt. Owner data are never
exported; ``source_file`` / ``source_row`` are not exported; dates (collection, birth) are kept
because the analysis needs them.

Exports and forgetting
----------------------
CSV exports neutralise spreadsheet formulas (:func:`neutralise_formulas`, after the OWASP "CSV
Injection" guidance): a text cell that begins with ``=``, ``+``, ``-``, ``@``, tab, carriage
return or NUL gets a leading single quote; numbers stay numbers. :meth:`Store.forget` deletes
with ``PRAGMA secure_delete = ON`` (set on every connection: deleted content is overwritten with
zeros), blanks the file name of every import that touched the patient (a name may carry the id)
and checkpoints and truncates the WAL, so the patient's ids and values are left in no byte of
the database files.
"""
from __future__ import annotations

import hashlib
import hmac
import math
import os
import re
import sqlite3
import sys
import time
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

from .errors import Problem, StoreError, ValidationError

__all__ = [
    "CANONICAL_COLUMNS",
    "MIGRATIONS",
    "SCHEMA_VERSION",
    "Conflict",
    "ImportConflict",
    "ImportSummary",
    "Removed",
    "Store",
    "default_db_path",
    "patient_pseudonym",
    "specimen_pseudonym",
    "pseudonymise_frame",
    "neutralise_formulas",
    "FORMULA_PREFIXES",
    "MISSING_TEXTS",
    "bench_import",
    "bench_history",
]

#: Canonical results frame columns in order (DEVELOPERS.md, "Canonical results frame").
CANONICAL_COLUMNS = (
    "patient", "species", "breed", "sex", "birth_date", "specimen", "collected_at", "analyte",
    "value", "unit", "reported_value", "reported_unit", "censor", "method", "replicate",
    "fasted", "haemolysis", "lipaemia", "icterus", "state", "source_file", "source_row",
)
_SORT = ["patient", "collected_at", "specimen", "analyte", "replicate"]
_PATIENT_FIELDS = ("species", "breed", "sex", "birth_date")
_SPECIMEN_FIELDS = ("collected_at", "state", "fasted", "haemolysis", "lipaemia", "icterus",
                    "laboratory")
_RESULT_FIELDS = ("value", "censor", "unit", "method")
_HIL = ("haemolysis", "lipaemia", "icterus")
#: Relative tolerance under which two canonical values are the same value (float round-off of a
#: unit conversion; modelling choice of this project).
VALUE_RTOL = 1e-9
DEFAULT_TIMEOUT_S = 30.0

#: Texts that pandas / Python print for a missing value; never stored (schema version 2
#: rewrites them to NULL in stores written by earlier versions).
MISSING_TEXTS = ("NaT", "nan", "NaN", "None", "<NA>")
_MISSING_TEXTS_SQL = ", ".join(f"'{t}'" for t in MISSING_TEXTS)
#: First characters that make a spreadsheet program read a text cell as a formula: the OWASP
#: "CSV Injection" guidance (common practice) lists =, +, -, @, tab and carriage return; OWASP
#: ASVS 5.0 (requirement 1.2.10) adds NUL. Exported text cells starting with one of them get a
#: leading single quote (:func:`neutralise_formulas`).
FORMULA_PREFIXES = ("=", "+", "-", "@", "\t", "\r", "\0")
_PLAIN_NUMBER = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?")

# ---------------------------------------------------------------------------------------------
# schema: forward migrations, applied in order; never edit a released step, append a new one.
# ---------------------------------------------------------------------------------------------
MIGRATIONS: list[list[str]] = [
    [  # version 1
        """CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT NOT NULL)""",
        """INSERT INTO meta (key, value) VALUES ('pseudonym_salt', lower(hex(randomblob(32))))""",
        """CREATE TABLE patients (
            pk INTEGER PRIMARY KEY,
            id TEXT NOT NULL UNIQUE,
            species TEXT NOT NULL,
            breed TEXT,
            sex TEXT,
            birth_date TEXT)""",
        """CREATE TABLE owners (
            patient INTEGER PRIMARY KEY REFERENCES patients(pk) ON DELETE CASCADE,
            owner TEXT NOT NULL)""",
        """CREATE TABLE specimens (
            pk INTEGER PRIMARY KEY,
            patient INTEGER NOT NULL REFERENCES patients(pk) ON DELETE CASCADE,
            id TEXT NOT NULL,
            collected_at TEXT NOT NULL,
            state TEXT NOT NULL DEFAULT '',
            fasted INTEGER,
            haemolysis REAL,
            lipaemia REAL,
            icterus REAL,
            laboratory TEXT,
            UNIQUE (patient, id))""",
        """CREATE INDEX specimens_patient_time ON specimens (patient, collected_at)""",
        """CREATE TABLE import_log (
            id INTEGER PRIMARY KEY,
            file TEXT NOT NULL,
            sha256 TEXT NOT NULL,
            imported_at TEXT NOT NULL,
            rows_added INTEGER NOT NULL DEFAULT 0,
            rows_skipped INTEGER NOT NULL DEFAULT 0,
            rows_replaced INTEGER NOT NULL DEFAULT 0)""",
        """CREATE TABLE import_patients (
            import INTEGER NOT NULL REFERENCES import_log(id) ON DELETE CASCADE,
            patient INTEGER NOT NULL REFERENCES patients(pk) ON DELETE CASCADE,
            PRIMARY KEY (import, patient)) WITHOUT ROWID""",
        """CREATE TABLE results (
            pk INTEGER PRIMARY KEY,
            specimen INTEGER NOT NULL REFERENCES specimens(pk) ON DELETE CASCADE,
            analyte TEXT NOT NULL,
            reported_value TEXT NOT NULL,
            reported_unit TEXT NOT NULL,
            value REAL NOT NULL,
            unit TEXT NOT NULL,
            censor TEXT NOT NULL DEFAULT '' CHECK (censor IN ('', 'left', 'right')),
            replicate INTEGER NOT NULL DEFAULT 1,
            method TEXT,
            import INTEGER REFERENCES import_log(id),
            source_row INTEGER,
            source_file TEXT,
            UNIQUE (specimen, analyte, replicate))""",
        """CREATE TABLE replaced (
            id INTEGER PRIMARY KEY,
            import INTEGER NOT NULL REFERENCES import_log(id),
            patient INTEGER REFERENCES patients(pk) ON DELETE CASCADE,
            entity TEXT NOT NULL,
            specimen TEXT,
            analyte TEXT,
            replicate INTEGER,
            field TEXT NOT NULL,
            old_value TEXT,
            new_value TEXT)""",
        """CREATE INDEX replaced_patient ON replaced (patient)""",
    ],
    [  # version 2: a missing value is SQL NULL. Earlier versions could store the text pandas
        # or Python print for a missing value ('NaT' for a missing birth date, ...), which then
        # never compared equal to itself; rewrite those texts (and '' in optional text fields).
        *(f"UPDATE {table} SET {col} = NULL WHERE {col} IN ({_MISSING_TEXTS_SQL}, '')"
          for table, col in (("patients", "breed"), ("patients", "sex"),
                             ("patients", "birth_date"), ("specimens", "laboratory"),
                             ("results", "method"), ("results", "source_file"))),
        *(f"UPDATE specimens SET {col} = NULL WHERE {col} IN ({_MISSING_TEXTS_SQL})"
          for col in ("fasted", "haemolysis", "lipaemia", "icterus")),
        f"UPDATE specimens SET state = '' WHERE state IN ({_MISSING_TEXTS_SQL})",
        f"UPDATE replaced SET old_value = NULL WHERE old_value IN ({_MISSING_TEXTS_SQL})",
        f"UPDATE replaced SET new_value = NULL WHERE new_value IN ({_MISSING_TEXTS_SQL})",
    ],
]
SCHEMA_VERSION = len(MIGRATIONS)


def default_db_path() -> Path:
    """Default database file (see the module docstring for the rule)."""
    env = os.environ.get("BAYESBASE_DB")
    if env:
        return Path(env).expanduser()
    xdg = os.environ.get("XDG_DATA_HOME")
    if xdg:
        return Path(xdg).expanduser() / "bayesbase" / "results.sqlite"
    if sys.platform == "darwin" or sys.platform.startswith("win"):
        try:
            import platformdirs
        except ImportError:
            pass
        else:
            return Path(platformdirs.user_data_dir("bayesbase", appauthor=False)) / "results.sqlite"
    return Path.home() / ".local" / "share" / "bayesbase" / "results.sqlite"


# ---------------------------------------------------------------------------------------------
# summaries and conflicts
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Conflict:
    """One stored value that an import would change."""

    kind: str  # "patient", "specimen" or "result"
    patient: str
    specimen: str | None
    analyte: str | None
    replicate: int | None
    field: str
    stored: object
    new: object

    def __str__(self) -> str:
        where = [f"patient {self.patient}"]
        if self.specimen is not None:
            where.append(f"specimen {self.specimen}")
        if self.analyte is not None:
            where.append(f"analyte {self.analyte}")
        if self.replicate is not None and self.replicate != 1:
            where.append(f"replicate {self.replicate}")
        return f"{', '.join(where)}: {self.field} stored {self.stored!r}, new {self.new!r}"


class ImportConflict(StoreError):
    """An import would overwrite stored values; ``conflicts`` lists every one."""

    def __init__(self, source: str, conflicts: list[Conflict]):
        self.source = source
        self.conflicts = list(conflicts)
        n = len(self.conflicts)
        head = "\n".join(f"  {c}" for c in self.conflicts[:50])
        more = f"\n  ... and {n - 50} more" if n > 50 else ""
        super().__init__(
            f"{source}: {n} value(s) differ from those already stored; nothing was imported "
            f"(import again with replace to overwrite them; old values are kept in the log):\n"
            f"{head}{more}")


@dataclass(frozen=True)
class ImportSummary:
    """What one import did. ``rows_added + rows_skipped + rows_replaced`` = rows in the input."""

    rows_added: int
    rows_skipped: int
    rows_replaced: int
    conflicts: tuple[Conflict, ...] = ()
    import_id: int | None = None
    source: str = ""
    patients_added: int = 0
    specimens_added: int = 0

    @property
    def nothing_new(self) -> bool:
        """True when the import changed nothing in the store."""
        return self.rows_added == 0 and self.rows_replaced == 0 and not self.conflicts


class Removed(int):
    """Total rows removed by :meth:`Store.forget`; ``by_table`` gives the count per table;
    ``wal_cleared`` tells whether the write-ahead log was checkpointed and truncated."""

    by_table: dict[str, int]
    wal_cleared: bool

    def __new__(cls, by_table: dict[str, int]):
        obj = super().__new__(cls, sum(by_table.values()))
        obj.by_table = dict(by_table)
        obj.wal_cleared = False
        return obj


# ---------------------------------------------------------------------------------------------
# small conversions between pandas and SQLite
# ---------------------------------------------------------------------------------------------
def _is_missing(v) -> bool:
    if v is None:
        return True
    try:
        import pandas as pd
        return bool(pd.isna(v))
    except (TypeError, ValueError):
        return False


def _py(v):
    """A value SQLite can bind (None for missing)."""
    if _is_missing(v):
        return None
    if hasattr(v, "item") and not isinstance(v, (str, bytes)):
        try:
            return v.item()
        except (AttributeError, ValueError):
            pass
    return v


def _col(frame, name, kind="str"):
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
        return [None if m else _iso(x) for x, m in zip(arr, missing)]
    if kind == "int":
        return [None if m else int(x) for x, m in zip(arr, missing)]
    if kind == "bool":
        return [None if m else int(bool(x)) for x, m in zip(arr, missing)]
    return [None if m else (x if type(x) is str else str(x)) for x, m in zip(arr, missing)]


def _blank_to_none(values: list) -> list:
    """An empty optional text ('' as a file says "nothing") stored as NULL."""
    return [None if v == "" else v for v in values]


def _iso(ts) -> str:
    import pandas as pd
    ts = pd.Timestamp(ts)
    return ts.isoformat()


def _same(a, b, *, numeric=False) -> bool:
    if numeric:
        a, b = float(a), float(b)
        return a == b or math.isclose(a, b, rel_tol=VALUE_RTOL, abs_tol=0.0)
    return a == b


def _differs(stored, new, *, numeric=False, blank_is_missing=False) -> str:
    """'' when nothing changes, 'fill' when an empty stored field gets a value, 'conflict'."""
    if blank_is_missing:
        stored = None if stored == "" else stored
        new = None if new == "" else new
    if _is_missing(new):
        return ""
    if _is_missing(stored):
        return "fill"
    return "" if _same(stored, new, numeric=numeric) else "conflict"


def file_sha256(path) -> str:
    """SHA-256 of a file's bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def frame_sha256(frame) -> str:
    """SHA-256 of a frame's CSV text (for frames imported without a file)."""
    return hashlib.sha256(frame.to_csv(index=False).encode("utf-8")).hexdigest()


# ---------------------------------------------------------------------------------------------
# pseudonyms
# ---------------------------------------------------------------------------------------------
def patient_pseudonym(salt: bytes, patient: str) -> str:
    """``P-`` + first 10 hex digits of HMAC-SHA256(salt, "patient:" + id)."""
    d = hmac.new(salt, f"patient:{patient}".encode(), hashlib.sha256).hexdigest()
    return "P-" + d[:10]


def specimen_pseudonym(salt: bytes, patient: str, specimen: str) -> str:
    """``S-`` + first 10 hex digits of HMAC-SHA256(salt, "specimen:" + patient + "|" + id)."""
    msg = f"specimen:{patient}|{specimen}".encode()
    return "S-" + hmac.new(salt, msg, hashlib.sha256).hexdigest()[:10]


def pseudonymise_frame(frame, salt: bytes):
    """Copy of a canonical frame with patient and specimen ids replaced by pseudonyms and
    ``source_file`` / ``source_row`` blanked (a file name may carry a name)."""
    import pandas as pd

    pats = frame["patient"].astype(str)
    specs = frame["specimen"].astype(str)
    pmap = {p: patient_pseudonym(salt, p) for p in pats.unique()}
    smap = {k: specimen_pseudonym(salt, *k) for k in set(zip(pats, specs))}
    out = frame.copy()
    out["patient"] = pd.array(pats.map(pmap).tolist(), dtype=frame["patient"].dtype)
    out["specimen"] = pd.array([smap[k] for k in zip(pats, specs)], dtype=frame["specimen"].dtype)
    out["source_file"] = pd.array([""] * len(out), dtype=frame["source_file"].dtype)
    out["source_row"] = pd.array([pd.NA] * len(out), dtype="Int64")
    return out


def neutralise_formulas(frame):
    """Copy of a frame safe to open in a spreadsheet program: every text cell that begins with
    a formula character (:data:`FORMULA_PREFIXES`, from the OWASP "CSV Injection" guidance) gets
    a leading single quote, as that guidance recommends. Numeric columns are untouched, and so
    is a text cell that is a plain decimal number (``-5``, ``+2.5e3``: a spreadsheet reads it as
    that number, not as a formula). Use it for every CSV or XLSX export."""
    import pandas as pd

    out = frame.copy()
    for name in out.columns:
        col = out[name]
        if not (isinstance(col.dtype, pd.StringDtype) or col.dtype == object):
            continue
        if isinstance(col.dtype, pd.StringDtype):
            text = col
        else:  # object column: only its str cells are text
            text = col.where(col.map(lambda x: isinstance(x, str)), None).astype("string")
        mask = (text.str.startswith(FORMULA_PREFIXES).fillna(False)
                & ~text.str.fullmatch(_PLAIN_NUMBER).fillna(False)).to_numpy(dtype=bool)
        if mask.any():
            values = col.to_numpy(dtype=object, copy=True)
            values[mask] = ["'" + v for v in values[mask]]
            out[name] = pd.array(values, dtype=col.dtype) if col.dtype != object else values
    return out


# ---------------------------------------------------------------------------------------------
# canonical frame helpers
# ---------------------------------------------------------------------------------------------
def _canonical_dtypes() -> dict:
    """Column -> dtype of the canonical frame, taken from bayesbase.data when it declares them."""
    try:
        from . import data
        declared = getattr(data, "CANONICAL_DTYPES", None)
        if declared:
            return dict(declared)
    except ImportError:
        pass
    string = "string"
    return {
        "patient": string, "species": string, "breed": string, "sex": string,
        "birth_date": "datetime64[ns]", "specimen": string, "collected_at": "datetime64[ns]",
        "analyte": string, "value": "float64", "unit": string, "reported_value": string,
        "reported_unit": string, "censor": string, "method": string, "replicate": "Int64",
        "fasted": "boolean", "haemolysis": "float64", "lipaemia": "float64",
        "icterus": "float64", "state": string, "source_file": string, "source_row": "Int64",
    }


def _coerce_canonical(frame):
    """Give a frame built from stored rows the canonical dtypes, order and sort."""
    import pandas as pd

    dtypes = _canonical_dtypes()
    out = {}
    for name in CANONICAL_COLUMNS:
        s = frame[name]
        dt = dtypes[name]
        if str(dt).startswith("datetime64"):
            s = pd.to_datetime(s, format="ISO8601").astype(dt)
        elif str(dt) == "boolean":
            s = s.map(lambda x: pd.NA if _is_missing(x) else bool(x)).astype("boolean")
        else:
            s = s.astype(dt)
        out[name] = s
    df = pd.DataFrame(out)
    df = df.sort_values(_SORT, kind="mergesort").reset_index(drop=True)
    return df


def _non_finite_problems(canon, source: str) -> list[Problem]:
    """Values the store refuses to hold: a measured value that is not a finite number, or a
    sample-quality index that is given but not finite (inf or NaN; IEEE 754). The validator
    refuses implausible values first; this guard is defence in depth for frames that reach the
    store by another way."""
    import numpy as np

    problems: list[Problem] = []
    rows = canon["source_row"] if "source_row" in canon else None
    for col in ("value", *_HIL):
        if col not in canon:
            continue
        try:
            v = canon[col].to_numpy(dtype="float64", na_value=math.nan)
        except (TypeError, ValueError):
            continue  # not numbers at all: the insert's own checks report it
        bad = ~np.isfinite(v)
        if col != "value":
            bad &= ~np.isnan(v)  # an index not given is missing, not bad
        for i in np.flatnonzero(bad)[:200]:
            r = None if rows is None or _is_missing(rows.iloc[i]) else int(rows.iloc[i])
            what = f"{col} {v[i]!r}"
            if col == "value" and "reported_value" in canon:
                rv, ru = canon["reported_value"].iloc[i], canon["reported_unit"].iloc[i]
                what = f"value {rv} {ru} gives {v[i]!r} {canon['unit'].iloc[i]}"
            problems.append(Problem(source, r, col, f"{what}: not a finite number",
                                    "the store holds finite numbers only; correct the value"))
    return problems


def _is_canonical(frame) -> bool:
    return set(CANONICAL_COLUMNS).issubset(frame.columns)


def _internal_problems(canon, source: str) -> list[Problem]:
    """Inconsistencies inside one input that the store cannot hold (one patient with two
    species, one specimen with two collection times, a result given twice)."""
    problems: list[Problem] = []

    def row_of(idx):
        r = canon["source_row"].iloc[idx] if "source_row" in canon else None
        return None if _is_missing(r) else int(r)

    dup = canon.duplicated(["patient", "specimen", "analyte", "replicate"], keep="first")
    for i in dup.to_numpy().nonzero()[0]:
        r = canon.iloc[i]
        problems.append(Problem(source, row_of(i), "replicate",
                                f"patient {r['patient']}, specimen {r['specimen']}, analyte "
                                f"{r['analyte']}, replicate {r['replicate']} appears twice",
                                "number the repeats with the replicate column"))

    def check(keys, fields):
        fields = [f for f in fields if f in canon]
        # fast path: every key has a single combination of the fields
        if canon[list(keys) + fields].drop_duplicates()[list(keys)].duplicated().sum() == 0:
            return
        for f in fields:
            sub = canon[list(keys) + [f]]
            nun = sub.groupby(list(keys), sort=False, dropna=False)[f].nunique(dropna=True)
            bad = nun[nun > 1]
            for key in bad.index[:200]:
                key_t = key if isinstance(key, tuple) else (key,)
                mask = (canon[list(keys)] == list(key_t)).all(axis=1).to_numpy()
                idx = mask.nonzero()[0]
                vals = canon[f].iloc[idx]
                first = vals.dropna().iloc[0]
                other = [i for i, v in zip(idx, vals) if not _is_missing(v) and v != first]
                label = ", ".join(f"{k} {v}" for k, v in zip(keys, key_t))
                problems.append(Problem(source, row_of(other[0]) if other else None, f,
                                        f"{label} has more than one {f} in this file"))

    check(("patient",), _PATIENT_FIELDS)
    check(("patient", "specimen"), ("collected_at", "state", "fasted") + _HIL)
    return problems


# ---------------------------------------------------------------------------------------------
# the store
# ---------------------------------------------------------------------------------------------
class Store:
    """The results store. Use as a context manager: ``with Store(path) as s: ...``.

    ``path`` None means :func:`default_db_path`. ``timeout`` is the busy timeout in seconds: how
    long a writer waits for another writer before failing.
    """

    def __init__(self, path=None, *, timeout: float = DEFAULT_TIMEOUT_S):
        self.path = Path(path).expanduser() if path is not None else default_db_path()
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self._conn = None
        self._salt_cache: bytes | None = None
        self.timeout = float(timeout)
        # opening is bounded by the busy timeout as a whole, however many steps must wait
        deadline = time.monotonic() + self.timeout
        try:
            self._conn = sqlite3.connect(str(self.path), timeout=timeout, isolation_level=None,
                                         check_same_thread=False)
            c = self._conn
            c.execute(f"PRAGMA busy_timeout = {int(timeout * 1000)}")
            # Switching a new file to WAL takes an exclusive lock without calling the busy
            # handler: when another process is creating the same store at that moment it fails
            # at once with SQLITE_BUSY, so it is retried here until the busy timeout.
            mode = _retry_busy(lambda: c.execute("PRAGMA journal_mode = WAL").fetchone()[0],
                               deadline)
            if str(mode).lower() != "wal":
                raise StoreError(f"{self.path}: could not switch the database to WAL mode "
                                 f"(journal mode is {mode})")
            c.execute("PRAGMA foreign_keys = ON")
            c.execute("PRAGMA synchronous = FULL")
            c.execute("PRAGMA temp_store = MEMORY")
            # deleted content is overwritten with zeros (forget leaves no bytes behind); set
            # here rather than relying on how this SQLite library was compiled
            c.execute("PRAGMA secure_delete = ON")
            if int(c.execute("PRAGMA secure_delete").fetchone()[0]) != 1:
                raise StoreError(f"{self.path}: this SQLite library cannot turn on "
                                 "secure_delete")
            _retry_busy(self._migrate, deadline)
        except sqlite3.OperationalError as exc:
            self.close()
            if _is_busy(exc):
                raise StoreError(
                    f"{self.path}: the store is busy: another process held a lock on it for "
                    f"longer than the busy timeout ({self.timeout:g} s); try again") from exc
            raise StoreError(f"{self.path}: not a usable bayesbase database ({exc})") from exc
        except sqlite3.DatabaseError as exc:
            self.close()
            raise StoreError(f"{self.path}: not a usable bayesbase database ({exc})") from exc
        except BaseException:
            self.close()
            raise

    # -- lifecycle ----------------------------------------------------------------------------
    def close(self) -> None:
        if getattr(self, "_conn", None) is not None:
            self._conn.close()
            self._conn = None

    def __enter__(self) -> "Store":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __del__(self):  # pragma: no cover - safety net
        try:
            self.close()
        except Exception:
            pass

    @property
    def connection(self) -> sqlite3.Connection:
        """The underlying connection (read it; write through the Store's methods)."""
        if self._conn is None:
            raise StoreError(f"{self.path}: the store is closed")
        return self._conn

    def schema_version(self) -> int:
        row = self.connection.execute("SELECT max(version) FROM schema_version").fetchone()
        return int(row[0] or 0)

    def _stored_version(self) -> int:
        c = self._conn
        if c.execute("SELECT 1 FROM sqlite_master WHERE type = 'table' "
                     "AND name = 'schema_version'").fetchone() is None:
            return 0
        return int(c.execute("SELECT coalesce(max(version), 0) FROM schema_version")
                   .fetchone()[0])

    def _migrate(self) -> None:
        """Bring the schema to :data:`SCHEMA_VERSION`. An up-to-date store is only read (a
        reader takes no write lock); otherwise creation and every migration run in one
        ``BEGIN IMMEDIATE`` transaction, so concurrent first opens create the store once."""
        c = self._conn
        current = self._stored_version()
        if current > SCHEMA_VERSION:
            raise StoreError(f"{self.path}: database schema version {current} is newer than this "
                             f"bayesbase understands ({SCHEMA_VERSION}); upgrade bayesbase")
        if current == SCHEMA_VERSION:
            return
        c.execute("BEGIN IMMEDIATE")
        try:
            c.execute("CREATE TABLE IF NOT EXISTS schema_version ("
                      "version INTEGER PRIMARY KEY, applied_at TEXT NOT NULL)")
            current = self._stored_version()  # another process may have migrated meanwhile
            if current > SCHEMA_VERSION:
                raise StoreError(f"{self.path}: database schema version {current} is newer "
                                 f"than this bayesbase understands ({SCHEMA_VERSION}); upgrade "
                                 "bayesbase")
            for version in range(current + 1, SCHEMA_VERSION + 1):
                for step in MIGRATIONS[version - 1]:
                    c.execute(step)
                c.execute("INSERT INTO schema_version (version, applied_at) VALUES (?, ?)",
                          (version, _now_utc()))
            c.execute("COMMIT")
        except BaseException:
            if c.in_transaction:
                c.execute("ROLLBACK")
            raise

    # -- pseudonyms ---------------------------------------------------------------------------
    def _salt(self) -> bytes:
        if self._salt_cache is None:
            row = self.connection.execute(
                "SELECT value FROM meta WHERE key = 'pseudonym_salt'").fetchone()
            self._salt_cache = bytes.fromhex(row[0])
        return self._salt_cache

    def pseudonym(self, patient: str) -> str:
        """Stable pseudonym of a patient id in this store: ``P-`` + 10 hex digits."""
        return patient_pseudonym(self._salt(), patient)

    def specimen_pseudonym(self, patient: str, specimen: str) -> str:
        """Stable pseudonym of a specimen id: ``S-`` + 10 hex digits."""
        return specimen_pseudonym(self._salt(), patient, specimen)

    # -- import -------------------------------------------------------------------------------
    def import_file(self, path, replace: bool = False) -> ImportSummary:
        """Import a results file: tidy CSV / XLSX (through :func:`bayesbase.data.load_results`
        rules) or a FHIR R4 Bundle in JSON (``.json``, through :func:`bayesbase.fhir.read_bundle`).
        An ``owner`` column goes to the ``owners`` table only."""
        path = Path(path)
        source = path.name  # as bayesbase.data names files in messages; no directory kept
        sha = file_sha256(path)
        if path.suffix.lower() == ".json":
            from .fhir import load_bundle
            canon = load_bundle(path, source=source)
            return self.import_frame(canon, source, sha, replace=replace)
        from . import data
        read_table = getattr(data, "read_table", None)
        if read_table is not None:
            raw = read_table(path)
            owners = _owner_map(raw)
            if owners is not None:
                raw = raw.drop(columns=[c for c in raw.columns if _norm(c) == "owner"])
            canon = data.validate(raw, source=source)
        else:  # pragma: no cover - data without read_table
            owners = None
            canon = data.load_results(path)
        return self.import_frame(canon, source, sha, replace=replace, owners=owners)

    def import_frame(self, frame, source: str, sha256: str | None = None,
                     replace: bool = False, *, owners: dict | None = None) -> ImportSummary:
        """Import a canonical frame (or a raw tidy frame, which is validated first).

        ``owners`` maps patient id -> owner text (stored in ``owners`` only); a raw frame's
        ``owner`` column is used the same way. Returns an :class:`ImportSummary`; raises
        :class:`~bayesbase.errors.ValidationError` (nothing stored) or :class:`ImportConflict`.
        """
        source = str(source)
        if owners is None:
            owners = _owner_map(frame)
        if not _is_canonical(frame):
            from . import data
            raw = frame.drop(columns=[c for c in frame.columns if _norm(c) == "owner"])
            frame = data.validate(raw, source=source)
        canon = frame
        problems = _non_finite_problems(canon, source) + _internal_problems(canon, source)
        if problems:
            raise ValidationError(problems)
        if sha256 is None:
            sha256 = frame_sha256(canon[list(CANONICAL_COLUMNS)])
        conn = self.connection
        conn.execute("BEGIN IMMEDIATE")
        try:
            summary = self._import_locked(canon, source, sha256, replace, owners or {})
            conn.execute("COMMIT")
        except BaseException:
            if conn.in_transaction:
                conn.execute("ROLLBACK")
            raise
        finally:
            for t in ("_tmp_patients", "_tmp_specimens", "_tmp_results"):
                conn.execute(f"DROP TABLE IF EXISTS temp.{t}")
        return summary

    def _result_rows(self, rows):
        """Iterator over the result tuples inserted by one import (kept as a method so a test can
        observe the insert loop)."""
        return iter(rows)

    def _import_locked(self, canon, source, sha256, replace, owners) -> ImportSummary:
        import pandas as pd

        c = self._conn
        n = len(canon)
        cur = c.execute("INSERT INTO import_log (file, sha256, imported_at) VALUES (?, ?, ?)",
                        (source, sha256, _now_utc()))
        import_id = cur.lastrowid
        conflicts: list[Conflict] = []
        changes: list[tuple] = []  # rows for `replaced`, patient pk filled in later

        # ---- patients ------------------------------------------------------------------------
        pat = canon.drop_duplicates("patient")[["patient", *_PATIENT_FIELDS]]
        pat_rows = list(zip(_col(pat, "patient"), _col(pat, "species"),
                            _blank_to_none(_col(pat, "breed")), _blank_to_none(_col(pat, "sex")),
                            _col(pat, "birth_date", "time")))
        c.execute("CREATE TEMP TABLE _tmp_patients (id TEXT PRIMARY KEY, species TEXT, "
                  "breed TEXT, sex TEXT, birth_date TEXT)")
        c.executemany("INSERT INTO _tmp_patients VALUES (?, ?, ?, ?, ?)", pat_rows)
        stored_pat = {r[1]: r for r in c.execute(
            "SELECT p.pk, p.id, p.species, p.breed, p.sex, p.birth_date "
            "FROM _tmp_patients t JOIN patients p ON p.id = t.id")}
        pat_updates: list[tuple] = []
        for row in pat_rows:
            pid = row[0]
            if pid not in stored_pat:
                continue
            s = stored_pat[pid]
            for j, f in enumerate(_PATIENT_FIELDS, start=1):
                new, old = row[j], s[j + 1]
                if f == "birth_date" and old is not None and new is not None:
                    same = pd.Timestamp(old) == pd.Timestamp(new)
                    kind = "" if same else "conflict"
                else:
                    kind = _differs(old, new)
                if kind == "conflict":
                    conflicts.append(Conflict("patient", pid, None, None, None, f, old, new))
                if kind:
                    pat_updates.append((f, new, s[0]))
                    changes.append((s[0], "patient", None, None, None, f, old, new))
        new_pat = [r for r in pat_rows if r[0] not in stored_pat]

        # ---- specimens -----------------------------------------------------------------------
        spec = canon.drop_duplicates(["patient", "specimen"])
        # the first non-missing value of each specimen-level field (missing rows say nothing)
        spec_vals = canon.groupby(["patient", "specimen"], sort=False)[
            [f for f in ("state", "fasted", *_HIL) if f in canon]].first()
        spec = spec[["patient", "specimen", "collected_at"]].merge(
            spec_vals.reset_index(), on=["patient", "specimen"], how="left")
        if "laboratory" in canon:
            lab = canon.groupby(["patient", "specimen"], sort=False)["laboratory"].first()
            spec = spec.merge(lab.reset_index(), on=["patient", "specimen"], how="left")
        else:
            spec["laboratory"] = None
        spec_rows = list(zip(
            _col(spec, "patient"), _col(spec, "specimen"), _col(spec, "collected_at", "time"),
            [s or "" for s in _col(spec, "state")], _col(spec, "fasted", "bool"),
            _col(spec, "haemolysis", "float"), _col(spec, "lipaemia", "float"),
            _col(spec, "icterus", "float"), _blank_to_none(_col(spec, "laboratory"))))
        c.execute("CREATE TEMP TABLE _tmp_specimens (patient TEXT, id TEXT, collected_at TEXT, "
                  "state TEXT, fasted INTEGER, haemolysis REAL, lipaemia REAL, icterus REAL, "
                  "laboratory TEXT, PRIMARY KEY (patient, id))")
        c.executemany("INSERT INTO _tmp_specimens VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)", spec_rows)
        stored_spec = {(r[1], r[2]): r for r in c.execute(
            "SELECT s.pk, p.id, s.id, s.collected_at, s.state, s.fasted, s.haemolysis, "
            "s.lipaemia, s.icterus, s.laboratory, p.pk "
            "FROM _tmp_specimens t JOIN patients p ON p.id = t.patient "
            "JOIN specimens s ON s.patient = p.pk AND s.id = t.id")}
        spec_updates: list[tuple] = []
        for row in spec_rows:
            key = (row[0], row[1])
            if key not in stored_spec:
                continue
            s = stored_spec[key]
            for j, f in enumerate(_SPECIMEN_FIELDS, start=2):
                new, old = row[j], s[j + 1]
                if f == "collected_at":
                    kind = "" if pd.Timestamp(old) == pd.Timestamp(new) else "conflict"
                else:
                    kind = _differs(old, new, numeric=f in _HIL, blank_is_missing=f == "state")
                if kind == "conflict":
                    conflicts.append(Conflict("specimen", row[0], row[1], None, None, f, old, new))
                if kind:
                    spec_updates.append((f, new, s[0]))
                    if f == "state" and old == "":
                        old = None  # a blank state is an empty field: logged as NULL
                    changes.append((s[10], "specimen", row[1], None, None, f, old, new))
        new_spec = [r for r in spec_rows if (r[0], r[1]) not in stored_spec]

        # ---- results on specimens already stored ---------------------------------------------
        key_pat = canon["patient"].astype(str).to_numpy()
        key_spec = canon["specimen"].astype(str).to_numpy()
        existing = set(stored_spec)
        if existing:
            in_old = pd.Series([(a, b) in existing for a, b in zip(key_pat, key_spec)],
                               index=canon.index)
        else:
            in_old = pd.Series(False, index=canon.index)
        old_part = canon[in_old.to_numpy()]
        res_updates: list[tuple] = []
        if len(old_part):
            spk = [stored_spec[(a, b)][0] for a, b in
                   zip(old_part["patient"].astype(str), old_part["specimen"].astype(str))]
            c.execute("CREATE TEMP TABLE _tmp_results (i INTEGER PRIMARY KEY, specimen INTEGER, "
                      "analyte TEXT, replicate INTEGER, value REAL, unit TEXT, censor TEXT, "
                      "method TEXT)")
            c.executemany("INSERT INTO _tmp_results VALUES (?, ?, ?, ?, ?, ?, ?, ?)", zip(
                range(len(old_part)), spk, _col(old_part, "analyte"),
                _col(old_part, "replicate", "int"), _col(old_part, "value", "float"),
                _col(old_part, "unit"), _col(old_part, "censor"),
                _blank_to_none(_col(old_part, "method"))))
            join = ("FROM _tmp_results t JOIN results r ON r.specimen = t.specimen "
                    "AND r.analyte = t.analyte AND r.replicate = t.replicate")
            differ = c.execute(
                "SELECT t.i, r.pk, r.value, r.unit, r.censor, r.method, "
                "t.value, t.unit, t.censor, t.method, r.reported_value, r.reported_unit " + join +
                " WHERE abs(r.value - t.value) > ? * max(abs(r.value), abs(t.value)) "
                "OR r.unit IS NOT t.unit OR r.censor IS NOT coalesce(t.censor, '') "
                "OR (t.method IS NOT NULL AND r.method IS NOT t.method)",
                (VALUE_RTOL,)).fetchall()
            for (i, rpk, ov, ou, oc, om, nv, nu, nc, nm, orv, oru) in differ:
                row = old_part.iloc[i]
                diffs = []
                if not _same(ov, nv, numeric=True):
                    diffs.append(("value", ov, nv))
                if oc != (nc or ""):
                    diffs.append(("censor", oc, nc))
                if ou != nu:
                    diffs.append(("unit", ou, nu))
                mk = _differs(om, nm)
                if mk == "conflict":
                    diffs.append(("method", om, nm))
                if not diffs:
                    if mk == "fill":
                        res_updates.append((rpk, row, [("method", om, nm)], False))
                    continue
                for f, o, nw in diffs:
                    conflicts.append(Conflict("result", str(row["patient"]), str(row["specimen"]),
                                              str(row["analyte"]), int(row["replicate"]), f,
                                              f"{orv} {oru}" if f == "value" else o,
                                              f"{row['reported_value']} {row['reported_unit']}"
                                              if f == "value" else nw))
                res_updates.append((rpk, row, diffs, True))
            unmatched = [r[0] for r in c.execute(
                "SELECT t.i FROM _tmp_results t WHERE NOT EXISTS (SELECT 1 FROM results r "
                "WHERE r.specimen = t.specimen AND r.analyte = t.analyte "
                "AND r.replicate = t.replicate) ORDER BY t.i")]
            old_new_rows = old_part.iloc[unmatched]
        else:
            old_new_rows = old_part.iloc[0:0]

        if conflicts and not replace:
            raise ImportConflict(source, conflicts)

        # ---- write ---------------------------------------------------------------------------
        c.executemany("INSERT INTO patients (id, species, breed, sex, birth_date) "
                      "VALUES (?, ?, ?, ?, ?)", new_pat)
        for f, v, pk in pat_updates:
            c.execute(f"UPDATE patients SET {f} = ? WHERE pk = ?", (v, pk))
        pat_pk = dict(c.execute("SELECT t.id, p.pk FROM _tmp_patients t "
                                "JOIN patients p ON p.id = t.id").fetchall())
        c.executemany(
            "INSERT INTO specimens (patient, id, collected_at, state, fasted, haemolysis, "
            "lipaemia, icterus, laboratory) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
            [(pat_pk[r[0]],) + r[1:] for r in new_spec])
        for f, v, pk in spec_updates:
            c.execute(f"UPDATE specimens SET {f} = ? WHERE pk = ?",
                      ("" if (f == "state" and v is None) else v, pk))
        spec_pk = {(a, b): pk for a, b, pk in c.execute(
            "SELECT t.patient, t.id, s.pk FROM _tmp_specimens t JOIN patients p "
            "ON p.id = t.patient JOIN specimens s ON s.patient = p.pk AND s.id = t.id")}

        new_rows = canon[~in_old.to_numpy()]
        if len(old_new_rows):
            new_rows = pd.concat([new_rows, old_new_rows])
        rows_added = len(new_rows)
        if rows_added:
            keys = pd.DataFrame([(a, b, pk) for (a, b), pk in spec_pk.items()],
                                columns=["patient", "specimen", "_spk"])
            left = pd.DataFrame({"patient": new_rows["patient"].astype(str).to_numpy(),
                                 "specimen": new_rows["specimen"].astype(str).to_numpy()})
            spks = left.merge(keys, on=["patient", "specimen"], how="left", sort=False)[
                "_spk"].astype("int64").tolist()
            tuples = zip(spks, _col(new_rows, "analyte"), _col(new_rows, "reported_value"),
                         _col(new_rows, "reported_unit"), _col(new_rows, "value", "float"),
                         _col(new_rows, "unit"), [x or "" for x in _col(new_rows, "censor")],
                         _col(new_rows, "replicate", "int"),
                         _blank_to_none(_col(new_rows, "method")),
                         [import_id] * rows_added, _col(new_rows, "source_row", "int"),
                         [None if f == source else f for f in _col(new_rows, "source_file")])
            c.executemany(
                "INSERT INTO results (specimen, analyte, reported_value, reported_unit, value, "
                "unit, censor, replicate, method, import, source_row, source_file) "
                "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)", self._result_rows(tuples))

        rows_replaced = 0
        for rpk, row, diffs, counts in res_updates:
            if counts:
                rows_replaced += 1
                old = c.execute("SELECT reported_value, reported_unit FROM results WHERE pk = ?",
                                (rpk,)).fetchone()
                c.execute("UPDATE results SET reported_value = ?, reported_unit = ?, value = ?, "
                          "unit = ?, censor = ?, method = coalesce(?, method), import = ?, "
                          "source_row = ?, source_file = ? WHERE pk = ?",
                          (str(row["reported_value"]), str(row["reported_unit"]),
                           float(row["value"]), str(row["unit"]), str(row["censor"] or ""),
                           _py(row["method"]) or None, import_id, _py(row["source_row"]),
                           None if _py(row["source_file"]) == source else _py(row["source_file"]),
                           rpk))
                ppk = pat_pk[str(row["patient"])]
                for f, o, nw in diffs:
                    if f == "value":
                        o = f"{old[0]} {old[1]} (= {o!r} {row['unit']})"
                        nw = f"{row['reported_value']} {row['reported_unit']} (= {nw!r} {row['unit']})"
                    changes.append((ppk, "result", str(row["specimen"]), str(row["analyte"]),
                                    int(row["replicate"]), f, o, nw))
            else:  # method filled on an otherwise identical row
                c.execute("UPDATE results SET method = ? WHERE pk = ?",
                          (_py(row["method"]) or None, rpk))
                changes.append((pat_pk[str(row["patient"])], "result", str(row["specimen"]),
                                str(row["analyte"]), int(row["replicate"]), "method", None,
                                _py(row["method"])))
        rows_skipped = n - rows_added - rows_replaced

        c.executemany(
            "INSERT INTO replaced (import, patient, entity, specimen, analyte, replicate, field, "
            "old_value, new_value) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
            [(import_id, ppk, ent, sp, an, rep, f, None if o is None else str(o),
              None if nw is None else str(nw)) for ppk, ent, sp, an, rep, f, o, nw in changes])
        c.executemany("INSERT OR IGNORE INTO import_patients (import, patient) VALUES (?, ?)",
                      [(import_id, pk) for pk in pat_pk.values()])
        owner_rows = [(pat_pk[str(p)], str(o)) for p, o in owners.items() if str(p) in pat_pk]
        c.executemany("INSERT INTO owners (patient, owner) VALUES (?, ?) ON CONFLICT (patient) "
                      "DO UPDATE SET owner = excluded.owner", owner_rows)
        c.execute("UPDATE import_log SET rows_added = ?, rows_skipped = ?, rows_replaced = ? "
                  "WHERE id = ?", (rows_added, rows_skipped, rows_replaced, import_id))
        return ImportSummary(rows_added, rows_skipped, rows_replaced, tuple(conflicts), import_id,
                             source, len(new_pat), len(new_spec))

    # -- reading ------------------------------------------------------------------------------
    _SELECT = (
        "SELECT p.id AS patient, p.species, p.breed, p.sex, p.birth_date, s.id AS specimen, "
        "s.collected_at, r.analyte, r.value, r.unit, r.reported_value, r.reported_unit, "
        "r.censor, r.method, r.replicate, s.fasted, s.haemolysis, s.lipaemia, s.icterus, "
        "s.state, coalesce(r.source_file, l.file) AS source_file, r.source_row "
        "FROM results r JOIN specimens s ON s.pk = r.specimen "
        "JOIN patients p ON p.pk = s.patient LEFT JOIN import_log l ON l.id = r.import")

    def _frame(self, where: str = "", params: tuple = ()):
        import pandas as pd

        cur = self.connection.execute(self._SELECT + where, params)
        rows = cur.fetchall()
        names = [d[0] for d in cur.description]
        df = pd.DataFrame.from_records(rows, columns=names)
        return _coerce_canonical(df)

    def results(self, patient: str | None = None):
        """Canonical results frame (all patients, or one), ready for :func:`bayesbase.assess`."""
        if patient is None:
            return self._frame()
        self._require_patient(patient)
        return self._frame(" WHERE p.id = ?", (str(patient),))

    def history(self, patient: str, analyte: str | None = None):
        """Canonical frame of one patient's results (optionally one analyte), in time order."""
        self._require_patient(patient)
        if analyte is None:
            return self._frame(" WHERE p.id = ?", (str(patient),))
        analyte = self._analyte_id(analyte)
        return self._frame(" WHERE p.id = ? AND r.analyte = ?", (str(patient), analyte))

    def history_table(self, patient: str, analyte: str | None = None):
        """Wide display table: one row per specimen (collection time order), one column per
        analyte headed ``analyte (unit)``; cells show the canonical value with ``<``/``>`` for a
        censored value and replicates joined by `` / ``. For display only, not for analysis."""
        import pandas as pd

        h = self.history(patient, analyte)
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
        return wide[["collected_at", "specimen", *order]].astype(
            {c: "str" for c in order})

    def patients(self):
        """One row per patient: id, species, breed, sex, birth_date, specimens, results,
        first and last collection time. Owner data are not included."""
        import pandas as pd

        cur = self.connection.execute(
            "SELECT p.id AS patient, p.species, p.breed, p.sex, p.birth_date, "
            "(SELECT count(*) FROM specimens s WHERE s.patient = p.pk) AS specimens, "
            "(SELECT count(*) FROM results r JOIN specimens s ON s.pk = r.specimen "
            " WHERE s.patient = p.pk) AS results, "
            "(SELECT min(collected_at) FROM specimens s WHERE s.patient = p.pk) AS first, "
            "(SELECT max(collected_at) FROM specimens s WHERE s.patient = p.pk) AS last "
            "FROM patients p ORDER BY p.id")
        df = pd.DataFrame.from_records(cur.fetchall(), columns=[d[0] for d in cur.description])
        for col in ("patient", "species", "breed", "sex"):
            df[col] = df[col].astype("string")
        for col in ("birth_date", "first", "last"):
            df[col] = pd.to_datetime(df[col], format="ISO8601").astype("datetime64[ns]")
        for col in ("specimens", "results"):
            df[col] = df[col].astype("int64")
        return df

    def imports(self):
        """The import log as a frame."""
        import pandas as pd

        cur = self.connection.execute("SELECT * FROM import_log ORDER BY id")
        return pd.DataFrame.from_records(cur.fetchall(), columns=[d[0] for d in cur.description])

    def replaced(self):
        """What imports with ``replace`` changed: one row per changed field."""
        import pandas as pd

        cur = self.connection.execute(
            "SELECT x.import, p.id AS patient, x.entity, x.specimen, x.analyte, x.replicate, "
            "x.field, x.old_value, x.new_value FROM replaced x "
            "LEFT JOIN patients p ON p.pk = x.patient ORDER BY x.id")
        return pd.DataFrame.from_records(cur.fetchall(), columns=[d[0] for d in cur.description])

    def _require_patient(self, patient) -> int:
        row = self.connection.execute("SELECT pk FROM patients WHERE id = ?",
                                      (str(patient),)).fetchone()
        if row is None:
            raise StoreError(f"{self.path}: no patient {patient!r} in the store")
        return row[0]

    @staticmethod
    def _analyte_id(analyte: str) -> str:
        try:
            from .units import resolve_analyte
        except ImportError:  # pragma: no cover
            return analyte
        try:
            res = resolve_analyte(analyte)
        except Exception:
            return analyte
        return getattr(res, "id", res) if res is not None else analyte

    # -- export -------------------------------------------------------------------------------
    def _export_frame(self, patient, pseudonymise: bool):
        df = self.results(patient)
        return pseudonymise_frame(df, self._salt()) if pseudonymise else df

    def export_csv(self, patient: str | None, path, pseudonymise: bool = True) -> Path:
        """Write a tidy results CSV (:func:`bayesbase.data.to_tidy_csv`: every canonical column,
        values as reported beside the canonical ones; reads back with
        :func:`bayesbase.data.load_results`) for one patient, or all when ``patient`` is None.
        Owner data are never written; with ``pseudonymise`` patient and specimen ids are replaced
        by pseudonyms and ``source_file``/``source_row`` are blanked (module docstring). A text
        cell that a spreadsheet would run as a formula gets a leading single quote
        (:func:`neutralise_formulas`); numbers are written as numbers."""
        from . import data

        df = self._export_frame(patient, pseudonymise)
        return data.to_tidy_csv(neutralise_formulas(df), Path(path))

    def export_fhir(self, patient: str | None, path, pseudonymise: bool = True) -> Path:
        """Write a FHIR R4 Bundle (type collection) for one patient (or all)."""
        from .fhir import write_bundle

        df = self._export_frame(patient, pseudonymise)
        return write_bundle(df, path, pseudonymise=False)

    # -- forget -------------------------------------------------------------------------------
    def forget(self, patient: str) -> Removed:
        """Remove everything stored under a patient: results, specimens, the patient row, owner
        rows, the `replaced` log rows about it, and its import links (an import log entry that no
        longer links to any patient is removed too). The file name of every import that touched
        the patient is blanked (a file name may carry the id or the animal's name); the other
        patients' rows from such an import then show an empty ``source_file``.

        Deleted content is overwritten with zeros (``secure_delete``) and the WAL is then
        checkpointed and truncated, so the patient's ids and values are left in no byte of the
        database files. Returns the total rows removed; the returned int's ``by_table`` gives the
        count per table and ``wal_cleared`` is False when another connection kept the WAL from
        being truncated (it is cleared at a later checkpoint)."""
        c = self.connection
        c.execute("BEGIN IMMEDIATE")
        try:
            row = c.execute("SELECT pk FROM patients WHERE id = ?", (str(patient),)).fetchone()
            if row is None:
                raise StoreError(f"{self.path}: no patient {patient!r} in the store")
            pk = row[0]
            counts = {
                "results": c.execute("SELECT count(*) FROM results r JOIN specimens s ON "
                                     "s.pk = r.specimen WHERE s.patient = ?", (pk,)).fetchone()[0],
                "specimens": c.execute("SELECT count(*) FROM specimens WHERE patient = ?",
                                       (pk,)).fetchone()[0],
                "owners": c.execute("SELECT count(*) FROM owners WHERE patient = ?",
                                    (pk,)).fetchone()[0],
                "replaced": c.execute("SELECT count(*) FROM replaced WHERE patient = ?",
                                      (pk,)).fetchone()[0],
                "import_patients": c.execute("SELECT count(*) FROM import_patients WHERE "
                                             "patient = ?", (pk,)).fetchone()[0],
            }
            imports = [r[0] for r in c.execute(
                "SELECT import FROM import_patients WHERE patient = ?", (pk,))]
            c.execute("DELETE FROM results WHERE specimen IN "
                      "(SELECT pk FROM specimens WHERE patient = ?)", (pk,))
            c.execute("DELETE FROM patients WHERE pk = ?", (pk,))  # cascades the rest
            counts["patients"] = 1
            # an import's results and `replaced` rows all belong to patients it links to, so an
            # import left without links holds nothing any more
            orphan = [i for i in imports if c.execute(
                "SELECT 1 FROM import_patients WHERE import = ? LIMIT 1", (i,)).fetchone() is None]
            c.executemany("DELETE FROM import_log WHERE id = ?", [(i,) for i in orphan])
            counts["import_log"] = len(orphan)
            kept = [(i,) for i in imports if i not in set(orphan)]
            c.executemany("UPDATE import_log SET file = '' WHERE id = ?", kept)
            c.executemany("UPDATE results SET source_file = NULL WHERE import = ? "
                          "AND source_file IS NOT NULL", kept)
            c.execute("COMMIT")
        except BaseException:
            if c.in_transaction:
                c.execute("ROLLBACK")
            raise
        removed = Removed(counts)
        busy = c.execute("PRAGMA wal_checkpoint(TRUNCATE)").fetchone()[0]
        removed.wal_cleared = int(busy) == 0
        return removed

    def integrity_check(self) -> str:
        """``PRAGMA integrity_check`` ('ok' when the file is sound)."""
        return str(self.connection.execute("PRAGMA integrity_check").fetchone()[0])


# ---------------------------------------------------------------------------------------------
def _is_busy(exc: BaseException) -> bool:
    """True for SQLITE_BUSY / SQLITE_LOCKED (another connection holds a lock)."""
    code = getattr(exc, "sqlite_errorcode", None)
    if code is not None:
        return (code & 0xFF) in (5, 6)  # SQLITE_BUSY, SQLITE_LOCKED (sqlite3.h)
    text = str(exc).lower()
    return "locked" in text or "busy" in text


def _retry_busy(fn, deadline: float):
    """Call ``fn`` until it does not fail with SQLITE_BUSY / SQLITE_LOCKED or the monotonic
    ``deadline`` (the busy timeout) passes; waits 1 ms, doubling to at most 50 ms."""
    wait = 0.001
    while True:
        try:
            return fn()
        except sqlite3.OperationalError as exc:
            left = deadline - time.monotonic()
            if not _is_busy(exc) or left <= 0:
                raise
            time.sleep(min(wait, left))
            wait = min(wait * 2, 0.05)


def _now_utc() -> str:
    return datetime.now(timezone.utc).replace(microsecond=0).isoformat()


def _norm(name) -> str:
    return str(name).strip().lower()


def _owner_map(frame) -> dict | None:
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


# ---------------------------------------------------------------------------------------------
# benchmarks (not tests): `bayesbase bench` reports them
# ---------------------------------------------------------------------------------------------
#: Invented demo panel (analyte id, canonical unit, typical value): demo numbers, not reference
#: values.
_DEMO_PANEL = (
    ("creatinine", "umol/L", 90.0), ("urea", "mmol/L", 5.0), ("glucose", "mmol/L", 5.5),
    ("alt", "U/L", 40.0), ("ast", "U/L", 30.0), ("alp", "U/L", 60.0), ("ggt", "U/L", 4.0),
    ("albumin", "g/L", 32.0), ("total_protein", "g/L", 62.0), ("cholesterol", "mmol/L", 6.0),
    ("calcium", "mmol/L", 2.5), ("sodium", "mmol/L", 147.0), ("potassium", "mmol/L", 4.5),
    ("chloride", "mmol/L", 112.0), ("total_bilirubin", "umol/L", 3.0),
    ("phosphate", "mmol/L", 1.2), ("triglycerides", "mmol/L", 0.8),
    ("globulin", "g/L", 30.0), ("magnesium", "mmol/L", 0.85), ("bicarbonate", "mmol/L", 22.0),
    ("lipase", "U/L", 300.0), ("sdma", "umol/L", 0.6), ("ck", "U/L", 120.0),
    ("cortisol", "nmol/L", 80.0), ("fructosamine", "umol/L", 300.0),
)


def synthetic_canonical(n_patients: int, n_specimens: int, n_analytes: int = 25,
                        seed: int = 20240611, source: str = "synthetic"):
    """Invented demo results (labelled as such): a canonical frame of ``n_patients`` dogs x
    ``n_specimens`` monthly specimens x ``n_analytes`` analytes. For tests and benchmarks."""
    import numpy as np
    import pandas as pd

    rng = np.random.default_rng(seed)
    panel = _DEMO_PANEL[:n_analytes]
    n_a = len(panel)
    n = n_patients * n_specimens * n_a
    p_idx = np.repeat(np.arange(n_patients), n_specimens * n_a)
    s_idx = np.tile(np.repeat(np.arange(n_specimens), n_a), n_patients)
    a_idx = np.tile(np.arange(n_a), n_patients * n_specimens)
    base = np.array([v for _, _, v in panel])
    value = np.round(base[a_idx] * np.exp(rng.normal(0.0, 0.1, n)), 3)
    start = np.datetime64("2004-01-05T09:00:00", "ns")
    days = (s_idx * 30 + (p_idx % 17)).astype("timedelta64[D]")
    collected = (start + days).astype("datetime64[ns]")
    width = max(len(str(n_patients)), 4)
    pat = np.char.add("DEMO-", np.char.zfill(p_idx.astype(str), width))
    spec = np.char.add(np.char.add(pat, "-"), np.char.zfill(s_idx.astype(str), 4))
    analyte = np.array([a for a, _, _ in panel])[a_idx]
    unit = np.array([u for _, u, _ in panel])[a_idx]
    reported = np.array([f"{v:g}" for v in value])
    df = pd.DataFrame({
        "patient": pat,
        "species": pd.array(np.full(n, "dog"), dtype="str"),
        "breed": pd.array(np.where(p_idx % 3 == 0, "beagle", "labrador retriever"), dtype="str"),
        "sex": pd.array(np.where(p_idx % 2 == 0, "female_neutered", "male_intact"), dtype="str"),
        "birth_date": (np.datetime64("2002-03-01", "ns")
                       + (p_idx % 300).astype("timedelta64[D]")).astype("datetime64[ns]"),
        "specimen": pd.array(spec, dtype="str"),
        "collected_at": collected,
        "analyte": pd.array(analyte, dtype="str"),
        "value": value,
        "unit": pd.array(unit, dtype="str"),
        "reported_value": pd.array(reported, dtype="str"),
        "reported_unit": pd.array(unit, dtype="str"),
        "censor": pd.array(np.full(n, ""), dtype="str"),
        "method": pd.array(np.full(n, "demo analyser"), dtype="str"),
        "replicate": pd.array(np.ones(n, dtype="int64"), dtype="Int64"),
        "fasted": pd.array(s_idx % 4 != 0, dtype="boolean"),
        "haemolysis": np.where(s_idx % 10 == 0, 1.0, np.nan),
        "lipaemia": np.full(n, np.nan),
        "icterus": np.full(n, np.nan),
        "state": pd.array(np.full(n, ""), dtype="str"),
        "source_file": pd.array(np.full(n, source), dtype="str"),
        "source_row": pd.array(np.arange(2, n + 2), dtype="Int64"),
    })
    return _coerce_canonical(df)


def bench_import(n_rows: int = 1_000_000, workdir=None, *, via_file: bool = True) -> dict:
    """Time a bulk import of ``n_rows`` invented results into an empty store (one transaction,
    executemany): from a canonical frame (store only), a re-import of the same rows (all
    skipped), and, with ``via_file``, from a tidy CSV file into another empty store (reading +
    validation + store). Returns timings in seconds."""
    import tempfile

    from . import data

    n_a = 25
    n_spec = 240
    n_pat = max(1, -(-n_rows // (n_a * n_spec)))
    t0 = time.perf_counter()
    frame = synthetic_canonical(n_pat, n_spec, n_a).iloc[:n_rows]
    t_gen = time.perf_counter() - t0
    out = {"n_rows": int(len(frame)), "generate_s": t_gen}
    with tempfile.TemporaryDirectory(dir=workdir) as d:
        db = Path(d) / "bench.sqlite"
        with Store(db) as store:
            t0 = time.perf_counter()
            s1 = store.import_frame(frame, "bench", "0" * 64)
            out["import_frame_s"] = time.perf_counter() - t0
            t0 = time.perf_counter()
            s2 = store.import_frame(frame, "bench", "0" * 64)
            out["reimport_frame_s"] = time.perf_counter() - t0
        out.update(rows_added=s1.rows_added, reimport_skipped=s2.rows_skipped,
                   db_bytes=db.stat().st_size)
        if via_file:
            csv = data.to_tidy_csv(frame, Path(d) / "bench.csv")
            with Store(Path(d) / "bench2.sqlite") as store:
                t0 = time.perf_counter()
                s3 = store.import_file(csv)
                out["import_file_s"] = time.perf_counter() - t0
            out["file_rows_added"] = s3.rows_added
    return out


def bench_history(n_specimens: int = 240, n_analytes: int = 25, repeats: int = 20,
                  workdir=None) -> dict:
    """Time :meth:`Store.history` for one patient with ``n_specimens`` monthly panels of
    ``n_analytes`` analytes (20 years = 240 specimens), among 50 other invented patients."""
    import tempfile

    frame = synthetic_canonical(51, n_specimens, n_analytes)
    target = str(frame["patient"].iloc[0])
    with tempfile.TemporaryDirectory(dir=workdir) as d:
        with Store(Path(d) / "bench.sqlite") as store:
            store.import_frame(frame, "bench", "0" * 64)
            times = []
            for _ in range(repeats):
                t0 = time.perf_counter()
                h = store.history(target)
                times.append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            store.history_table(target)
            t_table = time.perf_counter() - t0
    times.sort()
    return {"rows": int(len(h)), "history_median_s": times[len(times) // 2],
            "history_max_s": times[-1], "history_table_s": t_table}
