"""One all-or-nothing write transaction on an autocommit SQLite connection, shared by every
writer of the store (imports, forgetting a patient, schema creation and migrations). It imports
nothing from the store, so :mod:`bayesbase.store.schema` can use it too."""
from __future__ import annotations

import sqlite3
from contextlib import contextmanager

__all__ = ["write_transaction"]


@contextmanager
def write_transaction(conn: sqlite3.Connection, *, immediate: bool = True, cleanup=None):
    """One all-or-nothing transaction on an autocommit connection: ``BEGIN IMMEDIATE`` (the
    write lock taken at once, waiting up to the busy timeout) or, with ``immediate=False``,
    ``BEGIN`` (deferred: a read snapshot, no lock until the first write).

    The block may end the transaction itself (``conn.execute("ROLLBACK")`` for a dry run, or
    ``COMMIT``); when it leaves normally with the transaction still open, it is committed. Any
    exception (``BaseException``: an interrupt too) rolls back what is still open and is
    raised again. ``cleanup`` (a callable, e.g. dropping TEMP staging tables) runs last in
    every case."""
    conn.execute("BEGIN IMMEDIATE" if immediate else "BEGIN")
    try:
        yield conn
        if conn.in_transaction:
            conn.execute("COMMIT")
    except BaseException:
        if conn.in_transaction:
            conn.execute("ROLLBACK")
        raise
    finally:
        if cleanup is not None:
            cleanup()
