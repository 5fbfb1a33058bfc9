"""Stage 11: the :class:`Assessment` (tidy table, annotated history, provenance) and its JSON
records and labelled xarray dataset."""
from __future__ import annotations

import json
import math
import os
import shutil
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..constants import CAUTIONS, CI_BOUNDS, DEFAULT_CI_PROB, DIM_ANALYTE, DIM_CI, DIM_PATIENT

__all__ = ["Assessment", "json_number", "to_record", "to_dataset", "CSV_CAUTION", "csv_with_caution",
           "prepend_csv_caution"]

#: The first line of every CSV that bayesbase writes with results (assess, compare, export): a
#: comment line that carries the cautions. Readers that take such files back (pandas
#: ``read_csv(comment="#")``, or any reader that skips leading lines starting with ``#``) skip it.
CSV_CAUTION = "# bayesbase: " + " ".join(CAUTIONS)


def csv_with_caution(text: str) -> str:
    """CSV text with :data:`CSV_CAUTION` as its first line."""
    return CSV_CAUTION + "\n" + text


def prepend_csv_caution(path) -> None:
    """Put :data:`CSV_CAUTION` in front of a CSV file already written (once: a file that already
    starts with it is left as it is). The new file replaces the old one whole (written beside it,
    then renamed), so nothing is left half-written."""
    p = Path(path)
    text = p.read_text(encoding="utf-8")
    if text.startswith(CSV_CAUTION):
        return
    fd, tmp = tempfile.mkstemp(prefix=f".{p.name}.", suffix=".tmp", dir=p.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as fh:
            fh.write(csv_with_caution(text))
        shutil.copymode(p, tmp)  # keep the written file's permissions
        os.replace(tmp, p)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise

HARRIS_ORIENTATION = "Harris: CVI/CVG (low < 0.6 means the population interval is insensitive)"


@dataclass
class Assessment:
    """Result of :func:`assess`: tidy table, labelled dataset, annotated history, provenance."""

    table: pd.DataFrame
    history: pd.DataFrame
    attrs: dict[str, Any]
    packs: dict[str, Any] = field(default_factory=dict, repr=False)
    mcmc: Any = field(default=None, repr=False)

    @property
    def dataset(self):
        return to_dataset(self.table, self.attrs)

    @property
    def converged(self) -> bool:
        return bool(self.table["converged"].all()) if len(self.table) else True

    def to_records(self) -> list[dict]:
        return [to_record(r, self.attrs) for r in self.table.to_dict("records")]

    def to_json(self, indent: int | None = 2) -> str:
        return json.dumps(self.to_records(), indent=indent, default=_json_default)


# --------------------------------------------------------------------------------- JSON
def _json_default(o):
    if isinstance(o, (np.integer,)):
        return int(o)
    if isinstance(o, (np.floating,)):
        return None if not np.isfinite(o) else float(o)
    if isinstance(o, (np.bool_,)):
        return bool(o)
    if isinstance(o, (pd.Timestamp,)):
        return o.isoformat()
    return str(o)


def json_number(x):
    """A JSON-ready number: None for missing or non-finite, bool / int / float otherwise."""
    if x is None:
        return None
    try:
        if pd.isna(x):
            return None
    except (TypeError, ValueError):
        pass
    if isinstance(x, (bool, np.bool_)):
        return bool(x)
    if isinstance(x, (int, np.integer)):
        return int(x)
    x = float(x)
    return x if math.isfinite(x) else None


_num = json_number


def _rcv_record(r: dict) -> dict:
    return {
        "classical_pct": _num(r["rcv_classical_pct"]),
        "one_sided_pct": _num(r["rcv_one_sided_pct"]),
        "lognormal_up_pct": _num(r["rcv_lognormal_up_pct"]),
        "lognormal_down_pct": _num(r["rcv_lognormal_down_pct"]),
        "change_vs_last_pct": _num(r["change_vs_last_pct"]),
        "change_vs_mean_pct": _num(r["change_vs_mean_pct"]),
        "exceeded": _num(r.get("rcv_exceeded_last")),
        "exceeded_vs_mean": _num(r.get("rcv_exceeded_mean")),
        "lognormal_exceeded": _num(r.get("lognormal_exceeded_last")),
        "p_significant": _num(r.get("p_significant")),
    }


def _trend_record(r: dict) -> dict:
    return {
        "p_drift": _num(r.get("trend_p_drift")),
        "p_increase": _num(r.get("trend_p_increase")),
        "pct_per_year": {
            "mean": _num(r.get("trend_pct_per_year")),
            "lower": _num(r.get("trend_pct_lower")),
            "upper": _num(r.get("trend_pct_upper")),
        },
        "years_to_limit": _num(r.get("trend_years_to_limit")),
        "limit": r.get("trend_limit") or None,
        "note": r.get("trend_note") or None,
    }


def to_record(r: dict, attrs: dict) -> dict:
    """One row of the results table as the JSON contract (DEVELOPERS.md, "JSON output")."""
    rec = {
        "patient": r["patient"], "analyte": r["analyte"], "label": r["label"], "unit": r["unit"],
        "specimen": r["specimen"], "collected_at": pd.Timestamp(r["collected_at"]).isoformat(),
        "value": _num(r["value"]), "reported_value": r["reported_value"],
        "reported_unit": r["reported_unit"], "n_baseline": int(r["n_baseline"]),
        "set_point": {"mean": _num(r["set_point_mean"]), "lower": _num(r["set_point_lower"]),
                      "upper": _num(r["set_point_upper"])},
        "personal_interval": {"lower": _num(r["pi_lower"]), "upper": _num(r["pi_upper"]),
                              "coverage": _num(r["coverage"])},
        "percentile": _num(r["percentile"]), "bayes_factor": _num(r["bayes_factor"]),
        "p_change": _num(r["p_change"]), "p_increase": _num(r["p_increase"]),
        "p_exceed_delta": _num(r["p_exceed_delta"]),
        "rcv": _rcv_record(r),
        "model2_interval": {"lower": _num(r["model2_lower"]), "upper": _num(r["model2_upper"])},
        "population_interval": {"lower": _num(r["pop_lower"]), "upper": _num(r["pop_upper"]),
                                "outside": _num(r["outside_population"])},
        "index_of_individuality": {"cvi_over_cvg": _num(r["ii"]), "cvt_over_cvg": _num(r["ii_total"]),
                                   "orientation": HARRIS_ORIENTATION},
        "n_for_setpoint": _num(r["n_for_setpoint"]), "flags": list(r["flags"]), "engine": r["engine"],
        "converged": bool(r["converged"]), "pack": attrs.get("pack_id"), "pack_sha256": attrs.get("pack_sha256"),
        "cautions": list(CAUTIONS),
    }
    if "trend_p_drift" in r:
        rec["trend"] = _trend_record(r)
    return rec


# ----------------------------------------------------------------------------- dataset
_GRID_COLUMNS = ("value", "percentile", "bayes_factor", "p_change", "p_increase", "p_exceed_delta",
                 "n_baseline", "rcv_classical_pct", "rcv_lognormal_up_pct", "rcv_lognormal_down_pct",
                 "change_pct", "ii", "ii_total")
_INTERVALS = (("set_point", "set_point_lower", "set_point_upper"),
              ("personal_interval", "pi_lower", "pi_upper"),
              ("population_interval", "pop_lower", "pop_upper"),
              ("model2_interval", "model2_lower", "model2_upper"))


def to_dataset(table: pd.DataFrame, attrs: dict):
    """The table as an xarray Dataset over (patient, analyte[, ci_bound])."""
    import xarray as xr

    if table.empty:
        return xr.Dataset(attrs={k: str(v) for k, v in attrs.items()})
    pats = list(dict.fromkeys(table[DIM_PATIENT]))
    ans = list(dict.fromkeys(table[DIM_ANALYTE]))
    idx = pd.MultiIndex.from_product([pats, ans], names=[DIM_PATIENT, DIM_ANALYTE])
    t = table.set_index([DIM_PATIENT, DIM_ANALYTE]).reindex(idx)

    def grid(col, dtype=float):
        return np.asarray(t[col].to_numpy(dtype=dtype, na_value=np.nan)).reshape(len(pats), len(ans))

    dims = (DIM_PATIENT, DIM_ANALYTE)
    data = {col: (dims, grid(col)) for col in _GRID_COLUMNS}
    for name, lo, hi in _INTERVALS:
        data[name] = (dims + (DIM_CI,), np.stack([grid(lo), grid(hi)], axis=-1))
    data["set_point_mean"] = (dims, grid("set_point_mean"))
    ds = xr.Dataset(
        data,
        coords={DIM_PATIENT: pats, DIM_ANALYTE: ans, DIM_CI: list(CI_BOUNDS)},
        attrs={k: (json.dumps(v, default=str) if isinstance(v, dict) else str(v)) for k, v in attrs.items()},
    )
    ds["personal_interval"].attrs["ci_prob"] = float(table["coverage"].iloc[0])
    ds["set_point"].attrs["ci_prob"] = float(attrs.get("ci_prob", DEFAULT_CI_PROB))
    return ds
