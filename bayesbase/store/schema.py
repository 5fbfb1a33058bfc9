"""Database schema of the results store: forward migrations and the runner that applies them.

Never edit a released step of :data:`MIGRATIONS`; append a new one. The version reached is kept
in the ``schema_version`` table (one row per applied version).
"""
from __future__ import annotations

from ..errors import StoreError
from .frames import now_utc
from .transaction import write_transaction

__all__ = ["MIGRATIONS", "SCHEMA_VERSION", "COLUMNS_TABLES", "COLUMNS_CHUNK_BITS", "MISSING_TEXTS",
           "migrate", "stored_version"]

#: Texts that pandas / Python print for a missing value; never stored (schema version 2
#: rewrites them to NULL in stores written by earlier versions).
MISSING_TEXTS = ("NaT", "nan", "NaN", "None", "<NA>")
_MISSING_TEXTS_SQL = ", ".join(f"'{t}'" for t in MISSING_TEXTS)

#: Tables whose rows the whole-store read takes from a columnar copy kept in the same file: for
#: each, ``<table>_columns`` holds one row per chunk of :data:`COLUMNS_CHUNK_BITS` primary keys
#: (``chunk`` = ``pk >> COLUMNS_CHUNK_BITS``), its ``data`` the chunk's columns as one Arrow IPC
#: stream (:func:`bayesbase.store.frames.encode_columns`), ``format`` naming the columns and their
#: kinds. Triggers delete a chunk's copy in the statement that inserts, updates or deletes any of
#: its rows, so a copy present is never stale, whichever writer wrote; a chunk without a copy is
#: read from its table (:mod:`bayesbase.store.queries`), and every committing
#: :func:`~bayesbase.store.transaction.write_transaction` makes the missing copies again before
#: its ``COMMIT``. Part of released migration 3: never change these values; a new layout is a new
#: migration.
COLUMNS_TABLES = ("patients", "specimens", "results")
COLUMNS_CHUNK_BITS = 14


def _columns_copy_steps(bits: int = COLUMNS_CHUNK_BITS) -> list[str]:
    """DDL of the columnar copy (tables and triggers) of :data:`COLUMNS_TABLES`, in chunks of
    ``2 ** bits`` primary keys (tests build stores of small chunks with another ``bits``)."""
    steps = []
    for t in COLUMNS_TABLES:
        steps.append(f"CREATE TABLE {t}_columns (chunk INTEGER PRIMARY KEY, format TEXT NOT NULL, "
                     "data BLOB NOT NULL)")
        b = int(bits)
        for event, cond in (("INSERT", f"chunk = NEW.pk >> {b}"), ("DELETE", f"chunk = OLD.pk >> {b}"),
                            ("UPDATE", f"chunk IN (OLD.pk >> {b}, NEW.pk >> {b})")):
            steps.append(f"CREATE TRIGGER {t}_columns_{event.lower()} AFTER {event} ON {t} "
                         f"BEGIN DELETE FROM {t}_columns WHERE {cond}; END")
    return steps


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
    [  # version 3: a columnar copy of patients, specimens and results for the whole-store read
        *_columns_copy_steps(),
    ],
]
SCHEMA_VERSION = len(MIGRATIONS)


def stored_version(conn) -> int:
    """The schema version a database has reached (0 for a new, empty file)."""
    if conn.execute("SELECT 1 FROM sqlite_master WHERE type = 'table' "
                    "AND name = 'schema_version'").fetchone() is None:
        return 0
    return int(conn.execute("SELECT coalesce(max(version), 0) FROM schema_version").fetchone()[0])


def _refuse_newer(path, current: int) -> None:
    if current > SCHEMA_VERSION:
        raise StoreError(f"{path}: database schema version {current} is newer than this "
                         f"bayesbase understands ({SCHEMA_VERSION}); upgrade bayesbase")


def migrate(conn, path) -> None:
    """Bring the schema to :data:`SCHEMA_VERSION`. An up-to-date store is only read (a reader
    takes no write lock); otherwise creation and every migration run in one ``BEGIN IMMEDIATE``
    transaction, so concurrent first opens create the store once. ``path`` names the file in
    messages."""
    current = stored_version(conn)
    _refuse_newer(path, current)
    if current == SCHEMA_VERSION:
        return
    with write_transaction(conn):
        conn.execute("CREATE TABLE IF NOT EXISTS schema_version ("
                     "version INTEGER PRIMARY KEY, applied_at TEXT NOT NULL)")
        current = stored_version(conn)  # another process may have migrated meanwhile
        _refuse_newer(path, current)
        for version in range(current + 1, SCHEMA_VERSION + 1):
            for step in MIGRATIONS[version - 1]:
                conn.execute(step)
            conn.execute("INSERT INTO schema_version (version, applied_at) VALUES (?, ?)",
                         (version, now_utc()))
