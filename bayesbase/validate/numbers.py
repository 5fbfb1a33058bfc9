"""Parsers of the numeric fields: the reported value with its censoring, the censor column and
the replicate number (plus the number reading the sample-quality indices share).

A value is a number > 0 in the reported unit; ``<5``, ``<=5``, ``≤5`` are left-censored and
``>2000``, ``>=2000``, ``≥2000`` right-censored at the limit. A decimal comma is read unless the
file is comma-delimited; digits are 0-9 only (look-alikes are refused with their Unicode name).
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

__all__ = ["parse_number", "numbers", "digit_problems", "parse_value", "parse_censor",
           "parse_replicate"]

_NUMBER = re.compile(
    r"^(<=|>=|=<|=>|<|>|≤|≥)?\s*([+-]?(?:\d+(?:[.,]\d*)?|[.,]\d+)(?:[eE][+-]?\d+)?)$", re.ASCII)
_LEFT = {"<", "<=", "=<", "≤"}
_CENSOR_IN = {"": "", "left": "left", "<": "left", "right": "right", ">": "right"}


def parse_number(text: str, decimal_comma: bool):
    """(value, censor, error) for one reported string."""
    m = _NUMBER.match(text)
    if not m:
        return np.nan, "", "not a number"
    op, num = m.group(1), m.group(2)
    if "," in num:
        if not decimal_comma:
            return np.nan, "", "decimal comma"
        num = num.replace(",", ".")
    censor = "" if op is None else ("left" if op in _LEFT else "right")
    return float(num), censor, None


def numbers(col: Col, decimal_comma: bool, censoring: bool):
    """Per-row (values, censor, error) arrays; error is None, 'empty', 'not a number',
    'decimal comma' or 'digits' (digits that only look like 0-9)."""
    uniq = col.uniq
    val = np.array(pd.to_numeric(pd.Series(uniq, dtype=object), errors="coerce"), dtype=float)
    censor = np.full(len(uniq), "", dtype=object)
    err = np.full(len(uniq), None, dtype=object)
    for i, text in enumerate(uniq):
        if not text.isascii() and lookalike_digit(text):
            val[i], err[i] = np.nan, "digits"
    for i in np.flatnonzero(~np.isfinite(val) & (err == None)):  # noqa: E711
        text = uniq[i]
        if text == "":
            err[i] = "empty"
            continue
        v, c, e = parse_number(text, decimal_comma)
        if e is None and c and not censoring:
            e = "not a number"
        if e is None and not np.isfinite(v):
            e = "not a number"
        val[i], censor[i], err[i] = v, c, e
    return val[col.codes], censor[col.codes], err[col.codes]


def digit_problems(prob: Problems, c: Col, err: np.ndarray, column: str, what: str) -> None:
    """Numbers written with digits that only look like 0-9 (Arabic-Indic, full-width, ...)."""
    bad = err == "digits"
    if bad.any():
        prob.add(bad, column,
                 c.map(lambda u: f"{what} '{u}' uses look-alike digits ({lookalike_digit(u)})"),
                 "retype the number with the digits 0-9; the character only looks like a digit")


def parse_value(ctx: Context) -> None:
    """Sets ``value_col``, ``reported`` (the number as written), ``censor`` and ``value_ok``
    (a number > 0)."""
    prob = ctx.problems
    value_c = ctx.value_col = ctx.col("value")
    reported, censor, verr = numbers(value_c, ctx.decimal_comma, censoring=True)
    value_ok = verr == None  # noqa: E711
    if "value" in ctx.present:
        prob.add(verr == "empty", "value", "value is empty", "expected a number such as 1.2 or <5")
        digit_problems(prob, value_c, verr, "value", "value")
        nn = verr == "not a number"
        if nn.any():
            prob.add(nn, "value", value_c.map(lambda u: f"non-numeric value '{u}'"),
                     "expected a number such as 1.2, or a censored value such as <5 or >2000")
        dc = verr == "decimal comma"
        if dc.any():
            prob.add(dc, "value", value_c.map(lambda u: f"value '{u}' has a decimal comma"),
                     "a decimal comma is read only in files not delimited by commas; use 1.2")
        nonpos = value_ok & ~(reported > 0)
        prob.add(nonpos, "value", value_c.map(lambda u: f"value '{u}' is not greater than 0"),
                 "results are analysed on the log scale; write a result below the detection "
                 "limit as '<limit'")
        value_ok &= reported > 0
    ctx.reported, ctx.censor, ctx.value_ok = reported, censor, value_ok


def parse_censor(ctx: Context) -> None:
    """The ``censor`` column (a file written by ``to_tidy_csv``): fills ``censor`` where the
    value has no comparator; one that disagrees with the comparator is a problem."""
    if "censor" not in ctx.present:
        return
    prob, censor = ctx.problems, ctx.censor
    censor_c = ctx.col("censor")
    cin_u = np.array([_CENSOR_IN.get(u.lower(), None) for u in censor_c.uniq], dtype=object)
    cin = cin_u[censor_c.codes]
    bad = cin == None  # noqa: E711
    prob.add(bad, "censor", censor_c.map(lambda u: f"unknown censor '{u}'"),
             "expected left, right or blank")
    clash = ~bad & ctx.value_ok & (censor != "") & (cin != "") & (censor != cin)
    prob.add(clash, "censor", "censor disagrees with the comparator in the value",
             "remove one of them")
    use = ~bad & (censor == "")
    censor = np.where(use, cin, censor)
    ctx.censor = np.where(censor == None, "", censor)  # noqa: E711


def parse_replicate(ctx: Context) -> None:
    """Sets ``replicate`` (1 when blank or bad) and ``rep_bad`` (not a whole number >= 1)."""
    prob = ctx.problems
    replicate_c = ctx.col("replicate")
    rep_val, _, rep_err = numbers(replicate_c, ctx.decimal_comma, censoring=False)
    rep_blank = rep_err == "empty"
    rep_bad = ~rep_blank & ((rep_err != None) | ~(np.floor(rep_val) == rep_val)  # noqa: E711
                            | ~(rep_val >= 1) | ~(rep_val < 2**31))
    if "replicate" in ctx.present:
        digit_problems(prob, replicate_c, rep_err, "replicate", "replicate")
        prob.add(rep_bad & (rep_err != "digits"), "replicate",
                 replicate_c.map(lambda u: f"replicate '{u}' is not a whole number of at least 1"),
                 "expected 1, 2, ... or blank (= 1)")
    ctx.replicate = np.where(rep_blank | rep_bad, 1.0, rep_val).astype(np.int64)
    ctx.rep_bad = rep_bad
