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
  often in the header line); UTF-8 with or without BOM, UTF-16 with BOM, otherwise Windows-1252 /
  Latin-1 (so a Latin-1 ``µmol/L`` reads correctly). XLSX: the first worksheet, header in row 1.
* Column names are case- and space-insensitive, with synonyms (``patient_id`` -> ``patient``,
  ``date``/``collected`` -> ``collected_at``, ``result`` -> ``value``, ``units`` -> ``unit``,
  ``analyser``/``analyzer`` -> ``method``, ``hemolysis`` -> ``haemolysis``, ``lipemia`` ->
  ``lipaemia``, ``sex_neuter`` -> ``sex`` ...; see ``COLUMN_SYNONYMS``). An unknown column that
  looks like a misspelling of a known one is a problem (with a did-you-mean hint); other unknown
  columns are ignored and listed in ``frame.attrs["notes"]``.
* Dates: ISO 8601 (``2024-03-05``, ``2024-03-05T09:30``, ``2024-03-05 09:30:00``, with an offset
  such as ``+02:00`` or ``Z``) or day-first ``05/03/2024``, ``05.03.2024``, ``05-03-2024``
  (optionally followed by ``HH:MM[:SS]``). Day first, never month first. Times with an offset are
  converted to UTC; naive times are taken as they are (treated as UTC). A collection time more
  than ``FUTURE_TOLERANCE`` (14 h, the largest UTC offset in use) after ``now`` is "in the
  future", so local clock times are never flagged by mistake.
* Values: a number > 0 in the reported unit. Censored results ``<5``, ``< 5``, ``<=5``, ``≤5``,
  ``>2000``, ``>= 2000`` become value = the limit with censor ``"left"`` / ``"right"``. A decimal
  comma (``1,2``) is accepted unless the file is comma-delimited; thousands separators are not.
* ``state``: ``healthy``, ``unwell`` or blank (blank = assumed healthy); ``well``/``normal`` are
  read as healthy and ``sick``/``ill``/``diseased`` as unwell.
* ``fasted``: yes/no, true/false, 1/0, y/n, fasted/fed or blank.
* ``replicate``: a whole number >= 1; 1 when absent or blank.
* Identical duplicates (same specimen, analyte and replicate with the same value) are dropped
  and counted in the notes; the same key with different values is a problem.
* ``censor``, ``reported_value`` and ``reported_unit`` columns are read when present (so a file
  written by :func:`to_tidy_csv` reads back unchanged); ``source_file`` and ``source_row`` are
  always those of the file being read.

Problem messages have the form ``"<file>, row <n>, column '<col>': <message> (<hint>)"``, where
row numbers are spreadsheet rows (header = row 1, first data row = 2); they are sorted by row.
"""
from __future__ import annotations

import difflib
import io
import re
import time
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
    r"^(<=|>=|=<|=>|<|>|≤|≥)?\s*([+-]?(?:\d+(?:[.,]\d*)?|[.,]\d+)(?:[eE][+-]?\d+)?)$")
_LEFT = {"<", "<=", "=<", "≤"}
_DAYFIRST_FORMATS = ("%d/%m/%Y", "%d/%m/%Y %H:%M", "%d/%m/%Y %H:%M:%S",
                     "%d.%m.%Y", "%d.%m.%Y %H:%M", "%d.%m.%Y %H:%M:%S",
                     "%d-%m-%Y", "%d-%m-%Y %H:%M", "%d-%m-%Y %H:%M:%S")


# =========================================================================== reading


def _normalise_column(name: object) -> str:
    text = str(name).replace("\ufeff", "").strip().lower()
    text = re.sub(r"[^0-9a-z]+", "_", text).strip("_")
    return COLUMN_SYNONYMS.get(text, text)


def _decode(data: bytes) -> tuple[str, str]:
    if data.startswith(b"\xef\xbb\xbf"):
        return data[3:].decode("utf-8"), "utf-8-sig"
    if data.startswith((b"\xff\xfe", b"\xfe\xff")):
        return data.decode("utf-16"), "utf-16"
    try:
        return data.decode("utf-8"), "utf-8"
    except UnicodeDecodeError:
        pass
    try:
        return data.decode("cp1252"), "cp1252"
    except UnicodeDecodeError:
        return data.decode("latin-1"), "latin-1"


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


def _read_xlsx(path: Path) -> pd.DataFrame:
    from openpyxl import load_workbook

    wb = load_workbook(path, read_only=True, data_only=True)
    try:
        ws = wb.worksheets[0]
        rows = ws.iter_rows(values_only=True)
        header = next(rows, None)
        if header is None:
            return pd.DataFrame()
        header = [_cell_text(h) for h in header]
        while header and not header[-1].strip():
            header.pop()
        width = len(header)
        body = [[_cell_text(v) for v in r[:width]] + [""] * (width - len(r[:width])) for r in rows]
    finally:
        wb.close()
    names = [h if h.strip() else f"unnamed_{i + 1}" for i, h in enumerate(header)]
    return pd.DataFrame(body, columns=names, dtype=object)


def read_table(path: str | Path) -> pd.DataFrame:
    """Read a results file as a table of strings with normalised column names.

    The index is the data-row position in the file (spreadsheet row = index + 2) and survives
    the dropping of blank rows, so problems name the rows a user sees. ``attrs`` holds
    ``source`` (file name), ``delimiter`` (None for XLSX), ``encoding`` and ``notes``.
    """
    path = Path(path)
    name = path.name
    if not path.is_file():
        raise ValidationError([Problem(name, None, None, "file not found", str(path))])
    suffix = path.suffix.lower()
    notes: list[str] = []
    delimiter: str | None
    if suffix in (".xlsx", ".xlsm"):
        try:
            df = _read_xlsx(path)
        except Exception as exc:  # openpyxl raises several types for a damaged file
            raise ValidationError([Problem(name, None, None, f"cannot read as XLSX: {exc}")]) from exc
        delimiter, encoding = None, "xlsx"
    elif suffix == ".xls":
        raise ValidationError([Problem(name, None, None, "the old binary .xls format is not read",
                                       "save the sheet as .xlsx or CSV")])
    else:
        text, encoding = _decode(path.read_bytes())
        if encoding in ("cp1252", "latin-1"):
            notes.append(f"{name}: not UTF-8; read as {encoding}")
        delimiter = _sniff_delimiter(text)
        if not text.strip():
            df = pd.DataFrame()
        else:
            try:
                df = pd.read_csv(io.StringIO(text), sep=delimiter, dtype=str, keep_default_na=False,
                                 na_filter=False, skip_blank_lines=False, engine="c")
            except pd.errors.ParserError as exc:
                m = re.search(r"line (\d+), saw (\d+)", str(exc))
                row = int(m.group(1)) if m else None
                msg = (f"has {m.group(2)} fields where the header has fewer" if m
                       else f"cannot be parsed: {exc}")
                raise ValidationError([Problem(name, row, None, f"row {msg}",
                                               f"delimiter '{delimiter}'; quote values "
                                               "that contain it")]) from exc
    if len(df.columns):
        df.columns = [_normalise_column(c) for c in df.columns]
        if len(df):
            df = df.fillna("")
            blank = np.ones(len(df), dtype=bool)
            for c in df.columns:
                blank &= df[c].to_numpy(dtype=object) == ""
            if blank.any():
                df = df.loc[~blank]
    df.attrs = {"source": name, "delimiter": delimiter, "encoding": encoding, "notes": notes}
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
    def __init__(self, file: str, rows: np.ndarray):
        self.file = file
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
        self.items.extend(Problem(self.file, r, column, m, h) for r, m, h in zip(rows, msgs, hints))

    def one(self, row, column, message, hint=None) -> None:
        self.items.append(Problem(self.file, row, column, message, hint))

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
    """Per-row (values, censor, error) arrays; error is None, 'empty', 'not a number', ..."""
    uniq = col.uniq
    val = np.array(pd.to_numeric(pd.Series(uniq, dtype=object), errors="coerce"), dtype=float)
    censor = np.full(len(uniq), "", dtype=object)
    err = np.full(len(uniq), None, dtype=object)
    for i in np.flatnonzero(~np.isfinite(val)):
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
    """Per-row datetime64[ns] (NaT when blank or bad) and a per-row 'unparsable' flag."""
    uniq = pd.Series(col.uniq, dtype=object)
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
    lo, hi = pd.Timestamp.min.as_unit("us"), pd.Timestamp.max.as_unit("us")
    in_range = ok & (parsed >= lo).to_numpy() & (parsed <= hi).to_numpy()
    bad = (uniq != "").to_numpy() & ~ok
    values = np.full(len(uniq), np.datetime64("NaT"), dtype="datetime64[ns]")
    values[in_range] = parsed[in_range].to_numpy().astype("datetime64[ns]")
    # outside the ns range: keep as "far future/past" markers via the bounds
    far = ok & ~in_range
    values[far & (parsed > hi).to_numpy()] = np.datetime64(pd.Timestamp.max.as_unit("ns"))
    values[far & (parsed < lo).to_numpy()] = np.datetime64(pd.Timestamp.min.as_unit("ns"))
    return values[col.codes], bad[col.codes]


def _rows_text(rows: list[int], limit: int = 3) -> str:
    head = ", ".join(str(r) for r in rows[:limit])
    return ("row " if len(rows) == 1 else "rows ") + head + (", ..." if len(rows) > limit else "")


def _conflicts(prob: _Problems, key_codes, key_uniq, other_codes, other_text, valid, column, what,
               other_name) -> None:
    """One problem per key (e.g. patient) whose rows carry more than one `other` (e.g. species)."""
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
                 f"{what} '{key_uniq[k]}' is recorded with more than one {other_name}: "
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

    # ---- columns
    if len(raw.columns) == 0:
        prob.one(1, None, "the file is empty: expected a header row naming the columns "
                 + ", ".join(REQUIRED_COLUMNS))
        prob.raise_if_any()
    source_of: dict[str, object] = {}
    misspelt: dict[str, object] = {}  # canonical column -> the unknown column that resembles it
    for original in raw.columns:
        canon = _normalise_column(original)
        if canon in _KNOWN:
            if canon in source_of:
                prob.one(1, str(original), f"column '{original}' duplicates column "
                         f"'{source_of[canon]}' (both mean '{canon}')", "keep one of them")
            else:
                source_of[canon] = original
            continue
        close = difflib.get_close_matches(canon, sorted(_KNOWN | set(COLUMN_SYNONYMS)), n=1,
                                          cutoff=0.8)
        if close:
            target = COLUMN_SYNONYMS.get(close[0], close[0])
            misspelt[target] = original
            prob.one(1, str(original), f"unknown column '{original}'",
                     f"did you mean '{target}'?")
        else:
            notes.append(f"column '{original}' is not part of the results contract and was ignored")
    # a required column whose misspelling was already reported is not reported twice
    missing = [c for c in REQUIRED_COLUMNS if c not in source_of and c not in misspelt]
    for c in missing:
        prob.one(1, c, f"required column '{c}' is missing",
                 "columns found: " + ", ".join(str(x) for x in raw.columns))
    if n == 0:
        prob.one(2, None, "no data rows below the header")
        prob.raise_if_any()

    def col(name: str) -> _Col:
        original = source_of.get(name)
        return _Col(None if original is None else raw[original], n)

    present = set(source_of)

    # ---- simple text columns
    patient = col("patient")
    specimen = col("specimen")
    if "patient" in present:
        prob.add(patient.empty(), "patient", "patient is empty", "every row needs a patient id")
    if "specimen" in present:
        prob.add(specimen.empty(), "specimen", "specimen is empty",
                 "every row needs the id of its blood draw")

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
    breed_u = np.array([re.sub(r"\s+", " ", u.lower()) for u in breed_c.uniq], dtype=object)
    sex_c = col("sex")
    sex_u = np.array([_SEX.get(k, k) for k in
                      (re.sub(r"[^0-9a-z]+", "_", u.lower()).strip("_") for u in sex_c.uniq)],
                     dtype=object)
    method_c = col("method")

    # ---- dates
    collected_c = col("collected_at")
    collected, coll_bad = _parse_dates(collected_c)
    coll_ok = ~np.isnat(collected)
    if "collected_at" in present:
        prob.add(collected_c.empty(), "collected_at", "collection date is empty",
                 "expected a date such as 2024-03-05 or 2024-03-05T09:30")
        if coll_bad.any():
            prob.add(coll_bad, "collected_at", collected_c.map(lambda u: f"unparsable date '{u}'"),
                     "expected 2024-03-05, 2024-03-05T09:30 or day-first 05/03/2024")
        limit = np.datetime64(now_ts + FUTURE_TOLERANCE, "ns")
        future = coll_ok & (collected > limit)
        prob.add(future, "collected_at",
                 collected_c.map(lambda u: f"collection date '{u}' is in the future"),
                 f"reference time {now_ts.isoformat(sep=' ', timespec='minutes')} UTC")
        early = coll_ok & (collected < np.datetime64(EARLIEST_DATE, "ns"))
        prob.add(early, "collected_at",
                 collected_c.map(lambda u: f"collection date '{u}' is before 1900"),
                 "check the year")
        coll_ok = coll_ok & ~future & ~early
    birth_c = col("birth_date")
    birth, birth_bad = _parse_dates(birth_c)
    if "birth_date" in present:
        prob.add(birth_bad, "birth_date", birth_c.map(lambda u: f"unparsable date '{u}'"),
                 "expected 2019-06-01 or day-first 01/06/2019, or blank")
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
    value = reported * factor

    # ---- optional columns
    replicate_c = col("replicate")
    rep_val, _, rep_err = _numbers(replicate_c, decimal_comma, censoring=False)
    rep_blank = rep_err == "empty"
    rep_bad = ~rep_blank & ((rep_err != None) | ~(np.floor(rep_val) == rep_val)  # noqa: E711
                            | ~(rep_val >= 1) | ~(rep_val < 2**31))
    if "replicate" in present:
        prob.add(rep_bad, "replicate", replicate_c.map(lambda u: f"replicate '{u}' is not a "
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
            nn = ~blank & (e != None)  # noqa: E711
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
    pat_ok = ~patient.empty()
    spec_ok = ~specimen.empty()
    if present >= {"patient", "species"}:
        sp_codes = np.where(species_ok, pd.factorize(species)[0], -1)
        _conflicts(prob, patient.codes, patient.uniq, sp_codes, lambda o: species[sp_codes == o][0],
                   pat_ok & species_ok, "species", "patient", "species")
    if present >= {"specimen", "patient"}:
        _conflicts(prob, specimen.codes, specimen.uniq, patient.codes,
                   lambda o: f"patient '{patient.uniq[o]}'", spec_ok & pat_ok, "patient",
                   "specimen", "patient")
    if present >= {"specimen", "collected_at"}:
        ct_codes = pd.factorize(collected.astype(np.int64))[0]
        _conflicts(prob, specimen.codes, specimen.uniq, ct_codes,
                   lambda o: f"'{pd.Timestamp(collected[ct_codes == o][0]).isoformat()}'",
                   spec_ok & coll_ok, "collected_at", "specimen", "collection time")

    keep = np.ones(n, dtype=bool)
    n_dropped = 0
    row_ok = spec_ok & analyte_ok & unit_ok & value_ok & ~rep_bad
    if present >= {"specimen", "analyte", "value", "unit"} and row_ok.any():
        pos = np.flatnonzero(row_ok)
        aid_codes = pd.factorize(aid_u[analyte_c.codes][pos])[0]
        key = pd.DataFrame({"s": specimen.codes[pos], "a": aid_codes, "r": replicate[pos]})
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
                         f"specimen '{specimen.uniq[specimen.codes[first]]}' has {aid} replicate "
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

    # ---- build the canonical frame
    rv_c = col("reported_value")
    ru_c = col("reported_unit")
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
    vtext[rng.random(n_rows) < 0.002] = "<5"
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
