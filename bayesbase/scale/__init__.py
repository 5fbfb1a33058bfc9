"""Scoring a partitioned Parquet results dataset, one task per partition, in this process or on
Dask (layer 5).

Each task reads one partition file (:func:`bayesbase.io.parquet.read_canonical_file`), calls
the one :func:`bayesbase.assessment.assess` with the exact engine on it, and writes the
Assessment table as one Parquet file of the same name in the output directory (a temporary file,
then renamed), with the pack id, its SHA-256, engine, settings and version in the file's
metadata. A patient's whole history lies in one partition (a stable hash of its id), so the
tables of all partitions together are the table of one ``assess`` call on the whole dataset.

Public API
----------
``score_dataset(dataset, out, ...)``  run every partition; returns a :class:`ScoreSummary`
``score_partition(task)``             one partition (the function every Dask task runs)
``read_scores(out)``                  the output dataset back as one table
``scores_metadata(path)``             the provenance stamped in one output file

Modules: :mod:`.task` (one partition), :mod:`.output` (Arrow table, metadata, reading back),
:mod:`.run` (planning, resume, in-process or Dask), :mod:`.cluster` (Dask client),
:mod:`.cli` (``bayesbase score``).
"""
from __future__ import annotations

from .output import read_scores, scores_metadata
from .run import ScoreSummary, score_dataset
from .task import Outcome, PartitionTask, score_partition

__all__ = ["score_dataset", "ScoreSummary", "score_partition", "PartitionTask", "Outcome",
           "read_scores", "scores_metadata"]
