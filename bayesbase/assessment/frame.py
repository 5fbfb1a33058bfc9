"""Stage 2: the canonical frame of the patients to assess, sorted, with the age at each row."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from ..contract import is_canonical
from ..errors import BayesbaseError

__all__ = ["YEAR_DAYS", "SORT_COLUMNS", "canonical_frame", "select_patients", "history_frame",
           "years_of"]

#: days in a year for ages and time axes (Julian year)
YEAR_DAYS = 365.25
#: order of the rows of an assessment's history
SORT_COLUMNS = ["patient", "collected_at", "specimen", "analyte", "replicate"]


def canonical_frame(results, now=None) -> pd.DataFrame:
    """A results file (read and validated), a canonical frame (copied) or a raw frame (validated)."""
    from ..io import read_results
    from ..validate import validate

    if isinstance(results, (str, Path)):
        return read_results(results, now=now)
    if not isinstance(results, pd.DataFrame):
        raise BayesbaseError("results must be a file path or a pandas DataFrame")
    if is_canonical(results):
        return results.copy()
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


def years_of(times: pd.Series) -> np.ndarray:
    """Datetimes as years since 1970 (float)."""
    return times.to_numpy().astype("datetime64[ns]").astype("int64") / 1e9 / 86400 / YEAR_DAYS


def history_frame(results, wanted: set[str] | None = None, now=None) -> pd.DataFrame:
    """The rows to assess, sorted, with ``age_years`` at collection (NaN without a birth date)."""
    frame = select_patients(canonical_frame(results, now=now), wanted)
    hist = frame.sort_values(SORT_COLUMNS).reset_index(drop=True)
    bd = pd.to_datetime(hist["birth_date"]) if "birth_date" in hist else pd.Series(pd.NaT, index=hist.index)
    hist["age_years"] = (hist["collected_at"] - bd).dt.days / YEAR_DAYS
    return hist
