"""``bayesbase import`` and ``bayesbase check`` streaming a large text table in chunks (issue 11,
item 4): automatically above ``bayesbase.io.chunked.STREAM_ABOVE_BYTES``, or forced with
``--chunk-rows N``.

The reference for every check is the whole-file path of the same commands on the same file
(``Store.import_file`` / ``read_results``, tested elsewhere against published examples and
Python's ``csv`` module): the chunked import must leave every table of the store as the
whole-file import does (compared table by table, every column, with the store's own keys
replaced by the ids they stand for, and through an identified CSV export). SQLite's
documentation is the outside reference for WAL readers not being blocked by a writer and for
``secure_delete``; the bytes of a REAL are packed with Python's ``struct`` (IEEE 754, big
endian, as the SQLite record format stores them). Speed and memory are measured by
``bayesbase bench`` (``import_file``), never here. Demo data are the invented case-library
files, with invented owners.
"""
from __future__ import annotations

import sqlite3
import struct
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from bayesbase.cli.main import main
from bayesbase.errors import ValidationError
from bayesbase.io import chunked
from bayesbase.store import ImportConflict, Store
from bayesbase.store.importer import import_file_chunked
from store_helpers import dump_lines, process_context, reader_child, run_children

ROOT = Path(__file__).resolve().parents[1]
BV = ROOT / "case_library" / "dog_bv_study_example" / "results.csv"  # 576 rows, 12 dogs
OTHER = ROOT / "case_library" / "dog_stable_wellness" / "results.csv"
COLS = BV.read_text(encoding="utf-8").splitlines()[0].split(",")
C = {name: j for j, name in enumerate(COLS)}


# ------------------------------------------------------------------ helpers
def _rows(path: Path = BV) -> list[list[str]]:
    return [ln.split(",") for ln in path.read_text(encoding="utf-8").splitlines()[1:]]


def _write(path: Path, header: list[str], rows: list[list[str]]) -> Path:
    path.write_text("\n".join(",".join(r) for r in [header, *rows]) + "\n", encoding="utf-8")
    return path


def _messy(tmp_path: Path, name: str = "messy.csv") -> Path:
    """The BV study file with invented owners, its rows shuffled (seeded) so that every dog
    and most draws are spread over many chunks, and optional fields left blank on some rows
    (a blank says nothing: the first given value is the one stored)."""
    rng = np.random.default_rng(20261203)
    rows = _rows()
    for k, r in enumerate(rows):
        dog = int(r[C["patient"]][-2:])
        owner = f"Invented Owner {dog:02d}"
        if k % 7 == 0:
            owner = ""  # a blank owner says nothing
        r.append(owner)
        if k % 5 == 1:
            r[C["breed"]] = ""
        if k % 6 == 2:
            r[C["fasted"]] = ""
        if k % 4 == 3:
            r[C["haemolysis"]] = ""
    rows = [rows[i] for i in rng.permutation(len(rows))]
    d03 = [r for r in rows if r[C["patient"]] == "BV-D03"]
    for r in d03[len(d03) // 2:]:  # the later rows change the owner: the last one wins
        r[-1] = "Invented Owner 03 (moved)" if r[-1] else ""
    return _write(tmp_path / name, COLS + ["owner"], rows)


def _earlier(tmp_path: Path) -> Path:
    """An earlier file of two dogs of the study: breed not given (later filled), one value
    different from the study file (a conflict), and an owner (replaced by the study file's)."""
    rows = [r for r in _rows() if r[C["patient"]] in ("BV-D01", "BV-D02")][:60]
    for r in rows:
        r[C["breed"]] = ""
        r.append("Invented Owner Earlier")
    rows[5][C["value"]] = str(float(rows[5][C["value"]]) * 1.5)
    return _write(tmp_path / "earlier.csv", COLS + ["owner"], rows)


#: Each table of the store, read with the store's keys (pk) replaced by the ids they stand
#: for; the import log without its time.
_LOGICAL = {
    "patients": "SELECT id, species, breed, sex, birth_date FROM patients",
    "owners": "SELECT p.id, o.owner FROM owners o JOIN patients p ON p.pk = o.patient",
    "specimens": "SELECT p.id, s.id, s.collected_at, s.state, s.fasted, s.haemolysis, "
                 "s.lipaemia, s.icterus, s.laboratory FROM specimens s "
                 "JOIN patients p ON p.pk = s.patient",
    "results": "SELECT p.id, s.id, r.analyte, r.reported_value, r.reported_unit, r.value, "
               "r.unit, r.censor, r.replicate, r.method, r.import, r.source_row, r.source_file "
               "FROM results r JOIN specimens s ON s.pk = r.specimen "
               "JOIN patients p ON p.pk = s.patient",
    "import_log": "SELECT id, file, sha256, rows_added, rows_skipped, rows_replaced "
                  "FROM import_log",
    "import_patients": "SELECT i.import, p.id FROM import_patients i "
                       "JOIN patients p ON p.pk = i.patient",
    "replaced": "SELECT r.import, p.id, r.entity, r.specimen, r.analyte, r.replicate, "
                "r.field, r.old_value, r.new_value FROM replaced r "
                "LEFT JOIN patients p ON p.pk = r.patient",
    "meta": "SELECT key FROM meta",  # the salt differs from store to store by design
    "schema_version": "SELECT version FROM schema_version",
}


def _logical(db: Path) -> dict:
    con = sqlite3.connect(db)
    try:
        tables = {r[0] for r in con.execute(
            "SELECT name FROM sqlite_master WHERE type = 'table' AND name NOT LIKE 'sqlite_%'")}
        # the columnar copies of schema version 3 are derived from patients, specimens and results
        # (their rows are checked against those tables in tests/test_store_read_columnar_copy.py)
        tables -= {"patients_columns", "specimens_columns", "results_columns"}
        assert tables == set(_LOGICAL), "a table of the store is not compared"
        return {t: sorted(con.execute(q).fetchall(), key=repr) for t, q in _LOGICAL.items()}
    finally:
        con.close()


def _cli(capsys, *args) -> tuple[int, str, str]:
    code = main([str(a) for a in args])
    out = capsys.readouterr()
    return code, out.out, out.err


def _export(db: Path, path: Path) -> str:
    with Store(db) as s:
        s.export_csv(None, path, pseudonymise=False)
    return path.read_text(encoding="utf-8")


# ------------------------------------------------------------------ the same store both ways
@pytest.mark.parametrize("chunk_rows", [13, 250])
def test_chunked_import_stores_what_the_whole_file_import_stores(tmp_path, capsys, chunk_rows):
    src, earlier = _messy(tmp_path), _earlier(tmp_path)
    dbs = {"whole": tmp_path / "whole.sqlite", "chunked": tmp_path / "chunked.sqlite"}
    outs = {}
    for way, db in dbs.items():
        assert _cli(capsys, "import", OTHER, earlier, "--db", db)[0] == 0
        extra = ["--chunk-rows", chunk_rows] if way == "chunked" else []
        code, outs[way], err = _cli(capsys, "import", src, "--db", db, "--replace", *extra)
        assert code == 0, err
    assert outs["whole"] == outs["chunked"]  # the same counts of added, stored, replaced
    whole, chunk = _logical(dbs["whole"]), _logical(dbs["chunked"])
    for table in _LOGICAL:
        assert chunk[table] == whole[table], table
    # the file's facts came through: owners (last given one wins), breeds given on some rows
    owners = dict(whole["owners"])
    assert owners["BV-D03"] == "Invented Owner 03 (moved)"
    assert owners["BV-D01"] == "Invented Owner 01" and len(owners) == 12
    assert {r[2] for r in whole["patients"] if r[0].startswith("BV-")} == {"beagle"}
    assert any(r[6] == "breed" and r[7] is None for r in whole["replaced"])  # filled, logged
    assert any(r[6] == "value" for r in whole["replaced"])  # replaced, logged
    assert _export(dbs["chunked"], tmp_path / "c.csv") == _export(dbs["whole"], tmp_path / "w.csv")


def test_chunked_import_lists_the_conflicts_of_the_whole_file_import(tmp_path):
    src, earlier = _messy(tmp_path), _earlier(tmp_path)
    found = {}
    for way in ("whole", "chunked"):
        db = tmp_path / f"{way}.sqlite"
        with Store(db) as s:
            s.import_file(earlier)
            before = dump_lines(db)
            with pytest.raises(ImportConflict) as exc:
                if way == "whole":
                    s.import_file(src)
                else:
                    import_file_chunked(s.connection, src, 41)
        assert dump_lines(db) == before
        found[way] = exc.value.conflicts
    assert sorted(map(str, found["chunked"])) == sorted(map(str, found["whole"]))
    assert len(found["whole"]) == 1


def test_chunked_dry_run_says_what_the_whole_file_dry_run_says(tmp_path, capsys):
    src, earlier = _messy(tmp_path), _earlier(tmp_path)
    db = tmp_path / "s.sqlite"
    _cli(capsys, "import", earlier, "--db", db)
    before = dump_lines(db)
    whole = _cli(capsys, "import", src, "--db", db, "--dry-run")
    chunk = _cli(capsys, "import", src, "--db", db, "--dry-run", "--chunk-rows", 29)
    assert whole[0] == chunk[0] == 0
    assert whole[1] == chunk[1] and "1 conflicts" in whole[1]
    assert dump_lines(db) == before


def test_chunked_reimport_adds_nothing(tmp_path, capsys):
    src = _messy(tmp_path)
    db = tmp_path / "s.sqlite"
    assert _cli(capsys, "import", src, "--db", db, "--chunk-rows", 50)[0] == 0
    first = _logical(db)
    for extra in (["--chunk-rows", 50], ["--chunk-rows", 7], []):  # chunked again, then whole
        code, out, _ = _cli(capsys, "import", src, "--db", db, *extra)
        assert code == 0 and "nothing new (576 rows already stored)" in out
    again = _logical(db)
    for table in ("patients", "owners", "specimens", "replaced"):
        assert again[table] == first[table], table
    assert again["results"] == first["results"]
    assert [r[3:] for r in again["import_log"]] == [(576, 0, 0)] + [(0, 576, 0)] * 3


# ------------------------------------------------------------------ one bad row stores nothing
@pytest.mark.parametrize("where", ["first", "middle", "last"])
@pytest.mark.parametrize("bad", ["date", "value", "breed"])
def test_one_bad_row_anywhere_stores_nothing(tmp_path, capsys, where, bad):
    rows = _rows()
    at = {"first": 0, "middle": 300, "last": len(rows) - 1}[where]
    if bad == "date":
        rows[at][C["collected_at"]] = "2023-02-29 08:30"  # no such day (Gregorian calendar)
        column = "collected_at"
    elif bad == "value":
        rows[at][C["value"]] = "1e400"  # overflows to infinity (IEEE 754)
        column = "value"
    else:  # the dog's breed differs from the one its other rows give (chunks far apart)
        rows[at][C["breed"]] = "poodle"
        column = "breed"
    path = _write(tmp_path / "bad.csv", COLS, rows)
    db = tmp_path / "s.sqlite"
    assert _cli(capsys, "import", OTHER, "--db", db)[0] == 0
    before = dump_lines(db)
    for extra in ([], ["--chunk-rows", 40], ["--chunk-rows", 40, "--replace"]):
        code, out, err = _cli(capsys, "import", path, "--db", db, *extra)
        assert code == 2 and out == ""
        if bad == "breed":  # the row named is the first that differs from the dog's first one
            assert "column 'breed'" in err and "more than one breed" in err, err
        else:
            assert f"bad.csv, row {at + 2}, column '{column}'" in err, err
        assert "Traceback" not in err
        assert dump_lines(db) == before


def test_problems_of_reader_and_import_are_reported_together(tmp_path):
    rows = _rows()
    for r in rows[100:144]:  # dog BV-D03 (file rows 98-145): poodle in the second chunk only
        r[C["breed"]] = "poodle"
    rows[500][C["value"]] = "-3"  # found by the reader, in a later chunk
    path = _write(tmp_path / "two.csv", COLS, rows)
    db = tmp_path / "s.sqlite"
    with Store(db) as s, pytest.raises(ValidationError) as exc:
        import_file_chunked(s.connection, path, 100)
    where = [(p.file, p.row, p.column) for p in exc.value.problems]
    assert ("two.csv", 502, "value") in where
    (breed,) = [p for p in exc.value.problems if p.column == "breed"]
    assert 102 <= breed.row <= 145 and "'beagle'" in breed.message
    assert "'poodle'" in breed.message
    with Store(db) as s:
        assert len(s.results()) == 0


# ------------------------------------------------------------ automatic streaming, check, assess
def test_large_files_stream_without_the_option(tmp_path, capsys, monkeypatch):
    src = _messy(tmp_path)
    calls = []
    real = chunked.iter_results

    def spy(path, chunksize=chunked.DEFAULT_CHUNKSIZE, now=None, keep=()):
        calls.append(chunksize)
        return real(path, chunksize, now, keep)

    monkeypatch.setattr(chunked, "iter_results", spy)
    monkeypatch.setattr(chunked, "STREAM_ABOVE_BYTES", src.stat().st_size - 1)
    monkeypatch.setattr(chunked, "DEFAULT_CHUNKSIZE", 64)
    assert chunked.stream_chunksize(src) == 64
    assert chunked.stream_chunksize(OTHER) is None  # a small file is read whole
    db = tmp_path / "s.sqlite"
    assert _cli(capsys, "import", src, "--db", db)[0] == 0
    assert calls == [64]
    whole = tmp_path / "w.sqlite"
    monkeypatch.setattr(chunked, "STREAM_ABOVE_BYTES", 1 << 40)
    assert _cli(capsys, "import", src, "--db", whole)[0] == 0
    assert calls == [64]
    assert _logical(db) == _logical(whole)


def test_xlsx_and_fhir_are_read_whole(tmp_path):
    for name in ("r.xlsx", "r.json", "r.parquet"):
        (tmp_path / name).write_bytes(b"x" * 100)
        assert chunked.stream_chunksize(tmp_path / name, 10) is None
    assert chunked.stream_chunksize(tmp_path, 10) is None  # a Parquet dataset directory
    with pytest.raises(ValidationError, match="at least 1"):
        chunked.stream_chunksize(BV, 0)


def test_check_in_chunks_says_what_check_says(tmp_path, capsys):
    src = _messy(tmp_path)
    whole = _cli(capsys, "check", src, "--rows", 0)
    chunk = _cli(capsys, "check", src, "--rows", 0, "--chunk-rows", 33)
    assert whole[0] == chunk[0] == 0
    (count,) = [ln for ln in whole[1].splitlines() if ln.startswith("576 rows, 12 patient(s)")]
    assert count.endswith(": valid.")
    assert f"{count[:-1]} (read in chunks of 33 rows)." in chunk[1].splitlines()
    notes = [sorted(ln for ln in out.splitlines() if ln.startswith("note: "))
             for out in (whole[1], chunk[1])]
    assert notes[0] == notes[1] and notes[0]
    rows = _rows()
    rows[400][C["collected_at"]] = "2023-02-29 08:30"
    bad = _write(tmp_path / "bad.csv", COLS, rows)
    code, out, err = _cli(capsys, "check", bad, "--chunk-rows", 33)
    assert code == 2 and "bad.csv, row 402, column 'collected_at'" in err


@pytest.mark.parametrize("command", ["assess", "report"])
def test_assess_of_a_large_file_says_to_import_it_first(tmp_path, capsys, monkeypatch, command):
    monkeypatch.setattr(chunked, "STREAM_ABOVE_BYTES", 1000)
    code, out, err = _cli(capsys, command, BV)
    assert code == 2 and out == ""
    assert "too large" in err and f"bayesbase import {BV} --db STORE" in err
    assert f"bayesbase {command} --db STORE --patient ID" in err


# ------------------------------------------------------------------ processes (issue 11, item 3)
def test_two_chunked_cli_importers_into_one_store_both_land(tmp_path):
    a = _messy(tmp_path, "a.csv")
    rows = [r + [""] for r in _rows()]
    for r in rows:
        r[C["patient"]] = "OTHER-" + r[C["patient"]]
    b = _write(tmp_path / "b.csv", COLS + ["owner"], rows)
    db = tmp_path / "one.sqlite"
    cmd = [sys.executable, "-m", "bayesbase.cli", "import"]
    procs = [subprocess.Popen([*cmd, str(f), "--db", str(db), "--chunk-rows", "40"],
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for f in (a, b)]
    outs = [p.communicate(timeout=600) for p in procs]
    assert [p.returncode for p in procs] == [0, 0], outs
    with Store(db) as s:
        assert len(s.results()) == 2 * 576
        log = s.imports()
        assert sorted(log["file"]) == ["a.csv", "b.csv"]
        assert sorted(log["rows_added"].astype(int)) == [576, 576]
        assert s.integrity_check() == "ok"


def _paused_chunked(db, path, midway, go, queue):
    def rows(tuples):  # pauses inside the second chunk's insert loop
        rows.calls += 1
        for i, r in enumerate(tuples):
            if rows.calls == 2 and i == 3:
                midway.set()
                go.wait(timeout=120)
            yield r

    rows.calls = 0
    try:
        with Store(db) as s:
            summary = import_file_chunked(s.connection, path, 100, result_rows=rows)
        queue.put(("writer", "ok", summary.rows_added))
    except BaseException as exc:
        queue.put(("writer", "error", f"{type(exc).__name__}: {exc}"))


def test_reader_process_not_blocked_by_a_chunked_import(tmp_path):
    db = tmp_path / "s.sqlite"
    with Store(db) as s:
        s.import_file(OTHER)
        n0 = len(s.results())
    ctx = process_context(__name__)
    midway, go, wq = ctx.Event(), ctx.Event(), ctx.Queue()
    writer = ctx.Process(target=_paused_chunked, args=(str(db), str(BV), midway, go, wq))
    writer.start()
    try:
        assert midway.wait(timeout=300)  # the writer holds its one transaction open
        (got,) = run_children(ctx, reader_child, [(str(db),)])
        assert got == ("reader", "ok", n0)  # the last committed state, no half import
    finally:
        go.set()
        result = wq.get(timeout=300)
        writer.join(timeout=60)
    assert result == ("writer", "ok", 576) and writer.exitcode == 0
    with Store(db) as s:
        assert len(s.results()) == n0 + 576


# ------------------------------------------------------------------ forget (issue 11, item 5)
def test_forget_after_a_chunked_import_leaves_no_byte_behind(tmp_path, capsys):
    src = _messy(tmp_path)
    db = tmp_path / "s.sqlite"
    files = [db, Path(f"{db}-wal"), Path(f"{db}-shm")]
    assert _cli(capsys, "import", src, "--db", db, "--chunk-rows", 45)[0] == 0
    mine = [r for r in _rows() if r[C["patient"]] == "BV-D07"]
    # needles: ids, owner, and each distinctive value as text and as the 8 bytes of a REAL
    gone = {b"BV-D07", b"D07-W", b"Invented Owner 07"}
    gone |= {struct.pack(">d", float(r[C["value"]])) for r in mine
             if len(r[C["value"]].replace(".", "")) >= 4}
    kept = {b"BV-D08", b"Invented Owner 08"}

    def scan(paths, needles):
        blobs = [Path(p).read_bytes() for p in paths if Path(p).exists()]
        return {n for n in needles if any(n in blob for blob in blobs)}

    assert scan(files, {b"BV-D07", b"Invented Owner 07"}) == {b"BV-D07", b"Invented Owner 07"}
    code, out, _ = _cli(capsys, "forget", "--db", db, "BV-D07")
    assert code == 0 and "removed patient BV-D07" in out
    # values shared with a kept dog's rows cannot be expected gone
    shared = {struct.pack(">d", float(r[C["value"]])) for r in _rows()
              if r[C["patient"]] != "BV-D07"}
    gone -= shared
    assert scan(files, gone) == set()
    assert scan(files, kept) == kept
    exports = [tmp_path / "all.csv", tmp_path / "d08.csv", tmp_path / "d08.json"]
    _export(db, exports[0])
    assert _cli(capsys, "export", "--db", db, "--patient", "BV-D08", "--out", exports[1],
                "--identified")[0] == 0
    assert _cli(capsys, "export", "--db", db, "--patient", "BV-D08", "--format", "fhir",
                "--out", exports[2], "--identified")[0] == 0
    assert scan(exports, {b"BV-D07", b"D07-W", b"Invented Owner 07"}) == set()
    assert b"BV-D08" in exports[0].read_bytes()
