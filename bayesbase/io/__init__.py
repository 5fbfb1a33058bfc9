"""Reading and writing results files (layer 2): tables (CSV/TSV/XLSX), FHIR R4 Bundles and the
tidy CSV; never the store.

Public API
----------
``read_results(path, now)``     the canonical results frame of a table or FHIR JSON file (the
                                one dispatcher the command line, ``assess`` and the store use)
``read_results_hashed(path)``   ``read_results`` plus the SHA-256 of the file's bytes (provenance)
``read_table(path)``            raw table of strings, column names normalised
``iter_results(path, chunksize)``  canonical frames a chunk at a time (bounded memory; the
                                cross-row checks kept across chunks; :mod:`.chunked`)
``read_results_chunked(path)``  the chunks concatenated in canonical order (= ``read_results``)
``to_tidy_csv(frame, path)``    write a canonical frame as CSV (reads back with ``read_results``)
``read_bundle(obj)``            raw frame of a FHIR R4 Bundle (path, JSON text or dict)
``load_bundle(obj, source, now)``  ``read_bundle`` + validation, problems at resource paths
``write_bundle(frame, path)``   a canonical frame as a FHIR R4 Bundle (pseudonymised by default)
``bundle_dict(frame)``          the same Bundle as a dict

Modules: :mod:`.tables` (decoding, delimiter, blank lines, XLSX), :mod:`.chunked`, :mod:`.tidy_csv`,
:mod:`.results` (the dispatcher), :mod:`.fhir_codes` (systems and code tables),
:mod:`.fhir_json` (JSON with located problems), :mod:`.fhir_read`, :mod:`.fhir_write`.
"""
from __future__ import annotations

from .chunked import iter_results, read_results_chunked
from .fhir_read import load_bundle, read_bundle
from .fhir_write import bundle_dict, write_bundle
from .results import read_results, read_results_hashed
from .tables import read_table
from .tidy_csv import to_tidy_csv

__all__ = ["read_results", "read_results_hashed", "read_table", "iter_results",
           "read_results_chunked", "to_tidy_csv", "read_bundle", "load_bundle",
           "write_bundle", "bundle_dict"]
