"""The prior packs as pages: the built-in packs and the pack files (full packs or fragments,
such as calibrated ones) in a folder given to ``bayesbase serve --packs``. Every number with its
unit, its provenance word and its source; each source text is listed once per pack, numbered,
and the tables carry only its number (no 300-character table cells). The numbers come from
:func:`bayesbase.priors.describe`, the same view as ``bayesbase priors show``."""
from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

from ..errors import BayesbaseError
from .config import DeskError

__all__ = ["PackEntry", "list_packs", "pack_page", "load"]


@dataclass(frozen=True)
class PackEntry:
    kind: str  # "builtin" or "folder"
    name: str  # pack name, or file name in the folder
    id: str | None = None
    title: str | None = None
    version: str | None = None
    species: str | None = None
    sha256: str | None = None
    n_analytes: int = 0
    error: str | None = None


def _folder_files(packs_dir) -> list[Path]:
    if packs_dir is None or not Path(packs_dir).is_dir():
        return []
    return sorted(p for p in Path(packs_dir).glob("*.toml") if p.is_file())


def load(kind: str, name: str, packs_dir):
    """The pack a listing entry names (a folder file only by its listed name)."""
    from ..priors import available_packs, load_pack

    if kind == "builtin" and name in available_packs():
        return load_pack(name)
    if kind == "folder":
        for p in _folder_files(packs_dir):
            if p.name == name:
                return load_pack(str(p))
    raise DeskError(404, "No such pack", f"no {kind} pack named {name!r}")


def list_packs(packs_dir) -> list[PackEntry]:
    from ..priors import available_packs

    names = [("builtin", n) for n in available_packs()]
    names += [("folder", p.name) for p in _folder_files(packs_dir)]
    out = []
    for kind, name in names:
        try:
            pk = load(kind, name, packs_dir)
        except BayesbaseError as exc:
            out.append(PackEntry(kind, name, error=str(exc)))
            continue
        out.append(PackEntry(kind, name, pk.id, pk.title, pk.version, pk.species, pk.sha256,
                             len(pk.analytes)))
    return out


class _Refs:
    def __init__(self):
        self.items: list[str] = []

    def number(self, text) -> int | None:
        text = "" if text is None else str(text).strip()
        if not text:
            return None
        if text not in self.items:
            self.items.append(text)
        return self.items.index(text) + 1


def _value_text(value, unit: str) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "\u2013"
    v = float(value)
    text = f"{v:.4g}"
    if unit == "fraction":
        text += f" ({100 * v:.3g} %)"
    return text


def _analyte_rows(table, refs: _Refs) -> list[dict]:
    rows = []
    for r in table.itertuples(index=False):
        shown = str(r.unit) if r.unit not in ("fraction", "") else ""
        rows.append(dict(field=str(r.field), value=_value_text(r.value, str(r.unit)),
                         unit=shown, provenance=str(r.provenance or ""),
                         ref=refs.number(r.source)))
    return rows


def _group_rows(pack, refs: _Refs) -> list[dict]:
    rows = []
    for gid, g in pack.retest_groups.items():
        src = pack.sources.get(f"retest_groups.{gid}.hours_min")
        rows.append(dict(group=gid, label=g.label or gid,
                         hours=f"{g.hours_min:g}\u2013{g.hours_max:g} h",
                         slope_sd=f"{g.slope_sd:g}" if g.slope_sd is not None else "\u2013",
                         ref=refs.number(src),
                         slope_ref=refs.number(pack.sources.get(f"retest_groups.{gid}.slope_sd"))))
    return rows


def pack_page(kind: str, name: str, packs_dir) -> dict:
    """What the pack page shows: the pack's header, its defaults and retest groups, one table
    per analyte (field, value, unit, provenance, source number) and the numbered sources."""
    from ..priors import describe
    from ..units import label

    pack = load(kind, name, packs_dir)
    refs = _Refs()
    defaults = [dict(name=k, value=f"{v:g}" if isinstance(v, (int, float)) else str(v),
                     ref=refs.number(pack.sources.get(f"defaults.{k}")))
                for k, v in pack.defaults.items()]
    groups = _group_rows(pack, refs)
    table = describe(pack)
    analytes = []
    for aid in pack.analytes:
        try:
            title = label(aid)
        except KeyError:
            title = aid
        analytes.append(dict(id=aid, label=title, unit=pack.analytes[aid].unit,
                             rows=_analyte_rows(table[table["analyte"] == aid], refs)))
    return dict(kind=kind, name=name, pack=pack, defaults=defaults, groups=groups,
                analytes=analytes, sources=refs.items)
