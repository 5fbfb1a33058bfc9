"""The context every field parser reads from and writes to.

It holds what the whole table shares (the raw table, the file name for messages, the
spreadsheet row of every data row, the reference time ``now``, the problem collector and the
notes) and, as :func:`bayesbase.validate.validate` calls the parsers in dependency order, the
fields parsed so far (each parser's docstring says what it reads and what it sets).
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from .problems import Col, Problems

__all__ = ["Context", "reference_time"]


def reference_time(now) -> pd.Timestamp:
    """``now`` as a naive UTC timestamp (default: the current time)."""
    if now is None:
        return pd.Timestamp.now(tz="UTC").tz_localize(None)
    ts = pd.Timestamp(now)
    if ts.tzinfo is not None:
        ts = ts.tz_convert("UTC").tz_localize(None)
    return ts


def spreadsheet_rows(raw: pd.DataFrame) -> np.ndarray:
    """Spreadsheet row of every data row: ``raw.index + 2`` for an integer index (as
    ``read_table`` returns; header = row 1), else position + 2."""
    n = len(raw)
    if raw.index.dtype.kind in "iu" and n:
        return raw.index.to_numpy().astype(np.int64) + 2
    return np.arange(n, dtype=np.int64) + 2


class Context:
    """Shared state of one ``validate`` call."""

    # ---- parsed fields, set in this order (absent until their parser ran)
    patient: Col
    specimen: Col
    id_bad: dict[str, np.ndarray]       # patient/specimen -> rows whose id has invisible chars
    species: np.ndarray                 # canonical species per row (None when unknown)
    species_ok: np.ndarray
    breed: Col
    breed_u: np.ndarray                 # canonical breed per distinct text
    sex: Col
    sex_u: np.ndarray
    method: Col
    reported_value: Col
    reported_unit: Col
    cleaned_rows: np.ndarray            # rows whose free text lost control characters
    collected: np.ndarray               # datetime64[ns]
    coll_ok: np.ndarray
    birth: np.ndarray
    analyte: Col
    aid_u: np.ndarray                   # analyte id per distinct analyte text (None: unknown)
    analyte_ok: np.ndarray
    unit: Col
    pair_codes: np.ndarray              # (analyte text, unit text) pair of every row
    pair_aid: np.ndarray                # analyte id per distinct pair
    factor_u: np.ndarray                # conversion factor per distinct pair
    factor: np.ndarray                  # reported unit -> canonical unit, per row (NaN: bad)
    canon_unit: np.ndarray
    unit_ok: np.ndarray
    value_col: Col
    reported: np.ndarray                # number as written (before conversion)
    censor: np.ndarray
    value: np.ndarray                   # in the canonical unit
    value_ok: np.ndarray
    replicate: np.ndarray
    rep_bad: np.ndarray
    fasted: Col
    fast_val_u: np.ndarray
    fast_na_u: np.ndarray
    hil: dict[str, np.ndarray]
    state: Col
    state_u: np.ndarray
    ps_codes: np.ndarray                # (patient, specimen) key of every row
    ps_uniq: np.ndarray
    spec_ok: np.ndarray
    keep: np.ndarray                    # rows kept (identical duplicates dropped)
    n_dropped: int

    def __init__(self, raw: pd.DataFrame, source: str | None, now):
        attrs = dict(raw.attrs)
        self.raw = raw
        self.n = len(raw)
        self.file = source if source is not None else str(attrs.get("source") or "<data>")
        self.notes: list[str] = list(attrs.get("notes") or [])
        self.decimal_comma = attrs.get("delimiter") != ","
        self.now = reference_time(now)
        self.rows = spreadsheet_rows(raw)
        self.problems = Problems(self.file, self.rows)
        self.header_row = int(attrs.get("header_row") or 1)
        shown = attrs.get("original_columns")
        if not isinstance(shown, (list, tuple)) or len(shown) != len(raw.columns):
            shown = [str(c) for c in raw.columns]
        self.shown = shown                  # the header as written
        self.source_of: dict[str, int] = {}  # canonical column -> position in raw

    @property
    def present(self) -> set[str]:
        """Canonical columns the table carries."""
        return set(self.source_of)

    def col(self, name: str) -> Col:
        """The column ``name`` (by position: two columns may carry one normalised name); an
        absent column reads as blank."""
        j = self.source_of.get(name)
        return Col(None if j is None else self.raw.iloc[:, j], self.n)
