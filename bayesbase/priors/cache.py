"""One process-wide cache of loaded prior packs (:func:`cached_pack`).

Loading a pack reads, layers and checks its TOML (a few tenths of a second); ``assess``, the web
desk and ``bayesbase demo`` ask for the same packs again and again. An entry is keyed by what
the pack is read from: a built-in pack by its name and the SHA-256 of its bytes, a file by its
resolved path, size, ``mtime_ns`` and the SHA-256 of its bytes, and the same for a lab override
CSV. Every file a fragment layers over (``[pack] extends``) is checked the same way on each
look-up, so a pack file edited on disk is read again, while an unchanged one gives back the very
same :class:`~bayesbase.priors.Pack` object (a frozen dataclass: treat it as read-only). Errors
are never cached: a pack that fails to load raises again on the next look-up.
"""
from __future__ import annotations

import hashlib
import threading
from collections import OrderedDict
from pathlib import Path

from . import layers
from .pack import Pack, load_pack

__all__ = ["cached_pack", "clear_pack_cache", "MAX_PACKS"]

#: Packs kept (least recently used dropped first); a process rarely uses more than a handful.
MAX_PACKS = 32

_LOCK = threading.Lock()
_PACKS: "OrderedDict[tuple, tuple[tuple, Pack]]" = OrderedDict()


def _file_sig(path: Path, raw: bytes | None = None) -> tuple:
    """(resolved path, size, mtime_ns, sha256) of a file; ('missing', path) when it is gone."""
    try:
        p = path.resolve()
        st = p.stat()
        raw = p.read_bytes() if raw is None else raw
    except OSError:
        return ("missing", str(path))
    return (str(p), st.st_size, st.st_mtime_ns, hashlib.sha256(raw).hexdigest())


def _source_sig(src: layers.Source) -> tuple:
    if src.path is None:  # a built-in pack: its name (display) and its bytes
        return ("builtin", src.display, hashlib.sha256(src.raw).hexdigest())
    return _file_sig(src.path)


def _key(name_or_path, overrides) -> tuple:
    """The cache key: the pack's own file (or built-in name) and the override file."""
    top = _source_sig(layers.locate(name_or_path))
    return top, (None if overrides is None else _file_sig(Path(overrides)))


def _layer_sigs(name_or_path) -> tuple:
    """Signatures of the files a fragment layers over (base first, the pack's own file left
    out: it is in the key); () for a full pack or when the layers do not resolve."""
    layered, _ = layers.resolve(layers.locate(name_or_path))
    if layered is None:
        return ()
    return tuple(_source_sig(s) for s in layered.sources[:-1])


def _fresh(deps: tuple) -> bool:
    for sig in deps:
        if sig[0] == "builtin":
            try:
                src = layers.locate(sig[1][len("models/"):-len(".toml")])
            except Exception:
                return False
            if _source_sig(src) != sig:
                return False
        elif sig[0] == "missing" or _file_sig(Path(sig[0])) != sig:
            return False
    return True


def cached_pack(name_or_path: str | Path, overrides: str | Path | None = None) -> Pack:
    """:func:`~bayesbase.priors.load_pack` through the process-wide cache: the same object while
    the pack's files (and the override CSV) are unchanged on disk, a fresh load once any of them
    changed. Raises what ``load_pack`` raises."""
    key = _key(name_or_path, overrides)
    with _LOCK:
        hit = _PACKS.get(key)
        if hit is not None and _fresh(hit[0]):
            _PACKS.move_to_end(key)
            return hit[1]
    deps = _layer_sigs(name_or_path)  # taken before the load: a change during it shows next time
    pack = load_pack(name_or_path, overrides=overrides)
    with _LOCK:
        hit = _PACKS.get(key)
        if hit is not None and hit[0] == deps:  # another thread loaded the same files meanwhile
            return hit[1]
        _PACKS[key] = (deps, pack)
        _PACKS.move_to_end(key)
        while len(_PACKS) > MAX_PACKS:
            _PACKS.popitem(last=False)
    return pack


def clear_pack_cache() -> None:
    """Forget every cached pack (the next look-up loads again)."""
    with _LOCK:
        _PACKS.clear()
