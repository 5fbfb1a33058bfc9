"""Forgetting a patient: every stored row about it removed, its bytes overwritten."""
from __future__ import annotations

from .queries import require_patient
from .summaries import Removed
from .transaction import write_transaction

__all__ = ["forget"]


def _count(conn, sql: str, pk: int) -> int:
    return conn.execute(sql, (pk,)).fetchone()[0]


def _counts(conn, pk: int) -> dict[str, int]:
    """Rows per table that removing patient ``pk`` removes (patients and import_log apart)."""
    return {
        "results": _count(conn, "SELECT count(*) FROM results r JOIN specimens s ON "
                                "s.pk = r.specimen WHERE s.patient = ?", pk),
        "specimens": _count(conn, "SELECT count(*) FROM specimens WHERE patient = ?", pk),
        "owners": _count(conn, "SELECT count(*) FROM owners WHERE patient = ?", pk),
        "replaced": _count(conn, "SELECT count(*) FROM replaced WHERE patient = ?", pk),
        "import_patients": _count(conn, "SELECT count(*) FROM import_patients WHERE "
                                        "patient = ?", pk),
    }


def _delete(conn, pk: int) -> dict[str, int]:
    counts = _counts(conn, pk)
    imports = [r[0] for r in conn.execute(
        "SELECT import FROM import_patients WHERE patient = ?", (pk,))]
    conn.execute("DELETE FROM results WHERE specimen IN "
                 "(SELECT pk FROM specimens WHERE patient = ?)", (pk,))
    conn.execute("DELETE FROM patients WHERE pk = ?", (pk,))  # cascades the rest
    counts["patients"] = 1
    # an import's results and `replaced` rows all belong to patients it links to, so an import
    # left without links holds nothing any more
    orphan = [i for i in imports if conn.execute(
        "SELECT 1 FROM import_patients WHERE import = ? LIMIT 1", (i,)).fetchone() is None]
    conn.executemany("DELETE FROM import_log WHERE id = ?", [(i,) for i in orphan])
    counts["import_log"] = len(orphan)
    kept = [(i,) for i in imports if i not in set(orphan)]
    conn.executemany("UPDATE import_log SET file = '' WHERE id = ?", kept)
    conn.executemany("UPDATE results SET source_file = NULL WHERE import = ? "
                     "AND source_file IS NOT NULL", kept)
    return counts


def forget(conn, path, patient: str) -> Removed:
    """Remove everything stored under a patient: results, specimens, the patient row, owner
    rows, the `replaced` log rows about it, and its import links (an import log entry that no
    longer links to any patient is removed too). The file name of every import that touched the
    patient is blanked (a file name may carry the id or the animal's name); the other patients'
    rows from such an import then show an empty ``source_file``.

    Deleted content is overwritten with zeros (``secure_delete``, set on every connection) and
    the WAL is then checkpointed and truncated, so the patient's ids and values are left in no
    byte of the database files. Returns the total rows removed; the returned int's ``by_table``
    gives the count per table and ``wal_cleared`` is False when another connection kept the WAL
    from being truncated (it is cleared at a later checkpoint)."""
    with write_transaction(conn):
        counts = _delete(conn, require_patient(conn, path, patient))
    removed = Removed(counts)
    busy = conn.execute("PRAGMA wal_checkpoint(TRUNCATE)").fetchone()[0]
    removed.wal_cleared = int(busy) == 0
    return removed
