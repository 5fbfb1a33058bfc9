"""The whole-store read from the columnar copy kept in the store (schema version 3:
``patients_columns``, ``specimens_columns``, ``results_columns``; :mod:`bayesbase.store.queries`)
against the plainest reader, ``pandas.read_sql`` of the plain SQL join converted with pandas
(the outside reference; written in tests/test_store_read_speed_equivalence.py and imported
here), and against the read of the same store from its tables alone (copies ignored). Frames
must be identical (``assert_frame_equal(check_exact=True)``, dtypes included).

Every writer must leave the copy consistent: after each import (plain, with ``replace``,
chunked, dry run, refused, failing half-way), forget, a migration from schema version 2 and a
write by another tool outside the store's transaction block, every copy present is checked to
hold exactly its chunk's rows, and after every committed store write every chunk has one.
Stores here use chunks of 64 primary keys (the triggers built with other bits) so an invented
store of ~1,000 results spans many chunks."""
from __future__ import annotations

import sqlite3

import numpy as np
import pandas as pd
import pytest

from bayesbase.store import ImportConflict, Store, frames, importer, queries, schema
from test_store_read_speed_equivalence import _invented, reference

BITS = 6  # chunks of 64 primary keys in these tests (the store's own: schema.COLUMNS_CHUNK_BITS)


@pytest.fixture
def small_chunks(monkeypatch):
    """New stores get the columnar copy in chunks of 2**BITS primary keys (triggers and reads)."""
    monkeypatch.setattr(schema, "MIGRATIONS", [*schema.MIGRATIONS[:2], schema._columns_copy_steps(BITS)])
    monkeypatch.setattr(queries, "COLUMNS_CHUNK_BITS", BITS)
    return monkeypatch


def _tables_only(conn, monkeypatch) -> pd.DataFrame:
    """The whole-store read with every copy ignored (each chunk read from its table, in
    primary-key ranges of 37 within it)."""
    with monkeypatch.context() as m:
        m.setattr(queries, "_copies", lambda *a, **k: {})
        m.setattr(queries, "_CHUNK_PKS", 37)
        return queries.results(conn, "x")


def _same_columns(got: dict, want: dict, kinds: dict) -> None:
    for name, kind in kinds.items():
        if kind == "real":
            np.testing.assert_array_equal(got[name], want[name])  # NaN where NULL on both sides
            bits = [np.asarray(x[name]).view(np.int64).tolist() for x in (got, want)]
            assert bits[0] == bits[1], name  # the same 8 bytes of every double
        else:
            assert frames._plain(got[name]).equals(want[name]), name


def check_copies(conn, *, complete: bool) -> int:
    """Every copy present holds exactly its chunk's rows (as the table read gives them); with
    ``complete``, every chunk holding rows has a copy. Returns the number of copies checked."""
    checked = 0
    for table in schema.COLUMNS_TABLES:
        kinds = queries._TABLES[table][0]
        copies = queries._copies(conn, table, True)
        for chunk, blob in copies.items():
            want = queries._columns(conn, table, None, bounds=queries._chunk_bounds(chunk))
            assert len(want["pk"]) > 0, f"{table} chunk {chunk}: a copy of no rows"
            _same_columns(frames.decode_columns(blob, kinds), want, kinds)
            checked += 1
        if complete:
            pks = conn.execute(f"SELECT pk FROM {table}").fetchall()
            missing = {pk >> queries.COLUMNS_CHUNK_BITS for (pk,) in pks} - set(copies)
            assert not missing, f"{table}: chunks {sorted(missing)} without a copy"
    return checked


def check_read(st: Store, monkeypatch, *, complete: bool = True) -> pd.DataFrame:
    """The read equals pandas' read of the join and the tables-only read; the copies are sound."""
    conn = st.connection
    calls = []
    real = queries._columns
    with monkeypatch.context() as m:
        m.setattr(queries, "_columns", lambda *a, **k: calls.append(a[1]) or real(*a, **k))
        got = st.results()
    pd.testing.assert_frame_equal(got, reference(conn), check_exact=True)
    pd.testing.assert_frame_equal(got, _tables_only(conn, monkeypatch), check_exact=True)
    assert check_copies(conn, complete=complete) > 0
    if complete:
        assert calls == []  # every row came from the copies
    return got


def _copies_now(conn) -> dict:
    return {t: queries._copies(conn, t, True) for t in schema.COLUMNS_TABLES}


def test_every_store_writer_keeps_the_copy_consistent(tmp_path, small_chunks):
    f = _invented(seed=11)
    pids = f["patient"].unique()
    first, second = f[f["patient"].isin(pids[:14])], f[f["patient"].isin(pids[14:20])]
    owners = {p: f"Owner of {p}" for p in pids[:14:4]}
    with Store(tmp_path / "s.sqlite") as st:
        conn = st.connection
        st.import_frame(first, "first.csv", owners=owners)
        got = check_read(st, small_chunks)
        assert len(got) == len(first) > 4 * 64  # many chunks of results
        assert conn.execute("SELECT count(*) FROM results_columns").fetchone()[0] >= 5
        st.import_frame(second, "second.csv")
        check_read(st, small_chunks)
        # replace: changed values and methods of stored results (old chunks rewritten)
        fix = first.iloc[::9].copy()
        fix["value"] = fix["value"] * 1.01
        fix["reported_value"] = pd.array([f"{v:.6g}" for v in fix["value"]], dtype="string")
        fix["method"] = pd.array(["other, wet"] * len(fix), dtype="string")
        with pytest.raises(ImportConflict):  # refused: nothing written
            st.import_frame(fix, "fix.csv")
        assert st.import_frame(fix, "fix.csv", dry_run=True).dry_run
        before = _copies_now(conn)
        assert st.import_frame(fix, "fix.csv", replace=True).rows_replaced > 0
        after = _copies_now(conn)
        assert after["results"] != before["results"]
        check_read(st, small_chunks)
        # an import failing half-way rolls back the copies with the rows
        def failing(rows):
            for i, row in enumerate(rows):
                if i == 40:
                    raise RuntimeError("interrupted")
                yield row
        with small_chunks.context() as m:
            m.setattr(st, "_result_rows", failing)
            with pytest.raises(RuntimeError, match="interrupted"):
                st.import_frame(f[f["patient"].isin(pids[20:])], "late.csv")
        assert _copies_now(conn) == after
        # a chunked import (one transaction, several chunks)
        rest = f[f["patient"].isin(pids[20:])]
        importer.import_chunks(conn, [rest.iloc[:150], rest.iloc[150:]], "chunked.csv", "2" * 64)
        check_read(st, small_chunks)
        # forget: the patient's rows are in no copy
        gone = str(pids[3])
        gone_specs = {pk for (pk,) in conn.execute(
            "SELECT s.pk FROM specimens s JOIN patients p ON p.pk = s.patient WHERE p.id = ?", (gone,))}
        assert gone_specs
        st.forget(gone)
        got = check_read(st, small_chunks)
        assert gone not in set(got["patient"])
        for blob in queries._copies(conn, "results", True).values():
            held = frames.decode_columns(blob, queries._TABLES["results"][0])["specimen"].to_pylist()
            assert not gone_specs & set(held)
        for blob in queries._copies(conn, "patients", True).values():
            held = frames._plain(frames.decode_columns(blob, queries._TABLES["patients"][0])["id"]).to_pylist()
            assert gone not in held


def test_write_by_another_tool_removes_the_copies_it_touches(tmp_path, small_chunks):
    path = tmp_path / "s.sqlite"
    f = _invented(seed=12)
    with Store(path) as st:
        st.import_frame(f, "one.csv")
        n_results = st.connection.execute("SELECT count(*) FROM results_columns").fetchone()[0]
    other = sqlite3.connect(path)  # outside the store's transaction block: only the triggers act
    other.execute("PRAGMA foreign_keys = ON")
    other.execute("UPDATE results SET method = 'by hand' WHERE pk = 70")  # one chunk
    other.execute("UPDATE specimens SET haemolysis = 3.5 WHERE pk = 2")
    victim = other.execute("SELECT id FROM patients WHERE pk = 5").fetchone()[0]
    other.execute("DELETE FROM patients WHERE pk = 5")  # cascades to its specimens and results
    other.commit()
    other.close()
    with Store(path) as st:
        conn = st.connection
        left = conn.execute("SELECT count(*) FROM results_columns").fetchone()[0]
        assert 0 < left < n_results
        got = check_read(st, small_chunks, complete=False)
        assert victim not in set(got["patient"]) and "by hand" in set(got["method"])
        st.import_frame(f.iloc[:0], "nothing.csv")  # any committed store write completes the copy
        check_read(st, small_chunks)


def test_copies_of_another_format_or_unreadable_are_not_used(tmp_path, small_chunks):
    path = tmp_path / "s.sqlite"
    with Store(path) as st:
        st.import_frame(_invented(seed=13), "one.csv")
        conn = st.connection
        want = st.results()
        conn.execute("UPDATE results_columns SET format = 'other' WHERE chunk % 3 = 0")
        conn.execute("UPDATE results_columns SET data = x'00ff' WHERE chunk % 3 = 1")
        conn.execute("UPDATE specimens_columns SET data = x'' WHERE chunk = 0")
        pd.testing.assert_frame_equal(st.results(), want, check_exact=True)
        pd.testing.assert_frame_equal(st.results(), reference(conn), check_exact=True)
        st.import_frame(_invented(seed=13).iloc[:0], "nothing.csv")  # other formats replaced
        assert conn.execute("SELECT count(*) FROM results_columns WHERE format = 'other'").fetchone()[0] == 0
        pd.testing.assert_frame_equal(st.results(), want, check_exact=True)


def test_store_migrated_from_schema_version_2(tmp_path, monkeypatch):
    path = tmp_path / "old.sqlite"
    f = _invented(seed=14)
    with monkeypatch.context() as m:
        m.setattr(schema, "MIGRATIONS", schema.MIGRATIONS[:2])
        m.setattr(schema, "SCHEMA_VERSION", 2)
        with Store(path) as st:
            st.import_frame(f, "old.csv", owners={str(f["patient"].iloc[0]): "Invented Owner"})
            old = st.results()  # no copy in a version-2 store: read from the tables
            assert st.schema_version() == 2
    with Store(path) as st:  # migration 3 makes the copies in its own transaction
        assert st.schema_version() == schema.SCHEMA_VERSION >= 3
        assert check_copies(st.connection, complete=True) == 3  # one chunk of each table
        got = check_read(st, monkeypatch)
        pd.testing.assert_frame_equal(got, old, check_exact=True)


def test_empty_and_emptied_store(tmp_path, small_chunks):
    with Store(tmp_path / "s.sqlite") as st:
        f = _invented(seed=15)
        f = f[f["patient"] == f["patient"].iloc[0]]
        st.import_frame(f, "one.csv")
        check_read(st, small_chunks)
        st.forget(str(f["patient"].iloc[0]))
        got = st.results()
        assert got.empty and check_copies(st.connection, complete=True) == 0
        pd.testing.assert_frame_equal(got, reference(st.connection), check_exact=True)
