"""The study report page (bayesbase.study.output.study_html) section by section, on the
case-library study: each section alone against the numbers of the result and the published
formulas it states, and the whole page as the sections in order."""
from __future__ import annotations

import base64
import copy
import html
import types
from html.parser import HTMLParser
from pathlib import Path

import pandas as pd
import pytest

from bayesbase.constants import CAUTIONS
from bayesbase.study import estimate
from bayesbase.study import output as out_mod
from bayesbase.study.output import study_html

CASE = Path(__file__).resolve().parents[1] / "case_library" / "dog_bv_study_example" / "results.csv"


@pytest.fixture(scope="module")
def result():
    return estimate(CASE)


class _Tables(HTMLParser):
    """Cell texts of every table row (stdlib parser; entities decoded)."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.rows: list[list[str]] = []
        self._cell: list[str] | None = None

    def handle_starttag(self, tag, attrs):
        if tag == "tr":
            self.rows.append([])
        elif tag in ("td", "th"):
            self._cell = []

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None:
            self.rows[-1].append("".join(self._cell).strip())
            self._cell = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)


def _rows(parts: list[str]) -> list[list[str]]:
    p = _Tables()
    p.feed("\n".join(parts))
    return p.rows


def test_head_puts_cautions_and_provenance_first_and_escapes_text(result):
    r = copy.copy(result)
    r.warnings = ["CVI <unstable> & wide"]
    head = out_mod._html_head(r)
    text = "\n".join(head)
    assert head[0].startswith("<!DOCTYPE html>")
    assert text.index("Cautions") < text.index("Study file")
    for c in CAUTIONS:
        assert html.escape(c, quote=True) in text
    assert r.attrs["source_sha256"] in text
    assert "CVI &lt;unstable&gt; &amp; wide" in text and "<unstable>" not in text


def test_estimates_section_holds_the_result_and_the_desirable_cva(result):
    """One row per analyte with the estimates of the result, to one decimal; desirable CVA =
    0.5 x CVI (common practice) and 'met' when CVA <= it."""
    rows = _rows(out_mod._html_estimates(result))
    header, body = rows[0], rows[1:]
    assert header[:2] == ["analyte", "method"] and len(body) == len(result.estimates)
    for cells, r in zip(body, result.estimates.itertuples(index=False)):
        assert cells[2:6] == [str(r.n_animals), str(r.n_specimens), str(r.n_results), str(r.n_removed)]
        assert cells[7].startswith(f"{r.cvi_pct:.1f} ({r.cvi_lower:.1f}-{r.cvi_upper:.1f})")
        assert cells[11] == f"{r.rcv_pct:.1f}"
        des = 0.5 * r.cvi_pct
        assert cells[13] == f"{des:.1f}" + (" met" if r.cva_pct <= des else " NOT met")


def test_estimates_section_lists_a_new_animal_cvi_when_there_is_one(result):
    r = copy.copy(result)
    row = r.table.iloc[[0]].copy()
    row[["component", "estimate", "lower", "upper"]] = ["cvi_new_animal", 0.081, 0.05, 0.2]
    r.table = pd.concat([r.table, row], ignore_index=True)
    text = "\n".join(out_mod._html_estimates(r))
    assert f"{row['analyte'].iloc[0]} 8.1 % (5.0-20.0 %)" in text


def test_steps_section_lists_every_step_of_every_analyte(result):
    part = out_mod._html_steps(result)
    assert len(part) == 1 + len(result.notes)
    for part_html, aid in zip(part[1:], result.notes):
        assert part_html.count("<li>") == len(out_mod._steps_words(result, aid))
    # the Cochran critical values quoted are the ones of the steps table
    text = "\n".join(part)
    for x in result.removed[result.removed["step"].isin([1, 2])].itertuples(index=False):
        assert f"critical {x.critical_value:.3f}" in text


def test_removed_section_has_one_row_per_removal(result):
    rows = _rows(out_mod._html_removed(result))
    assert rows[0][:3] == ["analyte", "step", "test"] and len(rows) - 1 == len(result.removed)
    for cells, x in zip(rows[1:], result.removed.itertuples(index=False)):
        assert cells[0] == x.analyte and cells[7] == f"{x.statistic:.3f}"
    r = copy.copy(result)
    r.removed = result.removed.iloc[:0]
    assert "Nothing was removed" in "\n".join(out_mod._html_removed(r))


def test_removed_section_names_a_flagged_slope(result):
    r = copy.copy(result)
    r.slopes = result.slopes.copy()
    r.slopes.loc[r.slopes.index[0], "flagged"] = True
    x = r.slopes.iloc[0]
    assert f"{x.pct_per_week:+.2f} %/week" in "\n".join(out_mod._html_removed(r))


def test_figures_section_embeds_one_png_per_analyte(result):
    part = out_mod._html_figures(result)
    imgs = [p for p in part if "<img" in p]
    assert len(imgs) == len(result.notes)
    for p in imgs:
        data = p.split("base64,", 1)[1].split("'", 1)[0]
        assert base64.b64decode(data)[:8] == b"\x89PNG\r\n\x1a\n"


def test_methods_section_states_the_cochran_formula_and_escaped_priors(result):
    text = "\n".join(out_mod._html_methods(result))
    assert "1/(1 + (k-1)/F)" in text and "Reed AH et al. Clin Chem 1971;17:275" in text
    assert "Priors" not in text  # ANOVA only
    r = copy.copy(result)
    aid = next(iter(result.notes))
    r.bayes = {aid: types.SimpleNamespace(priors={"mu": "Normal(4, 1) <ln scale>"})}
    text = "\n".join(out_mod._html_methods(r))
    assert "Priors" in text and "Normal(4, 1) &lt;ln scale&gt;" in text


def test_page_is_the_sections_in_order_with_cautions_at_both_ends(result):
    page = study_html(result, figures=False)
    sections = (out_mod._html_head(result) + out_mod._html_estimates(result) + out_mod._html_steps(result)
                + out_mod._html_removed(result) + out_mod._html_methods(result))
    assert page == "\n".join(sections + [out_mod._cautions(), "</body></html>"])
    assert page.count("Decision support, not a diagnosis.") == 2
    assert "<h2>Figures</h2>" not in page and "data:image/png" not in page
    pos = [page.index(h) for h in ("<h2>Estimates", "<h2>Steps", "<h2>Removed", "<h2>Methods")]
    assert pos == sorted(pos)
    with_figures = study_html(result, figures=True)
    assert with_figures.index("<h2>Removed") < with_figures.index("<h2>Figures") < with_figures.index("<h2>Methods")
