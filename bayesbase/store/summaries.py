"""What an import did or would do (:class:`ImportSummary`), the stored values it would change
(:class:`Conflict`, :class:`ImportConflict`) and what :meth:`Store.forget` removed
(:class:`Removed`)."""
from __future__ import annotations

from dataclasses import dataclass

from ..errors import StoreError

__all__ = ["Conflict", "ImportConflict", "ImportSummary", "Removed"]


@dataclass(frozen=True)
class Conflict:
    """One stored value that an import would change."""

    kind: str  # "patient", "specimen" or "result"
    patient: str
    specimen: str | None
    analyte: str | None
    replicate: int | None
    field: str
    stored: object
    new: object

    def __str__(self) -> str:
        where = [f"patient {self.patient}"]
        if self.specimen is not None:
            where.append(f"specimen {self.specimen}")
        if self.analyte is not None:
            where.append(f"analyte {self.analyte}")
        if self.replicate is not None and self.replicate != 1:
            where.append(f"replicate {self.replicate}")
        return f"{', '.join(where)}: {self.field} stored {self.stored!r}, new {self.new!r}"


class ImportConflict(StoreError):
    """An import would overwrite stored values; ``conflicts`` lists every one."""

    def __init__(self, source: str, conflicts: list[Conflict]):
        self.source = source
        self.conflicts = list(conflicts)
        n = len(self.conflicts)
        head = "\n".join(f"  {c}" for c in self.conflicts[:50])
        more = f"\n  ... and {n - 50} more" if n > 50 else ""
        super().__init__(
            f"{source}: {n} value(s) differ from those already stored; nothing was imported "
            f"(import again with replace to overwrite them; old values are kept in the log):\n"
            f"{head}{more}")


@dataclass(frozen=True)
class ImportSummary:
    """What one import did (or, with ``dry_run``, would do: nothing was written and
    ``import_id`` is None). ``rows_added + rows_skipped + rows_replaced`` = rows in the input.
    A dry run counts as if the import were made with ``replace`` and lists the ``conflicts``
    that would refuse it without ``replace``."""

    rows_added: int
    rows_skipped: int
    rows_replaced: int
    conflicts: tuple[Conflict, ...] = ()
    import_id: int | None = None
    source: str = ""
    patients_added: int = 0
    specimens_added: int = 0
    dry_run: bool = False

    @property
    def nothing_new(self) -> bool:
        """True when the import changed nothing in the store."""
        return self.rows_added == 0 and self.rows_replaced == 0 and not self.conflicts


class Removed(int):
    """Total rows removed by :meth:`Store.forget`; ``by_table`` gives the count per table;
    ``wal_cleared`` tells whether the write-ahead log was checkpointed and truncated."""

    by_table: dict[str, int]
    wal_cleared: bool

    def __new__(cls, by_table: dict[str, int]):
        obj = super().__new__(cls, sum(by_table.values()))
        obj.by_table = dict(by_table)
        obj.wal_cleared = False
        return obj
