"""Line breaking of the PDF's plain text, the same lines as fpdf2's but without its objects per
character.

fpdf2 breaks a paragraph or a table cell into lines one character at a time: it appends each
character to a line object and measures the whole line again before the next one (about 40 000
character steps for a 25-analyte report, and each table cell is broken twice, once to measure
the row and once to write it). That was most of the PDF's time. :class:`QuickLineBreak` is
fpdf2's ``MultiLineBreak`` with a ``get_line`` that, for the text the report writes (one
fragment of a TrueType font whose widths :func:`.pdf._quick_width_class` sums, no character
spacing or stretching, words wrapped at ordinary spaces), finds the same break with integer
sums of the same glyph widths and the same float comparison, and returns the same ``TextLine``
(built by fpdf2's own ``CurrentLine``). Anything else (several fragments, shaped text, soft
hyphens, spaces other than the ordinary and the no-break one, tabs, character wrapping, indents) goes to fpdf2's own
method. ``fpdf.fpdf.MultiLineBreak`` is this class only while :func:`quick_line_breaking` is
active (the report's PDF is written inside it).
"""
from __future__ import annotations

import threading
from contextlib import contextmanager
from functools import lru_cache

__all__ = ["quick_line_breaking"]

_SWAP_LOCK = threading.Lock()
_ACTIVE = [0]


@lru_cache(maxsize=None)
def _quick_class():
    from fpdf import line_break as lb
    from fpdf.enums import WrapMode

    # characters fpdf2 treats specially (other than the ordinary space, newline and form feed)
    special = frozenset(lb.BREAKING_SPACE_SYMBOLS_STR.replace(lb.SPACE, "") + lb.SOFT_HYPHEN)

    class QuickLineBreak(lb.MultiLineBreak):
        """fpdf2's MultiLineBreak; ``get_line`` is quick for plain one-fragment text."""

        def _plain(self) -> bool:
            plain = getattr(self, "_bb_plain", None)
            if plain is None:
                plain = self._bb_plain = self._is_plain()
            return plain

        def _is_plain(self) -> bool:
            if (len(self.fragments) != 1 or self.wrapmode != WrapMode.WORD or self.print_sh
                    or self.skip_leading_spaces or self.first_line_indent):
                return False
            frag = self.fragments[0]
            font = frag.font
            return (getattr(type(font), "bb_quick_widths", False) and not font.is_symbol
                    and not frag.text_shaping_parameters and frag.char_spacing == 0
                    and frag.font_stretching == 100 and special.isdisjoint(frag.characters))

        def get_line(self):
            if not self._plain():
                return super().get_line()
            return _plain_line(self)

    return QuickLineBreak


def _line(frag, chars, n_spaces: int, height: float, max_width: float, align,
          nl: bool = False, ff: bool = False, keep_empty: bool = False):
    """The TextLine fpdf2's CurrentLine gives for these characters (its fragment is made
    by the first character, and kept, emptied, when the line breaks at a leading space)."""
    from fpdf import line_break as lb

    cur = lb.CurrentLine(max_width=max_width, print_sh=False, indent=0)
    if chars or keep_empty:
        cur.fragments.append(frag.clone(characters=list(chars), link=frag.link))
    cur.height = height
    cur.number_of_spaces = n_spaces
    return cur, cur.manual_break(align, trailing_nl=nl, trailing_form_feed=ff)


def _plain_line(self):
    """fpdf2's ``MultiLineBreak.get_line`` for one plain fragment (see the module text)."""
    from fpdf.enums import Align
    from fpdf.errors import FPDFException
    from fpdf.line_break import NBSP as nbsp, SPACE as space
    from fpdf.util import FloatTolerance

    tolerance = FloatTolerance.TOLERANCE
    forced_before = self.idx_last_forced_break
    self.idx_last_forced_break = None
    if self.fragment_index == len(self.fragments):
        return None
    frag = self.fragments[0]
    chars = frag.characters
    # what a line holds: fpdf2 writes a no-break space as a space (and counts it as one for
    # the word spacing) but measures it as itself before adding it
    out = self.__dict__.get("_bb_out")
    if out is None:
        out = self._bb_out = [space if ch == nbsp else ch for ch in chars]
    start = i = self.character_index
    n = len(chars)
    height_now = 0  # current_font_height of fpdf2: the fragment's size once a character is read
    line_max = avail = self.get_width(0)
    line_height = 0  # CurrentLine.height: set by each character added
    if start < n and FloatTolerance.greater_than(frag.font_size, 0):
        height_now = frag.font_size
        line_max = avail = self.get_width(height_now)
    for margin in self.margins:  # in fpdf2's order (the same float)
        avail -= float(margin)
    cw, k, size = frag.font.cw, frag.k, frag.font_size_pt
    total = 0  # integer sum of glyph widths of the line so far
    space_at = -1  # index of the last space of the line, and the spaces before it
    spaces = spaces_before = 0
    end_align = Align.L if self.align == Align.J else self.align
    while i < n:
        ch = chars[i]
        if ch == "\n" or ch == "\f":
            self.character_index = i + 1
            self._is_first_line = False
            h = max(line_height, height_now * self.line_height)
            return _line(frag, out[start:i], spaces, h, line_max, end_align,
                         nl=ch == "\n", ff=ch == "\f")[1]
        c = cw[ord(ch)]
        if (total * size * 0.001 / k + c * size * 0.001 / k) - avail > tolerance:
            self._is_first_line = False
            if ch == " ":
                self.character_index = i + 1
                return _line(frag, out[start:i], spaces, line_height, line_max, self.align)[1]
            if space_at >= 0:
                self.character_index = space_at + 1
                return _line(frag, out[start:space_at], spaces_before, line_height,
                             line_max, self.align, keep_empty=True)[1]
            if forced_before == (0, i):
                raise FPDFException("Not enough horizontal space to render a single character")
            self.idx_last_forced_break = (0, i)
            self.character_index = i
            return _line(frag, out[start:i], spaces, line_height, line_max, end_align)[1]
        if ch == " ":
            space_at, spaces_before = i, spaces
            spaces += 1
        elif ch == nbsp:
            spaces += 1
            c = cw[32]
        total += c
        line_height = height_now * self.line_height
        i += 1
    self.character_index = 0
    self.fragment_index = 1
    cur, line = _line(frag, out[start:n], spaces, line_height, line_max, end_align)
    if cur.width:
        self._is_first_line = False
        return line
    return None


@contextmanager
def quick_line_breaking():
    """fpdf2's multi-line text (``multi_cell``, tables) broken by :class:`QuickLineBreak` inside
    the block (the same lines; the module text says when fpdf2's own method is used)."""
    import fpdf.fpdf as fpdf_module

    quick = _quick_class()
    with _SWAP_LOCK:
        if _ACTIVE[0] == 0:
            _ACTIVE.append(fpdf_module.MultiLineBreak)
            fpdf_module.MultiLineBreak = quick
        _ACTIVE[0] += 1
    try:
        yield
    finally:
        with _SWAP_LOCK:
            _ACTIVE[0] -= 1
            if _ACTIVE[0] == 0:
                fpdf_module.MultiLineBreak = _ACTIVE.pop()
