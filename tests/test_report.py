"""Tests of bayesbase.report: panel false-discovery selection, the many-results chance line,
retest advice from the pack, HTML safety (autoescape, no network references), the PDF from the
same content model, the P(change) marks.

Every report here is built from a real assessment of a case-library case (invented demo
patients, case_library/<case>/results.csv) with the real prior packs.
"""
from __future__ import annotations

import dataclasses
import itertools
import re
from functools import lru_cache
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from bayesbase import report, units
from bayesbase.assessment import assess
from bayesbase.constants import CAUTIONS, PANEL_FDR, PROBABLE_CHANGE, UNCERTAIN_BAND
from bayesbase.io import read_results as load_results
from bayesbase.errors import BayesbaseError
from bayesbase.report import figures, wording
from bayesbase.report.content import DRIFT_SENTENCE_P

from conftest import case_dirs, load_case

SEED = 20261202
CASES = {d.name: (d, load_case(d)) for d in case_dirs()}


# --------------------------------------------------------------------------- real inputs
@lru_cache(maxsize=None)
def case_frame(name: str) -> pd.DataFrame:
    d, _ = CASES[name]
    return load_results(d / "results.csv")


@lru_cache(maxsize=None)
def case_assessment(name: str):
    _, meta = CASES[name]
    return assess(case_frame(name), patient=meta["patient"], at=meta.get("at"))


def drift_case() -> str:
    """A case whose assessment carries a drift sentence (P(drift) >= DRIFT_SENTENCE_P)."""
    for name in CASES:
        t = case_assessment(name).table
        if "trend_p_drift" in t and (t["trend_p_drift"] >= DRIFT_SENTENCE_P).any():
            return name
    pytest.fail("the case library has no drift case")


class _Collect(HTMLParser):
    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags, self.attrs, self.text = [], [], []
        self.rows, self.row_marks = [], []
        self._row, self._cell, self._in_results, self._marks = None, None, False, None

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.attrs.extend((tag, k, v) for k, v in attrs)
        d = dict(attrs)
        if tag == "table" and "results" in (d.get("class") or ""):
            self._in_results = True
        if self._in_results and tag == "tr":
            self._row, self._marks = [], []
        if self._in_results and tag in ("td", "th"):
            self._cell = []
        if self._in_results and tag == "svg":
            self._marks.append({"label": d.get("aria-label"), "fills": []})
        if self._in_results and tag == "polygon" and self._marks:
            self._marks[-1]["fills"].append(d.get("fill"))

    def handle_endtag(self, tag):
        if tag == "table":
            self._in_results = False
        if self._in_results and tag in ("td", "th") and self._cell is not None:
            self._row.append(" ".join("".join(self._cell).split()))
            self._cell = None
        if self._in_results and tag == "tr" and self._row is not None:
            self.rows.append(self._row)
            self.row_marks.append(self._marks)
            self._row = None

    def handle_data(self, data):
        self.text.append(data)
        if self._cell is not None:
            self._cell.append(data + " ")


def parse(path):
    p = _Collect()
    p.feed(Path(path).read_text(encoding="utf-8"))
    p.close()
    return p


def html_text(path) -> str:
    return " ".join(" ".join(parse(path).text).split())


def pdf_text(path) -> str:
    import pypdf

    reader = pypdf.PdfReader(str(path))
    assert len(reader.pages) > 0
    return " ".join(" ".join(page.extract_text() or "" for page in reader.pages).split())


def _float(s):
    """First number in a display string (thin spaces as thousands separators, U+2212 minus)."""
    s = s.replace("\u2009", "").replace("\u2212", "-")
    m = re.search(r"-?\d+(?:\.\d+)?", s)
    return float(m.group()) if m else None


# --------------------------------------------------------------------------- selection and chance
def _brute_force_size(p, fdr):
    """Largest subset size whose mean(1 - p) <= fdr, by enumerating every subset."""
    best = 0
    idx = range(len(p))
    for k in range(1, len(p) + 1):
        for comb in itertools.combinations(idx, k):
            if np.mean(1 - p[list(comb)]) <= fdr + 1e-12:
                best = k
                break
    return best


def test_select_changes_matches_brute_force():
    """Bayesian FDR rule vs direct enumeration of every subset (definition of the rule)."""
    rng = np.random.default_rng(SEED)
    for trial in range(40):
        n = int(rng.integers(1, 11))
        p = rng.beta(0.6, 0.6, size=n)
        if trial % 4 == 0:
            p[: n // 2] = rng.uniform(0.9, 1.0, size=n // 2)
        m = report.select_changes(p, fdr=PANEL_FDR, min_p=0.0)
        size = _brute_force_size(p, PANEL_FDR)
        assert m.sum() == size
        if size:
            assert np.mean(1 - p[m]) <= PANEL_FDR + 1e-12
            # the chosen set is a top set: nothing left out is more probable than what is in
            assert p[m].min() >= (p[~m].max() if (~m).any() else -1)
        # with the probable-change floor: the same set, minus those below PROBABLE_CHANGE
        m2 = report.select_changes(p, fdr=PANEL_FDR)
        np.testing.assert_array_equal(m2, m & (p >= PROBABLE_CHANGE))


def test_select_changes_hand_example_and_nan():
    # 1 - p sorted: 0.01, 0.05, 0.10, 0.30 -> running means 0.01, 0.03, 0.0533, 0.115 -> 3 listed
    p = np.array([0.7, 0.99, np.nan, 0.9, 0.95, 0.3])
    m = report.select_changes(p, fdr=0.10)
    assert m.tolist() == [False, True, False, True, True, False]
    # a member below 0.5 can enter the FDR set when the others are near certain; the floor drops it
    p = np.array([1.0] * 7 + [0.98, 0.45])  # mean(1 - p) over all nine = 0.57 / 9 = 0.063
    assert report.select_changes(p, fdr=0.10, min_p=0.0).sum() == 9
    assert report.select_changes(p, fdr=0.10).tolist() == [True] * 8 + [False]


def test_chance_any_outside_published_check_values():
    # Clin Chem Lab Med 2004;42:747: 10 results -> P(none outside) 60 %; 15 -> 46 %.
    assert 1 - report.chance_any_outside(10) == pytest.approx(0.60, abs=0.005)
    assert 1 - report.chance_any_outside(15) == pytest.approx(0.46, abs=0.005)
    # derived from the same formula: 20 results -> 64 % at least one outside
    assert report.chance_any_outside(20) == pytest.approx(0.64, abs=0.005)
    assert report.chance_any_outside(0) == 0.0


def test_individuality_words_cutoffs():
    # Fraser & Harris, Crit Rev Clin Lab Sci 1989;27:409: II < 0.6 and II > 1.4
    assert report.individuality_words(0.3).startswith("population interval tells little")
    assert "limited" in report.individuality_words(1.0)
    assert report.individuality_words(1.6) == "population interval informative"


def test_retest_windows_in_reading_units():
    # hand conversions: 24 h = 1 day, 168 h = 7 days = 1 week
    assert wording.hours_text(24, 48) == "24\u201348 h"
    assert wording.hours_text(72, 168) == "3\u20137 days"
    assert wording.hours_text(168, 336) == "1\u20132 weeks"
    assert wording.hours_text(None, 48) == "at the next visit"


# --------------------------------------------------------------------------- summary and advice
def test_panel_summary_lines():
    a = case_assessment("dog_liver_enzymes_after_anticonvulsant")
    s = report.panel_summary(a.table)
    mask = report.select_changes(a.table["p_change"].to_numpy())
    assert mask.sum() >= 2  # ALP and ALT rise after the anticonvulsant (case.toml)
    assert [c.analyte for c in s.changes] == list(
        a.table.loc[mask].sort_values("p_change", ascending=False)["analyte"])
    assert s.expected_false == pytest.approx(float(np.sum(1 - a.table.loc[mask, "p_change"])))
    assert s.n == 4
    assert "1 \u2212 0.95^4 = 19 %" in s.outside_line  # 1 - 0.95^4 = 0.1855 (by hand)
    assert s.outside_line.startswith(f"{int(a.table['outside_population'].sum())} of 4 results")

    name = drift_case()
    t = case_assessment(name).table
    s = report.panel_summary(t)
    drifting = t[t["trend_p_drift"] >= DRIFT_SENTENCE_P]
    assert len(s.drift) == len(drifting) >= 1
    r, d = drifting.iloc[0], s.drift[0]
    verb = "rising" if r["trend_pct_per_year"] >= 0 else "falling"
    assert d.startswith(f"{r['label']} has been {verb} about {abs(r['trend_pct_per_year']):.0f} %/year")
    assert f"P(drift) {r['trend_p_drift']:.2f}" in d
    assert f"~{r['trend_years_to_limit']:.1f} years" in d
    assert f"{r['trend_limit']} population limit" in d


def test_retest_advice_uses_pack_groups():
    a = case_assessment("dog_haemolysed_specimen")
    pack = a.packs["dog"]
    adv = {x.group: x for x in report.retest_advice(a.table, pack)}
    liver = adv["liver"]
    assert liver.when == "9\u201315 days"                   # 216-360 h in the dog pack
    assert (pack.retest_groups["liver"].hours_min, pack.retest_groups["liver"].hours_max) == (216, 360)
    assert liver.source == pack.sources["retest_groups.liver.hours_min"]
    assert "AST" in liver.analytes                            # p = 0.63: uncertain
    assert "ALT" in liver.analytes                            # haemolysed sample
    assert dict(liver.reasons)["ALT"] == "sample compromised (haemolysis)"
    assert adv["electrolytes"].analytes == ("Potassium",)     # haemolysed sample
    assert adv["electrolytes"].when == "24\u201372 h"
    assert "renal" not in adv                                 # creatinine: clear answer, clean sample
    # a haematology answer in the uncertain band gets the haematology window (48-72 h)
    t = case_assessment("dog_stable_wellness").table.copy()
    assert not report.retest_advice(t, pack)                  # nothing uncertain, nothing compromised
    t.loc[t["analyte"] == "wbc", "p_change"] = 0.5
    adv = {x.group: x for x in report.retest_advice(t, pack)}
    assert list(adv) == ["haematology"] and adv["haematology"].when == "48\u201372 h"
    assert adv["haematology"].reasons == (("WBC", "P(change) 0.50 is uncertain"),)


def test_personal_interval_path_calls_assess_per_specimen():
    name = "dog_unwell_visit_and_censored"
    frame = case_frame(name)
    patient = CASES[name][1]["patient"]
    calls = []

    def spy(sub, pack, at, **kw):  # the real assess, recording what it was asked
        calls.append((at, sorted(sub["specimen"].unique()), kw))
        return assess(sub, pack=pack, at=at, **kw)

    path = report.personal_interval_path(frame, None, patient, spy, engine="exact", trend=False)
    specs = list(frame.sort_values("collected_at").drop_duplicates("specimen")["specimen"])
    assert len(specs) == 4
    assert [c[0] for c in calls] == specs[1:]
    assert calls[0][1] == sorted(specs[:2]) and calls[-1][1] == sorted(specs)
    assert calls[0][2] == {"engine": "exact", "trend": False}
    assert list(path.columns) == ["patient", "analyte", "specimen", "collected_at", "pi_lower",
                                  "pi_upper"]
    measured = frame[frame["specimen"].isin(specs[1:])].drop_duplicates(["specimen", "analyte"])
    assert len(path) == len(measured)
    assert (path["pi_lower"] < path["pi_upper"]).all()


# --------------------------------------------------------------------------- the report itself
@pytest.fixture(scope="module")
def built(tmp_path_factory):
    d = tmp_path_factory.mktemp("rep")
    name = "dog_liver_enzymes_after_anticonvulsant"
    a = case_assessment(name)
    meta = CASES[name][1]
    path = report.personal_interval_path(case_frame(name), None, meta["patient"], assess,
                                         engine="exact", trend=False)
    files = report.build_report(a, None, d / "r.html", pdf=d / "r.pdf", png_dir=d / "png",
                                interval_path=path, dpi=72)
    return a, files


def _check_rows(table, html_path):
    """Every analyte of ``table`` has a row in the HTML results table with its numbers."""
    p = parse(html_path)
    assert len(p.rows) == 1 + len(table)
    for _, t in table.iterrows():
        cells = next(r for r in p.rows[1:] if r[0].startswith(t["label"] + " "))
        assert units.display_unit(t["analyte"]) in cells[0]
        # value, population and personal limits shown to 3 significant digits
        assert _float(cells[1]) == pytest.approx(t["value"], rel=0.006)
        lo, hi = cells[2].split("\u2013")
        assert _float(lo) == pytest.approx(t["pop_lower"], rel=0.006)
        assert _float(hi) == pytest.approx(t["pop_upper"], rel=0.006)
        lo, hi = cells[3].split("\u2013")
        assert _float(lo) == pytest.approx(t["pi_lower"], rel=0.006)
        assert _float(hi) == pytest.approx(t["pi_upper"], rel=0.006)
        assert _float(cells[4]) == pytest.approx(100 * t["percentile"], abs=0.51)
        assert _float(cells[5]) == pytest.approx(t["p_change"], abs=0.0051)
        if t["n_baseline"] == 0 or pd.isna(t["change_vs_mean_pct"]):
            assert cells[6] == "–" and cells[7] == cells[8] == "no baseline"
        else:
            assert _float(cells[6]) == pytest.approx(t["change_vs_mean_pct"], abs=0.51)
            assert ("beyond" in cells[7]) == bool(t["rcv_exceeded_mean"])
            assert _float(cells[7]) == pytest.approx(t["rcv_classical_pct"], abs=0.51)
            assert ("beyond" in cells[8]) == bool(t["lognormal_exceeded_mean"])
        assert _float(cells[9]) == pytest.approx(t["ii"], abs=0.0051)


def test_every_analyte_row_with_its_numbers(built):
    a, files = built
    _check_rows(a.table, files.html)


def test_cautions_on_top_and_bottom(built):
    _, files = built
    text = html_text(files.html)
    for c in CAUTIONS:
        assert text.count(c) >= 2, c
    assert text.find(CAUTIONS[0]) < text.find("Panel summary")
    assert text.rfind(CAUTIONS[0]) > text.find("Method and provenance")


def test_no_external_references(built):
    _, files = built
    p = parse(files.html)
    refs = [(t, k, v) for t, k, v in p.attrs if k in ("src", "href")]
    assert refs, "the figures should be embedded"
    for tag, k, v in refs:
        assert v.startswith("data:image/png;base64,"), (tag, k, v[:40])
    assert "script" not in p.tags and "link" not in p.tags
    raw = files.html.read_text(encoding="utf-8")
    assert "@import" not in raw and "url(" not in raw


def test_summary_lists_selected_changes_and_sections_order(built):
    a, files = built
    text = html_text(files.html)
    i_sum, i_tab = text.find("Panel summary"), text.find("Results over time")
    assert 0 < i_sum < i_tab
    summary_part = text[i_sum: text.find("What to do next")]
    listed = a.table.loc[report.select_changes(a.table["p_change"].to_numpy()), "label"]
    assert set(listed) == {"ALP", "ALT"}  # the case's expected changes (case.toml)
    for lab in listed:
        assert lab in summary_part
    # age at the assessed specimen, from the case file: born 2020-01-25, assessed 2026-10-20
    assert "Age at assessed specimen: 6.7 years" in text  # 2460 days / 365.25 = 6.73
    for spec in a.history["specimen"].unique():
        assert spec in text


def test_exclusion_reason_in_header(tmp_path):
    """A haemolysed earlier specimen is left out, and the header says why."""
    name = "dog_unwell_visit_and_censored"
    frame = case_frame(name).copy()
    frame["haemolysis"] = frame["haemolysis"].astype(float)
    earlier = frame["specimen"] == "D07-2025-06-03"
    frame.loc[earlier, "haemolysis"] = 400.0  # invented: that draw recorded as haemolysed
    a = assess(frame, patient=CASES[name][1]["patient"])
    reasons = a.history.loc[a.history["role"] == "excluded", "reason"]
    assert len(reasons) and all(r.startswith("sample quality: haemolysis") for r in reasons)
    files = report.build_report(a, None, tmp_path / "x.html")
    text = html_text(files.html)
    assert "left out" in text
    for r in reasons.unique():
        assert r in text


def test_pngs_written(built):
    a, files = built
    pngs = [p for p in files.pngs if p.suffix == ".png"]
    assert len(pngs) == len(a.table) + 1
    for p in pngs:
        assert p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_pdf_has_table_and_cautions(built):
    a, files = built
    assert files.pdf.read_bytes()[:5] == b"%PDF-"
    text = pdf_text(files.pdf)
    for lab in a.table["label"]:
        assert lab in text, lab
    for c in CAUTIONS:
        assert c in text
    assert "µmol/L" in text  # Unicode survives (DejaVu font)


def test_pngs_are_the_reports_figures_and_an_overview(tmp_path):
    """The PNGs written beside the report are its own figures (cut from its one shared
    figure, RGB without alpha); the overview holds every panel and the legend strip."""
    from PIL import Image

    a = case_assessment("dog_alp_personal_change")
    files = report.build_report(a, None, tmp_path / "r.html", png_dir=tmp_path / "png", dpi=72)
    content = report.build_content(a, dpi=72)
    by_name = {p.name: p for p in files.pngs}
    for panel in content.figures.panels:
        (path,) = [p for n, p in by_name.items() if n.endswith(f"_{panel.analyte}.png")]
        with Image.open(path) as img:
            assert img.mode == "RGB" and img.size == (round(3.4 * 72), round(2.3 * 72))
            assert np.array_equal(np.asarray(img), panel.rgb)
    (overview,) = [p for n, p in by_name.items() if n.endswith("_overview.png")]
    grid, legend = content.figures.grid_rgb, content.figures.legend_rgb
    with Image.open(overview) as img:
        assert img.mode == "RGB"
        assert img.size == (max(grid.shape[1], legend.shape[1]), grid.shape[0] + legend.shape[0])
        assert np.array_equal(np.asarray(img)[:grid.shape[0], :grid.shape[1]], grid)


def test_pdfs_in_a_row_keep_their_text_and_fonts(tmp_path):
    """Each PDF embeds the font subset of its own text (the font is read once per process and
    made new per document): the text of two reports written one after the other reads back."""
    for name in ("dog_new_analyser_and_units", "cat_creatinine_sdma_rise"):
        a = case_assessment(name)
        files = report.build_report(a, None, tmp_path / f"{name}.html", pdf=tmp_path / f"{name}.pdf",
                                    dpi=40)
        text = pdf_text(files.pdf)
        for lab in a.table["label"]:
            assert lab in text, (name, lab)
        for unit in {units.display_unit(x) for x in a.table["analyte"]}:
            assert unit in text, (name, unit)
        for c in CAUTIONS:
            assert c in text


def test_html_and_pdf_say_the_same_sentences(built):
    """Both outputs are laid out from one content model: its sentences appear in both."""
    a, files = built
    content = report.build_content(a, dpi=40)
    sentences = [content.summary.intro, content.summary.outside_line, content.table_key,
                 content.method, *content.summary.drift, *(c.line.text for c in content.summary.changes),
                 *(x.line.text for x in content.advice)]
    if content.no_advice:
        sentences.append(content.no_advice)
    html_, pdf_ = html_text(files.html), pdf_text(files.pdf)
    for s in sentences:
        s = " ".join(s.split())
        assert s in html_, s
        assert s in pdf_, s
    with pytest.raises(dataclasses.FrozenInstanceError):
        content.title = "changed"  # the content model is frozen


def test_patient_breed_and_specimen_are_escaped(tmp_path):
    """Autoescape: markup in a patient id, a breed or a specimen id is shown as text."""
    evil = "<script>alert(1)</script>"
    name = "dog_haemolysed_specimen"
    frame = case_frame(name).copy()
    assessed_spec = CASES[name][1]["at"]
    frame["patient"] = evil
    frame["breed"] = evil
    frame["specimen"] = frame["specimen"].where(frame["specimen"] != assessed_spec, evil)
    files = report.report_for_file(frame, evil, None, tmp_path / "x.html", with_path=False)
    raw = files.html.read_text(encoding="utf-8")
    assert evil not in raw
    p = parse(files.html)
    assert "script" not in p.tags
    text = " ".join(p.text)
    assert f"Patient: {evil}" in " ".join(text.split())
    assert f"Breed: {evil}" in " ".join(text.split())
    assert f"Assessed specimen: {evil}" in " ".join(text.split())
    assert text.count(evil) >= 4  # title, patient, breed, specimen (header and list)


def test_several_patients_need_a_choice(tmp_path):
    both = pd.concat([case_frame("dog_haemolysed_specimen"), case_frame("dog_new_analyser_and_units")],
                     ignore_index=True)
    a = assess(both)
    with pytest.raises(BayesbaseError, match="pass patient"):
        report.build_report(a, None, tmp_path / "x.html")
    pid = CASES["dog_new_analyser_and_units"][1]["patient"]
    f = report.build_report(a, None, tmp_path / "b.html", patient=pid)
    assert f"patient {pid}" in f.html.read_text(encoding="utf-8")
    with pytest.raises(BayesbaseError, match="not in the assessment"):
        report.build_report(a, None, tmp_path / "c.html", patient="nobody")


# --------------------------------------------------------------------------- P(change) marks
def test_table_marks_are_one_hue_stars_by_band(tmp_path):
    """The table's P(change) mark is the figures' star: hollow below the uncertain band,
    half-filled in it, filled above it, in the one-hue ramp (no sky-blue/vermillion pair)."""
    lo, hi = UNCERTAIN_BAND
    seen = set()
    for name in ("dog_haemolysed_specimen", "dog_liver_enzymes_after_anticonvulsant"):
        a = case_assessment(name)
        files = report.build_report(a, None, tmp_path / f"{name}.html", dpi=40)
        p = parse(files.html)
        for cells, marks in zip(p.rows[1:], p.row_marks[1:]):
            prob = _float(cells[5])
            shape = "hollow" if prob < lo else ("half" if prob <= hi else "filled")
            assert len(marks) == 1 and marks[0]["label"] == f"{shape} star", (cells[0], marks)
            fills = {f for f in marks[0]["fills"] if f != "none"}
            assert fills <= set(figures.CHANGE_RAMP.values())
            assert len(fills) == (2 if shape == "half" else 1)
            seen.add(shape)
        raw = files.html.read_text(encoding="utf-8").upper()
        assert "#56B4E9" not in raw  # the former sky blue of "no change"
    assert seen == {"hollow", "half", "filled"}


# --------------------------------------------------------------------------- end to end on cases
@pytest.mark.parametrize("case", ["dog_stable_wellness", "dog_unwell_visit_and_censored"])
def test_case_report_end_to_end(case, tmp_path):
    """A case from the case library through data -> priors -> assess -> report."""
    from bayesbase.priors import load_pack

    d, meta = CASES[case]
    pack = load_pack(meta["species"])
    csv = d / "results.csv"
    files = report.report_for_file(csv, meta["patient"], pack, tmp_path / "r.html",
                                   pdf=tmp_path / "r.pdf", at=meta.get("at"))
    a = assess(load_results(csv), pack=pack, at=meta.get("at"), patient=meta["patient"])
    _check_rows(a.table, files.html)
    text = html_text(files.html)
    for c in CAUTIONS:
        assert text.count(c) >= 2
    # the header names every earlier specimen with its role
    hist = a.history
    for spec, g in hist.groupby("specimen"):
        assert spec in text
    if (hist["role"] == "unwell").any():
        assert "left out (unwell)" in text
    assert pack.sha256 in text
    ptext = pdf_text(files.pdf)
    for lab in a.table["label"]:
        assert lab in ptext


def test_quick_text_widths_equal_fpdf2s_own():
    """The report's faster text width sums the same glyph widths as fpdf2's own method (exact:
    integer widths), on seeded random text in both fonts and several sizes."""
    from bayesbase.report import pdf as pdf_out

    doc = pdf_out._document("widths")
    fonts = [f for f in doc.fonts.values() if hasattr(f, "cw")]
    if not fonts:
        pytest.skip("no TrueType font available: the core font keeps fpdf2's own widths")
    rng = np.random.default_rng(17)
    alphabet = "abcdefghijklmnopqrstuvwxyz ABCDEFGHIJ0123456789.,;:%()[]-\u2013\u00b7\u2022\u00b5\u2191\u2193"
    for font in fonts:
        assert type(font).__name__.startswith("QuickWidths")
        own = type(font).__mro__[1].get_text_width
        for size in (6.5, 7.0, 8.5, 11.0):
            for _ in range(50):
                text = "".join(rng.choice(list(alphabet), rng.integers(0, 60)))
                assert font.get_text_width(text, size, None) == own(font, text, size, None)
