"""Parser of the sample-quality indices (haemolysis, lipaemia, icterus): a number >= 0 as the
analyser reports it, or blank."""
from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from ..contract import HIL_INDICES
from .numbers import digit_problems, numbers

if TYPE_CHECKING:
    from .context import Context

__all__ = ["parse_quality"]


def parse_quality(ctx: Context) -> None:
    """Sets ``hil``: index name -> per-row float (NaN when blank or bad)."""
    prob = ctx.problems
    ctx.hil = {}
    for name in HIL_INDICES:
        c = ctx.col(name)
        v, _, e = numbers(c, ctx.decimal_comma, censoring=False)
        blank = e == "empty"
        if name in ctx.present:
            digit_problems(prob, c, e, name, f"{name} index")
            nn = ~blank & (e != None) & (e != "digits")  # noqa: E711
            prob.add(nn, name, c.map(lambda u, name=name: f"{name} index '{u}' is not a number"),
                     "expected the numeric index as the analyser reports it, or blank")
            neg = (e == None) & (v < 0)  # noqa: E711
            prob.add(neg, name, c.map(lambda u, name=name: f"{name} index '{u}' is negative"),
                     "indices are 0 or more")
        ctx.hil[name] = np.where(e == None, v, np.nan).astype(float)  # noqa: E711
