"""Reading a results table (CSV/TSV/TXT/XLSX) as strings: decoding, delimiter, blank lines.

Input rules (documented choices of this project)
------------------------------------------------
* Text files: comma, semicolon, tab or pipe delimited (the delimiter is the one that occurs most
  often in the header line); UTF-8 with or without BOM, UTF-16 or UTF-32 with BOM, UTF-16 or
  UTF-32 LE/BE without BOM (recognised by its zero bytes; one that then does not decode, e.g. cut
  off mid-character, is a problem, never read as single bytes), otherwise Windows-1252 / Latin-1 (so a Latin-1 ``µmol/L`` reads
  correctly; also after a UTF-8 BOM when the rest is not UTF-8, with a note). Blank lines (or
  lines of delimiters only) above the header and at the end are skipped; row numbers stay the
  lines a user sees. A first data row wider than the header is a problem, never re-read as an
  index. XLSX: the first worksheet, header in its first non-blank row.
* Column names are normalised (:func:`bayesbase.validate.normalise_column`); the header as
  written is kept in ``attrs["original_columns"]``.
"""
from __future__ import annotations

import codecs
import io
import re
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import Problem, ValidationError
from ..validate.columns import normalise_column
from ..validate.text import cell_text, visible

__all__ = ["read_table"]

#: Lines that hold nothing but spaces, tabs and delimiters count as blank.
#: blank lines and comment lines ('# ...', e.g. the caution line bayesbase writes at the top of
#: its own CSV outputs) above the header
_LEADING_LINES = re.compile(r"(?:(?:[ \t,;|]*|#[^\r\n]*)(?:\r\n|\r|\n))*")
_LINE_BREAK = re.compile(r"\r\n|\r|\n")


# ------------------------------------------------------------------------------ decoding
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


def _looks_utf32(data: bytes) -> str | None:
    """'utf-32-le' / 'utf-32-be' when a BOM-less file has the zero-byte pattern of UTF-32 text
    (three zero bytes with every ASCII character), else None."""
    sample = data[:4096 - 4096 % 4]
    sample = sample[:len(sample) - len(sample) % 4]
    if len(sample) < 8:
        return None
    z = [sample[k::4].count(0) / (len(sample) // 4) for k in range(4)]
    if z[2] > 0.9 and z[3] > 0.9 and z[0] < 0.05:
        return "utf-32-le"
    if z[0] > 0.9 and z[1] > 0.9 and z[3] < 0.05:
        return "utf-32-be"
    return None


def wide_encoding(head: bytes) -> str | None:
    """The UTF-32 or UTF-16 encoding a BOM-less file's first bytes show by their zero bytes."""
    return _looks_utf32(head) or _looks_utf16(head)


def not_valid_as(name: str, encoding: str, why: str) -> ValidationError:
    """The problem of a file that looks like (or says it is) ``encoding`` but does not decode."""
    label = encoding.upper().replace("-LE", " LE").replace("-BE", " BE")
    return ValidationError([Problem(name, None, None, f"{why} {label} text but is not valid "
                                    f"{label} (cut off or damaged?)",
                                    "save the file again as UTF-8 CSV")])


def _decode_8bit(data: bytes) -> tuple[str, str]:
    try:
        return data.decode("cp1252"), "cp1252"
    except UnicodeDecodeError:  # the five bytes cp1252 leaves undefined
        return data.decode("latin-1"), "latin-1"


def _decode_bom(data: bytes, name: str) -> tuple[str, str, str | None] | None:
    """(text, encoding, note) of a file that starts with a UTF-8 or UTF-16 byte-order mark."""
    if data.startswith(codecs.BOM_UTF8):
        try:
            return data[3:].decode("utf-8"), "utf-8-sig", None
        except UnicodeDecodeError:
            text, enc = _decode_8bit(data[3:])
            return text, enc, (f"{name}: starts with a UTF-8 byte-order mark but is not UTF-8; "
                               f"read as {enc}")
    for boms, enc in (((codecs.BOM_UTF32_LE, codecs.BOM_UTF32_BE), "utf-32"),
                      ((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE), "utf-16")):
        if data.startswith(boms):  # UTF-32 first: its LE mark begins with UTF-16's
            try:
                return data.decode(enc), enc, None
            except UnicodeDecodeError as exc:
                raise not_valid_as(name, enc, "starts with a byte-order mark of") from exc
    return None


def decode(data: bytes, name: str) -> tuple[str, str, str | None]:
    """(text, encoding, note or None) of a text file's bytes."""
    with_bom = _decode_bom(data, name)
    if with_bom is not None:
        return with_bom
    guess = wide_encoding(data)
    if guess:
        try:
            text = data.decode(guess)
        except UnicodeDecodeError as exc:
            raise not_valid_as(name, guess, "looks like (zero bytes between the characters)") \
                from exc
        return text, guess, (f"{name}: no byte-order mark; read as {guess[:6].upper()} "
                             f"{guess[-2:].upper()} (detected from its zero bytes)")
    try:
        return data.decode("utf-8"), "utf-8", None
    except UnicodeDecodeError:
        pass
    text, enc = _decode_8bit(data)
    return text, enc, f"{name}: not UTF-8; read as {enc}"


# ------------------------------------------------------------------------------ text tables
def sniff_delimiter(text: str) -> str:
    header = next((line for line in text.splitlines() if line.strip()), "")
    counts = {d: header.count(d) for d in (",", ";", "\t", "|")}
    best = max(counts, key=lambda d: counts[d])
    return best if counts[best] > 0 else ","


def parser_problem(exc: Exception, name: str, delimiter: str, skipped: int) -> ValidationError:
    """The located problem of a pandas ``ParserError`` (a row wider than the header, an
    unclosed quote ...); its line number counts from the header, below ``skipped`` lines."""
    m = re.search(r"line (\d+), saw (\d+)", str(exc))
    q = re.search(r"EOF inside string starting at row (\d+)", str(exc))  # 0-based line
    row = int(m.group(1)) + skipped if m else (int(q.group(1)) + 1 + skipped if q else None)
    msg = (f"has {m.group(2)} fields where the header has fewer" if m
           else "has a quote that is never closed (the rest of the file is inside it)" if q
           else visible(f"cannot be parsed: {exc}"))
    return ValidationError([Problem(visible(name), row, None, f"row {msg}",
                                    visible(f"delimiter '{delimiter}'; quote values "
                                            "that contain it"))])


def wide_row_problem(df: pd.DataFrame, name: str, delimiter: str, skipped: int) -> ValidationError:
    """pandas takes the extra leading fields of a first data row that is wider than the
    header as an index: a misread, never accepted silently."""
    width = len(df.columns) + df.index.nlevels
    return ValidationError([Problem(
        visible(name), skipped + 2, None,
        f"row has {width} fields where the header has {len(df.columns)}",
        visible(f"delimiter '{delimiter}'; quote values that contain it, or name "
                "every column in the header"))])


def _parse_csv(text: str, delimiter: str, name: str, skipped: int) -> pd.DataFrame:
    """The table of strings in ``text`` (below ``skipped`` blank lines); a row wider than the
    header is a problem naming its line."""
    if not text.strip() or not text.strip(" \t,;|\r\n\ufeff"):
        return pd.DataFrame()
    try:
        df = pd.read_csv(io.StringIO(text), sep=delimiter, dtype=str, keep_default_na=False,
                         na_filter=False, skip_blank_lines=False, engine="c")
    except pd.errors.EmptyDataError:  # e.g. nothing but a stray byte-order mark
        df = pd.DataFrame()
    except pd.errors.ParserError as exc:
        raise parser_problem(exc, name, delimiter, skipped) from exc
    if not isinstance(df.index, pd.RangeIndex):
        raise wide_row_problem(df, name, delimiter, skipped)
    df.index = df.index + skipped
    return df


def _read_text(path: Path, name: str) -> tuple[pd.DataFrame, int, str, str, list[str]]:
    """(table, blank lines above the header, delimiter, encoding, notes) of a text file."""
    text, encoding, note = decode(path.read_bytes(), visible(name))
    notes = [note] if note else []
    skipped = 0
    lead = _LEADING_LINES.match(text).group(0)
    if lead:
        skipped = len(_LINE_BREAK.findall(lead))
        text = text[len(lead):]
    delimiter = sniff_delimiter(text)
    return _parse_csv(text, delimiter, name, skipped), skipped, delimiter, encoding, notes


# ------------------------------------------------------------------------------ XLSX
def _read_xlsx(path: Path) -> tuple[pd.DataFrame, int]:
    """(table, number of blank rows above the header) of the first worksheet."""
    from openpyxl import load_workbook

    wb = load_workbook(path, read_only=True, data_only=True)
    try:
        ws = wb.worksheets[0]
        rows = ws.iter_rows(values_only=True)
        skipped = 0
        for header in rows:
            if any(cell_text(h).strip() for h in header):
                break
            skipped += 1
        else:
            return pd.DataFrame(), 0
        header = [cell_text(h) for h in header]
        while header and not header[-1].strip():
            header.pop()
        width = len(header)
        body = [[cell_text(v) for v in r[:width]] + [""] * (width - len(r[:width])) for r in rows]
    finally:
        wb.close()
    names = [h if h.strip() else f"unnamed_{i + 1}" for i, h in enumerate(header)]
    df = pd.DataFrame(body, columns=names, dtype=object)
    df.index = df.index + skipped
    return df, skipped


def _read_spreadsheet(path: Path, name: str) -> tuple[pd.DataFrame, int]:
    try:
        return _read_xlsx(path)
    except Exception as exc:  # openpyxl raises several types for a damaged file
        raise ValidationError([Problem(visible(name), None, None,
                                       visible(f"cannot read as XLSX: {exc}"))]) from exc


# ------------------------------------------------------------------------------ table
def _drop_blank_rows(df: pd.DataFrame) -> pd.DataFrame:
    """Rows whose every cell is empty or white space removed (the index keeps file rows).

    By position (two columns may share a name); decided on each column's distinct values, not
    row by row."""
    df = df.fillna("")
    blank = np.ones(len(df), dtype=bool)
    for j in range(df.shape[1]):
        cand = np.flatnonzero(blank)
        if cand.size == 0:
            break
        codes, uniq = pd.factorize(df.iloc[cand, j].to_numpy(dtype=object))
        empty_u = np.array([not str(u).strip() for u in uniq] + [True], dtype=bool)
        blank[cand] = empty_u[codes]
    return df.loc[~blank] if blank.any() else df


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
        raise ValidationError([Problem(visible(name), None, None, "file not found",
                                       visible(str(path)))])
    suffix = path.suffix.lower()
    notes: list[str] = []
    delimiter: str | None
    if suffix in (".xlsx", ".xlsm"):
        df, skipped = _read_spreadsheet(path, name)
        delimiter, encoding = None, "xlsx"
    elif suffix == ".xls":
        raise ValidationError([Problem(visible(name), None, None,
                                       "the old binary .xls format is not read",
                                       "save the sheet as .xlsx or CSV")])
    else:
        df, skipped, delimiter, encoding, notes = _read_text(path, name)
    original = [str(c) for c in df.columns]
    if len(df.columns):
        df.columns = [normalise_column(c) for c in df.columns]
        if len(df):
            df = _drop_blank_rows(df)
    df.attrs = {"source": name, "delimiter": delimiter, "encoding": encoding, "notes": notes,
                "header_row": skipped + 1, "original_columns": original}
    return df
