"""The orchestrator: :func:`validate` runs the field parsers in dependency order over one
:class:`~bayesbase.validate.context.Context`, then the checks across rows, then assembles the
canonical frame."""
from __future__ import annotations

import pandas as pd

from .analytes import convert_values, parse_analyte, parse_unit
from .assemble import canonical_frame
from .checks import add_notes, check_consistency, check_duplicates
from .columns import map_columns
from .context import Context
from .dates import parse_birth_date, parse_collected
from .free_text import parse_free_text
from .ids import parse_ids, parse_species
from .numbers import parse_censor, parse_replicate, parse_value
from .quality import parse_quality
from .state import parse_fasted, parse_state

__all__ = ["validate", "FIELD_PARSERS"]

#: The parsers of the row fields, in dependency order (each reads what those before it set).
FIELD_PARSERS = (
    parse_ids, parse_species, parse_free_text,
    parse_collected, parse_birth_date,          # birth date: after the collection time
    parse_analyte, parse_unit,                  # unit: per (analyte, unit) pair
    parse_value, parse_censor, convert_values,  # conversion: needs value and unit
    parse_replicate, parse_fasted, parse_quality, parse_state,
)


def validate(raw: pd.DataFrame, source: str | None = None, now=None) -> pd.DataFrame:
    """Validate a raw results table and return the canonical results frame.

    Never mutates ``raw``. Every problem found goes into one
    :class:`~bayesbase.errors.ValidationError` (problems sorted by row). ``source`` names the
    file in messages (default: ``raw.attrs["source"]`` or ``"<data>"``); ``now`` is the reference
    time for "in the future" (default: now, UTC). Row numbers are ``raw.index + 2`` when the index
    is an integer index (as ``read_table`` returns), else position + 2. The returned frame's
    ``attrs`` hold ``source``, ``notes`` (ignored columns, duplicates dropped, ...) and
    ``n_duplicates_dropped``.
    """
    if not isinstance(raw, pd.DataFrame):
        raise TypeError("validate expects a pandas DataFrame (use load_results for a file)")
    ctx = Context(raw, source, now)
    if not map_columns(ctx):
        ctx.problems.raise_if_any()
    for parse in FIELD_PARSERS:
        parse(ctx)
    check_consistency(ctx)
    check_duplicates(ctx)
    ctx.problems.raise_if_any()
    add_notes(ctx)
    return canonical_frame(ctx)
