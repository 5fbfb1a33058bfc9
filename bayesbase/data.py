"""Tidy results contract: read CSV/TSV/XLSX, parse censoring, validate, convert units (layer 2).

Public API
----------
``read_table(path)``            raw table of strings, column names normalised
``validate(raw, source, now)``  the canonical results frame (see DEVELOPERS.md), or a
                                :class:`~bayesbase.errors.ValidationError` listing every problem
``load_results(path, now)``     ``read_table`` + ``validate``
``to_tidy_csv(frame, path)``    write a canonical frame as CSV (reads back with ``load_results``)
``bench_validate(n_rows)``      benchmark of ``validate`` (seconds, rows per second)

Input rules (documented choices of this project)
------------------------------------------------
* Text files: comma, semicolon, tab or pipe delimited (the delimiter is the one that occurs most
  often in the header line); UTF-8 with or without BOM, UTF-16 with BOM, UTF-16 LE/BE without BOM
  (recognised by its zero bytes), otherwise Windows-1252 / Latin-1 (so a Latin-1 ``µmol/L`` reads
  correctly; also after a UTF-8 BOM when the rest is not UTF-8, with a note). Blank lines (or
  lines of delimiters only) above the header and at the end are skipped; row numbers stay the
  lines a user sees. A first data row wider than the header is a problem, never re-read as an
  index. XLSX: the first worksheet, header in its first non-blank row.
* Column names are case- and space-insensitive, with synonyms (``patient_id`` -> ``patient``,
  ``date``/``collected`` -> ``collected_at``, ``result`` -> ``value``, ``units`` -> ``unit``,
  ``analyser``/``analyzer`` -> ``method``, ``hemolysis`` -> ``haemolysis``, ``lipemia`` ->
  ``lipaemia``, ``sex_neuter`` -> ``sex`` ...; see ``COLUMN_SYNONYMS``). An unknown column that
  looks like a misspelling of a known one is a problem (with a did-you-mean hint); other unknown
  columns are ignored and listed in ``frame.attrs["notes"]``. Two columns that mean the same
  (``unit`` and ``units``, ``Patient`` and ``patient`` ...) are a problem and stop validation.
* Dates: ISO 8601 (``2024-03-05``, ``2024-03-05T09:30``, ``2024-03-05 09:30:00``, with an offset
  such as ``+02:00`` or ``Z``) or day-first ``05/03/2024``, ``05.03.2024``, ``05-03-2024``
  (optionally followed by ``HH:MM[:SS]``). Day first, never month first. Times with an offset are
  converted to UTC; naive times are taken as they are (treated as UTC). A collection time more
  than ``FUTURE_TOLERANCE`` (14 h, the largest UTC offset in use) after ``now`` is "in the
  future", so local clock times are never flagged by mistake; one before 1900 is not a plausible
  collection (or birth) date. A partial date (``2025``, ``2025-09``) is refused, never completed.
* Values: a number > 0 in the reported unit. Censored results ``<5``, ``< 5``, ``<=5``, ``≤5``,
  ``>2000``, ``>= 2000`` become value = the limit with censor ``"left"`` / ``"right"``. A decimal
  comma (``1,2``) is accepted unless the file is comma-delimited; thousands separators are not.
  Digits are 0-9 only: look-alikes (Arabic-Indic, full-width, mathematical bold ...) are refused
  with their Unicode name. After conversion every value must lie in the analyte's plausibility
  envelope (``plausible`` in ``models/analytes.toml``: what a living animal can have, far wider
  than a reference interval); outside it (including overflow to infinity and subnormal numbers)
  the row is refused with the range in the canonical and the reported unit. No non-finite value
  is ever returned.
* ``state``: ``healthy``, ``unwell`` or blank (blank = assumed healthy); ``well``/``normal`` are
  read as healthy and ``sick``/``ill``/``diseased`` as unwell.
* ``fasted``: yes/no, true/false, 1/0, y/n, fasted/fed or blank.
* ``replicate``: a whole number >= 1; 1 when absent or blank.
* A specimen is keyed by (patient, specimen): two animals may both have a draw ``S1``; one draw
  of one animal has one collection time.
* Identical duplicates (same patient, specimen, analyte and replicate with the same value) are
  dropped and counted in the notes; the same key with different values is a problem.
* Ids (patient, specimen) with control or invisible characters (NUL, U+202E, zero-width joiner,
  BOM ...) are refused; such characters are removed from free text (breed, method, reported
  value and unit) with a note, and shown as ``<U+XXXX>`` in every message and note.
* Text that begins with ``=``, ``+``, ``-``, ``@``, tab or carriage return in patient, specimen,
  breed or method is noted as formula-like (OWASP guidance on CSV injection); it is not refused.
* ``censor``, ``reported_value`` and ``reported_unit`` columns are read when present (so a file
  written by :func:`to_tidy_csv` reads back unchanged); ``source_file`` and ``source_row`` are
  always those of the file being read.

Problem messages have the form ``"<file>, row <n>, column '<col>': <message> (<hint>)"``, where
row numbers are spreadsheet rows (header = row 1, first data row = 2); they are sorted by row.
"""
from __future__ import annotations

import codecs
import difflib
import io
import re
import time
import unicodedata
from datetime import date, datetime
from datetime import time as dtime
from pathlib import Path

import numpy as np
import pandas as pd

from . import units
from .errors import Problem, ValidationError

__all__ = [
    "CANONICAL_COLUMNS",
    "REQUIRED_COLUMNS",
    "COLUMN_SYNONYMS",
    "SPECIES_ALIASES",
    "FUTURE_TOLERANCE",
    "read_table",
    "validate",
    "load_results",
    "to_tidy_csv",
    "bench_validate",
]

REQUIRED_COLUMNS = ("patient", "species", "specimen", "collected_at", "analyte", "value", "unit")
OPTIONAL_COLUMNS = ("breed", "sex", "birth_date", "method", "replicate", "fasted",
                    "haemolysis", "lipaemia", "icterus", "state")
#: Columns of the canonical frame that an input may carry (a file written by `to_tidy_csv`).
PASSTHROUGH_COLUMNS = ("censor", "reported_value", "reported_unit", "source_file", "source_row")
CANONICAL_COLUMNS = (
    "patient", "species", "breed", "sex", "birth_date", "specimen", "collected_at", "analyte",
    "value", "unit", "reported_value", "reported_unit", "censor", "method", "replicate", "fasted",
    "haemolysis", "lipaemia", "icterus", "state", "source_file", "source_row",
)
_KNOWN = set(REQUIRED_COLUMNS) | set(OPTIONAL_COLUMNS) | set(PASSTHROUGH_COLUMNS)

#: Normalised column name -> canonical column.
COLUMN_SYNONYMS = {
    "patient_id": "patient", "animal": "patient", "animal_id": "patient", "pet": "patient",
    "pet_id": "patient", "subject": "patient", "subject_id": "patient", "patient_no": "patient",
    "specimen_id": "specimen", "sample": "specimen", "sample_id": "specimen",
    "sample_no": "specimen", "accession": "specimen", "accession_id": "specimen",
    "accession_no": "specimen", "draw": "specimen", "draw_id": "specimen",
    "date": "collected_at", "collected": "collected_at", "collection_date": "collected_at",
    "collection_time": "collected_at", "collected_on": "collected_at", "datetime": "collected_at",
    "date_time": "collected_at", "sampled_at": "collected_at", "sample_date": "collected_at",
    "collection_datetime": "collected_at", "collected_date": "collected_at",
    "test": "analyte", "test_name": "analyte", "analyte_name": "analyte", "parameter": "analyte",
    "measurand": "analyte",
    "result": "value", "result_value": "value", "value_reported": "value",
    "units": "unit", "unit_s": "unit", "result_unit": "unit", "result_units": "unit", "uom": "unit",
    "analyser": "method", "analyzer": "method", "instrument": "method", "device": "method",
    "hemolysis": "haemolysis", "haemolysis_index": "haemolysis", "hemolysis_index": "haemolysis",
    "h_index": "haemolysis", "lipemia": "lipaemia", "lipaemia_index": "lipaemia",
    "lipemia_index": "lipaemia", "l_index": "lipaemia", "icterus_index": "icterus",
    "icteric_index": "icterus", "i_index": "icterus",
    "sex_neuter": "sex", "gender": "sex", "sex_status": "sex",
    "dob": "birth_date", "date_of_birth": "birth_date", "birthdate": "birth_date",
    "born": "birth_date", "birthday": "birth_date",
    "rep": "replicate", "replicate_no": "replicate", "fasting": "fasted", "fasted_state": "fasted",
    "health_state": "state", "health": "state", "clinical_state": "state", "status": "state",
    "species_name": "species", "breed_name": "breed",
}

#: Accepted species spellings -> canonical species.
SPECIES_ALIASES = {
    "dog": "dog", "canine": "dog", "canis familiaris": "dog", "canis lupus familiaris": "dog",
    "cat": "cat", "feline": "cat", "felis catus": "cat",
    "horse": "horse", "equine": "horse", "equus caballus": "horse",
}
_STATE = {"": "", "healthy": "healthy", "well": "healthy", "normal": "healthy",
          "unwell": "unwell", "sick": "unwell", "ill": "unwell", "diseased": "unwell"}
_FASTED = {"yes": True, "y": True, "true": True, "1": True, "fasted": True,
           "no": False, "n": False, "false": False, "0": False, "fed": False, "": None}
_SEX = {"f": "female", "female": "female", "m": "male", "male": "male",
        "fs": "female_neutered", "sf": "female_neutered", "fn": "female_neutered",
        "female_spayed": "female_neutered", "spayed_female": "female_neutered",
        "female_neutered": "female_neutered", "neutered_female": "female_neutered",
        "fi": "female_intact", "fe": "female_intact", "female_intact": "female_intact",
        "female_entire": "female_intact", "intact_female": "female_intact",
        "mn": "male_neutered", "nm": "male_neutered", "mc": "male_neutered",
        "male_neutered": "male_neutered", "male_castrated": "male_neutered",
        "castrated_male": "male_neutered", "neutered_male": "male_neutered",
        "gelding": "male_neutered",
        "mi": "male_intact", "me": "male_intact", "male_intact": "male_intact",
        "male_entire": "male_intact", "intact_male": "male_intact", "stallion": "male_intact",
        "mare": "female_intact"}
_CENSOR_IN = {"": "", "left": "left", "<": "left", "right": "right", ">": "right"}

#: Allowance for local clock times written without an offset (largest UTC offset: +14:00).
FUTURE_TOLERANCE = pd.Timedelta(hours=14)
#: Collection and birth dates before this are refused as implausible (typing errors).
EARLIEST_DATE = pd.Timestamp("1900-01-01")

_NUMBER = re.compile(
    r"^(<=|>=|=<|=>|<|>|≤|≥)?\s*([+-]?(?:\d+(?:[.,]\d*)?|[.,]\d+)(?:[eE][+-]?\d+)?)$", re.ASCII)
#: Year only or year and month (``2025``, ``2025-09``, ``09/2025``): refused, never completed.
_PARTIAL_DATE = re.compile(r"^(?:\d{4}(?:[-/.]\d{1,2})?|\d{1,2}[-/.]\d{4})$", re.ASCII)
#: Text columns checked for spreadsheet-formula look (OWASP CSV-injection guidance).
FORMULA_COLUMNS = ("patient", "specimen", "breed", "method")
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")
#: ANSI / VT100 escape sequences (CSI ... final byte, OSC ... BEL or ST) in free text.
_ANSI = re.compile(r"\x1b\[[0-?]*[ -/]*[@-~]|\x1b\][^\x07\x1b]*(?:\x07|\x1b\\)?|\x1b[@-_]?")
_INVISIBLE_CATEGORIES = ("Cc", "Cf", "Zl", "Zp", "Cs")
_LEFT = {"<", "<=", "=<", "≤"}
_DAYFIRST_FORMATS = ("%d/%m/%Y", "%d/%m/%Y %H:%M", "%d/%m/%Y %H:%M:%S",
                     "%d.%m.%Y", "%d.%m.%Y %H:%M", "%d.%m.%Y %H:%M:%S",
                     "%d-%m-%Y", "%d-%m-%Y %H:%M", "%d-%m-%Y %H:%M:%S")


# =========================================================================== reading


def _normalise_column(name: object) -> str:
    text = str(name).replace("\ufeff", "").strip().lower()
    text = re.sub(r"[^0-9a-z]+", "_", text).strip("_")
    return COLUMN_SYNONYMS.get(text, text)


def _char_name(ch: str) -> str:
    name = unicodedata.name(ch, "")
    return f"U+{ord(ch):04X} {name}".strip()


def _visible(text: str) -> str:
    """``text`` with control and invisible format characters shown as ``<U+XXXX>``.

    Used for every message and note, so that no terminal escape or bidirectional override taken
    from an input reaches a terminal or a report.
    """
    if text.isascii() and text.isprintable():
        return text
    return "".join(f"<U+{ord(c):04X}>" if unicodedata.category(c) in _INVISIBLE_CATEGORIES else c
                   for c in text)


def _invisible_char(text: str) -> str | None:
    """Description of the first control/invisible character of an id, or None."""
    if text.isascii() and text.isprintable():
        return None
    for c in text:
        if unicodedata.category(c) in _INVISIBLE_CATEGORIES:
            return _char_name(c)
    return None


def _clean_free_text(text: str) -> str:
    """Free text without ANSI escape sequences and control/invisible characters."""
    if text.isascii() and text.isprintable():
        return text
    text = _ANSI.sub("", text)
    text = re.sub(r"[\t\n\r\x0b\x0c\x85\u2028\u2029]+", " ", text)
    return "".join(c for c in text
                   if unicodedata.category(c) not in _INVISIBLE_CATEGORIES).strip()


def _lookalike_digit(text: str) -> str | None:
    """Description of the first digit that is not 0-9 (Arabic-Indic, full-width, ...), or None."""
    if text.isascii():
        return None
    for c in text:
        if not c.isascii() and (c.isdigit() or unicodedata.category(c) == "Nd"):
            return _char_name(c)
    return None


def _looks_utf16(data: bytes) -> str | None:
    """'utf-16-le' / 'utf-16-be' when a BOM-less file has the zero-byte pattern of UTF-16 text
    (every other byte zero for ASCII characters), else None."""
    sample = data[:4096]
    if len(sample) < 4:
        return None
    even, odd = sample[0::2], sample[1::2]
    z_even, z_odd = even.count(0) / len(even), odd.count(0) / len(odd)
    if z_odd > 0.3 and z_even < 0.05:
        return "utf-16-le"
    if z_even > 0.3 and z_odd < 0.05:
        return "utf-16-be"
    return None


def _decode_8bit(data: bytes) -> tuple[str, str]:
    try:
        return data.decode("cp1252"), "cp1252"
    except UnicodeDecodeError:  # the five bytes cp1252 leaves undefined
        return data.decode("latin-1"), "latin-1"


def _decode(data: bytes, name: str) -> tuple[str, str, str | None]:
    """(text, encoding, note or None) of a text file's bytes."""
    if data.startswith(codecs.BOM_UTF8):
        try:
            return data[3:].decode("utf-8"), "utf-8-sig", None
        except UnicodeDecodeError:
            text, enc = _decode_8bit(data[3:])
            return text, enc, (f"{name}: starts with a UTF-8 byte-order mark but is not UTF-8; "
                               f"read as {enc}")
    if data.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)):
        try:
            return data.decode("utf-16"), "utf-16", None
        except UnicodeDecodeError as exc:
            raise ValidationError([Problem(
                name, None, None, "starts with a UTF-16 byte-order mark but is not valid UTF-16",
                "save the file again as UTF-8 CSV")]) from exc
    guess = _looks_utf16(data)
    if guess:
        try:
            text = data.decode(guess)
        except UnicodeDecodeError:
            pass
        else:
            return text, guess, (f"{name}: no byte-order mark; read as UTF-16 "
                                 f"{guess[-2:].upper()} (detected from its zero bytes)")
    try:
        return data.decode("utf-8"), "utf-8", None
    except UnicodeDecodeError:
        pass
    text, enc = _decode_8bit(data)
    return text, enc, f"{name}: not UTF-8; read as {enc}"


#: Lines that hold nothing but spaces, tabs and delimiters count as blank.
_BLANK_LINES = re.compile(r"(?:[ \t,;|]*(?:\r\n|\r|\n))*")
_LINE_BREAK = re.compile(r"\r\n|\r|\n")


def _sniff_delimiter(text: str) -> str:
    header = next((line for line in text.splitlines() if line.strip()), "")
    counts = {d: header.count(d) for d in (",", ";", "\t", "|")}
    best = max(counts, key=lambda d: counts[d])
    return best if counts[best] > 0 else ","


def _cell_text(v: object) -> str:
    if v is None:
        return ""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return str(int(v)) if v.is_integer() and abs(v) < 1e15 else repr(v)
    if isinstance(v, datetime):
        return v.isoformat(sep="T")
    if isinstance(v, (date, dtime)):
        return v.isoformat()
    return str(v)


def _read_xlsx(path: Path) -> tuple[pd.DataFrame, int]:
    """(table, number of blank rows above the header) of the first worksheet."""
    from openpyxl import load_workbook

    wb = load_workbook(path, read_only=True, data_only=True)
    try:
        ws = wb.worksheets[0]
        rows = ws.iter_rows(values_only=True)
        skipped = 0
        for header in rows:
            if any(_cell_text(h).strip() for h in header):
                break
            skipped += 1
        else:
            return pd.DataFrame(), 0
        header = [_cell_text(h) for h in header]
        while header and not header[-1].strip():
            header.pop()
        width = len(header)
        body = [[_cell_text(v) for v in r[:width]] + [""] * (width - len(r[:width])) for r in rows]
    finally:
        wb.close()
    names = [h if h.strip() else f"unnamed_{i + 1}" for i, h in enumerate(header)]
    df = pd.DataFrame(body, columns=names, dtype=object)
    df.index = df.index + skipped
    return df, skipped


def read_table(path: str | Path) -> pd.DataFrame:
    """Read a results file as a table of strings with normalised column names.

    The index is the data-row position in the file (spreadsheet row = index + 2) and survives
    the dropping of blank rows, so problems name the rows a user sees. Blank lines above the
    header are skipped and counted in the index. ``attrs`` holds ``source`` (file name),
    ``delimiter`` (None for XLSX), ``encoding``, ``notes``, ``header_row`` (the header's own
    line) and ``original_columns`` (the header as written).
    """
    path = Path(path)
    name = path.name
    if not path.is_file():
        raise ValidationError([Problem(_visible(name), None, None, "file not found",
                                       _visible(str(path)))])
    suffix = path.suffix.lower()
    notes: list[str] = []
    delimiter: str | None
    skipped = 0
    if suffix in (".xlsx", ".xlsm"):
        try:
            df, skipped = _read_xlsx(path)
        except Exception as exc:  # openpyxl raises several types for a damaged file
            raise ValidationError([Problem(_visible(name), None, None,
                                           _visible(f"cannot read as XLSX: {exc}"))]) from exc
        delimiter, encoding = None, "xlsx"
    elif suffix == ".xls":
        raise ValidationError([Problem(_visible(name), None, None,
                                       "the old binary .xls format is not read",
                                       "save the sheet as .xlsx or CSV")])
    else:
        text, encoding, note = _decode(path.read_bytes(), _visible(name))
        if note:
            notes.append(note)
        lead = _BLANK_LINES.match(text).group(0)
        if lead:
            skipped = len(_LINE_BREAK.findall(lead))
            text = text[len(lead):]
        delimiter = _sniff_delimiter(text)
        if not text.strip() or not text.strip(" \t,;|\r\n\ufeff"):
            df = pd.DataFrame()
        else:
            try:
                df = pd.read_csv(io.StringIO(text), sep=delimiter, dtype=str, keep_default_na=False,
                                 na_filter=False, skip_blank_lines=False, engine="c")
            except pd.errors.EmptyDataError:  # e.g. nothing but a stray byte-order mark
                df = pd.DataFrame()
            except pd.errors.ParserError as exc:
                m = re.search(r"line (\d+), saw (\d+)", str(exc))
                row = int(m.group(1)) + skipped if m else None
                msg = (f"has {m.group(2)} fields where the header has fewer" if m
                       else _visible(f"cannot be parsed: {exc}"))
                raise ValidationError([Problem(_visible(name), row, None, f"row {msg}",
                                               _visible(f"delimiter '{delimiter}'; quote values "
                                                        "that contain it"))]) from exc
            if not isinstance(df.index, pd.RangeIndex):
                # pandas takes the extra leading fields of a first data row that is wider
                # than the header as an index: a misread, never accepted silently
                width = len(df.columns) + df.index.nlevels
                raise ValidationError([Problem(
                    _visible(name), skipped + 2, None,
                    f"row has {width} fields where the header has {len(df.columns)}",
                    _visible(f"delimiter '{delimiter}'; quote values that contain it, or name "
                             "every column in the header"))])
            df.index = df.index + skipped
    original = [str(c) for c in df.columns]
    if len(df.columns):
        df.columns = [_normalise_column(c) for c in df.columns]
        if len(df):
            df = df.fillna("")
            # a row is blank when every cell is empty or white space (by position: two columns
            # may share a name); decided on each column's distinct values, not row by row
            blank = np.ones(len(df), dtype=bool)
            for j in range(df.shape[1]):
                cand = np.flatnonzero(blank)
                if cand.size == 0:
                    break
                codes, uniq = pd.factorize(df.iloc[cand, j].to_numpy(dtype=object))
                empty_u = np.array([not str(u).strip() for u in uniq] + [True], dtype=bool)
                blank[cand] = empty_u[codes]
            if blank.any():
                df = df.loc[~blank]
    df.attrs = {"source": name, "delimiter": delimiter, "encoding": encoding, "notes": notes,
                "header_row": skipped + 1, "original_columns": original}
    return df


# =========================================================================== validation helpers


class _Col:
    """One column as integer codes into stripped unique strings (fast on large frames)."""

    __slots__ = ("codes", "uniq")

    def __init__(self, series: pd.Series | None, n: int):
        if series is None:
            self.codes = np.zeros(n, dtype=np.intp)
            self.uniq = np.array([""], dtype=object)
            return
        codes, uniq = pd.factorize(series, use_na_sentinel=True)
        text = [_cell_text(u).strip() for u in uniq] + [""]
        codes = np.where(codes < 0, len(text) - 1, codes)
        codes2, uniq2 = pd.factorize(np.array(text, dtype=object))
        self.codes = codes2[codes]
        self.uniq = np.asarray(uniq2, dtype=object)

    def values(self) -> np.ndarray:
        return self.uniq[self.codes]

    def map(self, func) -> np.ndarray:
        """Apply ``func`` to each unique string; return the per-row object array."""
        out = np.empty(len(self.uniq), dtype=object)
        for i, u in enumerate(self.uniq):
            out[i] = func(u)
        return out[self.codes]

    def empty(self) -> np.ndarray:
        return (self.uniq == "")[self.codes]


class _Problems:
    """Collects problems; every message, hint, column and file name is made visible
    (control and invisible characters shown as ``<U+XXXX>``)."""

    def __init__(self, file: str, rows: np.ndarray):
        self.file = _visible(file)
        self.rows = rows
        self.items: list[Problem] = []

    def add(self, mask_or_pos, column, message, hint=None) -> None:
        """One problem per selected row; ``message``/``hint`` may be per-row arrays or strings."""
        pos = np.flatnonzero(mask_or_pos) if np.asarray(mask_or_pos).dtype == bool else \
            np.asarray(mask_or_pos, dtype=np.intp)
        if pos.size == 0:
            return
        msgs = [message] * pos.size if isinstance(message, str) else list(np.asarray(message)[pos])
        hints = [hint] * pos.size if (hint is None or isinstance(hint, str)) else \
            list(np.asarray(hint, dtype=object)[pos])
        rows = self.rows[pos].tolist()
        column = None if column is None else _visible(str(column))
        self.items.extend(Problem(self.file, r, column, _visible(str(m)),
                                  None if h is None else _visible(str(h)))
                          for r, m, h in zip(rows, msgs, hints))

    def one(self, row, column, message, hint=None) -> None:
        self.items.append(Problem(self.file, row, None if column is None else _visible(str(column)),
                                  _visible(message), None if hint is None else _visible(hint)))

    def raise_if_any(self) -> None:
        if self.items:
            order = {c: i for i, c in enumerate(CANONICAL_COLUMNS)}
            self.items.sort(key=lambda p: (-1 if p.row is None else p.row,
                                           order.get(p.column or "", -1), p.column or "", p.message))
            raise ValidationError(self.items)


def _parse_number(text: str, decimal_comma: bool):
    """(value, censor, error) for one reported string."""
    m = _NUMBER.match(text)
    if not m:
        return np.nan, "", "not a number"
    op, num = m.group(1), m.group(2)
    if "," in num:
        if not decimal_comma:
            return np.nan, "", "decimal comma"
        num = num.replace(",", ".")
    censor = "" if op is None else ("left" if op in _LEFT else "right")
    return float(num), censor, None


def _numbers(col: _Col, decimal_comma: bool, censoring: bool):
    """Per-row (values, censor, error) arrays; error is None, 'empty', 'not a number',
    'decimal comma' or 'digits' (digits that only look like 0-9)."""
    uniq = col.uniq
    val = np.array(pd.to_numeric(pd.Series(uniq, dtype=object), errors="coerce"), dtype=float)
    censor = np.full(len(uniq), "", dtype=object)
    err = np.full(len(uniq), None, dtype=object)
    for i, text in enumerate(uniq):
        if not text.isascii() and _lookalike_digit(text):
            val[i], err[i] = np.nan, "digits"
    for i in np.flatnonzero(~np.isfinite(val) & (err == None)):  # noqa: E711
        text = uniq[i]
        if text == "":
            err[i] = "empty"
            continue
        v, c, e = _parse_number(text, decimal_comma)
        if e is None and c and not censoring:
            e = "not a number"
        if e is None and not np.isfinite(v):
            e = "not a number"
        val[i], censor[i], err[i] = v, c, e
    return val[col.codes], censor[col.codes], err[col.codes]


def _parse_dates(col: _Col) -> tuple[np.ndarray, np.ndarray]:
    """Per-row datetime64[ns] (NaT when blank or bad) and a per-row error: None, 'unparsable',
    'partial' (year or year and month only) or 'digits' (digits that only look like 0-9).

    Dates outside the datetime64[ns] range (before 1677, after 2262) are kept as the range's
    bounds, so that they are reported as before 1900 or in the future."""
    uniq = pd.Series(col.uniq, dtype=object)
    kind = np.full(len(uniq), None, dtype=object)
    for i, text in enumerate(col.uniq):
        if _PARTIAL_DATE.match(text):
            kind[i] = "partial"
        elif not text.isascii() and _lookalike_digit(text):
            kind[i] = "digits"
    refused = kind != None  # noqa: E711
    if refused.any():
        uniq = uniq.where(~refused, "")
    parsed = pd.to_datetime(uniq, format="ISO8601", utc=True, errors="coerce")
    parsed = parsed.dt.tz_localize(None)
    todo = parsed.isna().to_numpy() & (uniq != "").to_numpy()
    for fmt in _DAYFIRST_FORMATS:
        if not todo.any():
            break
        sub = pd.to_datetime(uniq[todo], format=fmt, errors="coerce")
        got = sub.notna().to_numpy()
        if got.any():
            idx = np.flatnonzero(todo)[got]
            parsed.iloc[idx] = sub[got].to_numpy()
            todo[idx] = False
    ok = parsed.notna().to_numpy()
    lo, hi = pd.Timestamp.min, pd.Timestamp.max  # the datetime64[ns] range
    in_range = ok & (parsed >= lo).to_numpy() & (parsed <= hi).to_numpy()
    bad = (uniq != "").to_numpy() & ~ok
    kind[bad] = "unparsable"
    values = np.full(len(uniq), np.datetime64("NaT"), dtype="datetime64[ns]")
    values[in_range] = parsed[in_range].to_numpy().astype("datetime64[ns]")
    # outside the ns range: keep as "far future/past" markers via the bounds
    far = ok & ~in_range
    values[far & (parsed > hi).to_numpy()] = np.datetime64(pd.Timestamp.max.value, "ns")
    values[far & (parsed < lo).to_numpy()] = np.datetime64(pd.Timestamp.min.value, "ns")
    return values[col.codes], kind[col.codes]


def _date_problems(prob: _Problems, c: _Col, err: np.ndarray, column: str, expected: str,
                   partial_hint: str) -> None:
    """Unparsable, partial and look-alike-digit dates of one column."""
    if (err == "unparsable").any():
        prob.add(err == "unparsable", column, c.map(lambda u: f"unparsable date '{u}'"), expected)
    if (err == "partial").any():
        prob.add(err == "partial", column,
                 c.map(lambda u: f"partial date '{u}': the day (or month and day) is missing"),
                 partial_hint)
    if (err == "digits").any():
        prob.add(err == "digits", column,
                 c.map(lambda u: f"date '{u}' uses look-alike digits ({_lookalike_digit(u)})"),
                 "retype the date with the digits 0-9")


def _digit_problems(prob: _Problems, c: _Col, err: np.ndarray, column: str, what: str) -> None:
    """Numbers written with digits that only look like 0-9 (Arabic-Indic, full-width, ...)."""
    bad = err == "digits"
    if bad.any():
        prob.add(bad, column,
                 c.map(lambda u: f"{what} '{u}' uses look-alike digits ({_lookalike_digit(u)})"),
                 "retype the number with the digits 0-9; the character only looks like a digit")


def _rows_text(rows: list[int], limit: int = 3) -> str:
    head = ", ".join(str(r) for r in rows[:limit])
    return ("row " if len(rows) == 1 else "rows ") + head + (", ..." if len(rows) > limit else "")


def _conflicts(prob: _Problems, key_codes, key_text, other_codes, other_text, valid, column, what,
               other_name) -> None:
    """One problem per key (e.g. patient) whose rows carry more than one `other` (e.g. species).

    ``key_text(code)`` names a key in the message (e.g. ``"patient 'Rex'"``)."""
    pos = np.flatnonzero(valid)
    if pos.size == 0:
        return
    pairs = pd.DataFrame({"k": key_codes[pos], "o": other_codes[pos]})
    n_other = pairs.drop_duplicates().groupby("k", sort=False)["o"].size()
    bad_keys = n_other.index[n_other.to_numpy() > 1].to_numpy()
    if bad_keys.size == 0:
        return
    sel = np.isin(key_codes[pos], bad_keys)
    sub = pd.DataFrame({"k": key_codes[pos][sel], "o": other_codes[pos][sel], "p": pos[sel]})
    for k, grp in sub.groupby("k", sort=True):
        first_o = grp["o"].iloc[0]
        parts = []
        for o, g2 in grp.groupby("o", sort=False):
            parts.append(f"{other_text(o)} ({_rows_text(prob.rows[g2['p'].to_numpy()].tolist())})")
        first_bad = grp["p"].to_numpy()[grp["o"].to_numpy() != first_o][0]
        prob.add([first_bad], column,
                 f"{key_text(k)} is recorded with more than one {other_name}: "
                 + " and ".join(parts),
                 f"one {what} has one {other_name}; correct the rows or use distinct {what} ids")


def _now(now) -> pd.Timestamp:
    if now is None:
        return pd.Timestamp.now(tz="UTC").tz_localize(None)
    ts = pd.Timestamp(now)
    if ts.tzinfo is not None:
        ts = ts.tz_convert("UTC").tz_localize(None)
    return ts


def _string_array(values: np.ndarray, na_mask: np.ndarray | None = None):
    vals = np.asarray(values, dtype=object)
    if na_mask is not None and na_mask.any():
        vals = vals.copy()
        vals[na_mask] = None
    return pd.array(vals, dtype="string")


# =========================================================================== validate


def validate(raw: pd.DataFrame, source: str | None = None, now=None) -> pd.DataFrame:
    """Validate a raw results table and return the canonical results frame.

    Never mutates ``raw``. Every problem found goes into one
    :class:`~bayesbase.errors.ValidationError` (problems sorted by row). ``source`` names the
    file in messages (default: ``raw.attrs["source"]`` or ``"<data>"``); ``now`` is the reference
    time for "in the future" (default: now, UTC). Row numbers are ``raw.index + 2`` when the index
    is an integer index (as ``read_table`` returns), else position + 2. The returned frame's
    ``attrs`` hold ``source``, ``notes`` (ignored columns, duplicates dropped, ...) and
    ``n_duplicates_dropped``.
    """
    if not isinstance(raw, pd.DataFrame):
        raise TypeError("validate expects a pandas DataFrame (use load_results for a file)")
    attrs = dict(raw.attrs)
    file = source if source is not None else str(attrs.get("source") or "<data>")
    notes: list[str] = list(attrs.get("notes") or [])
    delimiter = attrs.get("delimiter")
    decimal_comma = delimiter != ","
    now_ts = _now(now)
    n = len(raw)

    if raw.index.dtype.kind in "iu" and n:
        rows = raw.index.to_numpy().astype(np.int64) + 2
    else:
        rows = np.arange(n, dtype=np.int64) + 2
    prob = _Problems(file, rows)
    header_row = int(attrs.get("header_row") or 1)

    # ---- columns (by position: two columns may carry the same normalised name)
    if len(raw.columns) == 0:
        prob.one(1, None, "the file is empty: expected a header row naming the columns "
                 + ", ".join(REQUIRED_COLUMNS))
        prob.raise_if_any()
    shown = attrs.get("original_columns")
    if not isinstance(shown, (list, tuple)) or len(shown) != len(raw.columns):
        shown = [str(c) for c in raw.columns]
    source_of: dict[str, int] = {}  # canonical column -> position in raw
    misspelt: dict[str, object] = {}  # canonical column -> the unknown column that resembles it
    duplicated = False
    for j, original in enumerate(shown):
        canon = _normalise_column(original)
        if canon in _KNOWN:
            if canon in source_of:
                duplicated = True
                prob.one(header_row, str(original), f"column '{original}' duplicates column "
                         f"'{shown[source_of[canon]]}' (both mean '{canon}')", "keep one of them")
            else:
                source_of[canon] = j
            continue
        close = difflib.get_close_matches(canon, sorted(_KNOWN | set(COLUMN_SYNONYMS)), n=1,
                                          cutoff=0.8)
        if close:
            target = COLUMN_SYNONYMS.get(close[0], close[0])
            misspelt[target] = original
            prob.one(header_row, str(original), f"unknown column '{original}'",
                     f"did you mean '{target}'?")
        else:
            notes.append(f"column '{original}' is not part of the results contract and was ignored")
    # a required column whose misspelling was already reported is not reported twice
    missing = [c for c in REQUIRED_COLUMNS if c not in source_of and c not in misspelt]
    for c in missing:
        prob.one(header_row, c, f"required column '{c}' is missing",
                 "columns found: " + ", ".join(str(x) for x in shown))
    if n == 0:
        prob.one(header_row + 1, None, "no data rows below the header")
    if n == 0 or duplicated:
        prob.raise_if_any()

    def col(name: str) -> _Col:
        j = source_of.get(name)
        return _Col(None if j is None else raw.iloc[:, j], n)

    present = set(source_of)

    # ---- simple text columns
    patient = col("patient")
    specimen = col("specimen")
    if "patient" in present:
        prob.add(patient.empty(), "patient", "patient is empty", "every row needs a patient id")
    if "specimen" in present:
        prob.add(specimen.empty(), "specimen", "specimen is empty",
                 "every row needs the id of its blood draw")
    id_bad = {}
    for name, c in (("patient", patient), ("specimen", specimen)):
        inv_u = np.array([_invisible_char(u) for u in c.uniq], dtype=object)
        bad_u = inv_u != None  # noqa: E711
        id_bad[name] = bad_u[c.codes]
        if name in present and bad_u.any():
            prob.add(id_bad[name], name,
                     c.map(lambda u, name=name: f"{name} id '{u}' contains an invisible or "
                           f"control character ({_invisible_char(u)})"),
                     "retype the id: invisible characters make ids that look the same differ")

    species_c = col("species")
    species_u = np.array([SPECIES_ALIASES.get(re.sub(r"\s+", " ", u.lower()), None)
                          for u in species_c.uniq], dtype=object)
    species = species_u[species_c.codes]
    species_ok = species != None  # noqa: E711  (object array comparison)
    if "species" in present:
        sp_empty = species_c.empty()
        prob.add(sp_empty, "species", "species is empty", "expected dog, cat or horse")
        bad = ~species_ok & ~sp_empty
        if bad.any():
            msgs = species_c.map(lambda u: f"unknown species '{u}'")
            hints = species_c.map(lambda u: _did_you_mean(u.lower(), SPECIES_ALIASES,
                                                          "expected dog, cat or horse "
                                                          "(or canine, feline, equine)"))
            prob.add(bad, "species", msgs, hints)

    breed_c = col("breed")
    sex_c = col("sex")
    sex_u = np.array([_SEX.get(k, k) for k in
                      (re.sub(r"[^0-9a-z]+", "_", u.lower()).strip("_") for u in sex_c.uniq)],
                     dtype=object)
    method_c = col("method")
    rv_c = col("reported_value")
    ru_c = col("reported_unit")
    cleaned_rows = np.zeros(n, dtype=bool)
    for c in (breed_c, method_c, rv_c, ru_c):
        clean = np.array([_clean_free_text(u) for u in c.uniq], dtype=object)
        changed = clean != c.uniq
        if changed.any():
            cleaned_rows |= changed[c.codes]
            c.uniq = clean
    breed_u = np.array([re.sub(r"\s+", " ", u.lower()) for u in breed_c.uniq], dtype=object)

    # ---- dates
    collected_c = col("collected_at")
    collected, coll_err = _parse_dates(collected_c)
    coll_ok = ~np.isnat(collected)
    if "collected_at" in present:
        prob.add(collected_c.empty(), "collected_at", "collection date is empty",
                 "expected a date such as 2024-03-05 or 2024-03-05T09:30")
        _date_problems(prob, collected_c, coll_err, "collected_at",
                       "expected 2024-03-05, 2024-03-05T09:30 or day-first 05/03/2024",
                       "a collection date needs year, month and day: write the full date of "
                       "the draw, e.g. 2024-03-05")
        limit = np.datetime64(now_ts + FUTURE_TOLERANCE, "ns")
        future = coll_ok & (collected > limit)
        prob.add(future, "collected_at",
                 collected_c.map(lambda u: f"collection date '{u}' is in the future"),
                 f"reference time {now_ts.isoformat(sep=' ', timespec='minutes')} UTC")
        early = coll_ok & (collected < np.datetime64(EARLIEST_DATE, "ns"))
        prob.add(early, "collected_at",
                 collected_c.map(lambda u: f"collection date '{u}' is before 1900: not a "
                                 "plausible collection date"),
                 "check the year")
        coll_ok = coll_ok & ~future & ~early
    birth_c = col("birth_date")
    birth, birth_err = _parse_dates(birth_c)
    if "birth_date" in present:
        _date_problems(prob, birth_c, birth_err, "birth_date",
                       "expected 2019-06-01 or day-first 01/06/2019, or blank",
                       "write a full date (year, month and day); if only the year or month of "
                       "birth is known, choose the day yourself, e.g. 2019-06-01")
        early_b = ~np.isnat(birth) & (birth < np.datetime64(EARLIEST_DATE, "ns"))
        prob.add(early_b, "birth_date",
                 birth_c.map(lambda u: f"birth date '{u}' is before 1900: not a plausible "
                             "birth date"), "check the year")
        after = ~np.isnat(birth) & coll_ok & (birth > collected)
        prob.add(after, "birth_date",
                 birth_c.map(lambda u: f"birth date '{u}' is after the collection date"),
                 "check both dates")

    # ---- analyte and unit
    analyte_c = col("analyte")

    def _resolve(u: str):
        if not u:
            return None, "analyte is empty", "every row needs an analyte name"
        try:
            return units.resolve_analyte(u), None, None
        except units.UnknownAnalyteError as exc:
            return None, exc.message, exc.hint

    resolved = [_resolve(u) for u in analyte_c.uniq]
    aid_u = np.array([r[0] for r in resolved], dtype=object)
    analyte_ok_u = aid_u != None  # noqa: E711
    analyte_ok = analyte_ok_u[analyte_c.codes]
    if "analyte" in present:
        err_u = np.array([r[1] for r in resolved], dtype=object)
        hint_u = np.array([r[2] for r in resolved], dtype=object)
        bad = ~analyte_ok
        prob.add(bad, "analyte", err_u[analyte_c.codes], hint_u[analyte_c.codes])

    unit_c = col("unit")
    n_units = len(unit_c.uniq)
    pair = analyte_c.codes.astype(np.int64) * n_units + unit_c.codes
    pair_codes, pair_uniq = pd.factorize(pair)
    factor_u = np.full(len(pair_uniq), np.nan)
    cunit_u = np.full(len(pair_uniq), "", dtype=object)
    perr_u = np.full(len(pair_uniq), None, dtype=object)
    phint_u = np.full(len(pair_uniq), None, dtype=object)
    for i, p in enumerate(pair_uniq):
        a_code, u_code = divmod(int(p), n_units)
        aid = aid_u[a_code]
        if aid is None:
            continue
        reported_name = analyte_c.uniq[a_code]
        unit_text = unit_c.uniq[u_code]
        if not unit_text:
            perr_u[i] = "unit is empty"
            phint_u[i] = "accepted units: " + ", ".join(
                units.accepted_units(aid, reported_name=reported_name))
            continue
        try:
            factor_u[i] = units.conversion_factor(aid, unit_text, reported_name=reported_name)
            cunit_u[i] = units.canonical_unit(aid)
        except units.UnitError as exc:
            perr_u[i], phint_u[i] = exc.message, exc.hint
    factor = factor_u[pair_codes]
    canon_unit = cunit_u[pair_codes]
    unit_ok = np.isfinite(factor)
    if "unit" in present and "analyte" in present:
        bad = analyte_ok & ~unit_ok
        prob.add(bad, "unit", perr_u[pair_codes], phint_u[pair_codes])

    # ---- values and censoring
    value_c = col("value")
    reported, censor, verr = _numbers(value_c, decimal_comma, censoring=True)
    value_ok = verr == None  # noqa: E711
    if "value" in present:
        prob.add(verr == "empty", "value", "value is empty", "expected a number such as 1.2 or <5")
        _digit_problems(prob, value_c, verr, "value", "value")
        nn = verr == "not a number"
        if nn.any():
            prob.add(nn, "value", value_c.map(lambda u: f"non-numeric value '{u}'"),
                     "expected a number such as 1.2, or a censored value such as <5 or >2000")
        dc = verr == "decimal comma"
        if dc.any():
            prob.add(dc, "value", value_c.map(lambda u: f"value '{u}' has a decimal comma"),
                     "a decimal comma is read only in files not delimited by commas; use 1.2")
        nonpos = value_ok & ~(reported > 0)
        prob.add(nonpos, "value", value_c.map(lambda u: f"value '{u}' is not greater than 0"),
                 "results are analysed on the log scale; write a result below the detection "
                 "limit as '<limit'")
        value_ok &= reported > 0
    censor_c = col("censor")
    if "censor" in present:
        cin_u = np.array([_CENSOR_IN.get(u.lower(), None) for u in censor_c.uniq], dtype=object)
        cin = cin_u[censor_c.codes]
        bad = cin == None  # noqa: E711
        prob.add(bad, "censor", censor_c.map(lambda u: f"unknown censor '{u}'"),
                 "expected left, right or blank")
        clash = ~bad & value_ok & (censor != "") & (cin != "") & (censor != cin)
        prob.add(clash, "censor", "censor disagrees with the comparator in the value",
                 "remove one of them")
        use = ~bad & (censor == "")
        censor = np.where(use, cin, censor)
        censor = np.where(censor == None, "", censor)  # noqa: E711
    with np.errstate(over="ignore", under="ignore", invalid="ignore"):
        value = reported * factor
    # ---- plausibility envelope of each analyte (canonical unit), after conversion
    lo_u = np.full(len(pair_uniq), np.nan)
    hi_u = np.full(len(pair_uniq), np.nan)
    for i, p in enumerate(pair_uniq):
        aid = aid_u[int(p) // n_units]
        if aid is not None and np.isfinite(factor_u[i]):
            env = units.plausible_range(aid)
            lo_u[i], hi_u[i] = env["min"], env["max"]
    lo, hi = lo_u[pair_codes], hi_u[pair_codes]
    implausible = value_ok & unit_ok & analyte_ok & ~((value >= lo) & (value <= hi))
    if implausible.any():
        pos = np.flatnonzero(implausible)
        msgs = []
        for q in pos:
            aid = aid_u[analyte_c.codes[q]]
            cu, ru, f = canon_unit[q], unit_c.uniq[unit_c.codes[q]], factor[q]
            text = (f"value '{value_c.uniq[value_c.codes[q]]}' {ru} is outside the plausible "
                    f"range for {units.label(aid)}: {lo[q]:g} to {hi[q]:g} {cu}")
            if f != 1.0:
                text += f" ({lo[q] / f:.3g} to {hi[q] / f:.3g} {ru})"
            msgs.append(text)
        per_row = np.full(n, "", dtype=object)
        per_row[pos] = msgs
        prob.add(pos, "value", per_row,
                 "no living animal has this value: check the number and its unit (the envelope "
                 "is the analyte's 'plausible' entry in models/analytes.toml)")
    value_ok &= ~implausible

    # ---- optional columns
    replicate_c = col("replicate")
    rep_val, _, rep_err = _numbers(replicate_c, decimal_comma, censoring=False)
    rep_blank = rep_err == "empty"
    rep_bad = ~rep_blank & ((rep_err != None) | ~(np.floor(rep_val) == rep_val)  # noqa: E711
                            | ~(rep_val >= 1) | ~(rep_val < 2**31))
    if "replicate" in present:
        _digit_problems(prob, replicate_c, rep_err, "replicate", "replicate")
        prob.add(rep_bad & (rep_err != "digits"), "replicate", replicate_c.map(lambda u: f"replicate '{u}' is not a "
                                                       "whole number of at least 1"),
                 "expected 1, 2, ... or blank (= 1)")
    replicate = np.where(rep_blank | rep_bad, 1.0, rep_val).astype(np.int64)

    fasted_c = col("fasted")
    fast_u = [_FASTED.get(u.lower(), "bad") for u in fasted_c.uniq]
    fast_bad_u = np.array([f == "bad" for f in fast_u])
    if "fasted" in present:
        prob.add(fast_bad_u[fasted_c.codes], "fasted",
                 fasted_c.map(lambda u: f"fasted '{u}' is not yes or no"),
                 "expected yes/no, true/false, 1/0, y/n, fasted/fed or blank")
    fast_val_u = np.array([f is True for f in fast_u])
    fast_na_u = np.array([f is None or f == "bad" for f in fast_u])

    hil = {}
    for name in ("haemolysis", "lipaemia", "icterus"):
        c = col(name)
        v, _, e = _numbers(c, decimal_comma, censoring=False)
        blank = e == "empty"
        if name in present:
            _digit_problems(prob, c, e, name, f"{name} index")
            nn = ~blank & (e != None) & (e != "digits")  # noqa: E711
            prob.add(nn, name, c.map(lambda u, name=name: f"{name} index '{u}' is not a number"),
                     "expected the numeric index as the analyser reports it, or blank")
            neg = (e == None) & (v < 0)  # noqa: E711
            prob.add(neg, name, c.map(lambda u, name=name: f"{name} index '{u}' is negative"),
                     "indices are 0 or more")
        hil[name] = np.where(e == None, v, np.nan).astype(float)  # noqa: E711

    state_c = col("state")
    state_u = np.array([_STATE.get(u.lower(), None) for u in state_c.uniq], dtype=object)
    if "state" in present:
        bad = (state_u == None)[state_c.codes]  # noqa: E711
        prob.add(bad, "state", state_c.map(lambda u: f"unknown state '{u}'"),
                 "expected healthy, unwell or blank (blank = assumed healthy)")
    state_u = np.where(state_u == None, "", state_u)  # noqa: E711

    # ---- consistency across rows (only on rows whose own fields are valid)
    # A specimen is keyed by (patient, specimen): clinics number draws per animal (S1, S2, ...).
    pat_ok = ~patient.empty() & ~id_bad["patient"]
    spec_ok = ~specimen.empty() & ~id_bad["specimen"] & pat_ok
    ps_codes, ps_uniq = pd.factorize(patient.codes.astype(np.int64) * len(specimen.uniq)
                                     + specimen.codes)
    ps_uniq = np.asarray(ps_uniq, dtype=np.int64)

    def spec_text(k) -> str:
        p_code, s_code = divmod(int(ps_uniq[k]), len(specimen.uniq))
        return f"specimen '{specimen.uniq[s_code]}' of patient '{patient.uniq[p_code]}'"

    if present >= {"patient", "species"}:
        sp_codes = np.where(species_ok, pd.factorize(species)[0], -1)
        _conflicts(prob, patient.codes, lambda k: f"patient '{patient.uniq[k]}'", sp_codes,
                   lambda o: species[sp_codes == o][0], pat_ok & species_ok, "species", "patient",
                   "species")
    if present >= {"specimen", "collected_at"}:
        ct_codes = pd.factorize(collected.astype(np.int64))[0]
        _conflicts(prob, ps_codes, spec_text, ct_codes,
                   lambda o: f"'{pd.Timestamp(collected[ct_codes == o][0]).isoformat()}'",
                   spec_ok & coll_ok, "collected_at", "specimen", "collection time")

    keep = np.ones(n, dtype=bool)
    n_dropped = 0
    row_ok = spec_ok & analyte_ok & unit_ok & value_ok & ~rep_bad
    if present >= {"specimen", "analyte", "value", "unit"} and row_ok.any():
        pos = np.flatnonzero(row_ok)
        aid_codes = pd.factorize(aid_u[analyte_c.codes][pos])[0]
        key = pd.DataFrame({"s": ps_codes[pos], "a": aid_codes, "r": replicate[pos]})
        dup = key.duplicated(keep=False).to_numpy()
        if dup.any():
            d = key[dup].assign(p=pos[dup], v=value[pos[dup]], c=censor[pos[dup]])
            for _, g in d.groupby(["s", "a", "r"], sort=True):
                v = g["v"].to_numpy()
                p = g["p"].to_numpy()
                same = np.allclose(v, v[0], rtol=1e-9, atol=0.0) and g["c"].nunique() == 1
                if same:
                    keep[p[1:]] = False
                    n_dropped += len(p) - 1
                    continue
                first = p[0]
                other = p[1:][~np.isclose(v[1:], v[0], rtol=1e-9, atol=0.0)
                              | (g["c"].to_numpy()[1:] != g["c"].iloc[0])][0]
                aid = aid_u[analyte_c.codes[first]]
                shown = " and ".join(
                    f"{analyte_c.uniq[analyte_c.codes[q]]} {value_c.uniq[value_c.codes[q]]} "
                    f"{unit_c.uniq[unit_c.codes[q]]} (row {rows[q]})" for q in (first, other))
                prob.add([other], "value",
                         f"{spec_text(ps_codes[first])} has {aid} replicate "
                         f"{replicate[first]} more than once with different values: {shown}",
                         "number repeated measurements with the replicate column, or remove "
                         "the wrong row")
    prob.raise_if_any()
    if n_dropped:
        notes.append(f"{n_dropped} identical duplicate row(s) (same specimen, analyte, replicate "
                     "and value) were dropped")
    n_assumed = int((state_u[state_c.codes] == "").sum())
    if n_assumed:
        notes.append(f"{n_assumed} row(s) with a blank state are assumed healthy")
    if cleaned_rows.any():
        notes.append("control characters (terminal escapes, invisible marks) were removed from "
                     "free text (breed, method, reported value or unit) in "
                     + _rows_text(rows[cleaned_rows].tolist()))
    text_cols = {"patient": patient, "specimen": specimen, "breed": breed_c, "method": method_c}
    for name in FORMULA_COLUMNS:
        c = text_cols[name]
        if name not in present:
            continue
        hit_u = np.array([u[:1] in _FORMULA_START for u in c.uniq], dtype=bool)
        if hit_u.any():
            hit = hit_u[c.codes]
            example = c.uniq[np.flatnonzero(hit_u)[0]]
            notes.append(
                f"column '{name}', {_rows_text(rows[hit].tolist())}: text beginning with "
                f"=, +, -, @, tab or carriage return (e.g. '{example[:40]}') looks like a "
                "spreadsheet formula; a spreadsheet program may run it when the file or an "
                "export is opened (OWASP guidance on CSV injection): check where it came from")
    notes = [_visible(str(x)) for x in notes]

    # ---- build the canonical frame
    reported_value = np.where(rv_c.empty(), value_c.values(), rv_c.values())
    reported_unit = np.where(ru_c.empty(), unit_c.values(), ru_c.values())
    aid = aid_u[analyte_c.codes]

    idx = np.flatnonzero(keep)
    order = _sort_order(patient, collected, specimen, aid, replicate, idx)
    sel = idx[order]

    def take(a):
        return np.asarray(a)[sel]

    breed_vals = take(breed_u[breed_c.codes])
    sex_vals = take(sex_u[sex_c.codes])
    method_vals = take(method_c.values())
    fasted_vals = pd.arrays.BooleanArray(take(fast_val_u[fasted_c.codes]),
                                         take(fast_na_u[fasted_c.codes]))
    frame = pd.DataFrame({
        "patient": _string_array(take(patient.values())),
        "species": _string_array(take(species)),
        "breed": _string_array(breed_vals, breed_vals == ""),
        "sex": _string_array(sex_vals, sex_vals == ""),
        "birth_date": take(birth),
        "specimen": _string_array(take(specimen.values())),
        "collected_at": take(collected),
        "analyte": _string_array(take(aid)),
        "value": take(value).astype(np.float64),
        "unit": _string_array(take(canon_unit)),
        "reported_value": _string_array(take(reported_value)),
        "reported_unit": _string_array(take(reported_unit)),
        "censor": _string_array(take(censor)),
        "method": _string_array(method_vals, method_vals == ""),
        "replicate": pd.array(take(replicate), dtype="Int64"),
        "fasted": fasted_vals,
        "haemolysis": take(hil["haemolysis"]),
        "lipaemia": take(hil["lipaemia"]),
        "icterus": take(hil["icterus"]),
        "state": _string_array(take(state_u[state_c.codes])),
        "source_file": _string_array(np.full(len(sel), file, dtype=object)),
        "source_row": pd.array(take(rows), dtype="Int64"),
    })
    frame.attrs = {"source": file, "notes": notes, "n_duplicates_dropped": n_dropped}
    return frame


def _did_you_mean(text: str, options, fallback: str) -> str:
    close = difflib.get_close_matches(text, list(options), n=1, cutoff=0.6)
    return f"did you mean '{close[0]}'?" if close else fallback


def _rank(uniq: np.ndarray) -> np.ndarray:
    order = np.argsort(np.asarray(uniq, dtype=str), kind="stable")
    rank = np.empty(len(uniq), dtype=np.int64)
    rank[order] = np.arange(len(uniq))
    return rank


def _sort_order(patient: _Col, collected, specimen: _Col, aid, replicate, idx) -> np.ndarray:
    """Order of rows `idx` by patient, collected_at, specimen, analyte, replicate (lexicographic)."""
    a_codes, a_uniq = pd.factorize(aid[idx])
    keys = (
        replicate[idx],
        _rank(np.asarray(a_uniq, dtype=object))[a_codes],
        _rank(specimen.uniq)[specimen.codes[idx]],
        collected[idx].astype(np.int64),
        _rank(patient.uniq)[patient.codes[idx]],
    )
    return np.lexsort(keys)


# =========================================================================== files


def load_results(path: str | Path, now=None) -> pd.DataFrame:
    """Read and validate a results file (CSV/TSV/TXT/XLSX); problems name this file."""
    raw = read_table(path)
    return validate(raw, source=Path(path).name, now=now)


def _iso(values: pd.Series) -> pd.Series:
    has_fraction = bool((values.dropna().dt.microsecond != 0).any())
    fmt = "%Y-%m-%dT%H:%M:%S.%f" if has_fraction else "%Y-%m-%dT%H:%M:%S"
    return values.dt.strftime(fmt).fillna("")


def to_tidy_csv(frame: pd.DataFrame, path: str | Path) -> Path:
    """Write a canonical results frame as UTF-8, comma-delimited CSV (ISO dates).

    ``load_results`` reads it back to the same frame (``source_file``/``source_row`` then name
    the written file). Returns the path written.
    """
    missing = [c for c in CANONICAL_COLUMNS if c not in frame.columns]
    if missing:
        raise ValueError(f"not a canonical results frame: missing columns {missing}")
    out = pd.DataFrame(index=frame.index)
    for c in CANONICAL_COLUMNS:
        s = frame[c]
        if c in ("birth_date", "collected_at"):
            out[c] = _iso(pd.to_datetime(s))
        elif c == "fasted":
            b = s.astype("boolean")
            out[c] = np.where(b.isna(), "", np.where(b.fillna(False), "yes", "no"))
        elif c in ("value", "haemolysis", "lipaemia", "icterus"):
            f = s.astype(float)
            out[c] = [("" if np.isnan(x) else repr(float(x))) for x in f.to_numpy()]
        else:
            out[c] = s.astype("string").fillna("").astype(object).astype(str)
    path = Path(path)
    out.to_csv(path, index=False, encoding="utf-8", lineterminator="\n")
    return path


# =========================================================================== benchmark


def _bench_frame(n_rows: int, seed: int) -> pd.DataFrame:
    """Invented results (demo data for the benchmark only): 10 analytes per specimen."""
    rng = np.random.default_rng(seed)
    panel = [("CREA", "mg/dL", 0.5, 2.0), ("BUN", "mg/dL", 8, 30), ("ALT", "U/L", 20, 120),
             ("ALKP", "U/L", 20, 150), ("GLU", "mmol/L", 3.5, 7.0), ("TP", "g/dL", 5.5, 7.5),
             ("ALB", "g/L", 25, 40), ("Na", "mEq/L", 140, 155), ("K", "mmol/L", 3.6, 5.6),
             ("HCT", "%", 35, 55)]
    n_spec = -(-n_rows // len(panel))
    spec = np.repeat(np.arange(n_spec), len(panel))[:n_rows]
    k = np.tile(np.arange(len(panel)), n_spec)[:n_rows]
    patient = spec // 5
    visit = spec % 5
    days = (patient % 365) + visit * 60
    base = np.datetime64("2018-01-01T08:00")
    when = base + days.astype("timedelta64[D]") + (patient % 600).astype("timedelta64[m]")
    lo = np.array([p[2] for p in panel])[k]
    hi = np.array([p[3] for p in panel])[k]
    vals = np.round(rng.uniform(lo, hi), 2)
    vtext = np.char.mod("%.2f", vals).astype(object)
    # a few censored enzyme results (ALT, ALKP): '<5' is plausible only for analytes that low
    vtext[(rng.random(n_rows) < 0.01) & np.isin(k, (2, 3))] = "<5"
    return pd.DataFrame({
        "patient": np.char.add("P", patient.astype(str)).astype(object),
        "species": np.where(patient % 3 == 0, "cat", "dog").astype(object),
        "specimen": np.char.add("S", spec.astype(str)).astype(object),
        "collected_at": np.datetime_as_string(when, unit="m").astype(object),
        "analyte": np.array([p[0] for p in panel], dtype=object)[k],
        "value": vtext,
        "unit": np.array([p[1] for p in panel], dtype=object)[k],
        "state": np.where(visit == 4, "unwell", "").astype(object),
        "fasted": np.where(visit % 2 == 0, "yes", "no").astype(object),
        "haemolysis": np.char.mod("%d", rng.integers(0, 50, n_rows)).astype(object),
    })


def bench_validate(n_rows: int = 1_000_000, seed: int = 20240601) -> dict:
    """Time ``validate`` on ``n_rows`` invented rows (a benchmark, not a test)."""
    raw = _bench_frame(n_rows, seed)
    t0 = time.perf_counter()
    frame = validate(raw, source="<bench>", now="2030-01-01")
    seconds = time.perf_counter() - t0
    return {"n_rows": int(len(frame)), "seconds": seconds, "rows_per_second": len(frame) / seconds}
