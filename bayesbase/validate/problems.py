"""The problem collector and the column view every field parser works on.

:class:`Col` holds one column as integer codes into its distinct stripped strings, so that a
parser looks at each distinct text once (the speed of ``validate`` on a million rows comes from
this); :class:`Problems` collects located problems and raises them together, sorted by row.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from ..contract import CANONICAL_COLUMNS
from ..errors import Problem, ValidationError
from .text import cell_text, visible

__all__ = ["Col", "Problems", "rows_text"]


class Col:
    """One column as integer codes into stripped unique strings (fast on large frames)."""

    __slots__ = ("codes", "uniq")

    def __init__(self, series: pd.Series | None, n: int):
        if series is None:
            self.codes = np.zeros(n, dtype=np.intp)
            self.uniq = np.array([""], dtype=object)
            return
        codes, uniq = pd.factorize(series, use_na_sentinel=True)
        text = [cell_text(u).strip() for u in uniq] + [""]
        codes = np.where(codes < 0, len(text) - 1, codes)
        codes2, uniq2 = pd.factorize(np.array(text, dtype=object))
        self.codes = codes2[codes]
        self.uniq = np.asarray(uniq2, dtype=object)

    def values(self) -> np.ndarray:
        return self.uniq[self.codes]

    def map(self, func) -> np.ndarray:
        """Apply ``func`` to each unique string; return the per-row object array."""
        out = np.empty(len(self.uniq), dtype=object)
        for i, u in enumerate(self.uniq):
            out[i] = func(u)
        return out[self.codes]

    def empty(self) -> np.ndarray:
        return (self.uniq == "")[self.codes]


class Problems:
    """Collects problems; every message, hint, column and file name is made visible
    (control and invisible characters shown as ``<U+XXXX>``)."""

    def __init__(self, file: str, rows: np.ndarray):
        self.file = visible(file)
        self.rows = rows
        self.items: list[Problem] = []

    def add(self, mask_or_pos, column, message, hint=None) -> None:
        """One problem per selected row; ``message``/``hint`` may be per-row arrays or strings."""
        pos = np.flatnonzero(mask_or_pos) if np.asarray(mask_or_pos).dtype == bool else \
            np.asarray(mask_or_pos, dtype=np.intp)
        if pos.size == 0:
            return
        msgs = [message] * pos.size if isinstance(message, str) else list(np.asarray(message)[pos])
        hints = [hint] * pos.size if (hint is None or isinstance(hint, str)) else \
            list(np.asarray(hint, dtype=object)[pos])
        rows = self.rows[pos].tolist()
        column = None if column is None else visible(str(column))
        self.items.extend(Problem(self.file, r, column, visible(str(m)),
                                  None if h is None else visible(str(h)))
                          for r, m, h in zip(rows, msgs, hints))

    def one(self, row, column, message, hint=None) -> None:
        self.items.append(Problem(self.file, row, None if column is None else visible(str(column)),
                                  visible(message), None if hint is None else visible(hint)))

    def raise_if_any(self) -> None:
        if self.items:
            order = {c: i for i, c in enumerate(CANONICAL_COLUMNS)}
            self.items.sort(key=lambda p: (-1 if p.row is None else p.row,
                                           order.get(p.column or "", -1), p.column or "", p.message))
            raise ValidationError(self.items)


def rows_text(rows: list[int], limit: int = 3) -> str:
    head = ", ".join(str(r) for r in rows[:limit])
    return ("row " if len(rows) == 1 else "rows ") + head + (", ..." if len(rows) > limit else "")
