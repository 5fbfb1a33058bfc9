"""Parsers of the date fields: collection time and birth date.

ISO 8601 (with an offset converted to UTC; naive times taken as UTC) or day-first
``05/03/2024``, ``05.03.2024``, ``05-03-2024`` with an optional time; a partial date is refused,
never completed; a date before :data:`EARLIEST_DATE` is not plausible; a collection time more
than :data:`FUTURE_TOLERANCE` after ``now`` is in the future.
"""
from __future__ import annotations

import re
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from .text import lookalike_digit

if TYPE_CHECKING:
    from .context import Context
    from .problems import Col, Problems

__all__ = ["FUTURE_TOLERANCE", "EARLIEST_DATE", "parse_dates", "parse_collected",
           "parse_birth_date"]

#: Allowance for local clock times written without an offset (largest UTC offset: +14:00).
FUTURE_TOLERANCE = pd.Timedelta(hours=14)
#: Collection and birth dates before this are refused as implausible (typing errors).
EARLIEST_DATE = pd.Timestamp("1900-01-01")

#: Year only or year and month (``2025``, ``2025-09``, ``09/2025``): refused, never completed.
_PARTIAL_DATE = re.compile(r"^(?:\d{4}(?:[-/.]\d{1,2})?|\d{1,2}[-/.]\d{4})$", re.ASCII)
_DAYFIRST_FORMATS = ("%d/%m/%Y", "%d/%m/%Y %H:%M", "%d/%m/%Y %H:%M:%S",
                     "%d.%m.%Y", "%d.%m.%Y %H:%M", "%d.%m.%Y %H:%M:%S",
                     "%d-%m-%Y", "%d-%m-%Y %H:%M", "%d-%m-%Y %H:%M:%S")


def _refused_kinds(uniq: np.ndarray) -> np.ndarray:
    """Per distinct text: 'partial', 'digits' (look-alike digits) or None."""
    kind = np.full(len(uniq), None, dtype=object)
    for i, text in enumerate(uniq):
        if _PARTIAL_DATE.match(text):
            kind[i] = "partial"
        elif not text.isascii() and lookalike_digit(text):
            kind[i] = "digits"
    return kind


def _to_datetime(uniq: pd.Series) -> pd.Series:
    """ISO 8601 first (UTC, offset dropped), then the day-first formats for what is left."""
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
    return parsed


def parse_dates(col: Col) -> tuple[np.ndarray, np.ndarray]:
    """Per-row datetime64[ns] (NaT when blank or bad) and a per-row error: None, 'unparsable',
    'partial' (year or year and month only) or 'digits' (digits that only look like 0-9).

    Dates outside the datetime64[ns] range (before 1677, after 2262) are kept as the range's
    bounds, so that they are reported as before 1900 or in the future."""
    uniq = pd.Series(col.uniq, dtype=object)
    kind = _refused_kinds(col.uniq)
    refused = kind != None  # noqa: E711
    if refused.any():
        uniq = uniq.where(~refused, "")
    parsed = _to_datetime(uniq)
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


def _date_problems(prob: Problems, c: Col, err: np.ndarray, column: str, expected: str,
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
                 c.map(lambda u: f"date '{u}' uses look-alike digits ({lookalike_digit(u)})"),
                 "retype the date with the digits 0-9")


def parse_collected(ctx: Context) -> None:
    """Sets ``collected`` and ``coll_ok`` (a valid time, neither in the future nor before
    1900)."""
    prob = ctx.problems
    collected_c = ctx.col("collected_at")
    collected, coll_err = parse_dates(collected_c)
    ctx.collected = collected
    coll_ok = ~np.isnat(collected)
    if "collected_at" in ctx.present:
        prob.add(collected_c.empty(), "collected_at", "collection date is empty",
                 "expected a date such as 2024-03-05 or 2024-03-05T09:30")
        _date_problems(prob, collected_c, coll_err, "collected_at",
                       "expected 2024-03-05, 2024-03-05T09:30 or day-first 05/03/2024",
                       "a collection date needs year, month and day: write the full date of "
                       "the draw, e.g. 2024-03-05")
        limit = np.datetime64(ctx.now + FUTURE_TOLERANCE, "ns")
        future = coll_ok & (collected > limit)
        prob.add(future, "collected_at",
                 collected_c.map(lambda u: f"collection date '{u}' is in the future"),
                 f"reference time {ctx.now.isoformat(sep=' ', timespec='minutes')} UTC")
        early = coll_ok & (collected < np.datetime64(EARLIEST_DATE, "ns"))
        prob.add(early, "collected_at",
                 collected_c.map(lambda u: f"collection date '{u}' is before 1900: not a "
                                 "plausible collection date"),
                 "check the year")
        coll_ok = coll_ok & ~future & ~early
    ctx.coll_ok = coll_ok


def parse_birth_date(ctx: Context) -> None:
    """Sets ``birth``; reads ``collected``/``coll_ok`` (a birth after the collection is a
    problem)."""
    prob = ctx.problems
    birth_c = ctx.col("birth_date")
    birth, birth_err = parse_dates(birth_c)
    ctx.birth = birth
    if "birth_date" not in ctx.present:
        return
    _date_problems(prob, birth_c, birth_err, "birth_date",
                   "expected 2019-06-01 or day-first 01/06/2019, or blank",
                   "write a full date (year, month and day); if only the year or month of "
                   "birth is known, choose the day yourself, e.g. 2019-06-01")
    early_b = ~np.isnat(birth) & (birth < np.datetime64(EARLIEST_DATE, "ns"))
    prob.add(early_b, "birth_date",
             birth_c.map(lambda u: f"birth date '{u}' is before 1900: not a plausible "
                         "birth date"), "check the year")
    after = ~np.isnat(birth) & ctx.coll_ok & (birth > ctx.collected)
    prob.add(after, "birth_date",
             birth_c.map(lambda u: f"birth date '{u}' is after the collection date"),
             "check both dates")
