"""Validation of a raw results table into the canonical results frame (layer 2).

``validate(raw, source=None, now=None)`` returns the canonical frame (DEVELOPERS.md) or raises
one :class:`~bayesbase.errors.ValidationError` listing every problem. Reading files is
:mod:`bayesbase.io` (``read_results`` reads and validates).

Layout: :mod:`.problems` (problem collector, column view), :mod:`.columns` (column mapping),
one parser per field group (:mod:`.ids`, :mod:`.free_text`, :mod:`.dates`, :mod:`.analytes`,
:mod:`.numbers`, :mod:`.quality`, :mod:`.state`), :mod:`.checks` (consistency across rows,
notes), :mod:`.assemble` (the canonical frame), :mod:`.core` (the orchestrator over a
:class:`~.context.Context`); :mod:`.text` holds the character rules the readers share.

Input rules (documented choices of this project)
------------------------------------------------
* Column names are case- and space-insensitive, with synonyms (``patient_id`` -> ``patient``,
  ``date``/``collected`` -> ``collected_at``, ``result`` -> ``value``, ``units`` -> ``unit``,
  ``analyser``/``analyzer`` -> ``method``, ``hemolysis`` -> ``haemolysis``, ``lipemia`` ->
  ``lipaemia``, ``sex_neuter`` -> ``sex`` ...; see ``COLUMN_SYNONYMS``). An unknown column that
  looks like a misspelling of a known one is a problem (with a did-you-mean hint); other unknown
  columns are ignored and listed in ``frame.attrs["notes"]``. Two columns that mean the same
  (``unit`` and ``units``, ``Patient`` and ``patient`` ...) are a problem and stop validation.
* Dates: ISO 8601 (``2024-03-05``, ``2024-03-05T09:30``, ``2024-03-05 09:30:00``, with an offset
  such as ``+02:00`` or ``Z``) or day-first ``05/03/2024``, ``05.03.2024``, ``05-03-2024``
  (optionally followed by ``HH:MM[:SS]``). Day first, never month first. Times with an offset are
  converted to UTC; naive times are taken as they are (treated as UTC). A collection time more
  than ``FUTURE_TOLERANCE`` (14 h, the largest UTC offset in use) after ``now`` is "in the
  future", so local clock times are never flagged by mistake; one before 1900 is not a plausible
  collection (or birth) date. A partial date (``2025``, ``2025-09``) is refused, never completed.
* Values: a number > 0 in the reported unit. Censored results ``<5``, ``< 5``, ``<=5``, ``≤5``,
  ``>2000``, ``>= 2000`` become value = the limit with censor ``"left"`` / ``"right"``. A decimal
  comma (``1,2``) is accepted unless the file is comma-delimited; thousands separators are not.
  Digits are 0-9 only: look-alikes (Arabic-Indic, full-width, mathematical bold ...) are refused
  with their Unicode name. After conversion every value must lie in the analyte's plausibility
  envelope (``plausible`` in ``models/analytes.toml``: what a living animal can have, far wider
  than a reference interval); outside it (including overflow to infinity and subnormal numbers)
  the row is refused with the range in the canonical and the reported unit. No non-finite value
  is ever returned.
* ``state``: ``healthy``, ``unwell`` or blank (blank = assumed healthy); ``well``/``normal`` are
  read as healthy and ``sick``/``ill``/``diseased`` as unwell.
* ``fasted``: yes/no, true/false, 1/0, y/n, fasted/fed or blank.
* ``replicate``: a whole number >= 1; 1 when absent or blank.
* A specimen is keyed by (patient, specimen): two animals may both have a draw ``S1``; one draw
  of one animal has one collection time.
* Identical duplicates (same patient, specimen, analyte and replicate with the same value) are
  dropped and counted in the notes; the same key with different values is a problem.
* Ids (patient, specimen) with control or invisible characters (NUL, U+202E, zero-width joiner,
  BOM ...) are refused; such characters are removed from free text (breed, method, reported
  value and unit) with a note, and shown as ``<U+XXXX>`` in every message and note.
* Text that begins with ``=``, ``+``, ``-``, ``@``, tab or carriage return in patient, specimen,
  breed or method is noted as formula-like (OWASP guidance on CSV injection); it is not refused.
* ``censor``, ``reported_value`` and ``reported_unit`` columns are read when present (so a file
  written by :func:`bayesbase.io.to_tidy_csv` reads back unchanged); ``source_file`` and
  ``source_row`` are always those of the file being read.

Problem messages have the form ``"<file>, row <n>, column '<col>': <message> (<hint>)"``, where
row numbers are spreadsheet rows (header = row 1, first data row = 2); they are sorted by row.
"""
from __future__ import annotations

from .columns import COLUMN_SYNONYMS, REQUIRED_COLUMNS, normalise_column
from .core import validate
from .dates import FUTURE_TOLERANCE
from .ids import SPECIES_ALIASES

__all__ = ["validate", "REQUIRED_COLUMNS", "COLUMN_SYNONYMS", "SPECIES_ALIASES",
           "FUTURE_TOLERANCE", "normalise_column"]
