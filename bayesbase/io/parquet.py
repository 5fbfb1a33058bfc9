"""Canonical results frames as a partitioned Parquet dataset (layer 2; pyarrow as the engine).

A dataset is a directory of files ``part-NNNNN.parquet``, one per non-empty partition. A patient
belongs to partition :func:`partition_of` = the first 8 bytes of SHA-256 of the patient id
(UTF-8), read as a big-endian unsigned integer, modulo the number of partitions: the same id
gives the same partition on every machine and in every process (Python's ``hash`` does not), so
one animal's history never spans two files and each file can be scored alone.

Each file holds exactly the canonical columns (:data:`bayesbase.contract.CANONICAL_COLUMNS`)
with the Arrow types of :func:`arrow_types`, rows in canonical order, and a ``bayesbase`` entry
in its key-value metadata (JSON: ``kind``, ``partition``, ``n_partitions``, ``partition_hash``,
``pseudonymised``, ``version``, ``cautions``). Readers check the columns, their types, the
required values and that every patient lies in the file's partition; a problem names the file,
the column and the record.

A dataset is written whole or not at all (written in a directory beside the target, then
renamed). :func:`atomic_write_table` writes one file the same way (a temporary file, then
``os.replace``).
"""
from __future__ import annotations

import hashlib
import json
import os
import shutil
import uuid
from pathlib import Path

import pandas as pd

from .. import __version__
from ..constants import CAUTIONS
from ..contract import CANONICAL_COLUMNS, CANONICAL_DTYPES
from ..errors import BayesbaseError, Problem, ValidationError

__all__ = ["arrow_types", "DEFAULT_PARTITIONS", "META_KEY", "PARTITION_HASH", "partition_of",
           "partition_name", "is_parquet_path", "dataset_files", "write_canonical_dataset",
           "read_canonical_file", "read_canonical", "read_canonical_hashed", "file_metadata",
           "atomic_write_table", "dataset_sha256", "file_sha256"]

#: Partitions of an export when none is asked for (a project choice: a few hundred animals per
#: partition for 20,000 animals; more partitions for a larger network).
DEFAULT_PARTITIONS = 64
#: Key of the project's JSON entry in each file's key-value metadata.
META_KEY = b"bayesbase"
#: How a patient's partition is computed (written into every file's metadata).
PARTITION_HASH = "sha256(patient id, UTF-8)[:8] as big-endian unsigned int, mod n_partitions"
_KIND = "canonical results"
_SORT = ["patient", "collected_at", "specimen", "analyte", "replicate"]
#: Values every row must carry (DEVELOPERS.md, "Canonical results frame": required columns).
_REQUIRED = ("patient", "species", "specimen", "collected_at", "analyte", "value", "unit")


def arrow_types() -> dict:
    """Arrow type of every canonical column (pyarrow imported on first use)."""
    import pyarrow as pa

    by_dtype = {"string": pa.string(), "datetime64[ns]": pa.timestamp("ns"),
                "float64": pa.float64(), "Int64": pa.int64(), "boolean": pa.bool_()}
    return {c: by_dtype[CANONICAL_DTYPES[c]] for c in CANONICAL_COLUMNS}


def partition_of(patient: str, n_partitions: int) -> int:
    """Partition of a patient id: SHA-256 of the id (UTF-8), first 8 bytes as a big-endian
    unsigned integer, modulo ``n_partitions`` (:data:`PARTITION_HASH`)."""
    digest = hashlib.sha256(str(patient).encode("utf-8")).digest()
    return int.from_bytes(digest[:8], "big") % int(n_partitions)


def partition_name(k: int) -> str:
    """File name of partition ``k`` in a dataset (``part-00007.parquet``)."""
    return f"part-{int(k):05d}.parquet"


def is_parquet_path(path) -> bool:
    """True for a directory (a dataset) or a ``.parquet`` file."""
    p = Path(path)
    return p.is_dir() or p.suffix.lower() == ".parquet"


def dataset_files(path) -> list[Path]:
    """The partition files of a dataset directory (sorted by name), or ``[path]`` for a file."""
    p = Path(path)
    if not p.exists():
        raise FileNotFoundError(2, "No such file or directory", str(p))
    if not p.is_dir():
        return [p]
    files = sorted(f for f in p.iterdir() if f.is_file() and f.suffix == ".parquet"
                   and not f.name.startswith("."))
    if not files:
        raise BayesbaseError(f"{p}: no .parquet files in this directory (not a results dataset)")
    return files


def file_sha256(path) -> str:
    """SHA-256 (hex) of a file's bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def dataset_sha256(path) -> str:
    """SHA-256 of a dataset: over each file's name and the SHA-256 of its bytes, in name order
    (the provenance stamp of an import or a score made from it)."""
    h = hashlib.sha256()
    for f in dataset_files(path):
        h.update(f.name.encode("utf-8") + b"\0" + file_sha256(f).encode("ascii") + b"\n")
    return h.hexdigest()


# ---------------------------------------------------------------------------------------------
# writing
# ---------------------------------------------------------------------------------------------
def atomic_write_table(table, path, metadata: dict | None = None) -> Path:
    """Write an Arrow table to ``path`` whole or not at all: into a temporary file in the same
    directory, then renamed over ``path`` (``os.replace``). ``metadata`` (JSON-able) goes under
    :data:`META_KEY` in the file's key-value metadata."""
    import pyarrow.parquet as pq

    path = Path(path)
    if metadata is not None:
        meta = dict(table.schema.metadata or {})
        meta[META_KEY] = json.dumps(metadata, sort_keys=True, default=str).encode("utf-8")
        table = table.replace_schema_metadata(meta)
    tmp = path.with_name(f".{path.name}.{uuid.uuid4().hex}.tmp")
    try:
        pq.write_table(table, tmp)
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return path


def _canonical_arrow(frame: pd.DataFrame):
    import pyarrow as pa

    types = arrow_types()
    schema = pa.schema([pa.field(c, types[c]) for c in CANONICAL_COLUMNS])
    return pa.Table.from_pandas(frame, schema=schema, preserve_index=False)


def _partition_column(frame: pd.DataFrame, n_partitions: int):
    pats = frame["patient"].astype(str)
    parts = {p: partition_of(p, n_partitions) for p in pats.unique()}
    return pats.map(parts).to_numpy()


def _fresh_target(directory: Path) -> None:
    if directory.exists() and (not directory.is_dir() or any(directory.iterdir())):
        raise BayesbaseError(f"{directory}: already exists and is not an empty directory; "
                             "choose a new directory for the dataset")


def write_canonical_dataset(frame: pd.DataFrame, directory, n_partitions: int = DEFAULT_PARTITIONS,
                            *, pseudonymised: bool) -> list[Path]:
    """Write a canonical frame as a partitioned dataset in ``directory`` (new or empty): one
    file per non-empty partition, rows in canonical order. Whole or not at all. Returns the
    files written."""
    if int(n_partitions) < 1:
        raise BayesbaseError("the number of partitions must be at least 1")
    missing = [c for c in CANONICAL_COLUMNS if c not in frame.columns]
    if missing:
        raise BayesbaseError(f"not a canonical results frame: missing columns {missing}")
    directory = Path(directory)
    _fresh_target(directory)
    canon = frame[list(CANONICAL_COLUMNS)].astype(CANONICAL_DTYPES)
    part = _partition_column(canon, n_partitions)
    directory.parent.mkdir(parents=True, exist_ok=True)
    tmp = directory.with_name(f".{directory.name}.{uuid.uuid4().hex}.tmp")
    tmp.mkdir()
    try:
        names = []
        for k, rows in canon.groupby(part, sort=True):
            rows = rows.sort_values(_SORT, kind="mergesort")
            meta = {"kind": _KIND, "partition": int(k), "n_partitions": int(n_partitions),
                    "partition_hash": PARTITION_HASH, "pseudonymised": bool(pseudonymised),
                    "version": __version__, "cautions": list(CAUTIONS)}
            atomic_write_table(_canonical_arrow(rows), tmp / partition_name(k), meta)
            names.append(partition_name(k))
        if directory.exists():
            directory.rmdir()  # empty (checked above)
        os.replace(tmp, directory)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return [directory / n for n in names]


# ---------------------------------------------------------------------------------------------
# reading
# ---------------------------------------------------------------------------------------------
def file_metadata(path) -> dict | None:
    """The project's JSON metadata of a Parquet file (None when it has none). Raises
    :class:`~bayesbase.errors.BayesbaseError` when the file is not readable Parquet."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        meta = pq.read_schema(path).metadata or {}
    except (pa.ArrowException, OSError) as exc:
        raise BayesbaseError(f"{path}: not a readable Parquet file ({exc})") from exc
    raw = meta.get(META_KEY)
    return None if raw is None else json.loads(raw.decode("utf-8"))


def _type_ok(have, want) -> bool:
    import pyarrow as pa

    if have.equals(want):
        return True
    if pa.types.is_string(want):
        return pa.types.is_large_string(have) or pa.types.is_string_view(have)
    if pa.types.is_timestamp(want):
        return pa.types.is_timestamp(have) and have.tz is None
    if pa.types.is_integer(want):
        return pa.types.is_integer(have)
    return False


def _schema_problems(name: str, schema) -> list[Problem]:
    types = arrow_types()
    problems = [Problem(name, None, c, "missing column", "a results dataset carries every "
                        "canonical column (DEVELOPERS.md, 'Canonical results frame')")
                for c in CANONICAL_COLUMNS if c not in schema.names]
    problems += [Problem(name, None, c, "not a canonical column", "remove it")
                 for c in schema.names if c not in types]
    for c in CANONICAL_COLUMNS:
        if c in schema.names and not _type_ok(schema.field(c).type, types[c]):
            problems.append(Problem(name, None, c, f"type {schema.field(c).type}, expected "
                                    f"{types[c]}"))
    return problems


def _value_problems(name: str, frame: pd.DataFrame, meta: dict) -> list[Problem]:
    problems = []
    for c in _REQUIRED:
        for i in frame.index[frame[c].isna()][:20]:
            problems.append(Problem(name, None, c, f"record {i + 1}: missing value",
                                    "every row carries this column"))
    n = meta.get("n_partitions")
    k = meta.get("partition")
    if isinstance(n, int) and isinstance(k, int) and n >= 1:
        pats = frame["patient"].dropna().astype(str).unique()
        for p in [p for p in pats if partition_of(p, n) != k][:20]:
            i = int(frame.index[frame["patient"] == p][0])
            problems.append(Problem(name, None, "patient", f"record {i + 1}: patient {p} belongs "
                                    f"to partition {partition_of(p, n)}, not {k}",
                                    "write the dataset with bayesbase export --format parquet"))
    return problems


def _metadata_or_problem(path: Path) -> tuple[dict, list[Problem]]:
    meta = file_metadata(path)
    if meta is None or meta.get("kind") != _KIND:
        return {}, [Problem(path.name, None, None, "no bayesbase results metadata (not written "
                            "by bayesbase export --format parquet)")]
    n, k = meta.get("n_partitions"), meta.get("partition")
    if not (isinstance(n, int) and isinstance(k, int) and 0 <= k < n):
        return meta, [Problem(path.name, None, None, f"bad partition metadata {k}/{n}")]
    return meta, []


def read_canonical_file(path) -> tuple[pd.DataFrame, dict]:
    """One partition file as ``(canonical frame, its metadata)``: columns, types, required
    values and partition membership checked (:class:`~bayesbase.errors.ValidationError` lists
    every problem, naming the file, column and record)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    path = Path(path)
    meta, problems = _metadata_or_problem(path)
    try:
        table = pq.read_table(path)
    except (pa.ArrowException, OSError) as exc:
        raise BayesbaseError(f"{path}: not a readable Parquet file ({exc})") from exc
    problems += _schema_problems(path.name, table.schema)
    if problems:
        raise ValidationError(problems)
    frame = table.select(list(CANONICAL_COLUMNS)).to_pandas()
    frame = frame.astype(CANONICAL_DTYPES).reset_index(drop=True)
    problems = _value_problems(path.name, frame, meta)
    if problems:
        raise ValidationError(problems)
    return frame, meta


def read_canonical(path) -> pd.DataFrame:
    """A dataset directory (or one ``.parquet`` file) as one canonical frame in canonical row
    order. Every file is checked (:func:`read_canonical_file`); the files must agree on the
    number of partitions and hold distinct partitions."""
    frames, seen, problems = [], {}, []
    for f in dataset_files(path):
        frame, meta = read_canonical_file(f)
        n, k = meta["n_partitions"], meta["partition"]
        if seen and n != next(iter(seen.values()))[0]:
            problems.append(Problem(f.name, None, None, f"{n} partitions; the other files say "
                                    f"{next(iter(seen.values()))[0]}"))
        if k in {v[1] for v in seen.values()}:
            problems.append(Problem(f.name, None, None, f"partition {k} appears twice"))
        seen[f.name] = (n, k)
        frames.append(frame)
    if problems:
        raise ValidationError(problems)
    out = pd.concat(frames, ignore_index=True) if len(frames) > 1 else frames[0]
    return out.sort_values(_SORT, kind="mergesort").reset_index(drop=True)


def read_canonical_hashed(path) -> tuple[pd.DataFrame, str]:
    """:func:`read_canonical` plus the dataset's SHA-256 (:func:`dataset_sha256`; for one file,
    the SHA-256 of its bytes)."""
    p = Path(path)
    digest = dataset_sha256(p) if p.is_dir() else file_sha256(p)
    return read_canonical(p), digest
