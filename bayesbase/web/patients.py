"""The patient list: search, sort and pagination done in SQL on the store, so the first page of
a store of 10,000 patients costs one count and one indexed query (no assessment). The columns
that need an assessment (probable changes at the last specimen, drift) come from
:mod:`.summaries`."""
from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import date, datetime, timezone

from .config import DeskError

__all__ = ["SORTS", "PatientRow", "PatientPage", "list_patients", "age_years"]

#: sortable columns: name -> (SQL expression, True when ascending means descending in SQL)
SORTS = {
    "id": ("p.id", False),
    "species": ("p.species", False),
    "breed": ("p.breed", False),
    "age": ("p.birth_date", True),  # youngest first = latest birth date first
    "last": ("last", False),
    "specimens": ("n_specimens", False),
}
_LAST = "(SELECT max(s.collected_at) FROM specimens s WHERE s.patient = p.pk)"
_COUNT = "(SELECT count(*) FROM specimens s WHERE s.patient = p.pk)"


@dataclass(frozen=True)
class PatientRow:
    patient: str
    species: str
    breed: str | None
    sex: str | None
    birth_date: str | None
    last: str | None
    n_specimens: int

    @property
    def age(self) -> float | None:
        return age_years(self.birth_date)


@dataclass(frozen=True)
class PatientPage:
    rows: tuple[PatientRow, ...]
    total: int
    page: int
    pages: int
    query: str
    sort: str
    order: str
    page_size: int


def _parse_time(text):
    if not text:
        return None
    try:
        return datetime.fromisoformat(str(text))
    except ValueError:
        return None


def age_years(birth_date, today: date | None = None) -> float | None:
    """Age in years (365.25-day years) from a stored birth date to ``today`` (UTC date)."""
    born = _parse_time(birth_date)
    if born is None:
        return None
    today = today or datetime.now(timezone.utc).date()
    return (today - born.date()).days / 365.25


def _like(text: str) -> str:
    escaped = text.replace("\\", "\\\\").replace("%", "\\%").replace("_", "\\_")
    return f"%{escaped}%"


def _where(query: str) -> tuple[str, tuple]:
    if not query:
        return "", ()
    pattern = _like(query)
    return (" WHERE p.id LIKE ? ESCAPE '\\' OR p.breed LIKE ? ESCAPE '\\' "
            "OR p.species LIKE ? ESCAPE '\\'", (pattern, pattern, pattern))


def _int(value, name: str, default: int) -> int:
    if value in (None, ""):
        return default
    try:
        return int(value)
    except (TypeError, ValueError):
        raise DeskError(400, "Bad request", f"{name} must be a whole number, not {value!r}")


def list_patients(conn, query: str = "", sort: str = "id", order: str = "asc", page=1,
                  page_size: int = 50) -> PatientPage:
    """One page of the patient list. ``query`` matches id, breed or species (case-insensitive
    substring); ``sort`` is a key of :data:`SORTS`; ``order`` 'asc' or 'desc'; missing values
    sort last either way; ties in patient id order."""
    query = (query or "").strip()[:200]
    if sort not in SORTS:
        raise DeskError(400, "Bad request", f"unknown sort {sort!r} (one of {', '.join(SORTS)})")
    if order not in ("asc", "desc"):
        raise DeskError(400, "Bad request", "order must be asc or desc")
    page = max(1, _int(page, "page", 1))
    where, params = _where(query)
    total = int(conn.execute(f"SELECT count(*) FROM patients p{where}", params).fetchone()[0])
    pages = max(1, math.ceil(total / page_size))
    page = min(page, pages)
    expr, flip = SORTS[sort]
    direction = "DESC" if (order == "desc") != flip else "ASC"
    sql = (f"SELECT p.id, p.species, p.breed, p.sex, p.birth_date, {_LAST} AS last, "
           f"{_COUNT} AS n_specimens FROM patients p{where} "
           f"ORDER BY ({expr} IS NULL), {expr} {direction}, p.id LIMIT ? OFFSET ?")
    rows = conn.execute(sql, params + (page_size, (page - 1) * page_size)).fetchall()
    return PatientPage(tuple(PatientRow(*r) for r in rows), total, page, pages, query, sort,
                       order, page_size)
