"""FHIR JSON at the level of JSON: reading the text (numbers beyond double precision kept with
their text), typed access to elements with located problems, short descriptions of values.

Malformed input never raises anything but :class:`~bayesbase.errors.ValidationError`: an
element of the wrong JSON type is a problem at its path; a number beyond double precision (or an
integer longer than CPython's int/str conversion limit) is read as out of range, never echoed in
full; JSON nested beyond the parser's depth limit is refused as "nested too deeply"; an
unreadable path is refused as "cannot read the file".
"""
from __future__ import annotations

import json
import math
import re
import sys
from pathlib import Path

from ..errors import Problem, ValidationError

__all__ = ["ReadContext", "jtype", "show", "pathpart", "load_json"]


class ReadContext:
    """Problems found so far (each once: a concept read twice reports its fault once)."""

    def __init__(self, source: str):
        self.source = source
        self.problems: list[Problem] = []
        self._seen: set[tuple[str, str]] = set()
        self._under: set[str] = set()  # every path prefix of a reported problem
        self.analyte_errors: dict[str, KeyError | None] = {}  # name -> resolve_analyte outcome

    def add(self, where: str, message: str, hint: str | None = None) -> None:
        if (where, message) in self._seen:
            return
        self._seen.add((where, message))
        self.problems.append(Problem(self.source, None, where, message, hint))
        self._under.add(where)
        self._under.update(where[:m.start()] for m in re.finditer(r"[.\[]", where))

    def has_under(self, path: str) -> bool:
        """True when a problem was already reported at ``path`` or inside it (a consequence
        of that fault is then not reported again)."""
        return path in self._under

    # typed access: a field of the wrong JSON type is a located problem, never an exception
    def obj(self, parent, key: str, where: str) -> dict | None:
        """``parent[key]`` when it is a JSON object; None when absent (or of the wrong type,
        which is reported at ``where.key``)."""
        v = parent.get(key) if isinstance(parent, dict) else None
        if v is None or isinstance(v, dict):
            return v
        self.add(f"{where}.{key}", f"{key} must be a JSON object, not {jtype(v)}",
                 "see the FHIR R4 JSON representation of this element")
        return None

    def arr(self, parent, key: str, where: str) -> list[tuple[str, dict]]:
        """The objects of the JSON array ``parent[key]`` as (path, object) pairs; an array
        of the wrong type, or an item that is not an object, is reported."""
        v = parent.get(key) if isinstance(parent, dict) else None
        if v is None:
            return []
        if not isinstance(v, list):
            self.add(f"{where}.{key}", f"{key} must be a JSON array, not {jtype(v)}",
                     "FHIR JSON writes repeating elements as arrays, even with one item")
            return []
        out = []
        for i, item in enumerate(v):
            if isinstance(item, dict):
                out.append((f"{where}.{key}[{i}]", item))
            else:
                self.add(f"{where}.{key}[{i}]", f"{key} item must be a JSON object, "
                         f"not {jtype(item)}")
        return out

    def text(self, parent, key: str, where: str, *, integer_ok: bool = False) -> str | None:
        """``parent[key]`` as text (None when absent or empty); an integer is accepted where
        ``integer_ok`` (ids and codes some systems write as numbers); other types are reported."""
        v = parent.get(key) if isinstance(parent, dict) else None
        if v is None:
            return None
        if isinstance(v, str):
            return v if v.strip() else None
        if integer_ok and isinstance(v, int) and not isinstance(v, bool) and _int_text_ok(v):
            return str(v)
        self.add(f"{where}.{key}", f"{key} must be a JSON string, not {jtype(v)}")
        return None


def _max_digits() -> int:
    """Digits beyond which CPython refuses int <-> text conversion
    (``sys.get_int_max_str_digits``: 4300 by default, 0 for no limit)."""
    return getattr(sys, "get_int_max_str_digits", lambda: 0)() or 10 ** 9


def _int_text_ok(v: int) -> bool:
    # bit_length * log10(2) bounds the number of digits from below; stay well inside the limit
    return v.bit_length() * 0.30103 < _max_digits() - 2


class _Overflowed(float):
    """A JSON number beyond double precision, kept as +-inf with the text it was written as
    (every reader of a value refuses it with a located message that shows that text)."""

    written: str = ""


def _overflowed(text: str) -> _Overflowed:
    out = _Overflowed(float(text))
    out.written = text
    return out


def _json_int(text: str):
    """``parse_int`` hook: an integer too long for CPython's int conversion becomes +-inf."""
    if len(text) - text.startswith("-") >= _max_digits():
        return _overflowed(text)
    return int(text)


def _json_float(text: str):
    """``parse_float`` hook: a number that overflows double precision keeps its text."""
    value = float(text)
    return _overflowed(text) if math.isinf(value) else value


def jtype(v) -> str:
    """A short description of a JSON value for a message (never the whole value)."""
    if v is None:
        return "null"
    if isinstance(v, bool):
        return f"the boolean {'true' if v else 'false'}"
    if isinstance(v, (int, float)):
        return f"the number {show(v)}"
    if isinstance(v, str):
        return f"the text {show(v)}"
    if isinstance(v, list):
        return f"an array of {len(v)} item(s)"
    if isinstance(v, dict):
        return "an object"
    return type(v).__name__


def show(v, limit: int = 48) -> str:
    """repr-like text of a JSON scalar, shortened; huge integers are described, not printed."""
    if isinstance(v, bool) or v is None:
        return json.dumps(v)
    if isinstance(v, int):
        if not _int_text_ok(v) or v.bit_length() > 160:
            return f"(an integer of about {int(v.bit_length() * 0.30103) + 1} digits)"
        return str(v)
    if isinstance(v, _Overflowed):
        w = v.written.lstrip("-")
        digits = len(w) if w.isdigit() else 0
        shown = v.written if len(v.written) <= 24 else f"{v.written[:12]}..."
        return f"{shown} (a number of {digits} digits)" if digits > 24 else shown
    if isinstance(v, float):
        return repr(v)
    if isinstance(v, str):
        r = repr(v)
        return r if len(r) <= limit else r[:limit - 4] + "...'"
    return jtype(v)


def pathpart(v) -> str:
    """A resource type or id as shown inside a resource path."""
    if isinstance(v, str):
        return v if len(v) <= 64 else v[:61] + "..."
    return "?" if v is None else show(v, 24)


def load_json(path_or_obj, source):
    if isinstance(path_or_obj, (dict, list)):
        return path_or_obj, source or "<bundle>"
    if isinstance(path_or_obj, (bytes, bytearray)):
        src = source or "<bundle>"
        try:
            text = bytes(path_or_obj).decode("utf-8-sig")
        except UnicodeDecodeError as exc:
            raise ValidationError([Problem(src, None, None,
                                           f"not UTF-8 text, so not FHIR JSON ({exc.reason})")]) \
                from None
    elif isinstance(path_or_obj, Path) or (
            isinstance(path_or_obj, str) and path_or_obj.lstrip()[:1] not in ("{", "[")):
        path = Path(path_or_obj)
        src = source or str(path)
        try:
            text = path.read_text(encoding="utf-8-sig")
        except FileNotFoundError:
            raise ValidationError([Problem(src, None, None, "file not found")]) from None
        except UnicodeDecodeError as exc:
            raise ValidationError([Problem(src, None, None,
                                           f"not UTF-8 text, so not FHIR JSON ({exc.reason})")]) \
                from None
        except (OSError, ValueError) as exc:  # a directory, no permission, name too long, NUL
            reason = getattr(exc, "strerror", None) or str(exc)
            raise ValidationError([Problem(src, None, None,
                                           f"cannot read the file ({reason})")]) from None
    elif isinstance(path_or_obj, str):
        text = path_or_obj
        src = source or "<bundle>"
    else:  # an already parsed JSON scalar (number, boolean, null)
        return path_or_obj, source or "<bundle>"
    try:
        return json.loads(text, parse_int=_json_int, parse_float=_json_float), src
    except json.JSONDecodeError as exc:
        raise ValidationError([Problem(
            src, None, None, f"not valid JSON (line {exc.lineno}, column {exc.colno}: {exc.msg})",
            "a FHIR Bundle in JSON format is expected")]) from None
    except RecursionError:
        raise ValidationError([Problem(
            src, None, None, "the JSON is nested too deeply to read (arrays or objects inside "
            "one another beyond the JSON reader's depth limit)",
            "a FHIR Bundle nests a few levels deep; this file is not one")]) from None
