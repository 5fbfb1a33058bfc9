"""Results store (bayesbase.store): schema, imports, conflicts, round trips, privacy, crash
safety and concurrency.

External references used by the checks: SQLite's documented pragmas (journal_mode, foreign_keys,
busy_timeout, integrity_check); HMAC-SHA256 (RFC 2104 / FIPS 180-4, via Python's hmac and
hashlib); pandas.testing for frame equality; the XDG Base Directory specification for the
default location. Demo data are invented (bayesbase.testing.synthetic_canonical).
"""
from __future__ import annotations

import hashlib
import hmac
import os
import re
import signal
import sqlite3
import subprocess
import sys
import textwrap
import threading

import numpy as np
import pandas as pd
import pandas.testing as pdt
import pytest

from bayesbase import io as bio, store as st
from bayesbase.errors import StoreError, ValidationError
from bayesbase.store import ImportConflict, Store
from bayesbase.testing import synthetic_canonical

NOW = "2030-01-01"  # reference time for "not in the future" checks of the invented data


def _count(db, table):
    con = sqlite3.connect(db)
    try:
        return con.execute(f"SELECT count(*) FROM {table}").fetchone()[0]
    finally:
        con.close()


def _without_source(frame):
    return frame.drop(columns=["source_file", "source_row"]).reset_index(drop=True)


REQUIRED = ["patient", "species", "specimen", "collected_at", "analyte", "value", "unit"]


def _variant(frame, variant):
    """The frame as given ("full") or with every optional attribute missing ("bare": breed,
    sex, birth_date, method, fasted, sample-quality indices missing, state blank)."""
    if variant == "full":
        return frame
    n = len(frame)
    out = frame.copy()
    for c in ("breed", "sex", "method"):
        out[c] = pd.array([None] * n, dtype=frame[c].dtype)
    out["birth_date"] = pd.Series(pd.NaT, index=out.index, dtype="datetime64[ns]")
    out["fasted"] = pd.array([None] * n, dtype="boolean")
    for c in ("haemolysis", "lipaemia", "icterus"):
        out[c] = np.nan
    out["state"] = pd.array([""] * n, dtype=frame["state"].dtype)
    return st.coerce_canonical(out)


def _results_file(frame, path, variant):
    """A tidy results file of the frame: every canonical column ("full"), or only the required
    columns with values and units as reported ("bare": a file without any optional column)."""
    if variant == "full":
        return bio.to_tidy_csv(frame, path)
    out = pd.DataFrame({c: frame[c].astype(str) for c in REQUIRED[:5]})
    out["collected_at"] = frame["collected_at"].dt.strftime("%Y-%m-%dT%H:%M:%S")
    out["value"] = frame["reported_value"].astype(str)
    out["unit"] = frame["reported_unit"].astype(str)
    out.to_csv(path, index=False)
    return path


VARIANTS = pytest.mark.parametrize("variant", ["full", "bare"])


# --------------------------------------------------------------------------------- schema
def test_schema_pragmas_and_version(tmp_path):
    db = tmp_path / "s.sqlite"
    with Store(db, timeout=7.5) as s:
        c = s.connection
        assert c.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        assert c.execute("PRAGMA foreign_keys").fetchone()[0] == 1
        assert c.execute("PRAGMA busy_timeout").fetchone()[0] == 7500
        assert s.schema_version() == len(st.MIGRATIONS) == st.SCHEMA_VERSION
        tables = {r[0] for r in c.execute("SELECT name FROM sqlite_master WHERE type='table'")}
        assert {"patients", "owners", "specimens", "results", "import_log", "replaced", "meta",
                "schema_version"} <= tables
        idx = {r[0]: r[1] for r in c.execute(
            "SELECT name, sql FROM sqlite_master WHERE type='index' AND sql IS NOT NULL")}
        assert "specimens(patient,collected_at)" in idx["specimens_patient_time"].replace(" ", "")
        salt = c.execute("SELECT value FROM meta WHERE key='pseudonym_salt'").fetchone()[0]
        assert re.fullmatch(r"[0-9a-f]{64}", salt)
        assert c.execute("PRAGMA secure_delete").fetchone()[0] == 1
    with Store(db) as s:  # reopening applies nothing twice
        assert (s.connection.execute("SELECT count(*) FROM schema_version").fetchone()[0]
                == st.SCHEMA_VERSION)


def test_newer_schema_is_refused(tmp_path):
    db = tmp_path / "s.sqlite"
    Store(db).close()
    con = sqlite3.connect(db)
    con.execute("INSERT INTO schema_version VALUES (?, '2099-01-01')", (st.SCHEMA_VERSION + 1,))
    con.commit()
    con.close()
    with pytest.raises(StoreError, match="newer"):
        Store(db)


def test_not_a_database_is_a_store_error(tmp_path):
    bad = tmp_path / "bad.sqlite"
    bad.write_bytes(b"this is not SQLite" * 100)
    with pytest.raises(StoreError, match="bad.sqlite"):
        Store(bad)


def test_default_location_rules(monkeypatch, tmp_path):
    # XDG Base Directory specification: $XDG_DATA_HOME, default ~/.local/share
    monkeypatch.delenv("BAYESBASE_DB", raising=False)
    monkeypatch.setenv("XDG_DATA_HOME", str(tmp_path / "xdg"))
    assert st.default_db_path() == tmp_path / "xdg" / "bayesbase" / "results.sqlite"
    monkeypatch.setenv("BAYESBASE_DB", str(tmp_path / "env.sqlite"))
    assert st.default_db_path() == tmp_path / "env.sqlite"
    monkeypatch.delenv("BAYESBASE_DB")
    monkeypatch.delenv("XDG_DATA_HOME")
    monkeypatch.setattr(sys, "platform", "linux")
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    assert st.default_db_path() == tmp_path / "home" / ".local/share/bayesbase/results.sqlite"


# --------------------------------------------------------------------------------- imports
@VARIANTS
def test_frame_round_trip_and_reimport(tmp_path, variant):
    frame = _variant(synthetic_canonical(3, 6, 5), variant)
    with Store(tmp_path / "s.sqlite") as s:
        first = s.import_frame(frame, "demo.csv", "a" * 64)
        assert (first.rows_added, first.rows_skipped, first.rows_replaced) == (90, 0, 0)
        assert first.patients_added == 3 and first.specimens_added == 18
        pdt.assert_frame_equal(s.results(), frame)
        again = s.import_frame(frame, "demo.csv", "a" * 64)
        assert (again.rows_added, again.rows_skipped, again.rows_replaced) == (0, 90, 0)
        assert again.nothing_new
        log = s.imports()
        assert log["rows_added"].tolist() == [90, 0] and log["rows_skipped"].tolist() == [0, 90]
        one = s.results("DEMO-0001")
        pdt.assert_frame_equal(one, frame[frame["patient"] == "DEMO-0001"].reset_index(drop=True))


@VARIANTS
def test_csv_round_trip_same_canonical_values(tmp_path, variant):
    # tidy CSV -> store -> CSV export (no pseudonyms) -> the same canonical frame
    frame = synthetic_canonical(2, 4, 6)
    frame.loc[3, ["reported_value", "censor"]] = ["<" + frame.loc[3, "reported_value"], "left"]
    src = _results_file(frame, tmp_path / "in.csv", variant)
    original = bio.read_results(src, now=NOW)
    with Store(tmp_path / "s.sqlite") as s:
        summary = s.import_file(src)
        assert summary.rows_added == len(original)
        s.export_csv(None, tmp_path / "out.csv", pseudonymise=False)
        s.export_csv("DEMO-0000", tmp_path / "one.csv", pseudonymise=False)
    back = bio.read_results(tmp_path / "out.csv", now=NOW)
    pdt.assert_frame_equal(_without_source(back), _without_source(original))
    one = bio.read_results(tmp_path / "one.csv", now=NOW)
    assert set(one["patient"]) == {"DEMO-0000"}
    assert len(one) == int((original["patient"] == "DEMO-0000").sum())


@VARIANTS
def test_same_file_twice_adds_nothing(tmp_path, variant):
    src = _results_file(synthetic_canonical(2, 3, 4), tmp_path / "r.csv", variant)
    with Store(tmp_path / "s.sqlite") as s:
        assert s.import_file(src).rows_added == 24
        second = s.import_file(src)
    assert second.rows_added == 0 and second.rows_skipped == 24 and second.nothing_new
    assert _count(tmp_path / "s.sqlite", "results") == 24


def test_one_bad_row_in_ten_thousand_stores_nothing(tmp_path):
    frame = synthetic_canonical(10, 40, 25)  # 10,000 rows
    assert len(frame) == 10_000
    path = bio.to_tidy_csv(frame, tmp_path / "big.csv")
    lines = path.read_text().splitlines()
    bad_line = 6_543  # 0-based line index in the file = spreadsheet row 6,544
    parts = lines[bad_line].split(",")
    col = lines[0].split(",").index("unit")
    analyte = parts[lines[0].split(",").index("analyte")]
    parts[col] = "furlongs"
    for name in ("reported_unit",):
        parts[lines[0].split(",").index(name)] = ""
    lines[bad_line] = ",".join(parts)
    path.write_text("\n".join(lines) + "\n")
    db = tmp_path / "s.sqlite"
    with Store(db) as s:
        with pytest.raises(ValidationError) as err:
            s.import_file(path)
    problems = err.value.problems
    assert [(p.row, p.column) for p in problems] == [(bad_line + 1, "unit")], problems
    assert "furlongs" in str(problems[0]) and "big.csv" in str(problems[0])
    assert analyte  # the row that failed carried an analyte of the panel
    for table in ("results", "specimens", "patients", "import_log"):
        assert _count(db, table) == 0


@VARIANTS
def test_conflict_lists_every_difference_and_stores_nothing(tmp_path, variant):
    frame = _variant(synthetic_canonical(2, 3, 4), variant)
    db = tmp_path / "s.sqlite"
    with Store(db) as s:
        s.import_frame(frame, "first.csv", "1" * 64)
        before = s.results()
        new = frame.copy()
        new.loc[0, ["value", "reported_value"]] = [999.0, "999"]  # one result
        new.loc[new["patient"] == "DEMO-0001", "species"] = "cat"  # one patient
        spec = new.loc[5, "specimen"]
        new.loc[new["specimen"] == spec, "collected_at"] += pd.Timedelta(hours=2)  # one specimen
        extra = frame.iloc[[0]].assign(analyte="sodium", unit="mmol/L", value=150.0,
                                       reported_value="150", reported_unit="mmol/L")
        new = pd.concat([new, extra], ignore_index=True)
        with pytest.raises(ImportConflict) as err:
            s.import_frame(new, "second.csv", "2" * 64)
        kinds = sorted((c.kind, c.field) for c in err.value.conflicts)
        assert kinds == [("patient", "species"), ("result", "value"),
                         ("specimen", "collected_at")]
        text = str(err.value)
        assert "second.csv" in text and "999" in text and "'cat'" in text
        pdt.assert_frame_equal(s.results(), before)  # nothing, not even the new sodium row
        assert len(s.imports()) == 1


@VARIANTS
def test_replace_overwrites_and_logs_old_and_new(tmp_path, variant):
    frame = _variant(synthetic_canonical(1, 2, 3), variant)
    with Store(tmp_path / "s.sqlite") as s:
        s.import_frame(frame, "first.csv", "1" * 64)
        old_value = float(frame.loc[1, "value"])
        new = frame.copy()
        new.loc[1, ["value", "reported_value"]] = [old_value * 2, f"{old_value * 2:g}"]
        summary = s.import_frame(new, "fix.csv", "2" * 64, replace=True)
        assert (summary.rows_added, summary.rows_skipped, summary.rows_replaced) == (0, 5, 1)
        assert [c.field for c in summary.conflicts] == ["value"]
        got = s.results()
        assert got.loc[1, "value"] == old_value * 2
        assert s.connection.execute("SELECT import FROM results WHERE value = ?",
                                    (old_value * 2,)).fetchone()[0] == summary.import_id == 2
        log = s.replaced()
        assert len(log) == 1
        row = log.iloc[0]
        assert (row["entity"], row["field"], row["import"]) == ("result", "value", 2)
        assert repr(old_value) in row["old_value"] and repr(old_value * 2) in row["new_value"]


def test_empty_field_is_filled_not_a_conflict(tmp_path):
    frame = synthetic_canonical(1, 2, 2)
    bare = frame.assign(breed=pd.array([pd.NA] * len(frame), dtype="string"),
                        haemolysis=np.nan)
    with Store(tmp_path / "s.sqlite") as s:
        s.import_frame(bare, "bare.csv", "1" * 64)
        summary = s.import_frame(frame, "full.csv", "2" * 64)  # adds breed and an index
        assert summary.rows_added == 0 and not summary.conflicts
        pdt.assert_frame_equal(_without_source(s.results()), _without_source(frame))
        assert set(s.replaced()["field"]) == {"breed", "haemolysis"}
        # and the other way round: a later file without the fields keeps the stored ones
        assert s.import_frame(bare, "bare2.csv", "3" * 64).nothing_new
        pdt.assert_frame_equal(_without_source(s.results()), _without_source(frame))


def test_inconsistent_rows_inside_one_frame_are_validation_errors(tmp_path):
    frame = synthetic_canonical(1, 2, 2)
    twice = pd.concat([frame, frame.iloc[[0]]], ignore_index=True)
    with Store(tmp_path / "s.sqlite") as s:
        with pytest.raises(ValidationError, match="appears twice"):
            s.import_frame(twice, "twice.csv")
        mixed = frame.copy()
        mixed.loc[0, "species"] = "cat"
        with pytest.raises(ValidationError, match="more than one species"):
            s.import_frame(mixed, "mixed.csv")
        assert s.results().empty


def test_failure_mid_insert_rolls_back(tmp_path):
    class Failing(Store):
        def _result_rows(self, rows):
            for i, r in enumerate(rows):
                if i == 50:
                    raise RuntimeError("disk on fire (simulated)")
                yield r

    frame = synthetic_canonical(2, 4, 25)
    db = tmp_path / "s.sqlite"
    with Failing(db) as s:
        with pytest.raises(RuntimeError, match="simulated"):
            s.import_frame(frame, "x.csv", "1" * 64)
    for table in ("results", "specimens", "patients", "import_log", "import_patients"):
        assert _count(db, table) == 0
    with Store(db) as s:
        assert s.import_frame(frame, "x.csv", "1" * 64).rows_added == len(frame)


# --------------------------------------------------------------------------------- reading
def test_history_and_wide_table(tmp_path):
    frame = synthetic_canonical(2, 5, 3)
    frame.loc[0, ["censor", "reported_value"]] = ["left", "<" + frame.loc[0, "reported_value"]]
    with Store(tmp_path / "s.sqlite") as s:
        s.import_frame(frame, "h.csv", "1" * 64)
        h = s.history("DEMO-0000")
        pdt.assert_frame_equal(h, frame[frame["patient"] == "DEMO-0000"].reset_index(drop=True))
        glu = s.history("DEMO-0000", "GLU")  # a registry alias resolves to the id
        assert set(glu["analyte"]) == {"glucose"} and len(glu) == 5
        wide = s.history_table("DEMO-0000")
        assert len(wide) == 5 and list(wide.columns[:2]) == ["collected_at", "specimen"]
        assert wide["collected_at"].is_monotonic_increasing
        first = frame.iloc[0]
        cell = wide.loc[wide["specimen"] == first["specimen"], f"{first['analyte']} ({first['unit']})"]
        assert cell.iloc[0] == f"<{first['value']:.6g}"
        pats = s.patients()
        assert pats["patient"].tolist() == ["DEMO-0000", "DEMO-0001"]
        assert pats["results"].tolist() == [15, 15] and pats["specimens"].tolist() == [5, 5]
        with pytest.raises(StoreError, match="no patient"):
            s.history("nobody")


# --------------------------------------------------------------------------------- privacy
@VARIANTS
def test_owner_column_is_kept_apart_and_forget_removes_everything(tmp_path, variant):
    frame = _variant(synthetic_canonical(2, 3, 2), variant)
    raw = bio.read_table(bio.to_tidy_csv(frame, tmp_path / "tmp.csv"))
    raw["owner"] = np.where(raw["patient"] == "DEMO-0000", "Invented Owner Alpha",
                            "Invented Owner Beta")
    raw.to_csv(tmp_path / "with_owner.csv", index=False)
    db = tmp_path / "s.sqlite"
    with Store(db) as s:
        s.import_file(tmp_path / "with_owner.csv")
        s.import_frame(frame[frame["patient"] == "DEMO-0000"], "only0.csv", "9" * 64)
        con = s.connection
        owners = dict(con.execute("SELECT p.id, o.owner FROM owners o JOIN patients p "
                                  "ON p.pk = o.patient"))
        assert owners == {"DEMO-0000": "Invented Owner Alpha", "DEMO-0001": "Invented Owner Beta"}
        assert "Alpha" not in s.results().to_csv() and "owner" not in s.patients().columns
        s.export_csv(None, tmp_path / "e.csv", pseudonymise=False)
        assert "Invented Owner" not in (tmp_path / "e.csv").read_text()

        removed = s.forget("DEMO-0000")
        assert removed.by_table == {"results": 6, "specimens": 3, "owners": 1, "replaced": 0,
                                    "import_patients": 2, "patients": 1, "import_log": 1}
        assert int(removed) == sum(removed.by_table.values())
        dump = "\n".join(con.iterdump())
        assert "DEMO-0000" not in dump and "Alpha" not in dump and "only0.csv" not in dump
        # the shared import stays for DEMO-0001, its file name blanked (it may carry an id)
        assert s.imports()["file"].tolist() == [""] and "with_owner" not in dump
        assert removed.wal_cleared
        assert set(s.results()["patient"]) == {"DEMO-0001"}
        assert len(s.results()) == 6 and s.integrity_check() == "ok"
        assert con.execute("PRAGMA foreign_key_check").fetchall() == []
        with pytest.raises(StoreError, match="no patient"):
            s.forget("DEMO-0000")


def test_pseudonymised_exports_hide_ids(tmp_path):
    frame = synthetic_canonical(2, 3, 3)
    with Store(tmp_path / "s.sqlite") as s:
        s.import_frame(frame, "DEMO-0000-results.csv", "1" * 64)
        salt = bytes.fromhex(s.connection.execute(
            "SELECT value FROM meta WHERE key='pseudonym_salt'").fetchone()[0])
        # RFC 2104 HMAC with SHA-256 computed independently of the store
        expected = "P-" + hmac.new(salt, b"patient:DEMO-0000", hashlib.sha256).hexdigest()[:10]
        assert s.pseudonym("DEMO-0000") == expected
        s.export_csv(None, tmp_path / "p.csv")
        s.export_csv(None, tmp_path / "p2.csv")
        s.export_fhir(None, tmp_path / "p.json")
    text = (tmp_path / "p.csv").read_text()
    fhir_text = (tmp_path / "p.json").read_text()
    for t in (text, fhir_text):
        assert "DEMO-0" not in t  # no patient id, specimen id or file name carrying one
        assert expected in t
    assert text == (tmp_path / "p2.csv").read_text()  # stable within a store
    exported = bio.read_results(tmp_path / "p.csv", now=NOW)
    assert all(re.fullmatch(r"P-[0-9a-f]{10}", p) for p in exported["patient"])
    assert all(re.fullmatch(r"S-[0-9a-f]{10}", p) for p in exported["specimen"])
    np.testing.assert_array_equal(np.sort(exported["value"].to_numpy()),
                                  np.sort(frame["value"].to_numpy()))
    with Store(tmp_path / "other.sqlite") as other:  # another store: another salt
        assert other.pseudonym("DEMO-0000") != expected


# --------------------------------------------------------------------------------- concurrency
def test_two_concurrent_imports_both_land(tmp_path):
    db = tmp_path / "s.sqlite"
    Store(db).close()
    a = synthetic_canonical(20, 24, 25)
    b = synthetic_canonical(20, 24, 25).assign(
        patient=lambda f: ("OTHER-" + f["patient"].astype(str)).astype("string"))
    barrier = threading.Barrier(2)
    results, errors = {}, []

    def work(name, frame):
        try:
            with Store(db) as s:
                barrier.wait()
                results[name] = s.import_frame(frame, f"{name}.csv", name * 64)
        except Exception as exc:  # reported below
            errors.append(exc)

    threads = [threading.Thread(target=work, args=(n, f)) for n, f in (("a", a), ("b", b))]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert errors == []
    assert results["a"].rows_added == len(a) and results["b"].rows_added == len(b)
    assert _count(db, "results") == len(a) + len(b)


def test_reader_not_blocked_and_second_writer_waits(tmp_path):
    # WAL: a reader sees the last committed state while a write transaction is open; the
    # second writer waits (busy_timeout) and then lands.
    db = tmp_path / "s.sqlite"
    Store(db).close()
    seen, later = {}, {}

    class Observed(Store):
        def _result_rows(self, rows):
            for i, r in enumerate(rows):
                if i == 100:
                    with Store(db) as reader:
                        seen["rows"] = len(reader.results())
                    t = threading.Thread(target=second_writer)
                    later["thread"] = t
                    t.start()
                yield r

    def second_writer():
        with Store(db, timeout=60) as s2:
            later["summary"] = s2.import_frame(
                synthetic_canonical(1, 2, 2).assign(patient="LATE-1", specimen=lambda f: "L-" +
                                                    f["specimen"].astype(str)), "late.csv")

    frame = synthetic_canonical(2, 10, 25)
    with Observed(db) as s:
        s.import_frame(frame, "first.csv", "1" * 64)
    later["thread"].join()
    assert seen["rows"] == 0
    assert later["summary"].rows_added == 4
    assert _count(db, "results") == len(frame) + 4


# --------------------------------------------------------------------------------- crash
#: Rows of the crash test's file: enough that the half imported when the kill lands no longer fits
#: SQLite's page cache (default cache_size -2000, i.e. about 2 MB; sqlite.org/pragma.html) and is
#: spilled to the WAL file as uncommitted frames, which recovery must then discard (measured: a
#: 3.4 MB WAL at the kill with 100,000 rows; none with 20,000). 1,000,000 rows before: the same
#: claim at ten times the file-making and parsing cost.
KILL_ROWS = 100_000

_CHILD = textwrap.dedent("""
    import sys
    from bayesbase.store import Store

    class Marked(Store):
        def _result_rows(self, rows):
            half = int(sys.argv[3])
            for i, r in enumerate(rows):
                if i == half:
                    print("MIDWAY", flush=True)
                    sys.stdin.readline()  # wait here, inside the insert loop, to be killed
                yield r

    with Marked(sys.argv[1]) as s:
        s.import_file(sys.argv[2])
    print("DONE", flush=True)
""")


@pytest.mark.slow
def test_sigkill_mid_import_leaves_none_of_the_file(tmp_path):
    n_pat = -(-KILL_ROWS // (240 * 25))
    frame = synthetic_canonical(n_pat, 240, 25).iloc[:KILL_ROWS]
    src = bio.to_tidy_csv(frame, tmp_path / "kill.csv")
    db = tmp_path / "s.sqlite"
    with Store(db) as s:  # something committed before: it must survive
        s.import_frame(synthetic_canonical(1, 1, 2).assign(patient="KEEP"), "keep.csv")
    proc = subprocess.Popen([sys.executable, "-c", _CHILD, str(db), str(src), str(len(frame) // 2)],
                            stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    try:
        line = proc.stdout.readline()
        assert line.strip() == "MIDWAY", line
        wal = f"{db}-wal"  # the KEEP store was closed cleanly: its WAL was checkpointed away
        wal_bytes = os.path.getsize(wal) if os.path.exists(wal) else 0
        os.kill(proc.pid, signal.SIGKILL)
    finally:
        proc.wait(timeout=120)
        proc.stdin.close()
        proc.stdout.close()
    assert proc.returncode == -signal.SIGKILL
    # the kill landed mid-import with the uncommitted half on disk (SQLite's WAL format: frames are
    # appended before commit once the page cache spills), not only in the child's memory
    assert wal_bytes > 1_000_000, wal_bytes
    with Store(db) as s:
        assert s.integrity_check() == "ok"
        rows = s.results()
        assert set(rows["patient"]) == {"KEEP"} and len(rows) == 2  # none of the file's rows
        assert list(s.imports()["file"]) == ["keep.csv"]
        assert s.connection.execute("SELECT count(*) FROM specimens").fetchone()[0] == 1


def test_xlsx_import_keeps_owner_apart(tmp_path):
    frame = synthetic_canonical(1, 2, 3)
    raw = bio.read_table(bio.to_tidy_csv(frame, tmp_path / "t.csv"))
    raw.insert(1, "Owner", "Invented Owner Gamma")
    raw.to_excel(tmp_path / "r.xlsx", index=False)  # openpyxl writer
    with Store(tmp_path / "s.sqlite") as s:
        assert s.import_file(tmp_path / "r.xlsx").rows_added == 6
        pdt.assert_frame_equal(_without_source(s.results()), _without_source(frame))
        assert s.connection.execute("SELECT owner FROM owners").fetchall() == [
            ("Invented Owner Gamma",)]
