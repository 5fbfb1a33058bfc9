"""A scoring run over a partitioned dataset: plan the tasks, skip partitions already scored
(``resume``), run the rest in this process or on Dask with the same function
(:func:`bayesbase.scale.task.score_partition`), and sum up.

Faults: a bad partition is a ``failed`` outcome naming its path while the others go on; a task
lost with its worker is retried by Dask (:data:`DASK_RETRIES`); each output file is written whole
(temporary file, then rename), so a rerun with ``resume`` scores only what is missing.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

from ..errors import BayesbaseError
from . import task as task_mod
from .task import Outcome, PartitionTask

__all__ = ["ScoreSummary", "score_dataset", "plan_tasks", "finished_outcome", "DASK_RETRIES"]

#: Times Dask reruns a task whose worker died or that raised (a project choice).
DASK_RETRIES = 2


@dataclass
class ScoreSummary:
    """What a run did: every partition's :class:`Outcome` (in file order), the output directory
    and the wall time. Counts sum over partitions scored now and those kept from before."""

    out: Path
    outcomes: list = field(default_factory=list)
    seconds: float = 0.0

    def _count(self, status: str) -> int:
        return sum(o.status == status for o in self.outcomes)

    @property
    def partitions(self) -> int:
        return len(self.outcomes)

    @property
    def done(self) -> int:
        return self._count("done")

    @property
    def skipped(self) -> int:
        return self._count("skipped")

    @property
    def failures(self) -> list:
        return [o for o in self.outcomes if o.failed]

    @property
    def patients(self) -> int:
        return sum(o.patients for o in self.outcomes)

    @property
    def cases(self) -> int:
        return sum(o.cases for o in self.outcomes)

    @property
    def probable(self) -> int:
        return sum(o.probable for o in self.outcomes)

    @property
    def ok(self) -> bool:
        return not self.failures


def _prepare_out(dataset: Path, out: Path, resume: bool) -> None:
    if out.resolve() == dataset.resolve():
        raise BayesbaseError(f"{out}: the output directory must not be the input dataset")
    if out.exists() and not out.is_dir():
        raise BayesbaseError(f"{out}: exists and is not a directory")
    out.mkdir(parents=True, exist_ok=True)
    if resume:
        for tmp in out.glob(".part-*.tmp"):  # left by a run that was stopped mid-write
            tmp.unlink(missing_ok=True)
    elif any(out.glob("part-*.parquet")):
        raise BayesbaseError(f"{out}: already holds scored partitions; add --resume to score only "
                             "the missing ones, or choose a new directory")


def plan_tasks(dataset, out, pack=None, at=None) -> list[PartitionTask]:
    """One task per partition file of ``dataset``, each writing the file of the same name in
    ``out``. ``pack`` (a name or path) is loaded here, once, for every task."""
    from ..io.parquet import dataset_files

    if isinstance(pack, (str, Path)):
        from ..priors import load_pack

        pack = load_pack(pack)
    at = None if at is None else str(at)
    return [PartitionTask(f, Path(out) / f.name, pack, at) for f in dataset_files(dataset)]


def finished_outcome(t: PartitionTask, pack_sha: Callable[[str], str]) -> Outcome | None:
    """A ``skipped`` outcome when ``t``'s output is already there for the same input bytes, the
    same request and (when each species' own pack is used) the packs as they are now
    (``pack_sha(pack_id)``); else None (the partition is scored again)."""
    from ..io.parquet import file_sha256
    from .output import scores_metadata

    if not t.target.is_file():
        return None
    try:
        meta = scores_metadata(t.target)
    except BayesbaseError:
        return None  # unreadable: scored again and replaced
    if not meta or meta.get("request") != t.request():
        return None
    if meta.get("input_sha256") != file_sha256(t.source):
        return None
    if t.pack is None:
        ids = str(meta.get("pack_id", "")).split(",")
        shas = str(meta.get("pack_sha256", "")).split(",")
        if len(ids) != len(shas) or any(pack_sha(i) != s for i, s in zip(ids, shas)):
            return None
    c = meta.get("counts", {})
    return Outcome(str(t.source), "skipped", int(c.get("patients", 0)), int(c.get("cases", 0)),
                   int(c.get("probable", 0)), meta=meta)


def _pack_sha_lookup() -> Callable[[str], str]:
    from ..priors import load_pack

    cache: dict[str, str] = {}

    def sha(pack_id: str) -> str:
        if pack_id not in cache:
            try:
                cache[pack_id] = load_pack(pack_id).sha256
            except BayesbaseError:
                cache[pack_id] = ""
        return cache[pack_id]

    return sha


def _run_in_process(todo: list, emit) -> None:
    for t in todo:
        emit(task_mod.score_partition(t))


def _run_dask(todo: list, client, emit) -> None:
    from distributed import as_completed

    futures = client.map(task_mod.score_partition, todo, pure=False, retries=DASK_RETRIES)
    source = {f.key: str(t.source) for f, t in zip(futures, todo)}
    for fut in as_completed(futures):
        try:
            outcome = fut.result()
        except Exception as exc:  # the task was lost (its worker died more often than retried)
            outcome = Outcome(source[fut.key], "failed",
                              error=f"task lost on the cluster: {type(exc).__name__}: {exc}")
        fut.release()
        emit(outcome)


def score_dataset(dataset, out, *, pack=None, at=None, scheduler=None, workers: int | None = None,
                  resume: bool = False, progress: Callable | None = None) -> ScoreSummary:
    """Score every partition of a Parquet results dataset (:mod:`bayesbase.io.parquet`) with
    the exact engine, writing the Assessment table of each partition to the file of the same
    name in ``out``.

    ``scheduler``: None runs the partitions one after another in this process; ``"local"`` a
    Dask ``LocalCluster`` of ``workers`` processes; an address (``tcp://host:8786``) an existing
    Dask scheduler, whose workers must reach ``dataset`` and ``out`` by the same paths; a
    ``distributed.Client`` is used as it is. ``resume`` keeps outputs already written for the
    same input, request and packs, and scores the rest (without it, ``out`` must hold no scored
    partition). ``progress(outcome, n_finished, n_total)`` is called after each partition.
    A failed partition does not stop the run: see :attr:`ScoreSummary.failures`."""
    t0 = time.perf_counter()
    if scheduler is not None:
        from .cluster import require_distributed

        require_distributed()  # before anything is written: a clear message without Dask
    dataset, out = Path(dataset), Path(out)
    tasks = plan_tasks(dataset, out, pack, at)
    _prepare_out(dataset, out, resume)
    summary = ScoreSummary(out)
    by_source: dict[str, Outcome] = {}

    def emit(o: Outcome) -> None:
        by_source[o.source] = o
        if progress is not None:
            progress(o, len(by_source), len(tasks))

    todo = []
    pack_sha = _pack_sha_lookup()
    for t in tasks:
        done = finished_outcome(t, pack_sha) if resume else None
        if done is None:
            todo.append(t)
        else:
            emit(done)
    if todo and scheduler is None:
        _run_in_process(todo, emit)
    elif todo:
        from .cluster import dask_client

        with dask_client(scheduler, workers) as client:
            _run_dask(todo, client, emit)
    summary.outcomes = [by_source[str(t.source)] for t in tasks]
    summary.seconds = time.perf_counter() - t0
    return summary
