"""Reading a large results table in chunks, with memory bounded by the chunk size.

:func:`iter_results` reads a text table (CSV/TSV/TXT) a chunk of rows at a time from a decoded
stream (never the whole file in memory), validates each chunk with
:func:`bayesbase.validate.validate` and checks across chunks what ``validate`` checks across
rows: one patient has one species, one draw (patient, specimen) has one collection time, and
the same (patient, specimen, analyte, replicate) twice is dropped when identical and a problem
when the values differ. What it keeps across chunks is compact: per patient, per draw and per
result key a few numbers (about 25 bytes per result row, plus the id texts).

Rules are those of :func:`bayesbase.io.read_table` / ``validate`` (decoding, delimiter, blank
lines above the header, row numbers as a spreadsheet shows them). Differences, by design:

* the rows come chunk by chunk, each chunk in the canonical order (patient, collected_at,
  specimen, analyte, replicate); sorted the same way, their concatenation is the frame
  ``read_results`` returns (:func:`read_results_chunked` does exactly that, for tests and small
  files);
* a problem with the header (a missing, misspelt or duplicated column) stops the reading at the
  first chunk; problems in rows are collected over the whole file (at most
  :data:`MAX_PROBLEMS` listed, then a count) and raised together at the end, as one
  :class:`~bayesbase.errors.ValidationError`; once a problem is found no further chunk is
  yielded, so a consumer that writes chunks inside one transaction (the store's import) rolls
  back and stores nothing.

An XLSX file (at most 1,048,576 rows per worksheet, ECMA-376) is read whole and then validated
the same way; a FHIR JSON file or a Parquet dataset is read whole by ``read_results`` and then
given in chunks.

Columns the validator does not know but a consumer wants (the store's ``owner`` column) are
taken off each raw chunk before validation with ``keep=("owner",)`` and given beside the chunk
by :meth:`ResultChunks.with_kept` (as raw text, with the raw ``patient`` column), so the
validation is that of a file without them, as the whole-file import does.

The command line streams a text table (CSV/TSV/TXT) when it is larger than
:data:`STREAM_ABOVE_BYTES` or when asked to (``--chunk-rows``): :func:`stream_chunksize`.
"""
from __future__ import annotations

import codecs
import re
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import Problem, ValidationError
from ..validate import validate
from ..validate.columns import normalise_column
from ..validate.text import visible
from . import tables
from .results import FHIR_SUFFIXES, read_results

__all__ = ["DEFAULT_CHUNKSIZE", "MAX_PROBLEMS", "STREAM_ABOVE_BYTES", "WHOLE_FILE_SUFFIXES",
           "ResultChunks", "iter_results", "read_results_chunked", "stream_chunksize",
           "CANONICAL_ORDER"]

DEFAULT_CHUNKSIZE = 250_000
#: A text table larger than this is read in chunks by ``bayesbase import`` and ``check`` (and
#: refused whole by ``assess``/``report``): 64 MiB is about 900,000 result rows of a typical
#: tidy CSV, whose whole-file frame (raw strings plus canonical columns) takes a few GB.
STREAM_ABOVE_BYTES = 64 * 1024 * 1024
#: Inputs always read whole: XLSX (one worksheet, at most 1,048,576 rows, ECMA-376), FHIR JSON,
#: Parquet datasets.
WHOLE_FILE_SUFFIXES = (".xlsx", ".xlsm", ".xls", ".parquet", *FHIR_SUFFIXES)
#: Problems listed by one chunked read (a file where every row is bad stays bounded).
MAX_PROBLEMS = 1000
#: The canonical frame's row order (``bayesbase.validate.assemble``).
CANONICAL_ORDER = ["patient", "collected_at", "specimen", "analyte", "replicate"]
_BLOCK = 1 << 24  # bytes per block when checking a file's encoding


def stream_chunksize(path, chunk_rows: int | None = None) -> int | None:
    """Rows per chunk when ``path`` is to be streamed, else None (read whole): a text table
    (not XLSX, FHIR JSON or Parquet; not a directory) with ``chunk_rows`` given, or larger than
    :data:`STREAM_ABOVE_BYTES` (then :data:`DEFAULT_CHUNKSIZE` rows)."""
    path = Path(path)
    if path.suffix.lower() in WHOLE_FILE_SUFFIXES or path.is_dir() or not path.is_file():
        return None
    if chunk_rows is not None:
        if int(chunk_rows) < 1:
            raise ValidationError([Problem(visible(path.name), None, None,
                                           f"--chunk-rows must be at least 1 (got {chunk_rows})")])
        return int(chunk_rows)
    return DEFAULT_CHUNKSIZE if path.stat().st_size > STREAM_ABOVE_BYTES else None


# ------------------------------------------------------------------------------ decoding
def _valid_as(path: Path, encoding: str, skip: int = 0) -> bool:
    """Whether the whole file (from byte ``skip``) decodes as ``encoding``, block by block."""
    dec = codecs.getincrementaldecoder(encoding)()
    with open(path, "rb") as fh:
        fh.seek(skip)
        try:
            while block := fh.read(_BLOCK):
                dec.decode(block)
            dec.decode(b"", final=True)
        except UnicodeDecodeError:
            return False
    return True


def stream_encoding(path: Path, name: str) -> tuple[str, str | None]:
    """(encoding for ``open``, note or None) of a text file, decided as
    :func:`bayesbase.io.tables.decode` decides it but without reading the whole file into
    memory (the head for byte-order marks and UTF-16 zero bytes, then a block-wise check)."""
    with open(path, "rb") as fh:
        head = fh.read(4096)
    if head.startswith(codecs.BOM_UTF8):
        if _valid_as(path, "utf-8", 3):
            return "utf-8-sig", None
        enc = "cp1252" if _valid_as(path, "cp1252", 3) else "latin-1"
        return enc, (f"{name}: starts with a UTF-8 byte-order mark but is not UTF-8; read as "
                     f"{enc}")
    for boms, enc in (((codecs.BOM_UTF32_LE, codecs.BOM_UTF32_BE), "utf-32"),
                      ((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE), "utf-16")):
        if head.startswith(boms):
            if not _valid_as(path, enc):
                raise tables.not_valid_as(name, enc, "starts with a byte-order mark of")
            return enc, None
    guess = tables.wide_encoding(head)
    if guess:
        if not _valid_as(path, guess):
            raise tables.not_valid_as(name, guess, "looks like (zero bytes between the characters)")
        return guess, (f"{name}: no byte-order mark; read as {guess[:6].upper()} "
                       f"{guess[-2:].upper()} (detected from its zero bytes)")
    if _valid_as(path, "utf-8"):
        return "utf-8", None
    enc = "cp1252" if _valid_as(path, "cp1252") else "latin-1"
    return enc, f"{name}: not UTF-8; read as {enc}"


def _skip_leading(fh) -> int:
    """Skip blank and comment lines above the header (as ``read_table`` does); their count."""
    skipped = 0
    while True:
        pos = fh.tell()
        line = fh.readline()
        if not line:
            return skipped
        if line.strip(" \t,;|\r\n") and not line.startswith("#"):
            fh.seek(pos)
            return skipped
        skipped += 1


# ------------------------------------------------------------------------------ raw chunks
def _raw_text_chunks(path: Path, name: str, chunksize: int):
    """Yield (raw chunk of strings with normalised columns and file-row index, attrs)."""
    encoding, note = stream_encoding(path, visible(name))
    fh = open(path, encoding=encoding, newline="")
    try:
        try:
            skipped = _skip_leading(fh)
            pos = fh.tell()
            header_line = fh.readline()
            fh.seek(pos)
        except UnicodeDecodeError as exc:
            raise _decode_problem(name, encoding) from exc
        delimiter = tables.sniff_delimiter(header_line)
        attrs = {"source": name, "delimiter": delimiter, "encoding": encoding,
                 "notes": [note] if note else [], "header_row": skipped + 1}
        if not header_line.strip(" \t,;|\r\n\ufeff"):
            df = pd.DataFrame()
            df.attrs = dict(attrs, original_columns=[])
            yield df
            return
        reader = pd.read_csv(fh, sep=delimiter, dtype=str, keep_default_na=False,
                             na_filter=False, skip_blank_lines=False, engine="c",
                             chunksize=chunksize)
        yield from _chunks_of(reader, name, delimiter, skipped, attrs, encoding)
    finally:
        fh.close()


def _decode_problem(name: str, encoding: str) -> ValidationError:
    return ValidationError([Problem(visible(name), None, None,
                                    f"is not valid {encoding} text",
                                    "save the file again as UTF-8 CSV")])


def _chunks_of(reader, name, delimiter, skipped, attrs, encoding):
    first = True
    while True:
        try:
            df = next(reader)
        except StopIteration:
            return
        except pd.errors.EmptyDataError:
            df = pd.DataFrame()
        except pd.errors.ParserError as exc:
            raise tables.parser_problem(exc, name, delimiter, skipped) from exc
        except UnicodeDecodeError as exc:
            raise _decode_problem(name, encoding) from exc
        if not isinstance(df.index, pd.RangeIndex):
            raise tables.wide_row_problem(df, name, delimiter, skipped)
        original = [str(c) for c in df.columns]
        df.index = df.index + skipped
        if len(df.columns):
            df.columns = [normalise_column(c) for c in df.columns]
            if len(df):
                df = tables._drop_blank_rows(df)
        df.attrs = dict(attrs, original_columns=original,
                        notes=list(attrs["notes"]) if first else [])
        first = False
        yield df


def _raw_chunks(path: Path, chunksize: int):
    if path.suffix.lower() in (".xlsx", ".xlsm", ".xls"):
        df = tables.read_table(path)
        attrs = df.attrs
        for start in range(0, max(len(df), 1), chunksize):
            part = df.iloc[start:start + chunksize]
            part.attrs = dict(attrs, notes=list(attrs["notes"]) if start == 0 else [])
            yield part
        return
    if not path.is_file():
        raise ValidationError([Problem(visible(path.name), None, None, "file not found",
                                       visible(str(path)))])
    yield from _raw_text_chunks(path, path.name, chunksize)


# ------------------------------------------------------------------------------ across chunks
class _Across:
    """What one chunked read remembers across chunks (compact: numbers per key)."""

    def __init__(self, file: str):
        self.file = file
        self.species: dict[str, tuple[str, int]] = {}      # patient -> (species, first row)
        self.draws: dict[str, int] = {}                     # 'patient<US>specimen' -> position
        self.draw_time: list[np.ndarray] = []               # collected_at (int64) per position
        self.draw_row: list[np.ndarray] = []
        self.pairs: dict[tuple[str, int], int] = {}         # (analyte, replicate) -> code
        self.seen: list[tuple[np.ndarray, ...]] = []        # sorted keys, value, censor, row
        self.n_dropped = 0

    # ---- one patient, one species
    def check_species(self, frame: pd.DataFrame, out: list[Problem]) -> None:
        first = frame.drop_duplicates("patient")
        for p, sp, row in zip(first["patient"], first["species"], first["source_row"]):
            old = self.species.get(p)
            if old is None:
                self.species[p] = (sp, int(row))
            elif old[0] != sp:
                bad = frame.loc[(frame["patient"] == p) & (frame["species"] != old[0]),
                                "source_row"].iloc[0]
                out.append(Problem(self.file, int(bad), "species",
                                   visible(f"patient '{p}' is recorded with more than one "
                                           f"species: {old[0]} (row {old[1]}) and {sp} (row "
                                           f"{int(bad)})"),
                                   "one patient has one species; correct the rows or use "
                                   "distinct patient ids"))

    # ---- one draw, one collection time
    def draw_positions(self, frame: pd.DataFrame, out: list[Problem]) -> np.ndarray:
        # ids never hold a control character (the validator refuses them): U+001F separates
        keys = np.array([f"{p}\x1f{s}" for p, s in zip(frame["patient"].tolist(),
                                                        frame["specimen"].tolist())], dtype=object)
        ukeys, first_idx = np.unique(keys, return_index=True)
        times = frame["collected_at"].to_numpy().astype("datetime64[ns]").astype(np.int64)
        rows = frame["source_row"].to_numpy(dtype=np.int64)
        base = len(self.draws)
        pos_u = np.empty(len(ukeys), dtype=np.int64)
        new_t, new_r = [], []
        all_t = np.concatenate(self.draw_time) if self.draw_time else np.empty(0, np.int64)
        all_r = np.concatenate(self.draw_row) if self.draw_row else np.empty(0, np.int64)
        for i, (k, fi) in enumerate(zip(ukeys, first_idx)):
            p = self.draws.get(k)
            if p is None:
                p = self.draws[k] = base + len(new_t)
                new_t.append(times[fi])
                new_r.append(rows[fi])
            elif all_t[p] != times[fi]:
                pt, sp = k.split("\x1f", 1)
                out.append(Problem(self.file, int(rows[fi]), "collected_at", visible(
                    f"specimen '{sp}' of patient '{pt}' is recorded with more than one "
                    f"collection time: '{pd.Timestamp(all_t[p]).isoformat()}' (row {all_r[p]}) "
                    f"and '{pd.Timestamp(times[fi]).isoformat()}' (row {rows[fi]})"),
                    "one specimen has one collection time; correct the rows or use distinct "
                    "specimen ids"))
            pos_u[i] = p
        if new_t:
            self.draw_time.append(np.asarray(new_t, dtype=np.int64))
            self.draw_row.append(np.asarray(new_r, dtype=np.int64))
        return pos_u[np.searchsorted(ukeys, keys)]

    # ---- one result per (draw, analyte, replicate)
    def result_keys(self, frame: pd.DataFrame, draw_pos: np.ndarray) -> np.ndarray:
        """One int64 per row, equal for two rows exactly when (patient, specimen, analyte,
        replicate) are equal: the draw's position times 2**23 plus a global code of the
        (analyte, replicate) pair."""
        local, uniq = pd.MultiIndex.from_arrays(
            [frame["analyte"].astype(object).to_numpy(),
             frame["replicate"].to_numpy(dtype=np.int64)]).factorize()
        codes_u = np.empty(len(uniq), dtype=np.int64)
        for i, pr in enumerate(uniq):
            c = self.pairs.get(pr)
            if c is None:
                c = self.pairs[pr] = len(self.pairs)
            codes_u[i] = c
        if len(self.pairs) >= 1 << 23:
            raise ValidationError([Problem(self.file, None, "replicate",
                                           "more than 8 million distinct (analyte, replicate) "
                                           "pairs: not a results file this reader can check")])
        return draw_pos * (1 << 23) + codes_u[local]

    def dedupe(self, frame: pd.DataFrame, keys: np.ndarray, out: list[Problem]) -> np.ndarray:
        """Mask of the rows to keep: an identical repeat of an earlier chunk's result is
        dropped, a different value for the same key is a problem."""
        value = frame["value"].to_numpy(dtype=float)
        censor = frame["censor"].astype(object).to_numpy()
        cens = np.select([censor == "left", censor == "right"], [1, 2], 0).astype(np.int8)
        rows = frame["source_row"].to_numpy(dtype=np.int64)
        keep = np.ones(len(frame), dtype=bool)
        for k_old, v_old, c_old, r_old in self.seen:
            pos = np.clip(np.searchsorted(k_old, keys), 0, max(len(k_old) - 1, 0))
            hit = (k_old[pos] == keys) if len(k_old) else np.zeros(len(keys), bool)
            for i in np.flatnonzero(hit & keep):
                j = pos[i]
                if np.isclose(v_old[j], value[i], rtol=1e-9, atol=0.0) and c_old[j] == cens[i]:
                    keep[i] = False
                    self.n_dropped += 1
                    continue
                keep[i] = False
                out.append(self._differs(frame, i, v_old[j], r_old[j]))
        order = np.argsort(keys[keep], kind="stable")
        self.seen.append((keys[keep][order], value[keep][order], cens[keep][order],
                          rows[keep][order]))
        return keep

    def _differs(self, frame, i, v_old, r_old) -> Problem:
        r = frame.iloc[i]
        return Problem(self.file, int(r["source_row"]), "value", visible(
            f"specimen '{r['specimen']}' of patient '{r['patient']}' has {r['analyte']} "
            f"replicate {int(r['replicate'])} more than once with different values: "
            f"{v_old!r} {r['unit']} (row {int(r_old)}) and {float(r['value'])!r} {r['unit']} "
            f"(row {int(r['source_row'])})"),
            "number repeated measurements with the replicate column, or remove the wrong row")


# ------------------------------------------------------------------------------ the reader
class ResultChunks:
    """An iterable of canonical frames (one per chunk) of one results file; after the
    iteration ``n_rows``, ``n_dropped`` and ``notes`` describe the whole file. Raises one
    :class:`~bayesbase.errors.ValidationError` at the end when any problem was found."""

    def __init__(self, path, chunksize: int = DEFAULT_CHUNKSIZE, now=None, keep=()):
        if int(chunksize) < 1:
            raise ValueError("chunksize must be at least 1")
        self.path, self.chunksize, self.now = Path(path), int(chunksize), now
        self.keep = tuple(keep)
        self.n_rows = self.n_dropped = 0
        self.n_patients = self.n_specimens = 0
        self._plain: list[str] = []
        self._counted: dict[str, int] = {}
        self.problems: list[Problem] = []
        self.n_problems = 0

    def _add(self, problems) -> None:
        self.n_problems += len(problems)
        room = MAX_PROBLEMS - len(self.problems)
        if room > 0:
            self.problems.extend(problems[:room])

    def _note(self, notes) -> None:
        """Keep each note once; a note that begins with a count ("4 row(s) with ...") is summed
        over the chunks (the duplicates note is written at the end, with the total)."""
        for n in notes:
            m = re.match(r"^(\d+) (.+)$", n)
            if m:
                if "identical duplicate" not in n:
                    self._counted[m.group(2)] = self._counted.get(m.group(2), 0) + int(m.group(1))
            elif n not in self._plain and len(self._plain) < 100:
                self._plain.append(n)

    @property
    def notes(self) -> list[str]:
        """The notes of the whole file (as ``read_results`` gives them in ``attrs``)."""
        out = list(self._plain)
        if self.n_dropped:
            out.insert(0, f"{self.n_dropped} identical duplicate row(s) (same specimen, "
                          "analyte, replicate and value) were dropped")
        out += [f"{k} {text}" for text, k in self._counted.items()]
        return out

    def _validated(self):
        """(raw chunk, canonical frame or the chunk's ValidationError, kept columns or None);
        a chunk left empty by blank lines is skipped, unless no chunk has a row (then its
        problem is the file's)."""
        empty, any_rows = None, False
        for raw in _raw_chunks(self.path, self.chunksize):
            raw, kept = self._split(raw)
            if len(raw) == 0 and len(raw.columns):
                empty = raw
                continue
            any_rows = True
            yield raw, self._validate(raw), kept
        if not any_rows and empty is not None:
            yield empty, self._validate(empty), None

    def _split(self, raw):
        """(raw chunk without the ``keep`` columns, those columns with ``patient``, or None);
        dropped as the whole-file import drops its ``owner`` column (``DataFrame.drop``, the
        attributes kept)."""
        names = [c for c in raw.columns if str(c).strip().lower() in self.keep]
        if not names:
            return raw, None
        cols = (["patient"] if "patient" in raw.columns else []) + names
        kept = raw.loc[:, cols]
        return raw.drop(columns=names), kept

    def _validate(self, raw):
        try:
            return validate(raw, source=self.path.name, now=self.now)
        except ValidationError as exc:
            return exc

    def __iter__(self):
        for frame, _ in self.with_kept():
            yield frame

    def _whole(self):
        """A FHIR Bundle read whole, or a Parquet dataset (canonical already), in chunks."""
        frame = read_results(self.path, now=self.now)
        self._note(frame.attrs.get("notes") or [])
        self.n_dropped = int(frame.attrs.get("n_duplicates_dropped") or 0)
        self.n_patients = int(frame["patient"].nunique())
        self.n_specimens = len(frame[["patient", "specimen"]].drop_duplicates())
        for start in range(0, len(frame), self.chunksize):
            self.n_rows += min(self.chunksize, len(frame) - start)
            yield frame.iloc[start:start + self.chunksize], None

    def with_kept(self):
        """Yield ``(canonical frame, kept)`` per chunk: ``kept`` is the raw text of the
        ``keep`` columns (with the raw ``patient`` column) of the chunk's rows, or None when
        the file has none of them. Same checks and errors as iterating."""
        name = visible(self.path.name)
        across = _Across(name)
        suffix = self.path.suffix.lower()
        if suffix in FHIR_SUFFIXES or suffix == ".parquet" or self.path.is_dir():
            yield from self._whole()
            return
        for raw, frame, kept in self._validated():
            if isinstance(frame, ValidationError):
                exc = frame
                header = raw.attrs.get("header_row", 1)
                self._add(exc.problems)
                if any(p.row is None or p.row <= header for p in exc.problems):
                    break  # a header problem: every chunk would repeat it
                continue
            self._note(frame.attrs.get("notes") or [])
            self.n_dropped += int(frame.attrs.get("n_duplicates_dropped") or 0)
            found: list[Problem] = []
            across.check_species(frame, found)
            keys = across.result_keys(frame, across.draw_positions(frame, found))
            keep = across.dedupe(frame, keys, found)
            self._add(found)
            if self.problems:
                continue  # keep checking, yield nothing more
            if not keep.all():
                frame = frame.loc[keep].reset_index(drop=True)
            self.n_rows += len(frame)
            self.n_patients, self.n_specimens = len(across.species), len(across.draws)
            yield frame, kept
        self.n_dropped += across.n_dropped
        if self.problems:
            problems = sorted(self.problems, key=lambda p: (-1 if p.row is None else p.row))
            if self.n_problems > len(problems):
                problems.append(Problem(name, None, None,
                                        f"... and {self.n_problems - len(problems)} more "
                                        "problem(s) not listed"))
            raise ValidationError(problems)


def iter_results(path, chunksize: int = DEFAULT_CHUNKSIZE, now=None, keep=()) -> ResultChunks:
    """The canonical frames of a results table, ``chunksize`` rows at a time (see the module
    docstring); ``now`` as for :func:`bayesbase.io.read_results`; ``keep``: lower-case names
    of columns taken off before validation and given by :meth:`ResultChunks.with_kept`."""
    return ResultChunks(path, chunksize, now, keep)


def read_results_chunked(path, chunksize: int = DEFAULT_CHUNKSIZE, now=None) -> pd.DataFrame:
    """The chunks of :func:`iter_results` concatenated in the canonical order: the frame
    :func:`bayesbase.io.read_results` returns, built the bounded way (memory is that of the
    result, not of the raw table)."""
    chunks = iter_results(path, chunksize, now)
    parts = list(chunks)
    if not parts:
        raise ValidationError([Problem(visible(Path(path).name), None, None,
                                       "no data rows below the header")])
    frame = pd.concat(parts, ignore_index=True)
    frame = frame.sort_values(CANONICAL_ORDER, kind="stable", ignore_index=True)
    frame.attrs = {"source": Path(path).name, "notes": chunks.notes,
                   "n_duplicates_dropped": chunks.n_dropped}
    return frame
