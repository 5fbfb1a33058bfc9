"""One all-or-nothing write transaction on an autocommit SQLite connection, shared by every
writer of the store (imports, forgetting a patient, schema creation and migrations). It imports
nothing from the store, so :mod:`bayesbase.store.schema` can use it too."""
from __future__ import annotations

import sqlite3
from contextlib import contextmanager

__all__ = ["write_transaction"]


def _before_commit(conn: sqlite3.Connection) -> None:
    """The store's columnar read copy made again where this transaction's writes removed it
    (:func:`bayesbase.store.queries.refresh_columns`; nothing on a connection without one), so
    the commit leaves it complete; imported here, not at the top of the module."""
    from .queries import refresh_columns

    refresh_columns(conn)


@contextmanager
def write_transaction(conn: sqlite3.Connection, *, immediate: bool = True, cleanup=None):
    """One all-or-nothing transaction on an autocommit connection: ``BEGIN IMMEDIATE`` (the
    write lock taken at once, waiting up to the busy timeout) or, with ``immediate=False``,
    ``BEGIN`` (deferred: a read snapshot, no lock until the first write).

    The block may end the transaction itself (``conn.execute("ROLLBACK")`` for a dry run, or
    ``COMMIT``); when it leaves normally with the transaction still open, it is committed. Any
    exception (``BaseException``: an interrupt too) rolls back what is still open and is
    raised again. ``cleanup`` (a callable, e.g. dropping TEMP staging tables) runs last in
    every case. Before that ``COMMIT`` the store's columnar read copy is made again where the
    block's writes removed it (:func:`_before_commit`)."""
    conn.execute("BEGIN IMMEDIATE" if immediate else "BEGIN")
    try:
        yield conn
        if conn.in_transaction:
            _before_commit(conn)
            conn.execute("COMMIT")
    except BaseException:
        if conn.in_transaction:
            conn.execute("ROLLBACK")
        raise
    finally:
        if cleanup is not None:
            cleanup()
