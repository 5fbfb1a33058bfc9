"""Where a pack comes from: built-in packs and files, and pack fragments layered over a base.

A *fragment* is a partial pack whose ``[pack]`` table names its base with ``extends = "<pack
name or path>"`` (a relative path is read from the fragment's folder; the base may itself be a
fragment). It inherits the base's defaults, retest groups and every analyte's keys; its own
values layer over them key by key: a cited number, a string, ``interference`` or
``cvi_studies`` replaces the base's whole, while the tables ``defaults``, ``retest_groups``,
``analytes``, each group, each analyte, ``breed_centers`` and ``hil_thresholds`` merge key by
key (so breed centres merge per breed). When a fragment sets ``cvi`` or ``cvi_log_sd`` of an
analyte without its own ``cvi_studies``, the base's studies stay listed but are no longer
pooled (the CVI now comes from the fragment). The layered pack is then checked by the full
schema; a problem in a key a fragment set names the fragment's file.

The layered pack's id is ``<base id>+<fragment id>`` (a fragment id that starts with the base
pack's own id and ``+``, e.g. ``dog+study-x``, loses that prefix: ``dog+study-x``, not
``dog+dog+study-x``), its title and version join both, its description names
every file with its SHA-256, and its ``sha256`` (see :mod:`.pack`) covers the bytes of every
file, base first. When two fragments set the same number, the later one wins and its ``note``
records the earlier value and file.
"""
from __future__ import annotations

import copy
import difflib
import hashlib
import tomllib
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path

from .. import __version__
from ..errors import PackError
from .schema import Collector, check_pack_meta

__all__ = ["Source", "Layered", "available_packs", "locate", "decode", "resolve", "layer", "merged_data",
           "header"]

_PACKAGE = "bayesbase.models"
_REGISTRY = "analytes.toml"


@dataclass(frozen=True)
class Source:
    """The bytes of one pack file and how to name it (``path`` is None for a built-in pack)."""

    raw: bytes
    display: str
    path: Path | None = None

    @property
    def sha256(self) -> str:
        return hashlib.sha256(self.raw).hexdigest()


@dataclass
class Layered:
    """A parsed pack TOML (full, or fragments layered over a base), before the schema check.

    ``sources`` lists the files base first; ``origins`` maps the key paths a fragment set to
    that fragment's file name; ``display`` names the layered pack in problems.
    """

    data: dict
    sources: list[Source]
    display: str
    origins: dict[str, str] = field(default_factory=dict)


# --------------------------------------------------------------------------- reading

def available_packs() -> list[str]:
    """Names of the packs shipped in ``bayesbase.models`` (``models/*.toml`` except the registry)."""
    root = resources.files(_PACKAGE)
    return sorted(p.name[:-5] for p in root.iterdir() if p.name.endswith(".toml") and p.name != _REGISTRY)


def _is_path(text: str) -> bool:
    return text.endswith(".toml") or "/" in text or "\\" in text


def locate(name_or_path: str | Path, relative_to: Path | None = None) -> Source:
    """The bytes of a pack given by built-in name (``"dog"``) or path (relative paths are read
    from ``relative_to`` when given). Raises :class:`PackError` when there is no such pack."""
    text = str(name_or_path)
    if isinstance(name_or_path, Path) or _is_path(text):
        path = Path(text)
        if relative_to is not None and not path.is_absolute():
            path = relative_to / path
        if not path.is_file():
            raise PackError(f"{path if relative_to is not None else text}: pack file not found")
        return Source(path.read_bytes(), str(path) if relative_to is not None else text, path)
    names = available_packs()
    if text not in names:
        close = difflib.get_close_matches(text, names, n=1)
        hint = f" (did you mean '{close[0]}'?)" if close else ""
        raise PackError(f"unknown pack '{text}'{hint}; available packs: {', '.join(names)}")
    return Source(resources.files(_PACKAGE).joinpath(f"{text}.toml").read_bytes(), f"models/{text}.toml")


def decode(src: Source) -> tuple[dict, list[str]]:
    """The TOML table of a pack file, or ({}, [problem])."""
    try:
        return tomllib.loads(src.raw.decode("utf-8")), []
    except UnicodeDecodeError as exc:
        return {}, [f"{src.display}: not UTF-8 text ({exc})"]
    except tomllib.TOMLDecodeError as exc:
        return {}, [f"{src.display}: TOML syntax error: {exc}"]


def _extends(data: dict) -> str | None:
    meta = data.get("pack")
    return meta.get("extends") if isinstance(meta, dict) else None


def resolve(src: Source, _seen: tuple[str, ...] = ()) -> tuple[Layered | None, list[str]]:
    """The pack a file stands for: the file itself, or (with ``[pack] extends``) its base,
    resolved the same way, with the file layered over it. Returns (layered, problems)."""
    data, problems = decode(src)
    if problems:
        return None, problems
    base_name = _extends(data)
    if base_name is None:
        return Layered(data, [src], src.display), []
    here = str(src.path.resolve()) if src.path is not None else src.display
    c = Collector(src.display)
    if not isinstance(base_name, str) or not base_name.strip():
        check_pack_meta(c, data["pack"])
        return None, c.problems
    if here in _seen:
        return None, [f"{src.display}: pack.extends: '{base_name}' leads back to this file (a circle)"]
    try:
        base_src = locate(base_name.strip(), src.path.parent if src.path is not None else None)
    except PackError as exc:
        return None, [f"{src.display}: pack.extends: {exc}"]
    base, problems = resolve(base_src, _seen + (here,))
    if base is None:
        return None, problems
    return layer(base, data, src)


# --------------------------------------------------------------------------- layering

def _mergeable(path: tuple[str, ...]) -> bool:
    """Tables that merge key by key (everything else is replaced whole)."""
    if len(path) == 1:
        return True
    if path[0] in ("retest_groups", "analytes") and len(path) == 2:
        return True
    return path[0] == "analytes" and len(path) == 3 and path[2] in ("breed_centers", "hil_thresholds")


def _note_conflict(new: object, old: object, earlier: str, later: str) -> object:
    """A cited number set by two layers: the later wins, its note says so."""
    if not (isinstance(new, dict) and isinstance(old, dict) and "value" in new and "value" in old):
        return new
    text = f"later layer wins: {later} replaces the value {old['value']!r} set by {earlier}"
    note = new.get("note")
    return {**new, "note": f"{note}; {text}" if isinstance(note, str) and note.strip() else text}


def _put(target: dict, key: str, value: object, path: tuple[str, ...], origins: dict, who: str) -> None:
    if key in target and isinstance(target[key], dict) and isinstance(value, dict) and _mergeable(path):
        for k, v in value.items():
            _put(target[key], k, v, path + (k,), origins, who)
        return
    where = ".".join(path)
    value = copy.deepcopy(value)
    earlier = next((origins[".".join(path[:i])] for i in range(len(path), 0, -1) if ".".join(path[:i]) in origins),
                   None)
    if earlier is not None and key in target:
        value = _note_conflict(value, target[key], earlier, who)
    target[key] = value
    origins[where] = who


def _unpool_inherited_studies(data: dict, frag: dict, origins: dict, who: str) -> None:
    analytes, fa = data.get("analytes"), frag.get("analytes")
    if not (isinstance(analytes, dict) and isinstance(fa, dict)):
        return
    for aid, a in fa.items():
        target = analytes.get(aid)
        if not (isinstance(a, dict) and isinstance(target, dict)) or "cvi_studies" in a:
            continue
        studies = target.get("cvi_studies")
        if not ({"cvi", "cvi_log_sd"} & set(a)) or not isinstance(studies, list):
            continue
        why = f"not pooled here: CVI set by {who}"
        target["cvi_studies"] = [
            {**st, "pooled": False, "note": f"{st['note']}; {why}" if str(st.get("note") or "").strip() else why}
            if isinstance(st, dict) else st for st in studies]
        origins[f"analytes.{aid}.cvi_studies"] = who


def _layered_meta(base: dict, frag: dict, src: Source, c: Collector) -> dict:
    meta = check_pack_meta(c, frag)
    bid, species = base.get("id", "?"), base.get("species", "?")
    if "species" in meta and meta["species"] != species:
        c.add("pack.species", f"'{meta['species']}' but the base pack '{bid}' is for {species}")
    fid = meta.get("id", Path(src.display).stem)
    root = f"{bid.split('+', 1)[0]}+"
    fid = fid[len(root):] if fid.startswith(root) else fid
    desc = " ".join(x for x in (base.get("description", "").strip(),
                                f"Layered over it: {src.display} (sha256 {src.sha256})"
                                + (f": {meta['description']}" if meta.get("description") else ".")) if x)
    return {"id": f"{bid}+{fid}", "species": species,
            "title": f"{base.get('title', bid)} + {meta.get('title', fid)}",
            "version": f"{base.get('version', '?')}+{meta.get('version', '?')}", "description": desc}


def layer(base: Layered, frag: dict, src: Source) -> tuple[Layered, list[str]]:
    """``frag`` (a parsed pack TOML read from ``src``) layered over ``base``; its ``extends``
    is not followed here. Returns the layered pack and the problems of the fragment's [pack]."""
    c = Collector(src.display)
    data, origins = copy.deepcopy(base.data), dict(base.origins)
    if not isinstance(frag.get("pack"), dict):
        c.add("pack", "missing required table (a fragment needs id, species, title and version)")
    base_meta = data.get("pack") if isinstance(data.get("pack"), dict) else {}
    data["pack"] = _layered_meta(base_meta, frag.get("pack") or {}, src, c)
    for key, value in frag.items():
        if key != "pack":
            _put(data, key, value, (key,), origins, src.display)
    _unpool_inherited_studies(data, frag, origins, src.display)
    return Layered(data, base.sources + [src], f"{src.display} (over {base.display})", origins), c.problems


def merged_data(base: str | Path, fragments) -> tuple[Layered | None, list[str]]:
    """``fragments`` (paths) layered in order over ``base`` (a name or path); their own
    ``extends`` is not followed. Returns (layered, problems)."""
    layered, problems = resolve(locate(base))
    if layered is None:
        return None, problems
    for f in fragments:
        src = locate(Path(f))
        data, more = decode(src)
        if more:
            return None, problems + more
        if isinstance(data.get("pack"), dict):
            data["pack"].pop("extends", None)
        layered, more = layer(layered, data, src)
        problems += more
    return layered, problems


def header(layered: Layered) -> list[str]:
    """Comment lines naming every file of a merged pack with its SHA-256."""
    base, *frags = layered.sources
    lines = [f"# bayesbase pack merged by `bayesbase priors merge` (bayesbase {__version__}).",
             f"# base: {base.display} (sha256 {base.sha256})"]
    lines += [f"# layer {i}: {s.display} (sha256 {s.sha256})" for i, s in enumerate(frags, start=1)]
    lines.append("# Layers apply in this order; where two set the same number the later wins (its note says so).")
    return lines
