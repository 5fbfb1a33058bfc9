"""Lab override CSV (``load_pack(..., overrides="my_lab.csv")``).

Columns ``analyte`` (required), ``unit``, ``population_center``, ``cvg_pct``, ``cvi_pct``,
``cvi_log_sd``, ``cva_pct``; any subset of columns and of rows. A blank cell keeps the pack's
value. Percentages are converted to fractions. Analyte names may be aliases (resolved by the
analyte registry). ``unit``, if given, applies to ``population_center`` and must be the pack's
canonical unit or convertible to it by the registry. An overridden number gets provenance
``lab`` and source ``lab override: <file> row N`` (rows counted as a spreadsheet shows them,
header = row 1). When the centre is overridden, the pack's interval limits and breed centres are
scaled by the ratio new/old centre (provenance ``derived``), so that the interval keeps its
log-width around the lab's centre. An analyte that is not in the pack is **rejected**: a lab that
needs a new analyte copies the pack, adds the analyte with its sources and checks the file with
``bayesbase priors check``.
"""
from __future__ import annotations

import csv
import io
import math
from dataclasses import replace
from typing import Any

from .. import units as _units
from .schema import LAB_PROVENANCE, CitedNumber, hint

__all__ = ["OVERRIDE_COLUMNS", "apply", "check_alone"]

#: Columns of a lab override CSV.
OVERRIDE_COLUMNS = ("analyte", "unit", "population_center", "cvg_pct", "cvi_pct", "cvi_log_sd", "cva_pct")
_NUMBER_COLUMNS = ("population_center", "cvg_pct", "cvi_pct", "cvi_log_sd", "cva_pct")
_PCT = {"cvg_pct": "cvg", "cvi_pct": "cvi", "cva_pct": "cva"}

Rows = list[tuple[int, dict[str, str]]]


def _header_problems(header: list[str], display: str) -> list[str]:
    problems = [f"{display}, column '{h}': unknown column" + hint(h, OVERRIDE_COLUMNS)
                for h in header if h not in OVERRIDE_COLUMNS]
    problems += [f"{display}, column '{h}': appears more than once"
                 for h in sorted({h for h in header if header.count(h) > 1})]
    if "analyte" not in header:
        problems.append(f"{display}: missing required column 'analyte'")
    return problems


def read_rows(raw: bytes, display: str) -> tuple[Rows, list[str]]:
    """(row number, {column: cell}) of every non-blank data row, or the problems of the file."""
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        return [], [f"{display}: not UTF-8 text ({exc})"]
    rows = list(csv.reader(io.StringIO(text)))
    if not rows or not any(cell.strip() for cell in rows[0]):
        return [], [f"{display}: empty file (expected a header with at least the column 'analyte')"]
    header = [h.strip() for h in rows[0]]
    problems = _header_problems(header, display)
    if problems:
        return [], problems
    out = []
    for i, row in enumerate(rows[1:], start=2):
        if not any(cell.strip() for cell in row):
            continue
        if len(row) > len(header):
            problems.append(f"{display}, row {i}: {len(row)} cells but {len(header)} columns in the header")
            continue
        out.append((i, {h: (row[j].strip() if j < len(row) else "") for j, h in enumerate(header)}))
    return out, problems


def _number(col: str, cell: str) -> tuple[str, float] | str:
    """(field, value) of one numeric cell, or the problem text."""
    try:
        v = float(cell)
    except ValueError:
        return f"expected a number, got '{cell}'"
    if not math.isfinite(v):
        return f"must be finite, got '{cell}'"
    if col in _PCT:
        return (_PCT[col], v / 100.0) if 0 < v < 200 else f"{cell} out of range (0, 200) percent"
    if col == "cvi_log_sd":
        return ("cvi_log_sd", v) if 0 <= v <= 3 else f"{cell} out of range [0, 3]"
    return ("center", v) if v > 0 else f"must be > 0, got '{cell}'"


def _row_analyte(row: dict, where: str, pack, seen: dict[str, int], row_no: int) -> tuple[str | None, str | None]:
    """(canonical analyte id, None) or (None, problem) of a row's analyte cell."""
    name = row.get("analyte", "")
    if not name:
        return None, f"{where}, column 'analyte': empty"
    try:
        aid = _units.resolve_analyte(name)
    except Exception as exc:  # UnknownAnalyteError carries its own hint
        return None, f"{where}, column 'analyte': {exc}"
    if pack is not None and aid not in pack.analytes:
        return None, (f"{where}, column 'analyte': '{name}' is not in pack '{pack.id}'; a lab override cannot "
                      "add analytes (copy the pack, add the analyte with its sources and check it with "
                      "'bayesbase priors check')")
    if aid in seen:
        return None, f"{where}, column 'analyte': '{aid}' already given in row {seen[aid]}"
    seen[aid] = row_no
    return aid, None


def _row_entry(row: dict, where: str, aid: str, row_no: int, problems: list[str]) -> dict | None:
    """{field: (value, row)} of one row (centre converted to the canonical unit), or None."""
    entry: dict[str, tuple[Any, int]] = {}
    bad = False
    for col in _NUMBER_COLUMNS:
        if row.get(col, ""):
            got = _number(col, row[col])
            if isinstance(got, str):
                problems.append(f"{where}, column '{col}': {got}")
                bad = True
            else:
                entry[got[0]] = (got[1], row_no)
    unit = row.get("unit", "")
    if unit:
        try:
            factor = _units.conversion_factor(aid, unit)
        except Exception as exc:  # UnitError names the accepted units
            problems.append(f"{where}, column 'unit': {exc}")
            return None
        if "center" in entry:
            entry["center"] = (entry["center"][0] * factor, row_no)
            if factor != 1.0:
                entry["_unit_note"] = (f"converted from {unit} x {factor:g}", row_no)
    return None if bad else entry


def parse(rows: Rows, display: str, pack) -> tuple[dict[str, dict], list[str]]:
    """Check override rows; returns {analyte: {field: (value, row)}} and problems."""
    problems: list[str] = []
    parsed: dict[str, dict] = {}
    seen: dict[str, int] = {}
    for row_no, row in rows:
        where = f"{display}, row {row_no}"
        aid, problem = _row_analyte(row, where, pack, seen, row_no)
        if problem:
            problems.append(problem)
            continue
        entry = _row_entry(row, where, aid, row_no, problems)
        if entry is not None:
            parsed[aid] = entry
    return parsed, problems


def check_alone(raw: bytes, display: str) -> list[str]:
    """Problems of an override CSV checked without a pack."""
    rows, problems = read_rows(raw, display)
    return problems or parse(rows, display, None)[1]


def _scale_to_centre(prior, new_centre: float, src: str, cited: dict, asrc: dict, changes: dict) -> None:
    """Interval limits and breed centres scaled by new/old centre (provenance derived)."""
    ratio = new_centre / prior.center
    src = f"derived here: pack value x {ratio:.4g} (lab centre / pack centre), {src}"
    for fld in ("ri_lower", "ri_upper"):
        changes[fld] = getattr(prior, fld) * ratio
        cited[fld] = CitedNumber(changes[fld], src, "derived", None)
        asrc[fld] = src
    changes["breed_centers"] = {}
    for b, bv in prior.breed_centers.items():
        changes["breed_centers"][b] = bv * ratio
        cited[f"breed_centers.{b}"] = CitedNumber(bv * ratio, src, "derived", None)
        asrc[f"breed_centers.{b}"] = src


def _apply_entry(prior, entry: dict, display: str, cited: dict):
    """(new AnalytePrior, its sources) with one row's numbers; ``cited`` is updated in place."""
    changes: dict[str, Any] = {}
    asrc = dict(prior.sources)
    unit_note = entry.pop("_unit_note", None)
    for fld, (v, row_no) in entry.items():
        src = f"lab override: {display} row {row_no}"
        cited[fld] = CitedNumber(v, src, LAB_PROVENANCE, unit_note[0] if (fld == "center" and unit_note) else None)
        changes[fld] = v
        asrc[fld] = src
    if "center" in changes:
        _scale_to_centre(prior, changes["center"], f"lab override: {display} row {entry['center'][1]}",
                         cited, asrc, changes)
    return replace(prior, **changes, sources=asrc), asrc


def apply(pack, raw: bytes, display: str) -> tuple[Any, list[str]]:
    """``pack`` with the override CSV's numbers layered over it, and the problems found."""
    rows, problems = read_rows(raw, display)
    if problems:
        return pack, problems
    parsed, problems = parse(rows, display, pack)
    if problems:
        return pack, problems
    analytes = dict(pack.analytes)
    cited = {a: dict(v) for a, v in pack.cited.items()}
    sources = dict(pack.sources)
    for aid, entry in parsed.items():
        analytes[aid], asrc = _apply_entry(analytes[aid], entry, display, cited[aid])
        sources.update({f"analytes.{aid}.{k}": v for k, v in asrc.items()})
    return replace(pack, analytes=analytes, cited=cited, sources=sources), []
