"""TOML text of a pack table (what ``bayesbase priors merge`` writes).

Top-level tables and tables of tables become ``[a.b]`` sections; a table of plain values (a
cited number, an interference entry, one method's bias) is written inline, so an analyte's
``breed_centers`` and ``method_biases`` become ``[analytes.<id>.breed_centers]`` /
``[analytes.<id>.method_biases]`` sections of one inline table per breed or method (a key that is
not bare, e.g. a method name with spaces, is quoted); ``cvi_studies`` is an array of inline
tables, one per line. ``tomllib.loads(dumps(data)) == data`` for every pack table.
"""
from __future__ import annotations

import json
import math
import re

__all__ = ["dumps"]

_BARE = re.compile(r"[A-Za-z0-9_-]+")


def _key(k: str) -> str:
    return k if _BARE.fullmatch(k) else _string(k)


def _string(s: str) -> str:
    # JSON string escapes are TOML basic-string escapes; DEL must be escaped in TOML too
    return json.dumps(s, ensure_ascii=False).replace("\x7f", "\\u007f")


def _value(v: object) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        return repr(v) if math.isfinite(v) else ("inf" if v > 0 else "-inf")
    if isinstance(v, str):
        return _string(v)
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{_key(k)} = {_value(x)}" for k, x in v.items()) + " }" if v else "{}"
    if isinstance(v, list):
        if any(isinstance(x, dict) for x in v):
            return "[\n" + "".join(f"    {_value(x)},\n" for x in v) + "]"
        return "[" + ", ".join(_value(x) for x in v) + "]"
    raise TypeError(f"cannot write {type(v).__name__} {v!r} as TOML")


def _is_section(v: object) -> bool:
    return isinstance(v, dict) and any(isinstance(x, dict) for x in v.values())


def _table(path: tuple[str, ...], table: dict, out: list[str]) -> None:
    plain = [(k, v) for k, v in table.items() if not _is_section(v)]
    if plain or not any(_is_section(v) for v in table.values()):
        out += ["", f"[{'.'.join(_key(p) for p in path)}]"]
        out += [f"{_key(k)} = {_value(v)}" for k, v in plain]
    for k, v in table.items():
        if _is_section(v):
            _table(path + (k,), v, out)


def dumps(data: dict, header: list[str] | None = None) -> str:
    """TOML text of ``data`` (a table of tables), after the comment lines ``header``."""
    out = list(header or [])
    for k, v in data.items():
        if not isinstance(v, dict):
            raise TypeError(f"top-level key {k!r} must hold a table")
        _table((k,), v, out)
    return "\n".join(out).lstrip("\n") + "\n"
