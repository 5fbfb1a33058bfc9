"""Opening a results store: where the file lives, the connection's pragmas, the busy retry and
the schema check (creation and migrations in :mod:`bayesbase.store.schema`).

WAL journal (readers are not blocked by a writer), ``PRAGMA busy_timeout`` so a second writer
waits for the first instead of failing, ``synchronous=FULL`` (a committed import survives a
crash), foreign keys on, ``secure_delete`` on (deleted content is overwritten with zeros).
Opening is bounded by the busy timeout as a whole: switching a new file to WAL does not call
SQLite's busy handler, so it is retried on SQLITE_BUSY until the timeout.
"""
from __future__ import annotations

import os
import sqlite3
import sys
import time
from pathlib import Path

from ..errors import StoreError
from .schema import migrate
from .transaction import write_transaction

__all__ = ["DEFAULT_TIMEOUT_S", "default_db_path", "open_connection", "is_busy", "retry_busy",
           "write_transaction"]

#: Busy timeout in seconds: how long a writer waits for another writer before failing.
DEFAULT_TIMEOUT_S = 30.0


def default_db_path() -> Path:
    """Default database file: the ``BAYESBASE_DB`` environment variable if set; else
    ``$XDG_DATA_HOME/bayesbase/results.sqlite`` when ``XDG_DATA_HOME`` is set; else, on macOS
    and Windows, the per-user data directory from ``platformdirs`` when it is installed; else
    ``~/.local/share/bayesbase/results.sqlite``."""
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


def is_busy(exc: BaseException) -> bool:
    """True for SQLITE_BUSY / SQLITE_LOCKED (another connection holds a lock)."""
    code = getattr(exc, "sqlite_errorcode", None)
    if code is not None:
        return (code & 0xFF) in (5, 6)  # SQLITE_BUSY, SQLITE_LOCKED (sqlite3.h)
    text = str(exc).lower()
    return "locked" in text or "busy" in text


def retry_busy(fn, deadline: float):
    """Call ``fn`` until it does not fail with SQLITE_BUSY / SQLITE_LOCKED or the monotonic
    ``deadline`` (the busy timeout) passes; waits 1 ms, doubling to at most 50 ms."""
    wait = 0.001
    while True:
        try:
            return fn()
        except sqlite3.OperationalError as exc:
            left = deadline - time.monotonic()
            if not is_busy(exc) or left <= 0:
                raise
            time.sleep(min(wait, left))
            wait = min(wait * 2, 0.05)


def _set_pragmas(c: sqlite3.Connection, path: Path, timeout: float, deadline: float) -> None:
    c.execute(f"PRAGMA busy_timeout = {int(timeout * 1000)}")
    # Switching a new file to WAL takes an exclusive lock without calling the busy handler:
    # when another process is creating the same store at that moment it fails at once with
    # SQLITE_BUSY, so it is retried here until the busy timeout.
    mode = retry_busy(lambda: c.execute("PRAGMA journal_mode = WAL").fetchone()[0], deadline)
    if str(mode).lower() != "wal":
        raise StoreError(f"{path}: could not switch the database to WAL mode "
                         f"(journal mode is {mode})")
    c.execute("PRAGMA foreign_keys = ON")
    c.execute("PRAGMA synchronous = FULL")
    c.execute("PRAGMA temp_store = MEMORY")
    # deleted content is overwritten with zeros (forget leaves no bytes behind); set here
    # rather than relying on how this SQLite library was compiled
    c.execute("PRAGMA secure_delete = ON")
    if int(c.execute("PRAGMA secure_delete").fetchone()[0]) != 1:
        raise StoreError(f"{path}: this SQLite library cannot turn on secure_delete")


def open_connection(path: Path, timeout: float) -> sqlite3.Connection:
    """A connection to the store at ``path`` (created or migrated when needed), in autocommit
    mode (the store issues its own ``BEGIN``), usable from other threads. Every failure closes
    the connection and raises :class:`~bayesbase.errors.StoreError` naming the file."""
    # opening is bounded by the busy timeout as a whole, however many steps must wait
    deadline = time.monotonic() + timeout
    conn = None
    try:
        conn = sqlite3.connect(str(path), timeout=timeout, isolation_level=None,
                               check_same_thread=False)
        _set_pragmas(conn, path, timeout, deadline)
        retry_busy(lambda: migrate(conn, path), deadline)
        return conn
    except BaseException as exc:
        if conn is not None:
            conn.close()
        if isinstance(exc, sqlite3.OperationalError) and is_busy(exc):
            raise StoreError(
                f"{path}: the store is busy: another process held a lock on it for longer "
                f"than the busy timeout ({timeout:g} s); try again") from exc
        if isinstance(exc, sqlite3.DatabaseError):
            raise StoreError(f"{path}: not a usable bayesbase database ({exc})") from exc
        raise
