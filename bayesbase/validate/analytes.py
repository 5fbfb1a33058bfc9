"""Parsers of the analyte and its unit, the conversion to the canonical unit and the
plausibility envelope (``plausible`` in ``models/analytes.toml``) of the converted value.

Work is done per distinct analyte text and per distinct (analyte, unit) pair, never per row.
"""
from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from .. import units

if TYPE_CHECKING:
    from .context import Context

__all__ = ["parse_analyte", "parse_unit", "convert_values"]


def _resolve(u: str):
    """(analyte id, message, hint) of one analyte text."""
    if not u:
        return None, "analyte is empty", "every row needs an analyte name"
    try:
        return units.resolve_analyte(u), None, None
    except units.UnknownAnalyteError as exc:
        return None, exc.message, exc.hint


def parse_analyte(ctx: Context) -> None:
    """Sets ``analyte``, ``aid_u`` (analyte id per distinct text) and ``analyte_ok``."""
    analyte_c = ctx.analyte = ctx.col("analyte")
    resolved = [_resolve(u) for u in analyte_c.uniq]
    ctx.aid_u = np.array([r[0] for r in resolved], dtype=object)
    analyte_ok_u = ctx.aid_u != None  # noqa: E711
    ctx.analyte_ok = analyte_ok_u[analyte_c.codes]
    if "analyte" in ctx.present:
        err_u = np.array([r[1] for r in resolved], dtype=object)
        hint_u = np.array([r[2] for r in resolved], dtype=object)
        ctx.problems.add(~ctx.analyte_ok, "analyte", err_u[analyte_c.codes],
                         hint_u[analyte_c.codes])


def _pair_units(aid: str, reported_name: str, unit_text: str):
    """(factor, canonical unit, message, hint) of one (analyte, reported unit) pair."""
    if not unit_text:
        return np.nan, "", "unit is empty", "accepted units: " + ", ".join(
            units.accepted_units(aid, reported_name=reported_name))
    try:
        factor = units.conversion_factor(aid, unit_text, reported_name=reported_name)
        return factor, units.canonical_unit(aid), None, None
    except units.UnitError as exc:
        return np.nan, "", exc.message, exc.hint


def parse_unit(ctx: Context) -> None:
    """Sets ``unit``, ``factor`` (reported -> canonical unit, NaN when not convertible),
    ``canon_unit`` and ``unit_ok``; reads ``analyte``/``aid_u``. The unit is looked up once per
    distinct (analyte text, unit text) pair (``pair_codes``, ``pair_uniq``)."""
    analyte_c, aid_u = ctx.analyte, ctx.aid_u
    unit_c = ctx.unit = ctx.col("unit")
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
        factor_u[i], cunit_u[i], perr_u[i], phint_u[i] = _pair_units(
            aid, analyte_c.uniq[a_code], unit_c.uniq[u_code])
    ctx.pair_codes, ctx.pair_aid = pair_codes, aid_u[np.asarray(pair_uniq) // n_units]
    ctx.factor_u = factor_u
    ctx.factor = factor_u[pair_codes]
    ctx.canon_unit = cunit_u[pair_codes]
    ctx.unit_ok = np.isfinite(ctx.factor)
    if "unit" in ctx.present and "analyte" in ctx.present:
        bad = ctx.analyte_ok & ~ctx.unit_ok
        ctx.problems.add(bad, "unit", perr_u[pair_codes], phint_u[pair_codes])


def _envelope(ctx: Context) -> tuple[np.ndarray, np.ndarray]:
    """Per-row (min, max) of the analyte's plausibility envelope (canonical unit)."""
    lo_u = np.full(len(ctx.factor_u), np.nan)
    hi_u = np.full(len(ctx.factor_u), np.nan)
    for i, aid in enumerate(ctx.pair_aid):
        if aid is not None and np.isfinite(ctx.factor_u[i]):
            env = units.plausible_range(aid)
            lo_u[i], hi_u[i] = env["min"], env["max"]
    return lo_u[ctx.pair_codes], hi_u[ctx.pair_codes]


def _implausible_messages(ctx: Context, pos: np.ndarray, lo, hi) -> list[str]:
    msgs = []
    for q in pos:
        aid = ctx.aid_u[ctx.analyte.codes[q]]
        cu, ru, f = ctx.canon_unit[q], ctx.unit.uniq[ctx.unit.codes[q]], ctx.factor[q]
        text = (f"value '{ctx.value_col.uniq[ctx.value_col.codes[q]]}' {ru} is outside the "
                f"plausible range for {units.label(aid)}: {lo[q]:g} to {hi[q]:g} {cu}")
        if f != 1.0:
            text += f" ({lo[q] / f:.3g} to {hi[q] / f:.3g} {ru})"
        msgs.append(text)
    return msgs


def convert_values(ctx: Context) -> None:
    """Sets ``value`` (``reported`` x ``factor``, the canonical unit) and refuses, in
    ``value_ok``, a converted value outside the analyte's plausibility envelope (including
    overflow to infinity and subnormal numbers)."""
    with np.errstate(over="ignore", under="ignore", invalid="ignore"):
        value = ctx.value = ctx.reported * ctx.factor
    lo, hi = _envelope(ctx)
    implausible = ctx.value_ok & ctx.unit_ok & ctx.analyte_ok & ~((value >= lo) & (value <= hi))
    if implausible.any():
        pos = np.flatnonzero(implausible)
        per_row = np.full(ctx.n, "", dtype=object)
        per_row[pos] = _implausible_messages(ctx, pos, lo, hi)
        ctx.problems.add(pos, "value", per_row,
                         "no living animal has this value: check the number and its unit (the "
                         "envelope is the analyte's 'plausible' entry in models/analytes.toml)")
    ctx.value_ok &= ~implausible
