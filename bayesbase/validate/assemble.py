"""Assembly of the canonical results frame from the parsed fields (DEVELOPERS.md, "Canonical
results frame"; columns and dtypes in :mod:`bayesbase.contract`)."""
from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

if TYPE_CHECKING:
    from .context import Context
    from .problems import Col

__all__ = ["canonical_frame"]


def _string_array(values: np.ndarray, na_mask: np.ndarray | None = None):
    vals = np.asarray(values, dtype=object)
    if na_mask is not None and na_mask.any():
        vals = vals.copy()
        vals[na_mask] = None
    return pd.array(vals, dtype="string")


def _rank(uniq: np.ndarray) -> np.ndarray:
    order = np.argsort(np.asarray(uniq, dtype=str), kind="stable")
    rank = np.empty(len(uniq), dtype=np.int64)
    rank[order] = np.arange(len(uniq))
    return rank


def _sort_order(patient: Col, collected, specimen: Col, aid, replicate, idx) -> np.ndarray:
    """Order of rows `idx` by patient, collected_at, specimen, analyte, replicate (lexicographic)."""
    a_codes, a_uniq = pd.factorize(aid[idx])
    keys = (
        replicate[idx],
        _rank(np.asarray(a_uniq, dtype=object))[a_codes],
        _rank(specimen.uniq)[specimen.codes[idx]],
        collected[idx].astype(np.int64),
        _rank(patient.uniq)[patient.codes[idx]],
    )
    return np.lexsort(keys)


def canonical_frame(ctx: Context) -> pd.DataFrame:
    """The kept rows, sorted by patient, collected_at, specimen, analyte and replicate, in the
    contract's columns and dtypes; ``attrs`` hold ``source``, ``notes`` and
    ``n_duplicates_dropped``."""
    reported_value = np.where(ctx.reported_value.empty(), ctx.value_col.values(),
                              ctx.reported_value.values())
    reported_unit = np.where(ctx.reported_unit.empty(), ctx.unit.values(),
                             ctx.reported_unit.values())
    aid = ctx.aid_u[ctx.analyte.codes]
    idx = np.flatnonzero(ctx.keep)
    sel = idx[_sort_order(ctx.patient, ctx.collected, ctx.specimen, aid, ctx.replicate, idx)]

    def take(a):
        return np.asarray(a)[sel]

    breed_vals = take(ctx.breed_u[ctx.breed.codes])
    sex_vals = take(ctx.sex_u[ctx.sex.codes])
    method_vals = take(ctx.method.values())
    fasted_vals = pd.arrays.BooleanArray(take(ctx.fast_val_u[ctx.fasted.codes]),
                                         take(ctx.fast_na_u[ctx.fasted.codes]))
    frame = pd.DataFrame({
        "patient": _string_array(take(ctx.patient.values())),
        "species": _string_array(take(ctx.species)),
        "breed": _string_array(breed_vals, breed_vals == ""),
        "sex": _string_array(sex_vals, sex_vals == ""),
        "birth_date": take(ctx.birth),
        "specimen": _string_array(take(ctx.specimen.values())),
        "collected_at": take(ctx.collected),
        "analyte": _string_array(take(aid)),
        "value": take(ctx.value).astype(np.float64),
        "unit": _string_array(take(ctx.canon_unit)),
        "reported_value": _string_array(take(reported_value)),
        "reported_unit": _string_array(take(reported_unit)),
        "censor": _string_array(take(ctx.censor)),
        "method": _string_array(method_vals, method_vals == ""),
        "replicate": pd.array(take(ctx.replicate), dtype="Int64"),
        "fasted": fasted_vals,
        "haemolysis": take(ctx.hil["haemolysis"]),
        "lipaemia": take(ctx.hil["lipaemia"]),
        "icterus": take(ctx.hil["icterus"]),
        "state": _string_array(take(ctx.state_u[ctx.state.codes])),
        "source_file": _string_array(np.full(len(sel), ctx.file, dtype=object)),
        "source_row": pd.array(take(ctx.rows), dtype="Int64"),
    })
    frame.attrs = {"source": ctx.file, "notes": ctx.notes,
                   "n_duplicates_dropped": ctx.n_dropped}
    return frame
