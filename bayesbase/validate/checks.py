"""Consistency checks across rows (on rows whose own fields are valid) and the notes of a
valid table.

* one patient has one species; one draw (a specimen, keyed by (patient, specimen): clinics
  number draws per animal S1, S2, ...) has one collection time;
* identical duplicates (same specimen, analyte, replicate and value) are dropped and counted;
  the same key with different values is a problem.
"""
from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from .problems import rows_text
from .text import visible

if TYPE_CHECKING:
    from .context import Context
    from .problems import Problems

__all__ = ["FORMULA_COLUMNS", "check_consistency", "check_duplicates", "add_notes"]

#: Text columns checked for spreadsheet-formula look (OWASP CSV-injection guidance).
FORMULA_COLUMNS = ("patient", "specimen", "breed", "method")
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def _conflicts(prob: Problems, key_codes, key_text, other_codes, other_text, valid, column, what,
               other_name) -> None:
    """One problem per key (e.g. patient) whose rows carry more than one `other` (e.g. species).

    ``key_text(code)`` names a key in the message (e.g. ``"patient 'Rex'"``)."""
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
            parts.append(f"{other_text(o)} ({rows_text(prob.rows[g2['p'].to_numpy()].tolist())})")
        first_bad = grp["p"].to_numpy()[grp["o"].to_numpy() != first_o][0]
        prob.add([first_bad], column,
                 f"{key_text(k)} is recorded with more than one {other_name}: "
                 + " and ".join(parts),
                 f"one {what} has one {other_name}; correct the rows or use distinct {what} ids")


def _spec_text(ctx: Context, k) -> str:
    """'specimen 'S1' of patient 'Rex'' for a (patient, specimen) key code."""
    p_code, s_code = divmod(int(ctx.ps_uniq[k]), len(ctx.specimen.uniq))
    return f"specimen '{ctx.specimen.uniq[s_code]}' of patient '{ctx.patient.uniq[p_code]}'"


def check_consistency(ctx: Context) -> None:
    """Sets ``spec_ok`` and the (patient, specimen) key ``ps_codes``/``ps_uniq``; a patient
    with two species, or a draw with two collection times, is a problem."""
    patient, specimen, species, collected = ctx.patient, ctx.specimen, ctx.species, ctx.collected
    pat_ok = ~patient.empty() & ~ctx.id_bad["patient"]
    ctx.spec_ok = ~specimen.empty() & ~ctx.id_bad["specimen"] & pat_ok
    ps_codes, ps_uniq = pd.factorize(patient.codes.astype(np.int64) * len(specimen.uniq)
                                     + specimen.codes)
    ctx.ps_codes, ctx.ps_uniq = ps_codes, np.asarray(ps_uniq, dtype=np.int64)
    if ctx.present >= {"patient", "species"}:
        sp_codes = np.where(ctx.species_ok, pd.factorize(species)[0], -1)
        _conflicts(ctx.problems, patient.codes, lambda k: f"patient '{patient.uniq[k]}'",
                   sp_codes, lambda o: species[sp_codes == o][0], pat_ok & ctx.species_ok,
                   "species", "patient", "species")
    if ctx.present >= {"specimen", "collected_at"}:
        ct_codes = pd.factorize(collected.astype(np.int64))[0]
        _conflicts(ctx.problems, ps_codes, lambda k: _spec_text(ctx, k), ct_codes,
                   lambda o: f"'{pd.Timestamp(collected[ct_codes == o][0]).isoformat()}'",
                   ctx.spec_ok & ctx.coll_ok, "collected_at", "specimen", "collection time")


def _duplicate_group(ctx: Context, g: pd.DataFrame) -> None:
    """One group of rows with the same (specimen, analyte, replicate): drop identical repeats,
    else report the first row that differs."""
    v = g["v"].to_numpy()
    p = g["p"].to_numpy()
    same = np.allclose(v, v[0], rtol=1e-9, atol=0.0) and g["c"].nunique() == 1
    if same:
        ctx.keep[p[1:]] = False
        ctx.n_dropped += len(p) - 1
        return
    first = p[0]
    other = p[1:][~np.isclose(v[1:], v[0], rtol=1e-9, atol=0.0)
                  | (g["c"].to_numpy()[1:] != g["c"].iloc[0])][0]
    analyte_c, value_c, unit_c = ctx.analyte, ctx.value_col, ctx.unit
    aid = ctx.aid_u[analyte_c.codes[first]]
    shown = " and ".join(
        f"{analyte_c.uniq[analyte_c.codes[q]]} {value_c.uniq[value_c.codes[q]]} "
        f"{unit_c.uniq[unit_c.codes[q]]} (row {ctx.rows[q]})" for q in (first, other))
    ctx.problems.add([other], "value",
                     f"{_spec_text(ctx, ctx.ps_codes[first])} has {aid} replicate "
                     f"{ctx.replicate[first]} more than once with different values: {shown}",
                     "number repeated measurements with the replicate column, or remove "
                     "the wrong row")


def check_duplicates(ctx: Context) -> None:
    """Sets ``keep`` and ``n_dropped`` (identical duplicate rows dropped)."""
    ctx.keep = np.ones(ctx.n, dtype=bool)
    ctx.n_dropped = 0
    row_ok = ctx.spec_ok & ctx.analyte_ok & ctx.unit_ok & ctx.value_ok & ~ctx.rep_bad
    if not (ctx.present >= {"specimen", "analyte", "value", "unit"} and row_ok.any()):
        return
    pos = np.flatnonzero(row_ok)
    aid_codes = pd.factorize(ctx.aid_u[ctx.analyte.codes][pos])[0]
    key = pd.DataFrame({"s": ctx.ps_codes[pos], "a": aid_codes, "r": ctx.replicate[pos]})
    dup = key.duplicated(keep=False).to_numpy()
    if dup.any():
        d = key[dup].assign(p=pos[dup], v=ctx.value[pos[dup]], c=ctx.censor[pos[dup]])
        for _, g in d.groupby(["s", "a", "r"], sort=True):
            _duplicate_group(ctx, g)


def _formula_notes(ctx: Context) -> list[str]:
    """Text beginning like a spreadsheet formula (OWASP guidance on CSV injection): noted."""
    out = []
    text_cols = {"patient": ctx.patient, "specimen": ctx.specimen, "breed": ctx.breed,
                 "method": ctx.method}
    for name in FORMULA_COLUMNS:
        c = text_cols[name]
        if name not in ctx.present:
            continue
        hit_u = np.array([u[:1] in _FORMULA_START for u in c.uniq], dtype=bool)
        if hit_u.any():
            hit = hit_u[c.codes]
            example = c.uniq[np.flatnonzero(hit_u)[0]]
            out.append(
                f"column '{name}', {rows_text(ctx.rows[hit].tolist())}: text beginning with "
                f"=, +, -, @, tab or carriage return (e.g. '{example[:40]}') looks like a "
                "spreadsheet formula; a spreadsheet program may run it when the file or an "
                "export is opened (OWASP guidance on CSV injection): check where it came from")
    return out


def add_notes(ctx: Context) -> None:
    """The notes of a valid table: duplicates dropped, blank states, cleaned free text,
    formula-like text; every note made visible."""
    notes = ctx.notes
    if ctx.n_dropped:
        notes.append(f"{ctx.n_dropped} identical duplicate row(s) (same specimen, analyte, "
                     "replicate and value) were dropped")
    n_assumed = int((ctx.state_u[ctx.state.codes] == "").sum())
    if n_assumed:
        notes.append(f"{n_assumed} row(s) with a blank state are assumed healthy")
    if ctx.cleaned_rows.any():
        notes.append("control characters (terminal escapes, invisible marks) were removed from "
                     "free text (breed, method, reported value or unit) in "
                     + rows_text(ctx.rows[ctx.cleaned_rows].tolist()))
    notes.extend(_formula_notes(ctx))
    ctx.notes = [visible(str(x)) for x in notes]
