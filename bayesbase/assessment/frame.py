"""Stage 2: the canonical frame of the patients to assess, sorted, with the age at each row."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from ..contract import is_canonical
from ..errors import BayesbaseError

__all__ = ["YEAR_DAYS", "SORT_COLUMNS", "canonical_frame", "select_patients", "history_frame",
           "years_of", "in_sort_order", "factorized"]

#: days in a year for ages and time axes (Julian year)
YEAR_DAYS = 365.25
#: order of the rows of an assessment's history
SORT_COLUMNS = ["patient", "collected_at", "specimen", "analyte", "replicate"]


def _copy_on_write() -> bool:
    """True when pandas gives every frame derived from another the behaviour of a copy (its
    Copy-on-Write: always from pandas 3, an option before)."""
    if int(pd.__version__.split(".")[0]) >= 3:
        return True
    return pd.options.mode.copy_on_write is True


def canonical_frame(results, now=None) -> pd.DataFrame:
    """A results file (read and validated), a canonical frame (copied) or a raw frame (validated).
    The copy of a canonical frame is pandas' lazy one where its Copy-on-Write holds
    (:func:`_copy_on_write`): the columns' data are copied only when either frame is written to,
    so the caller's frame and the assessment's history never change each other, as with a deep
    copy."""
    from ..io import read_results
    from ..validate import validate

    if isinstance(results, (str, Path)):
        return read_results(results, now=now)
    if not isinstance(results, pd.DataFrame):
        raise BayesbaseError("results must be a file path or a pandas DataFrame")
    if is_canonical(results):
        return results.copy(deep=not _copy_on_write())
    return validate(results, now=now)


def select_patients(frame: pd.DataFrame, wanted: set[str] | None) -> pd.DataFrame:
    """Rows of the patients in ``wanted`` (None: all); an error names patients not found."""
    if wanted is not None:
        frame = frame[frame["patient"].isin(wanted)]
        if frame.empty:
            raise BayesbaseError(f"patient {', '.join(sorted(wanted))} not found in the results")
    if frame.empty:
        raise BayesbaseError("no results to assess")
    return frame


def factorized(hist: pd.DataFrame, column: str, cache: dict | None = None):
    """``pd.factorize(hist[column])`` (codes, uniques), made once per column for the stages of
    one assessment: ``cache`` is a dict the stages share (None: made afresh). Only for columns
    the stages never change."""
    if cache is None:
        return pd.factorize(hist[column])
    key = ("factorize", column)
    if key not in cache:
        cache[key] = pd.factorize(hist[column])
    return cache[key]


def years_of(times: pd.Series) -> np.ndarray:
    """Datetimes as years since 1970 (float)."""
    return times.to_numpy().astype("datetime64[ns]").astype("int64") / 1e9 / 86400 / YEAR_DAYS


def _key_steps(col: pd.Series):
    """(next row greater, next row equal) of one sort column, adjacent rows compared; None when
    the column holds a missing value or is of a kind compared here by no fast rule (Arrow
    texts: UTF-8 byte order, which is code-point order, as Python and pandas order texts)."""
    if col.isna().any():
        return None
    if isinstance(col.dtype, pd.StringDtype) and col.dtype.storage == "pyarrow":
        import pyarrow as pa
        import pyarrow.compute as pc

        arr = pa.array(col.array)  # no copy: the column's own Arrow data
        arr = arr.combine_chunks() if isinstance(arr, pa.ChunkedArray) else arr
        a, b = arr.slice(0, len(arr) - 1), arr.slice(1)
        return (pc.greater(b, a).to_numpy(zero_copy_only=False),
                pc.equal(b, a).to_numpy(zero_copy_only=False))
    if isinstance(col.dtype, np.dtype) and col.dtype.kind in "iuM":
        v = col.to_numpy()
        v = v.view("int64") if v.dtype.kind == "M" else v
    elif isinstance(col.dtype, pd.Int64Dtype):
        v = col.to_numpy(dtype="int64")
    else:
        return None
    return v[1:] > v[:-1], v[1:] == v[:-1]


def in_sort_order(frame: pd.DataFrame) -> bool:
    """True when the rows are strictly increasing in :data:`SORT_COLUMNS` (with no missing key),
    as a store read gives them: sorting them would then change nothing (no two rows share a key,
    so the sorted order is this one). False when not, or not decided by :func:`_key_steps`."""
    if len(frame) < 2:
        return False
    greater, equal = np.zeros(len(frame) - 1, dtype=bool), np.ones(len(frame) - 1, dtype=bool)
    for c in SORT_COLUMNS:
        steps = _key_steps(frame[c])
        if steps is None:
            return False
        greater |= equal & steps[0]
        equal &= steps[1]
    return bool(greater.all())


def history_frame(results, wanted: set[str] | None = None, now=None) -> pd.DataFrame:
    """The rows to assess, sorted, with ``age_years`` at collection (NaN without a birth date);
    rows already in order (:func:`in_sort_order`) are not sorted again."""
    frame = select_patients(canonical_frame(results, now=now), wanted)
    hist = (frame if in_sort_order(frame) else frame.sort_values(SORT_COLUMNS)).reset_index(drop=True)
    bd = pd.to_datetime(hist["birth_date"]) if "birth_date" in hist else pd.Series(pd.NaT, index=hist.index)
    hist["age_years"] = (hist["collected_at"] - bd).dt.days / YEAR_DAYS
    return hist
