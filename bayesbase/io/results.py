"""``read_results(path)``: the one way a results file becomes the canonical frame, used by the
command line, ``assess`` and the store alike."""
from __future__ import annotations

import hashlib
from pathlib import Path

import pandas as pd

from ..validate import validate
from .tables import read_table

__all__ = ["FHIR_SUFFIXES", "read_results", "read_results_hashed"]

#: File suffixes read as a FHIR R4 Bundle in JSON (anything else is a table).
FHIR_SUFFIXES = (".json",)


def read_results(path: str | Path, now=None) -> pd.DataFrame:
    """Read and validate a results file: CSV/TSV/TXT/XLSX (:func:`read_table` then
    :func:`bayesbase.validate.validate`) or a FHIR R4 Bundle in JSON (``.json``: the FHIR
    reader, every problem located at its resource path). Problems name the file (no
    directory); ``now`` is the reference time for "in the future" (default: now, UTC).
    A directory or a ``.parquet`` file is a canonical Parquet dataset
    (:func:`bayesbase.io.parquet.read_canonical`, checked there; ``now`` is not used)."""
    path = Path(path)
    if path.is_dir() or path.suffix.lower() == ".parquet":
        from .parquet import read_canonical

        return read_canonical(path)
    if path.suffix.lower() in FHIR_SUFFIXES:
        from .fhir_read import load_bundle

        return load_bundle(path, source=path.name, now=now)
    return validate(read_table(path), source=path.name, now=now)


def read_results_hashed(path: str | Path, now=None) -> tuple[pd.DataFrame, str]:
    """:func:`read_results` plus the SHA-256 (hex) of the file's bytes, the provenance stamp of a
    result built from the file. The caller checks that the file exists (with its own error).
    For a Parquet dataset, the dataset's hash (:func:`bayesbase.io.parquet.dataset_sha256`)."""
    path = Path(path)
    if path.is_dir() or path.suffix.lower() == ".parquet":
        from .parquet import read_canonical_hashed

        return read_canonical_hashed(path)
    digest = hashlib.sha256(path.read_bytes()).hexdigest()
    return read_results(path, now=now), digest
