"""Seeded mutation corpus (issue 11, item 2): mutated copies of the case library's valid results
files run through the real command line (``check``, ``assess`` and ``import --db``).

For every mutant and command: the exit code is 0 or the documented error code 2 (``bayesbase``
prints every input problem as ``bayesbase: error: ...`` and exits 2); no Python traceback; a
failure names the file and a row, a column or a FHIR resource path (or says what is wrong with
the whole file); an import that failed left every table of the store exactly as it was (row
counts before/after, and the same content digest), an import that succeeded added rows.

The bulk runs in process through ``bayesbase.cli.main.main(argv)`` with captured output (fast);
a small sample runs through real subprocesses (``python -m bayesbase.cli ...``, 60 s timeout: no
hang), and a larger subprocess sample is marked ``slow``.

External references: RFC 4180 (CSV: quoting, CRLF), the Unicode standard (byte-order marks,
UTF-16/UTF-32 encodings, Arabic-Indic and full-width digits), IEEE 754 binary64 (1e308 is
finite, 1e400 overflows to infinity, 1e-400 underflows to 0), the Gregorian calendar
(2023-02-29 does not exist; 2024-02-29 does), OWASP "CSV Injection" guidance (=, +, -, @, tab
and carriage return as formula prefixes), ECMA-376 (an XLSX file is a ZIP archive of XML
parts), RFC 8259 (JSON) and HL7 FHIR R4 (Bundle/entry/resource). The corpus is made from the
invented case-library files; no real patient.
"""
from __future__ import annotations

import contextlib
import csv
import hashlib
import io
import json
import re
import shutil
import sqlite3
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from bayesbase.cli.main import main

ROOT = Path(__file__).resolve().parents[1]
CASES = sorted((ROOT / "case_library").glob("*/results.csv"))
#: files small enough to assess in a fraction of a second (assess runs on these only)
SMALL = [p for p in CASES if p.read_bytes().count(b"\n") <= 40]
SEED = 20261203
N_TEXT, N_XLSX, N_FHIR = 240, 30, 40  # in-process corpus: 310 mutants
#: subprocess samples: 12 spread evenly over the corpus, and (slow) at least 24 chosen with a
#: seeded rng so that together they carry every kind of mutation in MUTATION_KINDS (80 evenly
#: spread before: each mutant costs two or three interpreter start-ups; the 310 mutants all run
#: in process above, so the subprocess tier checks the real process boundary, kind by kind)
N_SUBPROCESS, N_SUBPROCESS_SLOW = 12, 24
ERROR_CODE = 2  # documented: every input problem exits 2 (bayesbase.cli.common.err)

# ------------------------------------------------------------------ values a mutation writes
NUMBERS = ["1e308", "1e400", "-1e400", "1e-400", "NaN", "nan", "inf", "-Infinity", "0", "-0",
           "-5", "99999999999999999999999999", "0x1A", "1,5", "1.2.3", "\u0661\u0662",
           "\uff11\uff12", "\U0001d7cf", "<", ">=", "<1e400", "5e-324", "2**10", "1_000",
           "\u00bd", "+", "", " ", "12 mg", "1e+308", "-1e308"]
DATES = ["0000-00-00", "9999-12-31", "2023-02-29", "2024-02-29", "2024-13-01", "2024-00-10",
         "31/02/2024", "2024-03-05T24:00", "2024-03-05T25:61", "1677-09-21", "2262-04-12",
         "0001-01-01", "20240305", "2024", "2024-03", "05/03/24", "yesterday", "",
         "2024-03-05T09:30+99:00", "2024-03-05T09:30:00.123456789123Z", "-2024-03-05",
         "\u0662\u0660\u0662\u0664-03-05", "2024-03-05 09:30 PM", "1e400"]
FORMULA = ["=", "+", "-", "@", "\t", "\r", "=HYPERLINK(\"x\")&", "@SUM(1)+"]
BOMS = [b"\xef\xbb\xbf", b"\xff\xfe", b"\xfe\xff", b"\x00\x00\xfe\xff", b"\xff\xfe\x00\x00"]
ENCODINGS = ["utf-16-le", "utf-16-be", "utf-16", "utf-32", "utf-32-le", "cp1252", "latin-1",
             "utf-8-sig", "mac-roman", "shift_jis", "cp437", "utf-7"]
ODD_TEXT = ["Bichon Fris\u00e9", "\u00b5mol/L", "\u03bcmol/L", "K\u00f6nig", "\u202eevil",
            "\u200bzero", "caf\u00e9\u0301", "\U0001f436", "\x1b[31mred", "x"]


# ------------------------------------------------------------------ row-level mutations
def _cell_cols(rows, names):
    header = [h.strip().lower() for h in rows[0]]
    return [j for j, h in enumerate(header) if h in names] or list(range(len(header)))


def _data_row(rng, rows):
    return int(rng.integers(1, len(rows))) if len(rows) > 1 else 0


def r_delete_column(rng, rows):
    j = int(rng.integers(len(rows[0])))
    return [r[:j] + r[j + 1:] for r in rows]


def r_duplicate_column(rng, rows):
    j = int(rng.integers(len(rows[0])))
    return [r[:j + 1] + r[j:j + 1] + r[j + 1:] for r in rows]


def r_swap_header(rng, rows):
    i, j = rng.choice(len(rows[0]), 2, replace=False)
    h = list(rows[0])
    h[i], h[j] = h[j], h[i]
    return [h] + rows[1:]


def r_swap_columns(rng, rows):  # whole columns: still a valid file
    i, j = rng.choice(len(rows[0]), 2, replace=False)
    out = []
    for r in rows:
        r = list(r)
        if max(i, j) < len(r):
            r[i], r[j] = r[j], r[i]
        out.append(r)
    return out


def r_drop_header(rng, rows):
    return rows[1:]


def r_header_again(rng, rows):  # the header line repeated inside the data
    k = int(rng.integers(1, len(rows) + 1))
    return rows[:k] + [list(rows[0])] + rows[k:]


def r_duplicate_header_name(rng, rows):
    i, j = rng.choice(len(rows[0]), 2, replace=False)
    h = list(rows[0])
    h[j] = h[i].upper() if rng.random() < 0.5 else h[i]
    return [h] + rows[1:]


def r_empty_cells(rng, rows):
    rows = [list(r) for r in rows]
    for _ in range(int(rng.integers(1, 6))):
        i = _data_row(rng, rows)
        if rows[i]:
            rows[i][int(rng.integers(len(rows[i])))] = ""
    return rows


def _set_cells(rng, rows, names, values, n_max=4):
    rows = [list(r) for r in rows]
    cols = _cell_cols(rows, names)
    for _ in range(int(rng.integers(1, n_max + 1))):
        i, j = _data_row(rng, rows), int(rng.choice(cols))
        if i and j < len(rows[i]):
            rows[i][j] = str(rng.choice(values))
    return rows


def r_numbers(rng, rows):
    return _set_cells(rng, rows, {"value", "replicate", "haemolysis", "lipaemia", "icterus"},
                      NUMBERS)


def r_dates(rng, rows):
    return _set_cells(rng, rows, {"collected_at", "birth_date"}, DATES)


def r_formula(rng, rows):
    rows = [list(r) for r in rows]
    cols = _cell_cols(rows, {"patient", "specimen", "breed", "method", "analyte", "unit"})
    for _ in range(int(rng.integers(1, 5))):
        i, j = _data_row(rng, rows), int(rng.choice(cols))
        if i and j < len(rows[i]):
            rows[i][j] = str(rng.choice(FORMULA)) + rows[i][j]
    return rows


def r_long_cell(rng, rows):  # a 1 MB field
    rows = [list(r) for r in rows]
    i = _data_row(rng, rows)
    if i:
        j = int(rng.integers(len(rows[i])))
        rows[i][j] = str(rng.choice(["x", "9", "\u00e9", ",", "\""])) * 1_000_000
    return rows


def r_odd_text(rng, rows):
    return _set_cells(rng, rows, {"breed", "unit", "method", "patient", "analyte", "species"},
                      ODD_TEXT)


def r_extra_field(rng, rows):
    rows = [list(r) for r in rows]
    i = int(rng.integers(len(rows)))
    rows[i] = rows[i] + [""] * int(rng.integers(1, 4))
    return rows


def r_short_row(rng, rows):
    rows = [list(r) for r in rows]
    i = _data_row(rng, rows)
    if i:
        rows[i] = rows[i][:int(rng.integers(len(rows[i])))]
    return rows


def r_duplicate_rows(rng, rows):
    i = _data_row(rng, rows)
    dup = list(rows[i])
    if rng.random() < 0.5 and len(dup) > 1:  # same key, another value
        cols = _cell_cols(rows, {"value"})
        if cols[0] < len(dup):
            dup[cols[0]] = "77"
    return rows + [dup]


def r_shuffle_rows(rng, rows):  # still valid
    body = list(rows[1:])
    rng.shuffle(body)
    return [rows[0]] + body


ROW_MUTATIONS = (r_delete_column, r_duplicate_column, r_swap_header, r_swap_columns,
                 r_drop_header, r_header_again, r_duplicate_header_name, r_empty_cells, r_numbers,
                 r_dates, r_formula, r_long_cell, r_odd_text, r_extra_field, r_short_row,
                 r_duplicate_rows, r_shuffle_rows)


def _write_rows(rows, rng) -> bytes:
    delimiter = str(rng.choice([",", ",", ",", ";", "\t", "|"]))
    buf = io.StringIO()
    csv.writer(buf, delimiter=delimiter, lineterminator="\n").writerows(rows)
    return buf.getvalue().encode("utf-8", "surrogatepass")


# ------------------------------------------------------------------ byte-level mutations
def b_truncate(rng, data):  # cut anywhere, usually mid-row
    return data[:int(rng.integers(len(data) + 1))]


def b_flip(rng, data):
    a = bytearray(data)
    for _ in range(int(rng.integers(1, 9))):
        if a:
            a[int(rng.integers(len(a)))] = int(rng.integers(256))
    return bytes(a)


def _insert(rng, data, piece: bytes, n: int = 1):
    for _ in range(n):
        k = int(rng.integers(len(data) + 1))
        data = data[:k] + piece + data[k:]
    return data


def b_nul(rng, data):
    return _insert(rng, data, b"\x00" * int(rng.integers(1, 4)), int(rng.integers(1, 4)))


def b_random_bytes(rng, data):
    return _insert(rng, data, rng.bytes(int(rng.integers(1, 64))))


def b_bom(rng, data):
    bom = BOMS[int(rng.integers(len(BOMS)))]
    where = rng.integers(3)
    if where == 0:
        return bom + data
    if where == 1:
        return bom + bom + data
    return _insert(rng, data, bom, 2)


def b_encoding(rng, data):
    text = data.decode("utf-8", "replace")
    if rng.random() < 0.5:
        text = text.replace("umol/L", "\u00b5mol/L").replace("mixed breed", "m\u00e9tis")
    enc = str(rng.choice(ENCODINGS))
    raw = text.encode(enc, "replace")
    if enc.startswith("utf-16") and rng.random() < 0.3:
        raw = raw[:len(raw) - 1]  # an odd number of bytes
    return raw


def b_newlines(rng, data):
    parts = data.split(b"\n")
    ends = [b"\n", b"\r\n", b"\r", b"\n\n", b"\r\r\n"]
    return b"".join(p + (ends[int(rng.integers(len(ends)))] if k < len(parts) - 1 else b"")
                    for k, p in enumerate(parts))


def b_blank_lines(rng, data):
    return _insert(rng, data, str(rng.choice(["\n", "\n\n", ",,,,\n", " \t\n", "#x\n"])).encode(),
                   int(rng.integers(1, 4)))


def b_quotes(rng, data):
    return _insert(rng, data, str(rng.choice(['"', '""', '"x"y', "'", '"\n'])).encode(),
                   int(rng.integers(1, 3)))


def b_delimiters(rng, data):
    return _insert(rng, data, str(rng.choice([",", ";", "\t", "|", ",,,"])).encode(),
                   int(rng.integers(1, 4)))


def b_empty(rng, data):
    return [b"", b"\n", b"\xef\xbb\xbf", b"\x00", b"\xff\xfe", data.split(b"\n")[0] + b"\n",
            data.split(b"\n")[0]][int(rng.integers(7))]


BYTE_MUTATIONS = (b_truncate, b_flip, b_nul, b_random_bytes, b_bom, b_encoding, b_newlines,
                  b_blank_lines, b_quotes, b_delimiters, b_empty)


def text_mutant(i: int) -> tuple[bytes, str, str]:
    """(bytes, suffix, description) of text mutant ``i`` (seeded: the same every run)."""
    rng = np.random.default_rng([SEED, i])
    case = CASES[int(rng.integers(len(CASES)))]
    rows = list(csv.reader(io.StringIO(case.read_text(encoding="utf-8"))))
    done = [case.parent.name]
    for _ in range(int(rng.integers(0, 3))):
        m = ROW_MUTATIONS[int(rng.integers(len(ROW_MUTATIONS)))]
        rows = m(rng, rows)
        done.append(m.__name__)
    data = _write_rows(rows, rng)
    n_bytes = int(rng.integers(0 if len(done) > 1 else 1, 3))
    for _ in range(n_bytes):
        m = BYTE_MUTATIONS[int(rng.integers(len(BYTE_MUTATIONS)))]
        data = m(rng, data)
        done.append(m.__name__)
    suffix = str(rng.choice([".csv", ".csv", ".csv", ".tsv", ".txt"]))
    return data, suffix, " ".join(done)


# ------------------------------------------------------------------ XLSX mutants
XLSX_CELLS = [1e308, -1.0, 0.0, float("nan"), float("inf"), True, "=1+1", "=A1/0", "#DIV/0!",
              None, "", "2024-02-30", 10**30, "\u0661\u0662", "x" * 40_000]


def xlsx_mutant(i: int, tmp: Path) -> tuple[bytes, str, str]:
    """An XLSX file written from a case file with openpyxl, then mutated: odd cell values
    (numbers, booleans, formulas, errors, datetimes), blank rows above the header, or the ZIP
    archive itself damaged (truncated, bytes changed, a part removed)."""
    import datetime as dt
    import zipfile

    from openpyxl import Workbook
    from openpyxl.cell.cell import ILLEGAL_CHARACTERS_RE  # what a worksheet cannot hold

    rng = np.random.default_rng([SEED, 10_000 + i])
    case = CASES[int(rng.integers(len(CASES)))]
    rows = list(csv.reader(io.StringIO(case.read_text(encoding="utf-8"))))
    done = [case.parent.name]
    if rng.random() < 0.4:
        m = ROW_MUTATIONS[int(rng.integers(len(ROW_MUTATIONS)))]
        if m is not r_long_cell:  # a worksheet cell holds at most 32,767 characters
            rows = m(rng, rows)
            done.append(m.__name__)
    wb = Workbook()
    ws = wb.active
    for _ in range(int(rng.integers(0, 3))):
        ws.append([])
    for r in rows:
        out = []
        for v in r:
            v = ILLEGAL_CHARACTERS_RE.sub("", v)
            out.append(float(v) if re.fullmatch(r"\d+(\.\d+)?", v) else v)
        ws.append(out)
    for _ in range(int(rng.integers(0, 4))):
        cell = ws.cell(row=int(rng.integers(1, ws.max_row + 2)),
                       column=int(rng.integers(1, ws.max_column + 2)))
        choice = int(rng.integers(len(XLSX_CELLS) + 2))
        if choice == len(XLSX_CELLS):
            cell.value = dt.datetime(2024, 3, 5, 9, 30)
        elif choice == len(XLSX_CELLS) + 1:
            cell.value = dt.time(9, 30)
        else:
            v = XLSX_CELLS[choice]
            cell.value = v if not isinstance(v, float) or np.isfinite(v) else str(v)
        done.append("cell")
    path = tmp / f"x{i}.xlsx"
    wb.save(path)
    data = path.read_bytes()
    kind = int(rng.integers(5))
    if kind == 0:
        data = b_truncate(rng, data)
        done.append("zip-truncated")
    elif kind == 1:
        data = b_flip(rng, data)
        done.append("zip-bytes")
    elif kind == 2:
        with zipfile.ZipFile(path) as z:
            names = z.namelist()
            drop = str(rng.choice(names))
            parts = {n: z.read(n) for n in names if n != drop}
        buf = io.BytesIO()
        with zipfile.ZipFile(buf, "w") as z:
            for n, b in parts.items():
                z.writestr(n, b)
        data = buf.getvalue()
        done.append(f"zip-without-{drop}")
    elif kind == 3 and rng.random() < 0.5:
        data = rng.bytes(len(data) // 10)  # not a ZIP archive at all
        done.append("not-zip")
    suffix = str(rng.choice([".xlsx", ".xlsx", ".xlsm"]))
    return data, suffix, " ".join(done)


# ------------------------------------------------------------------ FHIR JSON mutants
def _fhir_base(case: Path) -> dict:
    from bayesbase.io import bundle_dict, read_results

    return bundle_dict(read_results(case, now="2030-01-01"))


_FHIR_BASES: dict[Path, str] = {}


def _walk(obj, path=()):
    yield path, obj
    if isinstance(obj, dict):
        for k, v in obj.items():
            yield from _walk(v, path + (k,))
    elif isinstance(obj, list):
        for k, v in enumerate(obj):
            yield from _walk(v, path + (k,))


FHIR_VALUES = [None, [], {}, "", "x", 0, -1, 1e308, 10**400, True, [None], {"a": 1}, "1e400",
               "2023-02-29", "\u0000", "\u202e", 42.5, "=1+1", [[[[]]]]]


def _fhir_mutate(rng, obj):
    nodes = list(_walk(obj))[1:]
    path, _ = nodes[int(rng.integers(len(nodes)))]
    parent = obj
    for k in path[:-1]:
        parent = parent[k]
    key = path[-1]
    kind = int(rng.integers(4))
    if kind == 0:
        del parent[key]
        return f"del {path}"
    if kind == 1 and isinstance(parent, list):
        parent.append(json.loads(json.dumps(parent[key])))
        return f"dup {path}"
    v = FHIR_VALUES[int(rng.integers(len(FHIR_VALUES)))]
    parent[key] = v
    return f"set {path}"


def fhir_mutant(i: int) -> tuple[bytes, str, str]:
    """A FHIR R4 Bundle written from a case file, then mutated: keys removed, entries
    duplicated, values replaced by values of other JSON types, or the JSON text itself
    damaged (truncated, bytes changed, NaN literals, duplicate keys, deep nesting, another
    encoding)."""
    rng = np.random.default_rng([SEED, 20_000 + i])
    case = SMALL[int(rng.integers(len(SMALL)))]
    if case not in _FHIR_BASES:
        _FHIR_BASES[case] = json.dumps(_fhir_base(case))
    obj = json.loads(_FHIR_BASES[case])
    done = [case.parent.name]
    for _ in range(int(rng.integers(1, 4))):
        done.append(_fhir_mutate(rng, obj))
    text = json.dumps(obj)
    kind = int(rng.integers(8))
    if kind == 0:
        text = text[:int(rng.integers(len(text)))]
        done.append("truncated")
    elif kind == 1:
        text = text.replace('"value": ', '"value": NaN, "value": ', 1)
        done.append("NaN and duplicate key")
    elif kind == 2:
        text = text.replace('"entry": ', '"entry": ' + "[" * 100_000, 1)
        done.append("deep nesting")
    data = text.encode("utf-8")
    if kind == 3:
        data = b_flip(rng, data)
        done.append("bytes")
    elif kind == 4:
        data = text.encode(str(rng.choice(["utf-16", "utf-16-le", "utf-32", "cp1252"])), "replace")
        done.append("encoding")
    elif kind == 5:
        data = b"\xef\xbb\xbf" + data
        done.append("bom")
    return data, ".json", " ".join(done)


# ------------------------------------------------------------------ running the command line
def run_in_process(argv: list[str]) -> tuple[int, str, str]:
    """``bayesbase <argv>`` in this process: (exit code, stdout, stderr); an exception other
    than SystemExit escaping ``main`` is the crash this corpus looks for (a traceback)."""
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        try:
            rc = main(argv)
        except SystemExit as exc:
            rc = exc.code if isinstance(exc.code, int) else 1
        except BaseException as exc:  # noqa: BLE001 - reported as the crash it is
            import traceback

            rc = -1
            err.write("Traceback (most recent call last):\n" + traceback.format_exc())
            if isinstance(exc, KeyboardInterrupt):
                raise
    return rc, out.getvalue(), err.getvalue()


def run_subprocess(argv: list[str], cwd: Path) -> tuple[int, str, str]:
    res = subprocess.run([sys.executable, "-m", "bayesbase.cli", *argv], capture_output=True,
                         text=True, errors="replace", cwd=cwd, timeout=60)
    return res.returncode, res.stdout, res.stderr


def store_state(db: Path) -> tuple[dict, str]:
    """Row count of every table and a digest of the whole content (sqlite3, read only)."""
    con = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    try:
        tables = [r[0] for r in con.execute(
            "SELECT name FROM sqlite_master WHERE type='table' ORDER BY name")]
        counts = {t: con.execute(f'SELECT count(*) FROM "{t}"').fetchone()[0] for t in tables}
        digest = hashlib.sha256("\n".join(con.iterdump()).encode("utf-8", "replace")).hexdigest()
    finally:
        con.close()
    return counts, digest


#: Messages about a whole file, which has no row or column to name.
WHOLE_FILE = re.compile(
    r"cannot read as XLSX|byte-order mark|is not valid [\w-]+ text|file is empty|no data rows|"
    r"\.xls format|not UTF-8 text, so not FHIR JSON|JSON is nested too deeply|"
    r"but is not valid UTF", re.I)
#: A located problem: a row, a column, a FHIR resource path, or (a conflict with the store) the
#: patient, specimen and analyte of the stored value.
LOCATED = re.compile(r"row \d+|column '|Bundle[.\[]|entry\[|patient .+, specimen .+|"
                     r"line \d+, column \d+")


def failures_of(name: str, command: str, rc: int, out: str, err: str) -> list[str]:
    """What is wrong with one run (empty when it behaved)."""
    bad = []
    if rc not in (0, ERROR_CODE):
        bad.append(f"exit code {rc}")
    if "Traceback" in err or "Traceback" in out:
        bad.append("traceback: " + err[-1500:])
    if rc == ERROR_CODE:
        if name not in err:
            bad.append(f"error does not name the file: {err[:300]!r}")
        if not (LOCATED.search(err) or WHOLE_FILE.search(err)):
            bad.append(f"error names no row, column or resource: {err[:300]!r}")
    return bad


def check_mutant(path: Path, db_template: Path, tmp: Path, runner, assess_too: bool) -> list[str]:
    """Run check, import (into a copy of a store that already holds data) and, when the file
    is valid and small, assess; return what went wrong."""
    bad = []
    rc, out, err = runner(["check", str(path)])
    bad += [f"check: {b}" for b in failures_of(path.name, "check", rc, out, err)]
    if assess_too and rc == 0:
        rc_a, out, err = runner(["assess", str(path), "--format", "csv"])
        bad += [f"assess: {b}" for b in failures_of(path.name, "assess", rc_a, out, err)]
    db = tmp / f"{path.stem}.sqlite"
    shutil.copy(db_template, db)
    before = store_state(db)
    rc_i, out, err = runner(["import", str(path), "--db", str(db)])
    bad += [f"import: {b}" for b in failures_of(path.name, "import", rc_i, out, err)]
    after = store_state(db)
    if rc_i != 0 and after != before:
        bad.append(f"import: failed (exit {rc_i}) but changed the store: {before[0]} -> {after[0]}")
    if rc_i == 0 and after[0] == before[0] and "nothing new" not in out:
        bad.append("import: exit 0 but no row added and no 'nothing new'")
    if rc == 0 and rc_i not in (0, ERROR_CODE):
        bad.append("import: a file check accepts was not imported cleanly")
    return bad


@pytest.fixture(scope="module")
def db_template(tmp_path_factory) -> Path:
    """A store that already holds one case file (an import is never into an empty store)."""
    d = tmp_path_factory.mktemp("template")
    db = d / "template.sqlite"
    rc, out, err = run_in_process(["import", str(SMALL[0]), "--db", str(db)])
    assert rc == 0, err
    for suffix in ("-wal", "-shm"):
        assert not Path(str(db) + suffix).exists() or Path(str(db) + suffix).stat().st_size == 0
    return db


def _mutant_file(kind: str, i: int, tmp: Path) -> tuple[Path, str]:
    if kind == "text":
        data, suffix, what = text_mutant(i)
    elif kind == "xlsx":
        data, suffix, what = xlsx_mutant(i, tmp)
    else:
        data, suffix, what = fhir_mutant(i)
    path = tmp / f"mutant_{kind}_{i:04d}{suffix}"
    path.write_bytes(data)
    return path, what


CORPUS = ([("text", i) for i in range(N_TEXT)] + [("xlsx", i) for i in range(N_XLSX)]
          + [("fhir", i) for i in range(N_FHIR)])


def _run_corpus(items, tmp: Path, db_template: Path, runner,
                all_assess: bool = False) -> tuple[list[str], int]:
    problems, n_runs = [], 0
    for kind, i in items:
        path, what = _mutant_file(kind, i, tmp)
        # assess (about a second a file) on every fifth small mutant that check accepts
        small = (kind == "fhir" or path.stat().st_size < 8_000) and (all_assess or i % 5 == 0)
        found = check_mutant(path, db_template, tmp, runner, assess_too=small)
        n_runs += 1
        problems += [f"{path.name} [{what}]: {b}" for b in found]
        path.unlink()
    return problems, n_runs


def test_mutants_are_deterministic(tmp_path):
    # the corpus is seeded: the same mutant every run (numpy's documented seeding contract)
    assert text_mutant(7) == text_mutant(7)
    assert fhir_mutant(3) == fhir_mutant(3)
    assert len({text_mutant(i)[0] for i in range(20)}) == 20


def test_corpus_in_process(tmp_path, db_template):
    problems, n = _run_corpus(CORPUS, tmp_path, db_template, run_in_process)
    assert n == len(CORPUS) == 310
    assert not problems, f"{len(problems)} failure(s):\n" + "\n".join(problems[:40])


def test_corpus_has_valid_and_invalid_files(tmp_path, db_template):
    # the corpus exercises both outcomes: a corpus of files that all fail (or all pass) would
    # test only one path of the reader
    outcomes = []
    for kind, i in CORPUS[::10]:
        path, _ = _mutant_file(kind, i, tmp_path)
        outcomes.append(run_in_process(["check", str(path)])[0])
    assert outcomes.count(0) >= 3 and outcomes.count(ERROR_CODE) >= 10, outcomes


def _subprocess_sample(n: int, offset: int):
    step = max(1, len(CORPUS) // n)
    return [CORPUS[(offset + k * step) % len(CORPUS)] for k in range(n)]


#: The kinds of damage of the corpus: every row and byte mutation (text mutants; row mutations
#: also in XLSX mutants), the XLSX archive damage and odd cell values, the FHIR edits and the
#: JSON text damage (xlsx_mutant and fhir_mutant above).
XLSX_KINDS = ("xlsx:cell", "xlsx:zip-truncated", "xlsx:zip-bytes", "xlsx:zip-without", "xlsx:not-zip",
              "xlsx:zip-intact")
FHIR_KINDS = ("fhir:del", "fhir:dup", "fhir:set", "fhir:truncated", "fhir:NaN and duplicate key",
              "fhir:deep nesting", "fhir:bytes", "fhir:encoding", "fhir:bom", "fhir:text-intact")
MUTATION_KINDS = frozenset([m.__name__ for m in ROW_MUTATIONS + BYTE_MUTATIONS] + list(XLSX_KINDS)
                           + list(FHIR_KINDS))


def mutation_kinds(kind: str, i: int, tmp: Path) -> set[str]:
    """The kinds of mutation corpus item (kind, i) carries, read from its description."""
    names = {m.__name__ for m in ROW_MUTATIONS + BYTE_MUTATIONS}
    if kind == "text":
        return set(text_mutant(i)[2].split()[1:]) & names
    if kind == "xlsx":
        words = xlsx_mutant(i, tmp)[2].split()[1:]
        (tmp / f"x{i}.xlsx").unlink()
        out = set(words) & names
        out |= {"xlsx:cell"} if "cell" in words else set()
        zipped = [w for w in words if w.startswith(("zip-", "not-zip"))]
        out |= {"xlsx:" + ("zip-without" if zipped[0].startswith("zip-without-") else zipped[0])
                if zipped else "xlsx:zip-intact"}
        return out
    what = fhir_mutant(i)[2]
    out = {f"fhir:{e}" for e in ("del", "dup", "set") if re.search(rf"(^| ){e} \(", what)}
    last = [k for k in FHIR_KINDS[3:-1] if what.endswith(" " + k.split(":", 1)[1])]
    return out | set(last or ["fhir:text-intact"])


def covering_sample(n: int, exclude, tmp: Path) -> list[tuple[str, int]]:
    """``n`` corpus items that together carry every kind of mutation: a greedy set cover (each
    step the item carrying the most kinds not yet carried, ties to the earlier item of a seeded
    random order), then the next items of that order up to ``n``."""
    rng = np.random.default_rng([SEED, 30_000])
    order = [CORPUS[k] for k in rng.permutation(len(CORPUS)) if CORPUS[k] not in set(exclude)]
    kinds = {item: mutation_kinds(*item, tmp) for item in order}
    picked, covered = [], set()
    while True:
        best = max(order, key=lambda item: len(kinds[item] - covered))  # max: the first of equals
        if not kinds[best] - covered:
            break
        picked.append(best)
        covered |= kinds[best]
    assert covered == MUTATION_KINDS, sorted(MUTATION_KINDS - covered)  # the corpus carries every kind
    assert len(picked) <= n, len(picked)
    return picked + [item for item in order if item not in picked][:n - len(picked)]


def test_corpus_sample_in_subprocesses(tmp_path, db_template):
    def runner(argv):
        return run_subprocess(argv, tmp_path)

    problems, n = _run_corpus(_subprocess_sample(N_SUBPROCESS, 3), tmp_path, db_template, runner)
    assert n == N_SUBPROCESS
    assert not problems, "\n".join(problems[:20])


@pytest.mark.slow
def test_larger_corpus_in_subprocesses(tmp_path, db_template):
    def runner(argv):
        return run_subprocess(argv, tmp_path)

    sample = covering_sample(N_SUBPROCESS_SLOW, _subprocess_sample(N_SUBPROCESS, 3), tmp_path)
    problems, n = _run_corpus(sample, tmp_path, db_template, runner)
    assert n == N_SUBPROCESS_SLOW == len(set(sample))
    assert not problems, "\n".join(problems[:20])


def test_chunked_reader_agrees_with_the_whole_file_reader_on_the_corpus(tmp_path):
    # the bounded-memory reader (bayesbase.io.iter_results, chunks of 60 rows) accepts exactly
    # the mutants the whole-file reader accepts, with the same frame, and refuses the others
    # with located problems of the same file
    import pandas as pd

    from bayesbase.errors import ValidationError
    from bayesbase.io import read_results, read_results_chunked

    outcomes = {True: 0, False: 0}
    for i in range(0, N_TEXT, 3):
        data, suffix, what = text_mutant(i)
        path = tmp_path / f"chunk_{i:04d}{suffix}"
        path.write_bytes(data)
        try:
            whole = read_results(path, now="2030-01-01")
        except ValidationError as exc:
            whole = exc
        try:
            chunked = read_results_chunked(path, chunksize=60, now="2030-01-01")
        except ValidationError as exc:
            chunked = exc
        ok = not isinstance(whole, ValidationError)
        assert ok == (not isinstance(chunked, ValidationError)), (path.name, what, whole, chunked)
        outcomes[ok] += 1
        if ok:
            pd.testing.assert_frame_equal(whole, chunked, obj=f"{path.name} [{what}]")
        else:
            assert {p.file for p in chunked.problems} == {path.name}, (what, chunked)
    assert outcomes[True] >= 8 and outcomes[False] >= 25, outcomes
