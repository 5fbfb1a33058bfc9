"""The bounded-memory path (issue 11, item 4): ``bayesbase.io.iter_results`` reads a results
table chunk by chunk, and ``bayesbase.store.importer.import_chunks`` imports the chunks in one
transaction.

The reference for every check is the whole-file path (``read_results`` / ``Store.import_file``,
themselves tested against published examples and Python's csv module elsewhere) and Python's
``csv`` module (RFC 4180) as the outside reader of what ``to_tidy_csv`` writes. Speed and
memory are measured by ``bayesbase bench`` (``validate_file``), never here. Demo data are the
invented case-library files.
"""
from __future__ import annotations

import codecs
import csv
from pathlib import Path

import pandas as pd
import pytest

from bayesbase import io as bio
from bayesbase.errors import ValidationError
from bayesbase.io.chunked import iter_results, read_results_chunked
from bayesbase.store import ImportConflict, Store
from bayesbase.store.importer import file_sha256, import_chunks
from store_helpers import dump_lines

ROOT = Path(__file__).resolve().parents[1]
CASES = sorted((ROOT / "case_library").glob("*/results.csv"))
BV = ROOT / "case_library" / "dog_bv_study_example" / "results.csv"  # 576 rows, 12 dogs
NOW = "2030-01-01"


def _lines(path: Path = BV) -> list[str]:
    return path.read_text(encoding="utf-8").splitlines()


def _write(path: Path, lines: list[str], encoding: str = "utf-8", newline: str = "\n") -> Path:
    path.write_bytes((newline.join(lines) + newline).encode(encoding))
    return path


@pytest.mark.parametrize("case", CASES, ids=lambda p: p.parent.name)
@pytest.mark.parametrize("chunksize", [7, 1_000_000])
def test_chunked_read_gives_the_whole_file_frame(case, chunksize):
    whole = bio.read_results(case, now=NOW)
    chunked = read_results_chunked(case, chunksize=chunksize, now=NOW)
    pd.testing.assert_frame_equal(whole, chunked)
    assert chunked.attrs["n_duplicates_dropped"] == whole.attrs["n_duplicates_dropped"]
    assert sorted(chunked.attrs["notes"]) == sorted(whole.attrs["notes"])
    with open(case, newline="", encoding="utf-8") as fh:  # outside count: Python's csv module
        assert len(chunked) + whole.attrs["n_duplicates_dropped"] == sum(1 for _ in csv.reader(fh)) - 1


def test_chunks_of_one_row_give_the_whole_file_frame():
    case = CASES[0]  # 12 rows: every row its own chunk
    pd.testing.assert_frame_equal(read_results_chunked(case, chunksize=1, now=NOW),
                                  bio.read_results(case, now=NOW))


@pytest.mark.parametrize("encoding,prefix,newline", [
    ("utf-16-le", b"", "\r\n"), ("utf-16-be", b"", "\n"), ("utf-16", b"", "\n"),
    ("utf-8", codecs.BOM_UTF8, "\r\n"), ("cp1252", b"", "\n"), ("utf-8", b"\n\n,,,\n# c\n", "\n"),
])
def test_chunked_read_decodes_like_the_whole_file_reader(tmp_path, encoding, prefix, newline):
    lines = [ln.replace("beagle", "beagle crois\u00e9") for ln in _lines()]
    path = tmp_path / "enc.csv"
    path.write_bytes(prefix + (newline.join(lines) + newline).encode(encoding))
    whole = bio.read_results(path, now=NOW)
    chunked = read_results_chunked(path, chunksize=50, now=NOW)
    pd.testing.assert_frame_equal(whole, chunked)
    assert "beagle crois\u00e9" in set(chunked["breed"])


def _problems(path: Path, chunksize: int) -> list:
    with pytest.raises(ValidationError) as exc:
        read_results_chunked(path, chunksize=chunksize, now=NOW)
    return exc.value.problems


def test_a_bad_row_in_a_late_chunk_is_located_and_nothing_more_is_yielded(tmp_path):
    lines = _lines()
    cells = lines[500].split(",")
    cells[8] = "1e400"  # overflows to infinity (IEEE 754): refused
    lines[500] = ",".join(cells)
    path = _write(tmp_path / "bad.csv", lines)
    whole = pytest.raises(ValidationError, bio.read_results, path, now=NOW).value.problems
    chunks = iter_results(path, chunksize=50, now=NOW)
    got = []
    with pytest.raises(ValidationError) as exc:
        for c in chunks:
            got.append(len(c))
    assert sum(got) < 500  # chunks before the bad one only
    assert [(p.file, p.row, p.column) for p in exc.value.problems] == \
        [(p.file, p.row, p.column) for p in whole] == [("bad.csv", 501, "value")]


def test_problems_across_chunks_name_both_rows(tmp_path):
    lines = _lines()
    first = lines[1].split(",")
    other_species = list(first)
    other_species[1] = "cat"
    other_time = list(first)
    other_time[6] = "2025-09-01 10:45"
    other_value = list(first)
    other_value[8] = "99"
    # each in its own chunk of 50 rows, far from row 2 (the first row of patient BV-D01)
    lines.insert(150, ",".join(other_species))  # file row 151
    lines.insert(300, ",".join(other_time))     # file row 301
    lines.insert(450, ",".join(other_value))    # file row 451
    path = _write(tmp_path / "across.csv", lines)
    for chunksize in (50, 1_000_000):  # across chunks, and within one (the whole-file rules)
        found = {(p.row, p.column) for p in _problems(path, chunksize)}
        assert {(151, "species"), (301, "collected_at"), (451, "value")} <= found, found
    text = "\n".join(str(p) for p in _problems(path, 50))
    assert "(row 2)" in text and "(row 451)" in text and "different values" in text


def test_identical_repeats_across_chunks_are_dropped_and_counted(tmp_path):
    lines = _lines()
    path = _write(tmp_path / "rep.csv", lines + lines[1:4])
    whole = bio.read_results(path, now=NOW)
    chunked = read_results_chunked(path, chunksize=25, now=NOW)
    pd.testing.assert_frame_equal(whole, chunked)
    assert chunked.attrs["n_duplicates_dropped"] == whole.attrs["n_duplicates_dropped"] == 3


def test_a_header_problem_stops_at_the_first_chunk(tmp_path):
    lines = _lines()
    lines[0] = lines[0].replace("analyte", "analyt")
    path = _write(tmp_path / "head.csv", lines)
    problems = _problems(path, 20)
    assert [(p.row, p.message) for p in problems] == [(1, "unknown column 'analyt'")]


def test_an_unclosed_quote_deep_in_the_file_is_located(tmp_path):
    lines = _lines()
    lines[400] = lines[400] + ',"'
    path = _write(tmp_path / "q.csv", lines)
    for read in (lambda p: read_results_chunked(p, chunksize=50), bio.read_results):
        with pytest.raises(ValidationError) as exc:
            read(path)
        assert [(p.file, p.row) for p in exc.value.problems] == [("q.csv", 401)]
        assert "never closed" in exc.value.problems[0].message


# ------------------------------------------------------------------ import in chunks
def _import_chunked(db: Path, path: Path, chunksize: int, replace: bool = False):
    with Store(db) as s:
        return import_chunks(s.connection, iter_results(path, chunksize=chunksize), path.name,
                             file_sha256(path), replace=replace)


def test_chunked_import_stores_what_a_whole_file_import_stores(tmp_path):
    with Store(tmp_path / "whole.sqlite") as s:
        expected = s.import_file(BV)
        want = s.results()
    got = _import_chunked(tmp_path / "chunked.sqlite", BV, 37)
    assert (got.rows_added, got.rows_skipped, got.patients_added, got.specimens_added) == \
        (expected.rows_added, expected.rows_skipped, expected.patients_added,
         expected.specimens_added)
    with Store(tmp_path / "chunked.sqlite") as s:
        pd.testing.assert_frame_equal(s.results(), want)
        log = s.imports()
    assert len(log) == 1 and int(log["rows_added"].iloc[0]) == len(want)


@pytest.mark.parametrize("bad_at", [2, 300, 577])
def test_chunked_import_is_all_or_nothing(tmp_path, bad_at):
    db = tmp_path / "s.sqlite"
    with Store(db) as s:
        s.import_file(CASES[0])
    before = dump_lines(db)
    lines = _lines()
    cells = lines[bad_at - 1].split(",")
    cells[6] = "2023-02-29 08:30"  # no such day (Gregorian calendar)
    lines[bad_at - 1] = ",".join(cells)
    path = _write(tmp_path / "bad.csv", lines)
    with pytest.raises(ValidationError) as exc:
        _import_chunked(db, path, 40)
    assert any(p.row == bad_at and p.column == "collected_at" for p in exc.value.problems)
    assert dump_lines(db) == before


def test_chunked_import_conflict_in_a_late_chunk_stores_nothing(tmp_path):
    db = tmp_path / "s.sqlite"
    lines = _lines()
    with Store(db) as s:
        s.import_file(_write(tmp_path / "one.csv", [lines[0], lines[-1]]))
    before = dump_lines(db)
    cells = lines[-1].split(",")
    cells[8] = str(float(cells[8]) * 2)
    path = _write(tmp_path / "two.csv", lines[:-1] + [",".join(cells)])
    with pytest.raises(ImportConflict):
        _import_chunked(db, path, 40)
    assert dump_lines(db) == before


# ------------------------------------------------------------------ to_tidy_csv and CR
@pytest.mark.parametrize("text", ["\r=1+1", "a\rb", "a\r\nb", "end\r", "\n"])
def test_tidy_csv_quotes_cells_holding_a_carriage_return(tmp_path, text):
    frame = bio.read_results(CASES[0], now=NOW)
    frame["method"] = pd.array([text] * len(frame), dtype="string")
    out = bio.to_tidy_csv(frame, tmp_path / "cr.csv")
    with open(out, newline="", encoding="utf-8") as fh:  # RFC 4180 reader (Python's csv)
        rows = list(csv.DictReader(fh))
    assert len(rows) == len(frame)
    assert {r["method"] for r in rows} == {text}
    back = bio.read_results(out, now=NOW)
    assert len(back) == len(frame)
    assert back["value"].tolist() == frame["value"].tolist()


@pytest.mark.parametrize("where", ["end", "middle", "start"])
def test_a_chunk_of_blank_lines_is_skipped(tmp_path, where):
    # 575 data rows + 25 blank lines: with chunks of 25 one chunk holds blank lines only
    lines = _lines()[:576]
    blank = [""] * 12 + [",,,,"] * 13
    at = {"end": len(lines), "middle": 301, "start": 1}[where]
    path = _write(tmp_path / "blank.csv", lines[:at] + blank + lines[at:])
    whole = bio.read_results(path, now=NOW)
    pd.testing.assert_frame_equal(read_results_chunked(path, chunksize=25, now=NOW), whole)


def test_only_a_header_and_blank_lines_is_the_no_rows_problem(tmp_path):
    path = _write(tmp_path / "none.csv", [_lines()[0]] + [""] * 30)
    (p,) = _problems(path, 10)
    assert (p.file, p.message) == ("none.csv", "no data rows below the header")


def test_a_fhir_bundle_is_read_whole_then_given_in_chunks(tmp_path):
    frame = bio.read_results(CASES[0], now=NOW)
    path = bio.write_bundle(frame, tmp_path / "b.json")
    parts = list(iter_results(path, chunksize=5, now=NOW))
    assert [len(p) for p in parts] == [5, 5, 2]
    pd.testing.assert_frame_equal(pd.concat(parts, ignore_index=True),
                                  bio.read_results(path, now=NOW))
