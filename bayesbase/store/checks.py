"""Checks of one import's input that the store makes itself, whatever way the frame arrived:
values it refuses to hold and inconsistencies inside the input. Each returns a list of
:class:`~bayesbase.errors.Problem` naming file, row and column."""
from __future__ import annotations

import math

from ..contract import HIL_INDICES
from ..errors import Problem
from .frames import is_missing

__all__ = ["PATIENT_FIELDS", "non_finite_problems", "internal_problems"]

#: Patient attributes that one patient must carry once (and that an import compares).
PATIENT_FIELDS = ("species", "breed", "sex", "birth_date")


def non_finite_problems(canon, source: str) -> list[Problem]:
    """Values the store refuses to hold: a measured value that is not a finite number, or a
    sample-quality index that is given but not finite (inf or NaN; IEEE 754). The validator
    refuses implausible values first; this guard is defence in depth for frames that reach the
    store by another way."""
    import numpy as np

    problems: list[Problem] = []
    rows = canon["source_row"] if "source_row" in canon else None
    for col in ("value", *HIL_INDICES):
        if col not in canon:
            continue
        try:
            v = canon[col].to_numpy(dtype="float64", na_value=math.nan)
        except (TypeError, ValueError):
            continue  # not numbers at all: the insert's own checks report it
        bad = ~np.isfinite(v)
        if col != "value":
            bad &= ~np.isnan(v)  # an index not given is missing, not bad
        for i in np.flatnonzero(bad)[:200]:
            r = None if rows is None or is_missing(rows.iloc[i]) else int(rows.iloc[i])
            what = f"{col} {v[i]!r}"
            if col == "value" and "reported_value" in canon:
                rv, ru = canon["reported_value"].iloc[i], canon["reported_unit"].iloc[i]
                what = f"value {rv} {ru} gives {v[i]!r} {canon['unit'].iloc[i]}"
            problems.append(Problem(source, r, col, f"{what}: not a finite number",
                                    "the store holds finite numbers only; correct the value"))
    return problems


def _row_of(canon, idx) -> int | None:
    r = canon["source_row"].iloc[idx] if "source_row" in canon else None
    return None if is_missing(r) else int(r)


def _repeated_results(canon, source: str) -> list[Problem]:
    """A result (patient, specimen, analyte, replicate) given twice."""
    dup = canon.duplicated(["patient", "specimen", "analyte", "replicate"], keep="first")
    problems = []
    for i in dup.to_numpy().nonzero()[0]:
        r = canon.iloc[i]
        problems.append(Problem(source, _row_of(canon, i), "replicate",
                                f"patient {r['patient']}, specimen {r['specimen']}, analyte "
                                f"{r['analyte']}, replicate {r['replicate']} appears twice",
                                "number the repeats with the replicate column"))
    return problems


def _mixed_values(canon, source: str, keys: tuple, fields: tuple) -> list[Problem]:
    """A key (a patient, a specimen) carrying more than one value of one of its fields."""
    fields = [f for f in fields if f in canon]
    keys = list(keys)
    # fast path: every key has a single combination of the fields
    if canon[keys + fields].drop_duplicates()[keys].duplicated().sum() == 0:
        return []
    problems = []
    for f in fields:
        nun = canon[keys + [f]].groupby(keys, sort=False, dropna=False)[f].nunique(dropna=True)
        for key in nun[nun > 1].index[:200]:
            key_t = key if isinstance(key, tuple) else (key,)
            idx = (canon[keys] == list(key_t)).all(axis=1).to_numpy().nonzero()[0]
            vals = canon[f].iloc[idx]
            first = vals.dropna().iloc[0]
            other = [i for i, v in zip(idx, vals) if not is_missing(v) and v != first]
            label = ", ".join(f"{k} {v}" for k, v in zip(keys, key_t))
            problems.append(Problem(source, _row_of(canon, other[0]) if other else None, f,
                                    f"{label} has more than one {f} in this file"))
    return problems


def internal_problems(canon, source: str) -> list[Problem]:
    """Inconsistencies inside one input that the store cannot hold (one patient with two
    species, one specimen with two collection times, a result given twice)."""
    return (_repeated_results(canon, source)
            + _mixed_values(canon, source, ("patient",), PATIENT_FIELDS)
            + _mixed_values(canon, source, ("patient", "specimen"),
                            ("collected_at", "state", "fasted") + HIL_INDICES))
