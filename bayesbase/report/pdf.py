"""The PDF report (A4 landscape, fpdf2): layout only, from the same content model as the HTML.
The cautions open and close the document and run in the footer of every page."""
from __future__ import annotations

import threading
from contextlib import contextmanager
from functools import lru_cache
from io import BytesIO
from pathlib import Path

from matplotlib.colors import to_rgb

from .. import __version__
from . import figures
from . import wording as w
from .figures import tint
from .content import ReportContent
from .pdftext import quick_line_breaking

__all__ = ["render"]

#: column widths (mm) of the results table: the headings of wording.RESULT_HEADINGS with a
#: narrow column for the P(change) star before P(change)
_RESULT_WIDTHS = (27, 15, 24, 24, 18, 6, 31, 17, 22, 26, 21, 46)
_STAR_COLUMN = 5
_CV_WIDTHS = (40, 30, 30, 30, 60)
#: fill of the P(change) cell by band: the star's one hue, lightened, darker as a change grows
#: more probable (no fill for "no change")
_BAND_TINTS = {band: tuple(round(255 * c) for c in to_rgb(tint(figures.PALETTE["change"], share)))
               for band, share in (("uncertain", 0.8), ("probable", 0.55))}
_HEADING_FILL = (232, 244, 240)
#: one document at a time has fpdf2's output module see the subset cache (see
#: :func:`_cached_subsetting`)
_SWAP_LOCK = threading.Lock()


def _font_paths() -> tuple[Path, Path] | None:
    import matplotlib

    base = Path(matplotlib.get_data_path()) / "fonts" / "ttf"
    reg, bold = base / "DejaVuSans.ttf", base / "DejaVuSans-Bold.ttf"
    return (reg, bold) if reg.exists() and bold.exists() else None


@lru_cache(maxsize=None)
def _quick_width_class(base: type) -> type:
    """A subclass of an fpdf2 font class whose text width is the same sum of the same integer
    glyph widths (``cw``: exact, so the layout is unchanged) without a Python generator per
    character, and a prefix of the last text measured is not summed again. fpdf2 measures every
    growing prefix of a line while it breaks lines, which made text width most of the PDF's
    time. Symbol fonts and shaped text keep fpdf2's own method."""

    # the last text measured: (font, its width table, text, sum of glyph widths). Line breaking
    # measures each growing prefix of a line, so the next text mostly extends the last one and
    # only the new characters are added (integers: the same sum). One entry, so no width table
    # is kept alive beyond the last font used.
    last = [None, None, "", 0]

    class QuickWidths(base):
        __slots__ = ()
        #: read by .pdftext: the widths are the integer sums of ``cw`` described above
        bb_quick_widths = True

        def get_text_width(self, text, font_size_pt, text_shaping_params):
            if text_shaping_params or self.is_symbol:
                return super().get_text_width(text, font_size_pt, text_shaping_params)
            if font_size_pt > self.biggest_size_pt:
                self.biggest_size_pt = font_size_pt
            cw = self.cw
            font, table, prev, total = last
            if font is self and table is cw and text.startswith(prev):
                total += sum(map(cw.__getitem__, map(ord, text[len(prev):])))
            else:
                total = sum(map(cw.__getitem__, map(ord, text)))
            last[:] = (self, cw, text, total)
            return len(text), total * font_size_pt * 0.001

    QuickWidths.__name__ = QuickWidths.__qualname__ = f"QuickWidths{base.__name__}"
    return QuickWidths


def _quick_widths(font) -> None:
    """Switch one of this document's TrueType fonts to :func:`_quick_width_class`."""
    if hasattr(font, "cw") and hasattr(font, "is_symbol") and hasattr(font, "biggest_size_pt"):
        font.__class__ = _quick_width_class(type(font))


#: what a TrueType font of fpdf2 changes while one document is written (the rest, its glyph
#: widths and character map, is read only)
_PER_DOCUMENT = ("i", "ttfont", "subset", "missing_glyphs", "biggest_size_pt", "desc")


@lru_cache(maxsize=None)
def _font_template(family: str, style: str, path: str):
    """The font as fpdf2 reads it for a document (its glyph-width table is built glyph by glyph,
    about a tenth of a short report's PDF time), read once per process; never written out."""
    from fpdf import FPDF

    doc = FPDF()
    doc.add_font(family, style, path)
    return next(iter(doc.fonts.values()))


def _add_font(doc, family: str, style: str, path: str) -> None:
    """``doc.add_font(family, style, path)``, the font's read-only tables taken from
    :func:`_font_template` and the parts a document writes (font number, the font file that is
    subset on output, the subset map, the descriptor) made new for this document. Falls back to
    ``add_font`` when the font object is not the one this was written for."""
    import copy

    template = _font_template(family, style, path)
    slots = getattr(type(template), "__slots__", ())
    if (type(template).__name__ != "TTFFont" or not all(a in slots for a in _PER_DOCUMENT)
            or getattr(template, "color_font", None) is not None):
        doc.add_font(family, style, path)
        return
    from fontTools import ttLib

    font = copy.copy(template)
    font.i = len(doc.fonts) + 1
    font.ttfont = ttLib.TTFont(template.ttffile, recalcTimestamp=False,
                               fontNumber=template.collection_font_number, lazy=True)
    font.subset = type(template.subset)(font)
    font.missing_glyphs = []
    font.biggest_size_pt = 0
    font.desc = copy.copy(template.desc)
    doc.fonts[template.fontkey] = font


#: subset fonts already made in this process: (font file, font number, glyph names) -> (glyph id
#: by name, tables present, the subset font file's bytes); oldest dropped beyond the limit
_SUBSETS: dict = {}
_SUBSETS_MAX = 16
_SUBSET_LOCK = threading.Lock()


class _SubsetFont:
    """What fpdf2's output reads of a document's TrueType font (``font.ttfont``) while it embeds
    the font: it subsets the font with fontTools, then asks the subset for glyph ids and its
    file. Stands in for the font during :func:`_cached_subsetting`: a subset made before in this
    process for the same font file and the same glyphs is answered from :data:`_SUBSETS`
    (fontTools makes the same bytes from the same font and glyphs: the head table's time stamp
    is not recalculated), else the font itself is subset and the result kept."""

    def __init__(self, real, key):
        self.real, self.key, self.done = real, key, None

    def subset_with(self, options, glyphs) -> None:
        key = (*self.key, frozenset(glyphs))
        with _SUBSET_LOCK:
            self.done = _SUBSETS.get(key)
        if self.done is not None:
            return
        from fontTools import subset as ftsubset

        subsetter = ftsubset.Subsetter(options)
        subsetter.populate(glyphs=glyphs)
        subsetter.subset(self.real)
        buf = BytesIO()
        self.real.save(buf)
        ids = {name: i for i, name in enumerate(self.real.getGlyphOrder())}
        self.done = (ids, frozenset(self.real.keys()), buf.getvalue())
        with _SUBSET_LOCK:
            _SUBSETS[key] = self.done
            while len(_SUBSETS) > _SUBSETS_MAX:
                del _SUBSETS[next(iter(_SUBSETS))]

    def getGlyphID(self, name: str) -> int:  # noqa: N802 (fontTools' name)
        return self.done[0][name]

    def __contains__(self, tag) -> bool:
        return tag in self.done[1]

    def __getitem__(self, tag):
        return self.real[tag]

    def save(self, file) -> None:
        file.write(self.done[2])

    def close(self) -> None:
        self.real.close()


class _CachingSubsetter:
    """fontTools' ``Subsetter`` as fpdf2's output calls it (``populate(glyphs=...)``, then
    ``subset(font)``), for :class:`_SubsetFont` stand-ins."""

    def __init__(self, options):
        self.options, self.glyphs = options, ()

    def populate(self, glyphs=(), **kw) -> None:
        if kw:
            raise TypeError(f"unexpected populate arguments {sorted(kw)}")
        self.glyphs = tuple(glyphs)

    def subset(self, font) -> None:
        if isinstance(font, _SubsetFont):
            font.subset_with(self.options, self.glyphs)
            return
        # another document's font written out meanwhile (another thread): fontTools' own way
        from fontTools import subset as ftsubset

        real = ftsubset.Subsetter(self.options)
        real.populate(glyphs=self.glyphs)
        real.subset(font)


@contextmanager
def _cached_subsetting(doc):
    """While ``doc`` is written out: its TrueType fonts are subset through :data:`_SUBSETS`
    (the same subset font file as fpdf2 makes, made once per process for a font and a glyph
    set: subsetting read the whole font, about a tenth of a report's time). fpdf2's output
    module sees a fontTools ``subset`` module whose Subsetter is :class:`_CachingSubsetter`
    only inside this block, one report at a time (the shim subsets any other font as fontTools
    does); fonts of other kinds, or an
    fpdf2 whose output does not import ``fontTools.subset`` as ``ftsubset``, are left alone."""
    import types

    from fpdf import output as fpdf_output
    from fpdf.fonts import TTFFont

    real_module = getattr(fpdf_output, "ftsubset", None)
    fonts = [f for f in doc.fonts.values() if isinstance(f, TTFFont)
             and getattr(f, "color_font", None) is None and not getattr(f, "is_cff", False)]
    if real_module is None or not hasattr(real_module, "Subsetter") or not fonts:
        yield
        return
    shim = types.SimpleNamespace(Options=real_module.Options, Subsetter=_CachingSubsetter)
    with _SWAP_LOCK:
        saved = [(f, f.ttfont) for f in fonts]
        for f in fonts:
            f.ttfont = _SubsetFont(f.ttfont, (str(f.ttffile), f.collection_font_number))
        fpdf_output.ftsubset = shim
        try:
            yield
        finally:
            fpdf_output.ftsubset = real_module
            for f, real in saved:
                f.ttfont = real


#: parsed SVGs of the documents being laid out (id of the document's image cache -> SVG bytes ->
#: what fpdf2's ``get_svg_info`` returned), and the function it replaces while any is
_SVG_DOCS: dict = {}
_SVG_SWAP: list = []


def _parse_svg_once(filename, img, image_cache, *args, **kw):
    """fpdf2's ``image_parsing.get_svg_info``, parsing each SVG of a report's document once: the
    results table places the same P(change) star (one per band) in every row, twice (fpdf2
    measures a row, then writes it), and each parse read the SVG's XML again (a fifth of the
    PDF's time). The parsed SVG holds no state between placings (fpdf2 sets its viewport
    transform afresh each time). Other documents' SVGs are parsed as before."""
    parsed = _SVG_DOCS.get(id(image_cache))
    if parsed is None:
        return _SVG_SWAP[0](filename, img, image_cache, *args, **kw)
    img.seek(0)
    key = (filename, img.read(), args, tuple(sorted(kw.items())))
    if key not in parsed:
        parsed[key] = _SVG_SWAP[0](filename, img, image_cache, *args, **kw)
    return parsed[key]


@contextmanager
def _svg_parsed_once(doc):
    """Inside the block, fpdf2 parses each SVG placed on ``doc`` once (see
    :func:`_parse_svg_once`)."""
    from fpdf import image_parsing

    with _SWAP_LOCK:
        if not _SVG_DOCS:
            _SVG_SWAP[:] = [image_parsing.get_svg_info]
            image_parsing.get_svg_info = _parse_svg_once
        _SVG_DOCS[id(doc.image_cache)] = {}
    try:
        yield
    finally:
        with _SWAP_LOCK:
            del _SVG_DOCS[id(doc.image_cache)]
            if not _SVG_DOCS:
                image_parsing.get_svg_info = _SVG_SWAP.pop()


def _document(title: str):
    """An fpdf2 document with the cautions in its footer, and its font family."""
    from fpdf import FPDF

    class _Doc(FPDF):
        font_name = "Helvetica"

        def footer(self):
            self.set_y(-10)
            self.set_font(self.font_name, size=6.5)
            self.set_text_color(110, 40, 0)
            self.cell(0, 4, w.page_footer(self.page_no()), align="C")
            self.set_text_color(0, 0, 0)

    doc = _Doc(orientation="L", unit="mm", format="A4")
    fonts = _font_paths()
    if fonts:
        _add_font(doc, "DejaVu", "", str(fonts[0]))
        _add_font(doc, "DejaVu", "B", str(fonts[1]))
        doc.font_name = "DejaVu"
        for font in doc.fonts.values():
            _quick_widths(font)
    doc.set_title(title)
    doc.set_creator(f"bayesbase {__version__}")
    doc.set_auto_page_break(True, margin=13)
    doc.set_margins(10, 10, 10)
    return doc


def _image(rgb, png: bytes):
    """What the PDF places for a figure: its pixels as drawn (an RGB image, so the PNG is not
    decoded again), or its PNG when the pixels are not at hand."""
    if rgb is None:
        return BytesIO(png)
    from PIL import Image

    return Image.fromarray(rgb)


class _Layout:
    """Writes the sections of one report on an fpdf2 document."""

    def __init__(self, content: ReportContent):
        self.c = content
        self.pdf = _document(content.title)
        self.ff = self.pdf.font_name
        self.pdf.add_page()
        self.W = self.pdf.w - self.pdf.l_margin - self.pdf.r_margin

    # -- text primitives
    def txt(self, s) -> str:
        s = str(s).replace(w.SHY, "")
        if self.ff == "Helvetica":  # core font: Latin-1 only
            s = s.encode("latin-1", "replace").decode("latin-1")
        return s

    def para(self, s, size: float = 8.5, style: str = "") -> None:
        self.pdf.set_font(self.ff, style, size)
        self.pdf.multi_cell(self.W, size * 0.48, self.txt(s), new_x="LMARGIN", new_y="NEXT",
                            align="L")

    def h2(self, s: str, need: float = 30) -> None:
        """A section heading, on a new page when less than ``need`` mm are left under it."""
        pdf = self.pdf
        if pdf.get_y() > pdf.h - need:
            pdf.add_page()
        pdf.ln(1.5)
        pdf.set_font(self.ff, "B", 11)
        pdf.set_text_color(0, 100, 70)
        pdf.cell(self.W, 6, self.txt(s), new_x="LMARGIN", new_y="NEXT")
        pdf.set_draw_color(0, 158, 115)
        pdf.line(pdf.l_margin, pdf.get_y(), pdf.l_margin + self.W, pdf.get_y())
        pdf.set_text_color(0, 0, 0)
        pdf.ln(1)

    def cautions_box(self) -> None:
        pdf = self.pdf
        if pdf.get_y() > pdf.h - pdf.b_margin - 14:  # keep the box on one page
            pdf.add_page()
        pdf.set_draw_color(213, 94, 0)
        pdf.set_fill_color(255, 247, 240)
        pdf.set_font(self.ff, "B", 8.5)
        y0 = pdf.get_y()
        pdf.multi_cell(self.W, 4.4, self.txt(w.cautions_line()), border=1, fill=True,
                       new_x="LMARGIN", new_y="NEXT", align="L", padding=1.2)
        pdf.set_y(max(pdf.get_y(), y0) + 1.5)

    # -- sections
    def body(self) -> None:
        """Every section, in order, the cautions box last."""
        self.header()
        self.summary()
        self.results()
        self.advice()
        self.figures()
        self.method()
        self.pdf.ln(2)
        self.cautions_box()

    def header(self) -> None:
        self.cautions_box()
        self.pdf.set_font(self.ff, "B", 14)
        self.pdf.multi_cell(self.W, 7, self.txt(self.c.title), new_x="LMARGIN", new_y="NEXT")
        fields = self.c.header
        self.para(" \u00b7 ".join(f"{k}: {v}" for k, v in fields[:-1]), 9)
        self.para(f"{fields[-1][0]}: {fields[-1][1]}", 9, "B")
        for s in self.c.specimens:
            bits = [" ".join(x for x in (p.word, p.analytes, p.reasons) if x) for p in s.parts]
            self.para(f"{s.date}  {s.specimen}: " + " \u00b7 ".join(bits), 7.8)

    def summary(self) -> None:
        summ = self.c.summary
        self.h2(w.SECTION_SUMMARY)
        self.para(summ.intro, 9)
        for ch in summ.changes:
            self.para(f"   \u2022 {ch.line.text}", 9, "B")
        self.para(summ.outside_line, 9)
        for d in summ.drift:
            self.para(d, 9)

    def results(self) -> None:
        from fpdf.fonts import FontFace

        self.h2(w.SECTION_RESULTS)
        if self.c.common_line:
            self.para(self.c.common_line, 7.5)
        pdf = self.pdf
        pdf.set_font(self.ff, "", 7)
        pdf.set_fill_color(255, 255, 255)
        heading = FontFace(emphasis="BOLD", fill_color=_HEADING_FILL)
        with pdf.table(col_widths=_RESULT_WIDTHS, width=self.W, line_height=3.3,
                       text_align="LEFT", headings_style=heading,
                       borders_layout="HORIZONTAL_LINES", padding=0.8, repeat_headings=1,
                       v_align="TOP", cell_fill_mode="NONE") as tab:
            hr = tab.row()
            headings = list(self.c.headings)
            headings.insert(_STAR_COLUMN, "")
            for h in headings:
                hr.cell(self.txt(h))
            for r in self.c.rows:
                self._result_row(tab.row(), r, FontFace)
        self.para(self.c.table_key, 7)

    def _result_row(self, tr, r, FontFace) -> None:
        bold = FontFace(emphasis="BOLD")
        tint = _BAND_TINTS.get(r.band)
        tr.cell(self.txt(f"{r.label}\n{r.unit}"), style=bold)
        tr.cell(self.txt(r.value), style=bold if r.outside_population else None)
        tr.cell(self.txt(r.population))
        tr.cell(self.txt(r.personal))
        tr.cell(self.txt(r.percentile))
        star = None if r.p_change is None else BytesIO(
            figures.star_svg(r.p_change, standalone=True).encode("utf-8"))
        tr.cell("", img=star, img_fill_width=True, padding=(0.6, 0.4, 0.4, 0.8),
                style=FontFace(fill_color=tint))
        tr.cell(self.txt(f"{r.p_text}{r.arrow}\n{r.vs_set_point}"),
                style=FontFace(emphasis="BOLD", fill_color=tint))
        tr.cell(self.txt(r.delta_mean))
        tr.cell(self.txt(r.classical.text.strip()), style=bold if r.classical.beyond else None)
        tr.cell(self.txt(r.lognormal.text.strip()), style=bold if r.lognormal.beyond else None)
        tr.cell(self.txt(f"{r.ii}\n{r.ii_short}"))
        tr.cell(self.txt(self.c.own_notes(r)))

    def advice(self) -> None:
        self.h2(w.SECTION_NEXT)
        for a in self.c.advice:
            self.para(a.line.text, 8.5, "B")
            self.para(a.reasons_text, 7.5)
        if self.c.no_advice:
            self.para(self.c.no_advice, 8.5)

    def figures(self, ncol: int = 4, gap: float = 3) -> None:
        pdf, figs = self.pdf, self.c.figures
        cw = (self.W - gap * (ncol - 1)) / ncol
        ch = cw * figs.ratio
        # keep the heading with the legend strip, its key and the first row of figures
        self.h2(w.SECTION_FIGURES, need=self.W * 0.8 * figs.legend_ratio + 25 + ch)
        pdf.image(_image(figs.legend_rgb, figs.legend_png), w=self.W * 0.8,
                  x=pdf.l_margin + self.W * 0.1)
        self.para(" \u00b7 ".join(f"{k}: {v}" for k, v in figs.legend), 6.8)
        y = pdf.get_y() + 1
        for i, panel in enumerate(figs.panels):
            col = i % ncol
            if col == 0 and i:
                y += ch + gap
            if y + ch > pdf.h - 13:
                pdf.add_page()
                y = pdf.t_margin
            pdf.image(_image(panel.rgb, panel.png), x=pdf.l_margin + col * (cw + gap), y=y,
                      w=cw, h=ch)
        pdf.set_y(y + ch + gap)

    def method(self) -> None:
        from fpdf.fonts import FontFace

        self.h2(w.SECTION_METHOD)
        self.para(self.c.method, 7.6)
        self.pdf.ln(1)
        for k, v in self.c.provenance:
            self.para(f"{k}: {v}", 7.6)
        self.pdf.ln(1)
        self.pdf.set_font(self.ff, "", 7)
        heading = FontFace(emphasis="BOLD", fill_color=_HEADING_FILL)
        with self.pdf.table(col_widths=_CV_WIDTHS, width=sum(_CV_WIDTHS), cell_fill_mode="NONE",
                            line_height=3.2, text_align="LEFT", headings_style=heading,
                            borders_layout="HORIZONTAL_LINES", padding=0.6, align="LEFT") as tab:
            hr = tab.row()
            for h in w.CV_HEADINGS:
                hr.cell(h)
            for cv in self.c.cv_rows:
                tr = tab.row()
                tr.cell(self.txt(cv.label))
                for cell in cv.cells:
                    tr.cell(self.txt(f"{cell.text} {cell.ref}"))
        if self.c.references:
            self.pdf.ln(1)
            for i, ref in enumerate(self.c.references, 1):
                self.para(f"[{i}] {ref}", 6.6)


def render(content: ReportContent, path) -> None:
    """Write the report as a PDF at ``path`` (text broken into lines by
    :func:`.pdftext.quick_line_breaking`: fpdf2's lines, found faster; each SVG parsed once,
    :func:`_svg_parsed_once`; fonts subset once per process, :func:`_cached_subsetting`)."""
    with quick_line_breaking():
        lay = _Layout(content)
        with _svg_parsed_once(lay.pdf):
            lay.body()
    with _cached_subsetting(lay.pdf):
        lay.pdf.output(str(path))
