"""Helpers shared by the results-store tests (test_store_robustness, test_cli_chunked,
test_data_chunked): reading a store file back whole, and starting child processes that use a
store at the same time as the test."""
from __future__ import annotations

import multiprocessing
import sqlite3
from pathlib import Path

__all__ = ["dump_lines", "process_context", "run_children", "reader_child"]


def dump_lines(db: Path | str) -> list[str]:
    """The store file as SQL text (``iterdump``), one statement a line: two stores hold the
    same rows exactly when their dumps are equal."""
    con = sqlite3.connect(db)
    try:
        return list(con.iterdump())
    finally:
        con.close()


def process_context(module: str):
    """A multiprocessing context for child processes of the test module ``module`` (pass
    ``__name__``): forkserver, so children fork from one clean server process (not the pytest
    process) that has imported pandas, the store and that module once, and each child starts
    in milliseconds; spawn where forkserver is missing (e.g. Windows)."""
    if "forkserver" not in multiprocessing.get_all_start_methods():
        return multiprocessing.get_context("spawn")
    ctx = multiprocessing.get_context("forkserver")
    ctx.set_forkserver_preload(["pandas", "bayesbase.io", "bayesbase.store", module])
    return ctx


def run_children(ctx, target, arglists):
    """Run ``target(*args, queue)`` in one child process per ``args`` of ``arglists``; the
    values the children put on the queue (one each, in the order they arrive). Every child
    must exit with code 0."""
    queue = ctx.Queue()
    procs = [ctx.Process(target=target, args=(*a, queue)) for a in arglists]
    for p in procs:
        p.start()
    out = [queue.get(timeout=300) for _ in procs]
    for p in procs:
        p.join(timeout=60)
    assert [p.exitcode for p in procs] == [0] * len(procs)
    return out


def reader_child(db: str, queue) -> None:
    """A child process that reads the whole store (results and patients) with a 1 s busy
    timeout, so a reader that had to wait for a writer fails; puts ``("reader", "ok", number
    of results)`` or ``("reader", "error", what went wrong)`` on the queue."""
    from bayesbase.store import Store

    try:
        with Store(db, timeout=1.0) as s:
            n = len(s.results())
            s.patients()
        queue.put(("reader", "ok", n))
    except BaseException as exc:
        queue.put(("reader", "error", f"{type(exc).__name__}: {exc}"))
