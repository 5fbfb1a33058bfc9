"""Parsers of the visit's state (healthy / unwell / blank = assumed healthy) and fasting."""
from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from .context import Context

__all__ = ["parse_fasted", "parse_state"]

_STATE = {"": "", "healthy": "healthy", "well": "healthy", "normal": "healthy",
          "unwell": "unwell", "sick": "unwell", "ill": "unwell", "diseased": "unwell"}
_FASTED = {"yes": True, "y": True, "true": True, "1": True, "fasted": True,
           "no": False, "n": False, "false": False, "0": False, "fed": False, "": None}


def parse_fasted(ctx: Context) -> None:
    """Sets ``fasted`` with ``fast_val_u``/``fast_na_u`` (value and missing mask per distinct
    text)."""
    fasted_c = ctx.fasted = ctx.col("fasted")
    fast_u = [_FASTED.get(u.lower(), "bad") for u in fasted_c.uniq]
    fast_bad_u = np.array([f == "bad" for f in fast_u])
    if "fasted" in ctx.present:
        ctx.problems.add(fast_bad_u[fasted_c.codes], "fasted",
                         fasted_c.map(lambda u: f"fasted '{u}' is not yes or no"),
                         "expected yes/no, true/false, 1/0, y/n, fasted/fed or blank")
    ctx.fast_val_u = np.array([f is True for f in fast_u])
    ctx.fast_na_u = np.array([f is None or f == "bad" for f in fast_u])


def parse_state(ctx: Context) -> None:
    """Sets ``state`` and ``state_u`` (canonical state per distinct text; '' when blank)."""
    state_c = ctx.state = ctx.col("state")
    state_u = np.array([_STATE.get(u.lower(), None) for u in state_c.uniq], dtype=object)
    if "state" in ctx.present:
        bad = (state_u == None)[state_c.codes]  # noqa: E711
        ctx.problems.add(bad, "state", state_c.map(lambda u: f"unknown state '{u}'"),
                         "expected healthy, unwell or blank (blank = assumed healthy)")
    ctx.state_u = np.where(state_u == None, "", state_u)  # noqa: E711
