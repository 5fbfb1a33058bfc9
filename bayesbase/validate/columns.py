"""Column mapping: normalised names and synonyms, duplicates, did-you-mean for misspellings."""
from __future__ import annotations

import difflib
import re
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from .context import Context

__all__ = ["REQUIRED_COLUMNS", "OPTIONAL_COLUMNS", "PASSTHROUGH_COLUMNS", "COLUMN_SYNONYMS",
           "normalise_column", "did_you_mean", "map_columns"]

REQUIRED_COLUMNS = ("patient", "species", "specimen", "collected_at", "analyte", "value", "unit")
OPTIONAL_COLUMNS = ("breed", "sex", "birth_date", "method", "replicate", "fasted",
                    "haemolysis", "lipaemia", "icterus", "state")
#: Columns of the canonical frame that an input may carry (a file written by `to_tidy_csv`).
PASSTHROUGH_COLUMNS = ("censor", "reported_value", "reported_unit", "source_file", "source_row")
KNOWN = set(REQUIRED_COLUMNS) | set(OPTIONAL_COLUMNS) | set(PASSTHROUGH_COLUMNS)

#: Normalised column name -> canonical column.
COLUMN_SYNONYMS = {
    "patient_id": "patient", "animal": "patient", "animal_id": "patient", "pet": "patient",
    "pet_id": "patient", "subject": "patient", "subject_id": "patient", "patient_no": "patient",
    "specimen_id": "specimen", "sample": "specimen", "sample_id": "specimen",
    "sample_no": "specimen", "accession": "specimen", "accession_id": "specimen",
    "accession_no": "specimen", "draw": "specimen", "draw_id": "specimen",
    "date": "collected_at", "collected": "collected_at", "collection_date": "collected_at",
    "collection_time": "collected_at", "collected_on": "collected_at", "datetime": "collected_at",
    "date_time": "collected_at", "sampled_at": "collected_at", "sample_date": "collected_at",
    "collection_datetime": "collected_at", "collected_date": "collected_at",
    "test": "analyte", "test_name": "analyte", "analyte_name": "analyte", "parameter": "analyte",
    "measurand": "analyte",
    "result": "value", "result_value": "value", "value_reported": "value",
    "units": "unit", "unit_s": "unit", "result_unit": "unit", "result_units": "unit", "uom": "unit",
    "analyser": "method", "analyzer": "method", "instrument": "method", "device": "method",
    "hemolysis": "haemolysis", "haemolysis_index": "haemolysis", "hemolysis_index": "haemolysis",
    "h_index": "haemolysis", "lipemia": "lipaemia", "lipaemia_index": "lipaemia",
    "lipemia_index": "lipaemia", "l_index": "lipaemia", "icterus_index": "icterus",
    "icteric_index": "icterus", "i_index": "icterus",
    "sex_neuter": "sex", "gender": "sex", "sex_status": "sex",
    "dob": "birth_date", "date_of_birth": "birth_date", "birthdate": "birth_date",
    "born": "birth_date", "birthday": "birth_date",
    "rep": "replicate", "replicate_no": "replicate", "fasting": "fasted", "fasted_state": "fasted",
    "health_state": "state", "health": "state", "clinical_state": "state", "status": "state",
    "species_name": "species", "breed_name": "breed",
}


def normalise_column(name: object) -> str:
    """A column name lower-cased, runs of other characters as ``_``, synonyms resolved."""
    text = str(name).replace("\ufeff", "").strip().lower()
    text = re.sub(r"[^0-9a-z]+", "_", text).strip("_")
    return COLUMN_SYNONYMS.get(text, text)


def did_you_mean(text: str, options, fallback: str) -> str:
    close = difflib.get_close_matches(text, list(options), n=1, cutoff=0.6)
    return f"did you mean '{close[0]}'?" if close else fallback


def map_columns(ctx: Context) -> bool:
    """Set ``ctx.source_of`` (canonical column -> position in the raw table); report a column
    that duplicates another's meaning, a misspelt column and a missing required column; note
    the other unknown columns as ignored. True when validation can go on to the rows."""
    prob, shown = ctx.problems, ctx.shown
    if len(ctx.raw.columns) == 0:
        prob.one(1, None, "the file is empty: expected a header row naming the columns "
                 + ", ".join(REQUIRED_COLUMNS))
        prob.raise_if_any()
    misspelt: dict[str, object] = {}  # canonical column -> the unknown column that resembles it
    duplicated = False
    for j, original in enumerate(shown):
        canon = normalise_column(original)
        if canon in KNOWN:
            if canon in ctx.source_of:
                duplicated = True
                prob.one(ctx.header_row, str(original), f"column '{original}' duplicates column "
                         f"'{shown[ctx.source_of[canon]]}' (both mean '{canon}')", "keep one of them")
            else:
                ctx.source_of[canon] = j
            continue
        close = difflib.get_close_matches(canon, sorted(KNOWN | set(COLUMN_SYNONYMS)), n=1,
                                          cutoff=0.8)
        if close:
            target = COLUMN_SYNONYMS.get(close[0], close[0])
            misspelt[target] = original
            prob.one(ctx.header_row, str(original), f"unknown column '{original}'",
                     f"did you mean '{target}'?")
        else:
            ctx.notes.append(f"column '{original}' is not part of the results contract and was "
                             "ignored")
    # a required column whose misspelling was already reported is not reported twice
    missing = [c for c in REQUIRED_COLUMNS if c not in ctx.source_of and c not in misspelt]
    for c in missing:
        prob.one(ctx.header_row, c, f"required column '{c}' is missing",
                 "columns found: " + ", ".join(str(x) for x in shown))
    if ctx.n == 0:
        prob.one(ctx.header_row + 1, None, "no data rows below the header")
    return not (ctx.n == 0 or duplicated)
