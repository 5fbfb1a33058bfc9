"""Error types shared by every layer (standard library only)."""
from __future__ import annotations

from dataclasses import dataclass, field


@dataclass(frozen=True)
class Problem:
    """One problem found in an input: where it is and what was expected."""

    file: str
    row: int | None  # 1-based data row as a user sees it in a spreadsheet (header = row 1)
    column: str | None
    message: str
    hint: str | None = None

    def __str__(self) -> str:
        where = [self.file]
        if self.row is not None:
            where.append(f"row {self.row}")
        if self.column:
            where.append(f"column '{self.column}'")
        text = ", ".join(where) + ": " + self.message
        if self.hint:
            text += f" ({self.hint})"
        return text


class BayesbaseError(Exception):
    """Base class: every error the CLI turns into a message without a traceback."""


class ValidationError(BayesbaseError):
    """Input results failed validation; `problems` lists every problem found."""

    def __init__(self, problems: list[Problem]):
        self.problems = list(problems)
        n = len(self.problems)
        head = "\n".join(str(p) for p in self.problems[:50])
        more = f"\n... and {n - 50} more" if n > 50 else ""
        super().__init__(f"{n} problem(s) in the input:\n{head}{more}")


class PackError(BayesbaseError):
    """A prior pack or an override file is invalid."""

    def __init__(self, problems: list[str] | str):
        if isinstance(problems, str):
            problems = [problems]
        self.problems = list(problems)
        super().__init__("\n".join(self.problems))


class AnalyteNotInPack(BayesbaseError):
    """An analyte in the results has no prior in the chosen pack."""


class ConvergenceError(BayesbaseError):
    """An MCMC fit failed its convergence checks and the caller asked for strictness."""


class StoreError(BayesbaseError):
    """A problem with the results store (import conflicts, bad database)."""


class MissingExtra(BayesbaseError, ImportError):
    """An optional package (an extra of pyproject, e.g. nutpie or dask) is needed and not
    installed; the message says how to install it. Also an ImportError, for callers that catch
    that."""
