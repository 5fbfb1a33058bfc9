"""The patient list's two assessed columns: how many analytes the report would list as probable
changes at the last specimen, and whether it would write a drift sentence.

Chosen: computed lazily, only for the rows on screen (the page's script asks
``/api/summaries`` for them after the page is shown), with the report's default settings and
the report's own rules (:func:`bayesbase.report.panel_summary`: the changes listed with
Bayesian false-discovery control, and the drift sentences), then cached per patient until its
stored results change (a fingerprint of the patient's rows in the store: count, largest row
key, last import that wrote or replaced one). Sorting by these columns is therefore not
offered: it would need every patient assessed.
"""
from __future__ import annotations

import threading
from collections import OrderedDict
from dataclasses import asdict, dataclass

from ..errors import BayesbaseError

__all__ = ["ListSummary", "SummaryCache", "fingerprints", "summarise", "MAX_IDS"]

#: most patients one request may ask for (one page of the list)
MAX_IDS = 100


@dataclass(frozen=True)
class ListSummary:
    """``changes``: analytes listed as probable changes at the last specimen; ``drift``: the
    drift sentences (empty: no drift marker); ``error``: why the patient could not be assessed."""

    changes: int | None
    drift: tuple[str, ...] = ()
    error: str | None = None

    def as_json(self) -> dict:
        return asdict(self) | {"drift": list(self.drift)}


def fingerprints(conn, ids) -> dict[str, tuple]:
    """patient id -> (results, largest result key, last import on a result, last replacement
    import, specimens) for the given ids; a change to any of them means new stored data."""
    ids = [str(i) for i in ids]
    if not ids:
        return {}
    marks = ", ".join("?" * len(ids))
    rows = conn.execute(
        "SELECT p.id, count(r.pk), max(r.pk), max(r.import), "
        "(SELECT max(x.import) FROM replaced x WHERE x.patient = p.pk), "
        "(SELECT count(*) FROM specimens s2 WHERE s2.patient = p.pk) "
        f"FROM patients p LEFT JOIN specimens s ON s.patient = p.pk "
        f"LEFT JOIN results r ON r.specimen = s.pk WHERE p.id IN ({marks}) GROUP BY p.pk",
        ids).fetchall()
    return {r[0]: tuple(r[1:]) for r in rows}


class SummaryCache:
    """patient -> (fingerprint, ListSummary), at most ``size`` patients (least recently used
    dropped first). Thread-safe."""

    def __init__(self, size: int = 20_000):
        self.size = size
        self._data: OrderedDict[str, tuple] = OrderedDict()
        self._lock = threading.Lock()

    def get(self, patient: str, fingerprint) -> ListSummary | None:
        with self._lock:
            hit = self._data.get(patient)
            if hit is None or hit[0] != fingerprint:
                return None
            self._data.move_to_end(patient)
            return hit[1]

    def put(self, patient: str, fingerprint, summary: ListSummary) -> None:
        with self._lock:
            self._data[patient] = (fingerprint, summary)
            self._data.move_to_end(patient)
            while len(self._data) > self.size:
                self._data.popitem(last=False)


def _assess_many(store, ids: list[str]) -> dict[str, ListSummary]:
    import pandas as pd

    from ..assessment import assess
    from ..report import panel_summary
    from .patient import species_pack

    frame = pd.concat([store.results(i) for i in ids], ignore_index=True)
    out = {}
    for _, part in frame.groupby(frame["species"].astype(str), sort=False):
        a = assess(part, pack=species_pack(part))
        ci_prob = float(a.attrs["ci_prob"])
        for pid, table in a.table.groupby(a.table["patient"].astype(str), sort=False):
            s = panel_summary(table.reset_index(drop=True), ci_prob=ci_prob)
            out[pid] = ListSummary(len(s.changes), tuple(s.drift))
    for pid in ids:  # a patient without an assessable result
        out.setdefault(pid, ListSummary(None, (), "nothing to assess"))
    return out


def summarise(store, ids, cache: SummaryCache) -> dict[str, ListSummary]:
    """The summaries of ``ids`` (patients the store holds), from the cache or assessed now in
    one call (one patient at a time when the batch fails, so one bad patient marks only
    itself)."""
    ids = list(dict.fromkeys(str(i) for i in ids))[:MAX_IDS]
    prints = fingerprints(store.connection, ids)
    ids = [i for i in ids if i in prints]
    out, todo = {}, []
    for pid in ids:
        hit = cache.get(pid, prints[pid])
        if hit is None:
            todo.append(pid)
        else:
            out[pid] = hit
    if todo:
        try:
            fresh = _assess_many(store, todo)
        except BayesbaseError:
            fresh = {}
            for pid in todo:
                try:
                    fresh.update(_assess_many(store, [pid]))
                except BayesbaseError as exc:
                    fresh[pid] = ListSummary(None, (), str(exc).splitlines()[0][:300])
        for pid in todo:
            cache.put(pid, prints[pid], fresh[pid])
            out[pid] = fresh[pid]
    return out
