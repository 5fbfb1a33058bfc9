"""The scored output of one partition: the Assessment table as an Arrow table (same columns,
``flags`` as a Parquet ``list<string>`` column), its provenance metadata, and reading the output
dataset back."""
from __future__ import annotations

from pathlib import Path

from .. import __version__
from ..constants import CAUTIONS

__all__ = ["KIND", "FLAGS_ENCODING", "table_to_arrow", "output_metadata", "scores_metadata",
           "read_scores"]

#: ``kind`` of the metadata of a scored partition file.
KIND = "assessment"
#: How the list-valued ``flags`` column is written.
FLAGS_ENCODING = "list<string>"


def table_to_arrow(table):
    """The Assessment table as an Arrow table: every column as pandas gives it, ``flags`` as a
    ``list<string>`` column in its place (an empty list when no flag)."""
    import pyarrow as pa

    cols = list(table.columns)
    arrow = pa.Table.from_pandas(table.drop(columns=["flags"]), preserve_index=False)
    flags = pa.array([[str(x) for x in f] for f in table["flags"]], type=pa.list_(pa.string()))
    return arrow.add_column(cols.index("flags"), "flags", flags)


def output_metadata(attrs: dict, task, input_sha256: str, counts: dict) -> dict:
    """The provenance of one scored partition: the assessment's attrs (pack id and SHA-256,
    engine, settings, seed, version ...), the input file and its SHA-256, the partition, what
    was asked (``request``), the counts, the flags encoding and the cautions."""
    meta = {k: v for k, v in attrs.items()}
    meta.update({
        "kind": KIND, "version": __version__, "input": task.source.name,
        "input_sha256": input_sha256, "request": task.request(), "counts": counts,
        "flags_encoding": FLAGS_ENCODING, "cautions": list(CAUTIONS),
    })
    return meta


def scores_metadata(path) -> dict | None:
    """The metadata of one scored file (None when it carries none of ours, or is not one)."""
    from ..io.parquet import file_metadata

    meta = file_metadata(path)
    return meta if meta and meta.get("kind") == KIND else None


def read_scores(out):
    """The scored dataset (a directory, or one file) as one table, sorted by patient and
    analyte, ``flags`` back as lists of strings."""
    import pandas as pd
    import pyarrow.parquet as pq

    out = Path(out)
    files = sorted(out.glob("part-*.parquet")) if out.is_dir() else [out]
    frames = [pq.read_table(f).to_pandas() for f in files]
    if not frames:
        return pd.DataFrame()
    t = pd.concat(frames, ignore_index=True) if len(frames) > 1 else frames[0]
    t["flags"] = [list(f) for f in t["flags"]]
    return t.sort_values(["patient", "analyte"], kind="mergesort").reset_index(drop=True)
