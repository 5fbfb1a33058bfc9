"""One partition, scored: the function each Dask task (or the in-process loop) runs.

:func:`score_partition` never raises for a bad partition: it returns an :class:`Outcome` that
names the partition's path and what went wrong, so the other partitions go on.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

__all__ = ["PartitionTask", "Outcome", "score_partition", "count_table"]


@dataclass(frozen=True)
class PartitionTask:
    """What one task scores: the input partition file, the output file, the prior pack (None:
    each species' own pack; else a loaded :class:`~bayesbase.priors.Pack`, loaded once by the
    caller so that every worker uses the same bytes) and the specimen to assess (``at``)."""

    source: Path
    target: Path
    pack: Any = None
    at: str | None = None
    engine: str = "exact"

    def request(self) -> dict:
        """What was asked, as stamped in the output (a finished output is reused by ``resume``
        only when it was asked the same)."""
        pack = None if self.pack is None else {"id": self.pack.id, "sha256": self.pack.sha256}
        return {"pack": pack, "at": self.at, "engine": self.engine}


@dataclass(frozen=True)
class Outcome:
    """What became of one partition: ``status`` is ``done`` (scored and written), ``skipped``
    (already scored: ``resume``), ``empty`` (no rows: nothing written) or ``failed`` (``error``
    says why; nothing written for it)."""

    source: str
    status: str
    patients: int = 0
    cases: int = 0
    probable: int = 0
    error: str | None = None
    seconds: float = 0.0
    meta: dict = field(default_factory=dict, repr=False)

    @property
    def failed(self) -> bool:
        return self.status == "failed"


def count_table(table) -> dict:
    """Patients, cases and probable changes (P(change) >= :data:`PROBABLE_CHANGE`) of a table."""
    from ..constants import PROBABLE_CHANGE

    if not len(table):
        return {"patients": 0, "cases": 0, "probable": 0}
    return {"patients": int(table["patient"].nunique()), "cases": int(len(table)),
            "probable": int((table["p_change"].to_numpy(dtype=float) >= PROBABLE_CHANGE).sum())}


def _pack_for(task: PartitionTask, frame):
    """The pack to pass to ``assess``: the task's, else the one species' own pack (the pack
    ``assess`` would load itself), else None (several species: ``assess`` loads each). A
    species' own pack comes from the process-wide cache (:func:`bayesbase.priors.cached_pack`):
    loaded once per process while its file is unchanged, not parsed again per partition."""
    if task.pack is not None:
        return task.pack
    species = frame["species"].dropna().unique()
    if len(species) != 1:
        return None
    from ..priors import cached_pack

    return cached_pack(str(species[0]))


def _score(task: PartitionTask, t0: float) -> Outcome:
    from ..assessment import assess
    from ..io.parquet import atomic_write_table, file_sha256, read_canonical_file
    from .output import output_metadata, table_to_arrow

    digest = file_sha256(task.source)
    frame, _ = read_canonical_file(task.source)
    if not len(frame):
        return Outcome(str(task.source), "empty", seconds=time.perf_counter() - t0)
    a = assess(frame, pack=_pack_for(task, frame), engine=task.engine, at=task.at)
    counts = count_table(a.table)
    meta = output_metadata(a.attrs, task, digest, counts)
    atomic_write_table(table_to_arrow(a.table), task.target, meta)
    return Outcome(str(task.source), "done", error=None, seconds=time.perf_counter() - t0,
                   meta=meta, **counts)


def score_partition(task: PartitionTask) -> Outcome:
    """Score one partition file with :func:`bayesbase.assessment.assess` and write its table
    (whole or not at all). A problem with the partition (unreadable file, bad rows, an analyte
    without a prior ...) becomes a ``failed`` :class:`Outcome` naming the file."""
    t0 = time.perf_counter()
    try:
        return _score(task, t0)
    except Exception as exc:  # reported with the partition's path; the other partitions go on
        return Outcome(str(task.source), "failed", error=f"{type(exc).__name__}: {exc}",
                       seconds=time.perf_counter() - t0)
