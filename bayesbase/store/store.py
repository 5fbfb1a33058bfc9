""":class:`Store`: one results database, composing the store's parts (connection, importer,
queries, export, forget)."""
from __future__ import annotations

import sqlite3
from pathlib import Path

from ..contract import CANONICAL_COLUMNS
from ..errors import StoreError
from ..privacy import patient_pseudonym, specimen_pseudonym
from . import export, importer, queries
from .connection import DEFAULT_TIMEOUT_S, default_db_path, open_connection, write_transaction
from .forget import forget
from .schema import stored_version
from .summaries import ImportConflict, ImportSummary, Removed

__all__ = ["Store"]


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
        self._conn = open_connection(self.path, self.timeout)

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
        return stored_version(self.connection)

    def integrity_check(self) -> str:
        """``PRAGMA integrity_check`` ('ok' when the file is sound)."""
        return str(self.connection.execute("PRAGMA integrity_check").fetchone()[0])

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
    def import_file(self, path, replace: bool = False, *, dry_run: bool = False) -> ImportSummary:
        """Import a results file: tidy CSV / XLSX (through :func:`bayesbase.data.read_table`
        and :func:`bayesbase.data.validate`) or a FHIR R4 Bundle in JSON (``.json``, through
        :func:`bayesbase.io.load_bundle`). An ``owner`` column goes to the ``owners`` table
        only. With ``dry_run`` nothing is written (see :meth:`import_frame`)."""
        path = Path(path)
        source = path.name  # as bayesbase.data names files in messages; no directory kept
        sha = importer.file_sha256(path)
        if path.suffix.lower() == ".json":
            from ..io import load_bundle

            canon = load_bundle(path, source=source)
            return self.import_frame(canon, source, sha, replace=replace, dry_run=dry_run)
        from ..io import read_table
        from ..validate import validate

        raw = read_table(path)
        owners = importer.owner_map(raw)
        if owners is not None:
            raw = importer.drop_owner_columns(raw)
        canon = validate(raw, source=source)
        return self.import_frame(canon, source, sha, replace=replace, owners=owners,
                                 dry_run=dry_run)

    def import_frame(self, frame, source: str, sha256: str | None = None,
                     replace: bool = False, *, owners: dict | None = None,
                     dry_run: bool = False) -> ImportSummary:
        """Import a canonical frame (or a raw tidy frame, which is validated first).

        ``owners`` maps patient id -> owner text (stored in ``owners`` only); a raw frame's
        ``owner`` column is used the same way. Returns an :class:`ImportSummary`; raises
        :class:`~bayesbase.errors.ValidationError` (nothing stored) or :class:`ImportConflict`.
        With ``dry_run`` nothing is written: the summary says what the import would do (as
        with ``replace``) and lists the conflicts instead of raising them.
        """
        source = str(source)
        canon, owners = importer.prepare(frame, source, owners)
        if sha256 is None:
            sha256 = importer.frame_sha256(canon[list(CANONICAL_COLUMNS)])
        conn = self.connection
        # a dry run only reads (BEGIN DEFERRED: a snapshot, no write lock on the database)
        with write_transaction(conn, immediate=not dry_run,
                               cleanup=lambda: importer.drop_staging(conn)):
            plan = importer.plan(conn, canon)
            if dry_run:
                summary = plan.summary(source, dry_run=True)
                conn.execute("ROLLBACK")
                return summary
            if plan.conflicts and not replace:
                raise ImportConflict(source, list(plan.conflicts))
            summary = importer.apply(conn, plan, source, sha256, owners,
                                     result_rows=self._result_rows)
        return summary  # committed on leaving the block

    def _result_rows(self, rows):
        """Iterator over the result tuples inserted by one import (kept as a method so a test can
        observe the insert loop)."""
        return iter(rows)

    # -- reading ------------------------------------------------------------------------------
    def results(self, patient: str | None = None):
        """Canonical results frame (all patients, or one), ready for :func:`bayesbase.assess`."""
        return queries.results(self.connection, self.path, patient)

    def history(self, patient: str, analyte: str | None = None):
        """Canonical frame of one patient's results (optionally one analyte), in time order."""
        return queries.history(self.connection, self.path, patient, analyte)

    def history_table(self, patient: str, analyte: str | None = None):
        """Wide display table: one row per specimen (collection time order), one column per
        analyte headed ``analyte (unit)``; cells show the canonical value with ``<``/``>`` for a
        censored value and replicates joined by `` / ``. For display only, not for analysis."""
        return queries.history_table(self.history(patient, analyte))

    def patients(self):
        """One row per patient: id, species, breed, sex, birth_date, specimens, results,
        first and last collection time. Owner data are not included."""
        return queries.patients(self.connection)

    def imports(self):
        """The import log as a frame."""
        return queries.imports(self.connection)

    def replaced(self):
        """What imports with ``replace`` changed: one row per changed field."""
        return queries.replaced(self.connection)

    # -- export -------------------------------------------------------------------------------
    def _export_frame(self, patient, pseudonymise: bool):
        salt = self._salt() if pseudonymise else None
        return export.export_frame(self.connection, self.path, patient, salt)

    def export_csv(self, patient: str | None, path, pseudonymise: bool = True) -> Path:
        """Write a tidy results CSV (:func:`bayesbase.data.to_tidy_csv`: every canonical column,
        values as reported beside the canonical ones; reads back with
        :func:`bayesbase.data.load_results`) for one patient, or all when ``patient`` is None.
        Owner data are never written; with ``pseudonymise`` patient and specimen ids are replaced
        by pseudonyms and ``source_file``/``source_row`` are blanked. A text cell that a
        spreadsheet would run as a formula gets a leading single quote
        (:func:`neutralise_formulas`); numbers are written as numbers."""
        return export.write_csv(self._export_frame(patient, pseudonymise), path)

    def export_fhir(self, patient: str | None, path, pseudonymise: bool = True) -> Path:
        """Write a FHIR R4 Bundle (type collection) for one patient (or all)."""
        return export.write_fhir(self._export_frame(patient, pseudonymise), path)

    # -- forget -------------------------------------------------------------------------------
    def forget(self, patient: str) -> Removed:
        """Remove everything stored under a patient (:func:`bayesbase.store.forget.forget`:
        deleted bytes overwritten, WAL truncated). Returns the total rows removed, with
        ``by_table`` and ``wal_cleared``."""
        return forget(self.connection, self.path, patient)
