"""Stage 3: the prior pack of every species, and the prior of every (species, analyte) row."""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from ..errors import AnalyteNotInPack, BayesbaseError
from .frame import factorized

__all__ = ["resolve_pack", "packs_by_species", "RowPriors", "row_priors"]


def resolve_pack(pack, species: str, priors, cache: dict):
    """The pack for ``species``: ``pack`` (a name, path or Pack, with the override CSV
    ``priors`` layered over it) or, when ``pack`` is None, the species' own pack. Packs come from
    the process-wide cache (:func:`bayesbase.priors.cached_pack`: read again when a file changed);
    ``cache`` keeps each one looked up once per assessment."""
    from ..priors import Pack, cached_pack

    if isinstance(pack, Pack):
        key = ("obj", id(pack))
        if key not in cache:
            cache[key] = pack if priors is None else cached_pack(pack.id.split("+")[0], overrides=priors)
        return cache[key]
    name = pack if pack is not None else species
    key = (str(name), str(priors))
    if key not in cache:
        cache[key] = cached_pack(name, overrides=priors)
    return cache[key]


def packs_by_species(hist: pd.DataFrame, pack=None, priors=None) -> dict[str, Any]:
    """Species -> pack; an error when a pack chosen by name is for another species."""
    species_of = hist.groupby("patient", sort=False)["species"].first()
    cache: dict = {}
    out = {}
    for sp in species_of.unique():
        pk = resolve_pack(pack, sp, priors, cache)
        if pk.species != sp:
            pid = species_of.index[species_of == sp][0]
            raise BayesbaseError(
                f"patient {pid} is a {sp} but pack '{pk.id}' is for {pk.species}; choose the {sp} pack")
        out[sp] = pk
    return out


@dataclass(frozen=True)
class RowPriors:
    """The analyte prior of every row of a history (None where the row plays no part)."""

    codes: np.ndarray  # per row: index into ``priors``
    priors: tuple  # AnalytePrior (or None) per distinct (species, analyte)
    of: dict  # (species, analyte) -> AnalytePrior, for the rows that play a part

    def column(self, get, fill, dtype=float) -> np.ndarray:
        """``get(prior)`` on every row (``fill`` where a row has no prior)."""
        per = [fill if p is None else get(p) for p in self.priors] + [fill]  # code -1: fill
        return np.asarray(per, dtype=dtype)[self.codes]

    def at(self, i: int):
        """The prior of row ``i`` (None when the row plays no part)."""
        c = self.codes[i]
        return self.priors[c] if c >= 0 else None


def row_priors(hist: pd.DataFrame, in_case: np.ndarray, packs: dict, cache: dict | None = None) -> RowPriors:
    """Priors of the (species, analyte) pairs of rows in a case; an analyte missing from a
    pack is an error naming up to five of the patients concerned (``cache``: as for
    :func:`.frame.factorized`)."""
    sp_codes, sp_names = factorized(hist, "species", cache)
    an_codes, an_names = factorized(hist, "analyte", cache)
    pair = np.where((sp_codes < 0) | (an_codes < 0), -1,
                    sp_codes.astype(np.int64) * (len(an_names) + 1) + an_codes)
    codes, used = pd.factorize(pair, use_na_sentinel=False)
    width = len(an_names) + 1
    uniq = [(sp_names[int(k) // width], an_names[int(k) % width]) if k >= 0 else (None, None)
            for k in np.asarray(used).tolist()]
    uniq = [(None if s is None else str(s), None if a is None else str(a)) for s, a in uniq]
    of: dict = {}
    for c in pd.unique(codes[in_case]):
        sp, aid = uniq[c]
        try:
            of[(sp, aid)] = packs[sp].get(aid)
        except AnalyteNotInPack as exc:
            rows = (hist["species"] == sp) & (hist["analyte"] == aid) & in_case
            pids = sorted(set(hist.loc[rows, "patient"]))
            raise AnalyteNotInPack(f"{exc} (patient {', '.join(pids[:5])}); add it with a lab override "
                                   "CSV (--priors) or drop it") from None
    return RowPriors(codes=np.asarray(codes), priors=tuple(of.get(u) for u in uniq), of=of)
