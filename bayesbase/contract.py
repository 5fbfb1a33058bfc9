"""The data contract every unit shares, declared once (standard library only).

- :data:`CANONICAL_COLUMNS` / :data:`CANONICAL_DTYPES`: the canonical results frame
  (DEVELOPERS.md, "Canonical results frame"), as :func:`bayesbase.validate.validate` builds it;
- :data:`HIL_INDICES`: the sample-quality (haemolysis, lipaemia, icterus) index columns;
- the roles an assessment gives every row of a patient's history (:data:`ROLES`);
- :func:`is_canonical`: the one test of "this frame is already canonical, do not validate again".
"""
from __future__ import annotations

__all__ = [
    "CANONICAL_COLUMNS",
    "CANONICAL_DTYPES",
    "HIL_INDICES",
    "ROLE_ASSESSED",
    "ROLE_BASELINE",
    "ROLE_UNWELL",
    "ROLE_EXCLUDED",
    "ROLE_LATER",
    "ROLE_NOT_ASSESSED",
    "ROLES",
    "is_canonical",
]

#: Columns of the canonical results frame, in order.
CANONICAL_COLUMNS = (
    "patient", "species", "breed", "sex", "birth_date", "specimen", "collected_at", "analyte",
    "value", "unit", "reported_value", "reported_unit", "censor", "method", "replicate", "fasted",
    "haemolysis", "lipaemia", "icterus", "state", "source_file", "source_row",
)

#: pandas dtype of every canonical column (what ``validate`` builds; datetimes are naive UTC).
CANONICAL_DTYPES = {
    "patient": "string", "species": "string", "breed": "string", "sex": "string",
    "birth_date": "datetime64[ns]", "specimen": "string", "collected_at": "datetime64[ns]",
    "analyte": "string", "value": "float64", "unit": "string", "reported_value": "string",
    "reported_unit": "string", "censor": "string", "method": "string", "replicate": "Int64",
    "fasted": "boolean", "haemolysis": "float64", "lipaemia": "float64",
    "icterus": "float64", "state": "string", "source_file": "string", "source_row": "Int64",
}

#: Sample-quality index columns (haemolysis, lipaemia, icterus), in the order flags list them.
HIL_INDICES = ("haemolysis", "lipaemia", "icterus")

#: Roles of the rows of an assessment's history (column ``role``).
ROLE_ASSESSED = "assessed"        # a result of the assessed specimen
ROLE_BASELINE = "baseline"        # an earlier result used for the set point
ROLE_UNWELL = "unwell"            # an earlier result of an unwell visit: shown, never used
ROLE_EXCLUDED = "excluded"        # an earlier result left out by a rule (the reason says which)
ROLE_LATER = "later"              # collected with or after the assessed specimen
ROLE_NOT_ASSESSED = "not assessed"  # an analyte the assessed specimen did not measure
ROLES = (ROLE_ASSESSED, ROLE_BASELINE, ROLE_UNWELL, ROLE_EXCLUDED, ROLE_LATER, ROLE_NOT_ASSESSED)


def is_canonical(frame) -> bool:
    """True when ``frame`` carries every canonical column (it came from ``validate``, the
    store or an assessment's history), so it is used as it is rather than validated again.

    A raw table never carries all of them: ``source_file``/``source_row`` and the reported
    value beside the canonical one are written only by the reader.
    """
    columns = getattr(frame, "columns", None)
    if columns is None:
        return False
    return set(CANONICAL_COLUMNS).issubset(columns)
