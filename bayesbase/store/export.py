"""Exports from the results store: a tidy CSV (spreadsheet formulas neutralised), a FHIR R4
Bundle or a partitioned Parquet dataset (:mod:`bayesbase.io.parquet`), pseudonymised by default
(:mod:`bayesbase.privacy`). Owner data are never exported.

CSV exports neutralise spreadsheet formulas (:func:`neutralise_formulas`, after the OWASP "CSV
Injection" guidance): a text cell that begins with ``=``, ``+``, ``-``, ``@``, tab, carriage
return or NUL gets a leading single quote; numbers stay numbers.
"""
from __future__ import annotations

import re
from pathlib import Path

from ..privacy import pseudonymise_frame
from . import queries

__all__ = ["FORMULA_PREFIXES", "neutralise_formulas", "export_frame", "write_csv", "write_fhir",
           "write_parquet", "store_to_parquet"]

#: First characters that make a spreadsheet program read a text cell as a formula: the OWASP
#: "CSV Injection" guidance (common practice) lists =, +, -, @, tab and carriage return; OWASP
#: ASVS 5.0 (requirement 1.2.10) adds NUL. Exported text cells starting with one of them get a
#: leading single quote (:func:`neutralise_formulas`).
FORMULA_PREFIXES = ("=", "+", "-", "@", "\t", "\r", "\0")
_PLAIN_NUMBER = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?")


def neutralise_formulas(frame):
    """Copy of a frame safe to open in a spreadsheet program: every text cell that begins with
    a formula character (:data:`FORMULA_PREFIXES`, from the OWASP "CSV Injection" guidance) gets
    a leading single quote, as that guidance recommends. Numeric columns are untouched, and so
    is a text cell that is a plain decimal number (``-5``, ``+2.5e3``: a spreadsheet reads it as
    that number, not as a formula). Use it for every CSV or XLSX export."""
    import pandas as pd

    out = frame.copy()
    for name in out.columns:
        col = out[name]
        if not (isinstance(col.dtype, pd.StringDtype) or col.dtype == object):
            continue
        if isinstance(col.dtype, pd.StringDtype):
            text = col
        else:  # object column: only its str cells are text
            text = col.where(col.map(lambda x: isinstance(x, str)), None).astype("string")
        mask = (text.str.startswith(FORMULA_PREFIXES).fillna(False)
                & ~text.str.fullmatch(_PLAIN_NUMBER).fillna(False)).to_numpy(dtype=bool)
        if mask.any():
            values = col.to_numpy(dtype=object, copy=True)
            values[mask] = ["'" + v for v in values[mask]]
            out[name] = pd.array(values, dtype=col.dtype) if col.dtype != object else values
    return out


def export_frame(conn, path, patient: str | None, salt: bytes | None):
    """The canonical results of one patient (or all), pseudonymised with ``salt`` unless it is
    None (then identified)."""
    df = queries.results(conn, path, patient)
    return pseudonymise_frame(df, salt) if salt is not None else df


def write_csv(frame, path) -> Path:
    """Write a tidy results CSV (:func:`bayesbase.data.to_tidy_csv`) with formulas
    neutralised."""
    from ..io import to_tidy_csv

    return to_tidy_csv(neutralise_formulas(frame), Path(path))


def write_fhir(frame, path) -> Path:
    """Write a FHIR R4 Bundle (type collection) of a frame already pseudonymised or not."""
    from ..io import write_bundle

    return write_bundle(frame, path, pseudonymise=False)


def write_parquet(frame, path, n_partitions: int | None = None, *,
                  pseudonymised: bool) -> list[Path]:
    """Write a Parquet dataset (a new directory) of a frame already pseudonymised or not,
    partitioned by a stable hash of the patient id as written
    (:func:`bayesbase.io.parquet.write_canonical_dataset`). Parquet cells are typed, so no
    formula neutralising is needed. Returns the partition files written."""
    from ..io.parquet import DEFAULT_PARTITIONS, write_canonical_dataset

    return write_canonical_dataset(frame, path, n_partitions or DEFAULT_PARTITIONS,
                                   pseudonymised=pseudonymised)


def store_to_parquet(store, patient: str | None, path, n_partitions: int | None = None,
                     pseudonymise: bool = True) -> list[Path]:
    """A :class:`~bayesbase.store.Store`'s results (one patient, or all when None) as a Parquet
    dataset (:func:`write_parquet`), pseudonymised with the store's salt unless told not to."""
    frame = store._export_frame(patient, pseudonymise)
    return write_parquet(frame, path, n_partitions, pseudonymised=pseudonymise)
