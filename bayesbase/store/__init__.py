"""Patient results store: an embedded SQLite database (standard library ``sqlite3``).

Layer 4: imports ``bayesbase.contract``, ``errors``, ``units``, ``privacy`` and ``data``, and
``bayesbase.io`` (its sibling in the same layer) for one reader (:func:`bayesbase.io.
load_bundle`) and one writer (:func:`bayesbase.io.write_bundle`); fhir never imports the store.

Parts
-----
``schema``      DDL as forward :data:`MIGRATIONS` and the migration runner;
``connection``  where the file lives (:func:`default_db_path`), opening, pragmas, busy retry;
``frames``      conversions between pandas and SQLite, the canonical dtypes of a frame read back;
``checks``      values the store refuses and inputs that contradict themselves;
``importer``    one import as prepare -> plan (:class:`ImportPlan`: rows to add, already
                stored, to replace, conflicts; nothing written) -> apply;
``queries``     results, history, the wide history table, patients, imports, replaced values;
``export``      CSV (formulas neutralised) and FHIR exports, pseudonymised by default;
``forget``      removing a patient and its bytes;
``summaries``   :class:`ImportSummary`, :class:`Conflict`, :class:`ImportConflict`,
                :class:`Removed`;
``store``       :class:`Store`, which composes them.

Where the database lives
------------------------
Every function and :class:`Store` take a ``db`` path. Without one, :func:`default_db_path` is
used: the ``BAYESBASE_DB`` environment variable if set; else ``$XDG_DATA_HOME/bayesbase/
results.sqlite`` when ``XDG_DATA_HOME`` is set; else, on macOS and Windows, the per-user data
directory from ``platformdirs`` when it is installed; else ``~/.local/share/bayesbase/
results.sqlite``.

Tables (schema version 3)
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
``patients_columns``, ``specimens_columns``, ``results_columns`` (version 3) a columnar copy
               of those tables for the whole-store read (:meth:`Store.results`): one Arrow IPC
               stream per chunk of 16,384 primary keys. Triggers delete a chunk's copy in the
               statement that changes any of its rows (whoever writes), so a copy present is
               never stale; a chunk without one is read from its table; every committed store
               write (import, forget, migration: ``transaction.write_transaction``) makes the
               missing copies before its ``COMMIT``. Forget's deleted copies are overwritten
               with zeros like every deleted row.

A missing optional attribute (breed, sex, birth date, method, fasting, sample-quality index,
laboratory) is stored as SQL NULL, never as the text of a missing value ('NaT', 'nan', ...);
a blank state is stored as ''.

Indexes: ``specimens(patient, collected_at)``; ``results(specimen, analyte, replicate)`` (the
UNIQUE index, whose leading column serves every lookup by specimen, so no second index on
``results(specimen)`` is kept).

Import rules
------------
* One transaction per import (``BEGIN IMMEDIATE`` ... ``COMMIT``): every row is stored or none.
  A dry run (``dry_run=True``, ``bayesbase import --dry-run``) makes the plan in a read
  transaction, writes nothing and returns the summary the import would give.
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
Exports are pseudonymised by default (:mod:`bayesbase.privacy`): a patient id becomes ``P-`` +
the first 10 hex digits of HMAC-SHA256(salt, "patient:" + id), a specimen id ``S-`` + 10 hex
digits of HMAC-SHA256(salt, "specimen:" + patient + "|" + specimen). The salt is 32 random
bytes made when the store is created and kept in ``meta``; the same store always gives the same
pseudonym, another store a different one, and the pseudonym cannot be reversed without the salt.
Owner data are never exported; ``source_file`` / ``source_row`` are not exported; dates
(collection, birth) are kept because the analysis needs them.

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

from ..contract import CANONICAL_COLUMNS
from ..privacy import patient_pseudonym, pseudonymise_frame, specimen_pseudonym
from .connection import DEFAULT_TIMEOUT_S, default_db_path
from .export import FORMULA_PREFIXES, neutralise_formulas
from .frames import VALUE_RTOL, coerce_canonical
from .importer import ImportPlan, file_sha256, frame_sha256
from .schema import MIGRATIONS, MISSING_TEXTS, SCHEMA_VERSION
from .store import Store
from .summaries import Conflict, ImportConflict, ImportSummary, Removed

__all__ = [
    "CANONICAL_COLUMNS",
    "DEFAULT_TIMEOUT_S",
    "FORMULA_PREFIXES",
    "MIGRATIONS",
    "MISSING_TEXTS",
    "SCHEMA_VERSION",
    "VALUE_RTOL",
    "Conflict",
    "ImportConflict",
    "ImportPlan",
    "ImportSummary",
    "Removed",
    "Store",
    "coerce_canonical",
    "default_db_path",
    "file_sha256",
    "frame_sha256",
    "neutralise_formulas",
    "patient_pseudonym",
    "pseudonymise_frame",
    "specimen_pseudonym",
]
