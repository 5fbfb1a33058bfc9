"""Writing a canonical results frame as a tidy CSV that reads back to the same frame."""
from __future__ import annotations

import csv
from pathlib import Path

import numpy as np
import pandas as pd

from ..contract import CANONICAL_COLUMNS

__all__ = ["to_tidy_csv"]


def _iso(values: pd.Series) -> pd.Series:
    has_fraction = bool((values.dropna().dt.microsecond != 0).any())
    fmt = "%Y-%m-%dT%H:%M:%S.%f" if has_fraction else "%Y-%m-%dT%H:%M:%S"
    return values.dt.strftime(fmt).fillna("")


def to_tidy_csv(frame: pd.DataFrame, path: str | Path) -> Path:
    """Write a canonical results frame as UTF-8, comma-delimited CSV (ISO dates).

    :func:`bayesbase.io.read_results` reads it back to the same frame (``source_file`` /
    ``source_row`` then name the written file). Returns the path written.
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
    out.to_csv(path, index=False, encoding="utf-8", lineterminator="\n", quoting=_quoting(out))
    return path


def _quoting(out: pd.DataFrame) -> int:
    """``csv.QUOTE_ALL`` when some cell holds a carriage return, else ``csv.QUOTE_MINIMAL``.

    Python's csv writer (which pandas uses) quotes a cell that holds the delimiter, the quote or
    a character of the line terminator; with the terminator LF a bare carriage return (CR) is
    left unquoted, and every CSV reader (RFC 4180) takes it as a line break that splits the row.
    Such files are rare (the validator removes control characters from free text; a store
    export neutralises a leading CR as a quote then the CR), so only they get every cell quoted."""
    for c in out.columns:
        if out[c].str.contains("\r", regex=False).any():
            return csv.QUOTE_ALL
    return csv.QUOTE_MINIMAL
