"""Prior packs (layer 2): strict schema, loading, hashing, fragments and lab override CSVs.

A pack (``models/<name>.toml``) holds, per analyte, the population centre and interval, the
between-animal CV (CVG), the within-animal CV (CVI) with the SD of ln(CVI), a default analytical
CV (CVA), sample-quality directions and thresholds, and its retest group. Every number is a
*cited number*: an inline table ``{ value, source, provenance[, locator, note] }`` with provenance
one of :data:`PROVENANCES` (``from memory`` with a rationale in ``note``; ``estimated`` and
``calibrated`` with the SHA-256 of the file or store they come from in ``source``). The schema
is strict: unknown keys (with a did-you-mean hint), missing keys, wrong types and out-of-range
values are all collected and raised together in a :class:`PackError`, each naming the file and
the key path. A pack whose CVs disagree with its own population interval loads, with
``pack.warnings``; an analyte's ``interval_gap = { ratio, reason }`` acknowledges such a
disagreement (listed in ``pack.acknowledged`` instead) for as long as the stated ratio matches.
``breed_notes.<breed> = { text, source, provenance[, locator, note] }`` holds notes shown for
animals of a breed (the ``breed note`` flag), apart from the age rule (``age_dependent``).

Modules: :mod:`.schema` (key specs and rules), :mod:`.pack` (loaded packs, loading, hashing,
checking, merging), :mod:`.layers` (built-in packs and files; fragments with ``[pack] extends``
layered over a base), :mod:`.overrides` (the lab override CSV), :mod:`.text` (views for people),
:mod:`.toml_out` (the TOML writer of ``priors merge``), :mod:`.cache` (one process-wide cache of
loaded packs, :func:`cached_pack`, re-read when a pack file changes on disk).
"""
from __future__ import annotations

from .cache import cached_pack, clear_pack_cache
from .layers import available_packs
from .overrides import OVERRIDE_COLUMNS
from .pack import AnalytePrior, Check, Pack, RetestGroup, check, check_file, load_pack, merge
from .schema import (COMBINE_RTOL, DESIGNS, DIRECTIONS, GAP_RATIO_RTOL, HASHED_PROVENANCES, HIL,
                     INTERVAL_CV_TOLERANCE, LAB_PROVENANCE, MIN_LOG_SD_FROM_MEMORY, PROVENANCES, CitedNote,
                     CitedNumber, CviStudy, IntervalGap, MethodBias, breed_key, consistency_acknowledged,
                     consistency_warnings, interval_consistency)
from .text import describe, describe_text

__all__ = [
    "PROVENANCES",
    "HASHED_PROVENANCES",
    "LAB_PROVENANCE",
    "DIRECTIONS",
    "HIL",
    "DESIGNS",
    "COMBINE_RTOL",
    "MIN_LOG_SD_FROM_MEMORY",
    "INTERVAL_CV_TOLERANCE",
    "GAP_RATIO_RTOL",
    "OVERRIDE_COLUMNS",
    "CitedNumber",
    "CviStudy",
    "CitedNote",
    "IntervalGap",
    "MethodBias",
    "RetestGroup",
    "AnalytePrior",
    "Pack",
    "Check",
    "available_packs",
    "load_pack",
    "cached_pack",
    "clear_pack_cache",
    "check",
    "check_file",
    "merge",
    "describe",
    "describe_text",
    "consistency_warnings",
    "consistency_acknowledged",
    "interval_consistency",
    "breed_key",
]
