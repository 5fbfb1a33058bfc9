"""Characters of input text: what a message shows, what an id refuses, what free text loses.

Shared by the field parsers and the table readers (:mod:`bayesbase.io`); standard library only.
"""
from __future__ import annotations

import re
import unicodedata
from datetime import date, datetime
from datetime import time as dtime

__all__ = ["char_name", "visible", "invisible_char", "clean_free_text", "lookalike_digit",
           "cell_text"]

#: ANSI / VT100 escape sequences (CSI ... final byte, OSC ... BEL or ST) in free text.
_ANSI = re.compile(r"\x1b\[[0-?]*[ -/]*[@-~]|\x1b\][^\x07\x1b]*(?:\x07|\x1b\\)?|\x1b[@-_]?")
_INVISIBLE_CATEGORIES = ("Cc", "Cf", "Zl", "Zp", "Cs")


def char_name(ch: str) -> str:
    name = unicodedata.name(ch, "")
    return f"U+{ord(ch):04X} {name}".strip()


def visible(text: str) -> str:
    """``text`` with control and invisible format characters shown as ``<U+XXXX>``.

    Used for every message and note, so that no terminal escape or bidirectional override taken
    from an input reaches a terminal or a report.
    """
    if text.isascii() and text.isprintable():
        return text
    return "".join(f"<U+{ord(c):04X}>" if unicodedata.category(c) in _INVISIBLE_CATEGORIES else c
                   for c in text)


def invisible_char(text: str) -> str | None:
    """Description of the first control/invisible character of an id, or None."""
    if text.isascii() and text.isprintable():
        return None
    for c in text:
        if unicodedata.category(c) in _INVISIBLE_CATEGORIES:
            return char_name(c)
    return None


def clean_free_text(text: str) -> str:
    """Free text without ANSI escape sequences and control/invisible characters."""
    if text.isascii() and text.isprintable():
        return text
    text = _ANSI.sub("", text)
    text = re.sub(r"[\t\n\r\x0b\x0c\x85\u2028\u2029]+", " ", text)
    return "".join(c for c in text
                   if unicodedata.category(c) not in _INVISIBLE_CATEGORIES).strip()


def lookalike_digit(text: str) -> str | None:
    """Description of the first digit that is not 0-9 (Arabic-Indic, full-width, ...), or None."""
    if text.isascii():
        return None
    for c in text:
        if not c.isascii() and (c.isdigit() or unicodedata.category(c) == "Nd"):
            return char_name(c)
    return None


def cell_text(v: object) -> str:
    """A cell (text, or a spreadsheet's number, boolean, date or time) as the text it shows."""
    if v is None:
        return ""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return str(int(v)) if v.is_integer() and abs(v) < 1e15 else repr(v)
    if isinstance(v, datetime):
        return v.isoformat(sep="T")
    if isinstance(v, (date, dtime)):
        return v.isoformat()
    return str(v)
