"""Tests of bayesbase.report: panel false-discovery selection, the many-results chance line,
HTML safety (escaping, no network references), PDF content.

The fake assessment below is invented demo data (one dog, five specimens, 25 analytes) shaped
exactly like the documented Assessment.table / Assessment.history columns of DEVELOPERS.md.
"""
from __future__ import annotations

import itertools
import re
from dataclasses import dataclass, field
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from bayesbase import report, units
from bayesbase.constants import CAUTIONS, PANEL_FDR, PROBABLE_CHANGE
from bayesbase.errors import BayesbaseError

SEED = 20261202


# --------------------------------------------------------------------------- fake inputs
@dataclass(frozen=True)
class Cited:
    value: float
    source: str
    provenance: str
    note: str | None = None


@dataclass(frozen=True)
class RetestGroup:
    hours_min: float
    hours_max: float
    source: str = "common practice"


@dataclass
class FakePack:
    id: str = "dog-demo"
    title: str = "Invented demo pack"
    version: str = "0"
    sha256: str = "0" * 64
    cited: dict = field(default_factory=dict)
    retest_groups: dict = field(default_factory=dict)


@dataclass
class FakeAssessment:
    table: pd.DataFrame
    history: pd.DataFrame
    attrs: dict


ANALYTES = ['creatinine', 'urea', 'sdma', 'glucose', 'cholesterol', 'triglycerides',
            'total_bilirubin', 'fructosamine', 'bile_acids', 'total_protein', 'albumin',
            'globulin', 'alt', 'ast', 'alp', 'ggt', 'ck', 'lipase', 'calcium', 'phosphate',
            'sodium', 'potassium', 'chloride', 'haematocrit', 'wbc']
GROUP = {a: ("haematology" if a in ("haematocrit", "wbc") else
             "liver" if a in ("alt", "ast", "alp", "ggt", "bile_acids", "total_bilirubin") else
             "chemistry") for a in ANALYTES}
# P(change) per analyte: a few high, some uncertain, most low (invented)
P_CHANGE = dict(zip(ANALYTES, [0.97, 0.35, 0.55, 0.05, 0.02, 0.12, 0.03, 0.04, 0.08, 0.02, 0.01,
                               0.03, 0.995, 0.62, 0.04, 0.02, 0.06, 0.09, 0.03, 0.07, 0.01, 0.02,
                               0.02, 0.05, 0.88]))


def fake_assessment(patient="Demo-1", n_analytes=25, trend=True):
    rng = np.random.default_rng(SEED)
    t0 = pd.Timestamp("2024-01-10 09:00")
    specs = [("S1", t0), ("S2", t0 + pd.Timedelta(days=150)), ("S3", t0 + pd.Timedelta(days=330)),
             ("S4", t0 + pd.Timedelta(days=520)), ("S5", t0 + pd.Timedelta(days=700))]
    birth = pd.Timestamp("2017-03-01")
    hist, tab = [], []
    for a in ANALYTES[:n_analytes]:
        centre = float(rng.uniform(5, 200))  # invented demo magnitudes
        cvi = float(rng.uniform(0.04, 0.2))
        cvg = float(rng.uniform(0.1, 0.3))
        cva = 0.03
        vals = centre * np.exp(rng.normal(0, cvi, size=len(specs)))
        p = P_CHANGE[a]
        if p > 0.8:
            vals[-1] *= 1.45
        for (s, t), v in zip(specs, vals):
            role, reason = "baseline", ""
            if s == "S2":
                role, reason = "unwell", "state unwell"
            if s == "S3" and a in ("alt", "ast", "potassium"):
                role, reason = "excluded", "haemolysis index above the pack threshold"
            if s == "S5":
                role, reason = "assessed", ""
            hist.append(dict(patient=patient, species="dog", breed="labrador retriever",
                             sex="female_neutered", birth_date=birth, specimen=s, collected_at=t,
                             analyte=a, value=float(v), unit=units.canonical_unit(a),
                             reported_value=f"{v:.4g}", reported_unit=units.canonical_unit(a),
                             censor="", method="demo analyser", replicate=1, fasted=True,
                             haemolysis=np.nan, lipaemia=np.nan, icterus=np.nan,
                             state="unwell" if s == "S2" else "", source_file="demo.csv",
                             source_row=len(hist) + 2, role=role, reason=reason,
                             age_years=(t - birth).days / 365.25))
        base = vals[[0, 2, 3]] if a not in ("alt", "ast", "potassium") else vals[[0, 3]]
        sp = float(np.exp(np.mean(np.log(base))))
        val = float(vals[-1])
        rcv = 2.77 * np.hypot(cvi, cva) * 100
        up = (np.exp(1.96 * np.sqrt(2) * np.sqrt(np.log1p(cvi**2) + np.log1p(cva**2))) - 1) * 100
        down = 100 * (1 / (1 + up / 100) - 1)
        chg = 100 * (val / sp - 1)
        row = dict(
            patient=patient, species="dog", breed="labrador retriever", analyte=a,
            label=units.label(a), unit=units.canonical_unit(a), specimen="S5",
            collected_at=specs[-1][1], value=val, reported_value=f"{val:.4g}",
            reported_unit=units.canonical_unit(a), censor="", n_baseline=len(base),
            baseline_specimens="S1;S3;S4", assumed_healthy=len(base),
            set_point_mean=sp, set_point_lower=sp * 0.9, set_point_upper=sp * 1.1,
            pi_lower=sp * np.exp(-1.96 * cvi * 1.1), pi_upper=sp * np.exp(1.96 * cvi * 1.1),
            coverage=0.95, percentile=float(np.clip(0.5 + chg / 100, 0.001, 0.999)),
            bayes_factor=p / (1 - p) * 9, p_change=p, p_increase=0.9 if chg > 0 else 0.1,
            p_exceed_delta=np.nan, delta_pct=np.nan, change_pct=chg, rcv_classical_pct=rcv,
            rcv_one_sided_pct=rcv * 1.645 / 1.96, rcv_lognormal_up_pct=up,
            rcv_lognormal_down_pct=down, change_vs_last_pct=100 * (val / vals[-2] - 1),
            change_vs_mean_pct=chg, rcv_exceeded_last=abs(chg) > rcv,
            rcv_exceeded_mean=abs(chg) > rcv, lognormal_exceeded_last=(chg > up) or (chg < down),
            lognormal_exceeded_mean=(chg > up) or (chg < down), p_significant=0.5,
            model2_lower=sp * 0.8, model2_upper=sp * 1.2, ii=cvi / cvg,
            ii_total=np.hypot(cvi, cva) / cvg, n_for_setpoint=4, cva_high=cva > 0.5 * cvi,
            pop_lower=centre * np.exp(-1.96 * cvg), pop_upper=centre * np.exp(1.96 * cvg),
            outside_population=bool(val > centre * np.exp(1.96 * cvg)),
            cvi_pct=100 * cvi, cvg_pct=100 * cvg, cva_pct=100 * cva, retest_group=GROUP[a],
            quality="haemolysis" if a == "potassium" else "ok", comparable=True,
            flags=["fed: feeding-sensitive analyte"] if a == "triglycerides" else [],
            engine="exact", converged=True,
            trend_p_drift=np.nan, trend_p_increase=np.nan, trend_pct_per_year=np.nan,
            trend_pct_lower=np.nan, trend_pct_upper=np.nan, trend_years_to_limit=np.nan,
            trend_limit=np.nan,
        )
        if trend and a == "creatinine":
            row.update(trend_p_drift=0.97, trend_p_increase=0.99, trend_pct_per_year=9.0,
                       trend_pct_lower=4.0, trend_pct_upper=14.0, trend_years_to_limit=3.1,
                       trend_limit="upper")
        tab.append(row)
    attrs = dict(pack_id="dog-demo", pack_sha256="ab" * 32, engine="exact", seed=1234,
                 settings={"nodes": 24, "ci_prob": 0.95}, version="0.1.0", coverage=0.95,
                 prior_change=0.1)
    return FakeAssessment(pd.DataFrame(tab), pd.DataFrame(hist), attrs)


def fake_pack():
    cited = {a: {"cvi": Cited(0.1, f"Invented demo source for {a} CVI", "demo"),
                 "cvg": Cited(0.2, "Invented demo source (CVG)", "demo"),
                 "cva": Cited(0.03, "common practice", "demo")} for a in ANALYTES}
    groups = {"haematology": RetestGroup(24, 48), "liver": RetestGroup(168, 336),
              "chemistry": RetestGroup(72, 168)}
    return FakePack(cited=cited, retest_groups=groups)


class _Collect(HTMLParser):
    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags, self.attrs, self.text = [], [], []
        self.rows, self._row, self._cell, self._in_results = [], None, None, False

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.attrs.extend((tag, k, v) for k, v in attrs)
        d = dict(attrs)
        if tag == "table" and "results" in (d.get("class") or ""):
            self._in_results = True
        if self._in_results and tag == "tr":
            self._row = []
        if self._in_results and tag in ("td", "th"):
            self._cell = []

    def handle_endtag(self, tag):
        if tag == "table":
            self._in_results = False
        if self._in_results and tag in ("td", "th") and self._cell is not None:
            self._row.append(" ".join("".join(self._cell).split()))
            self._cell = None
        if self._in_results and tag == "tr" and self._row is not None:
            self.rows.append(self._row)
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


def test_panel_summary_lines():
    a = fake_assessment()
    s = report.panel_summary(a.table)
    mask = report.select_changes(a.table["p_change"].to_numpy())
    assert [c["analyte"] for c in s["changes"]] == list(
        a.table.loc[mask].sort_values("p_change", ascending=False)["analyte"])
    assert s["n"] == 25
    assert "1 \u2212 0.95^25 = 72 %" in s["outside_line"]  # 1 - 0.95^25 = 0.7226
    assert len(s["drift"]) == 1
    d = s["drift"][0]
    assert "Creatinine has been rising about 9 %/year" in d
    assert "P(drift) 0.97" in d and "~3.1 years" in d and "upper population limit" in d


def test_retest_advice_uses_pack_groups():
    a = fake_assessment()
    adv = {x["group"]: x for x in report.retest_advice(a.table, fake_pack())}
    # wbc p = 0.88 is not uncertain; haematocrit p = 0.05 neither: no haematology retest
    assert "haematology" not in adv
    assert adv["liver"]["when"] == "1\u20132 weeks"          # 168-336 h in the fake pack
    assert "AST" in adv["liver"]["analytes"]                   # p = 0.62 uncertain
    assert "ALT" not in adv["liver"]["analytes"]               # p = 0.995
    chem = adv["chemistry"]
    assert "Potassium" in chem["analytes"]                     # haemolysed sample
    assert "Triglycerides" in chem["analytes"]                 # flagged
    assert chem["when"] == "3\u20137 days"
    t = a.table.copy()
    t.loc[t["analyte"] == "wbc", "p_change"] = 0.5
    adv = {x["group"]: x for x in report.retest_advice(t, fake_pack())}
    assert adv["haematology"]["when"] == "24\u201348 h"


def test_personal_interval_path_calls_assess_per_specimen():
    a = fake_assessment(n_analytes=3)
    results = a.history.drop(columns=["role", "reason", "age_years"])
    calls = []

    def fake_assess(sub, pack, at, **kw):
        calls.append((at, sorted(sub["specimen"].unique()), kw))
        last = sub[sub["specimen"] == at]
        t = last.assign(pi_lower=last["value"] * 0.5, pi_upper=last["value"] * 2.0)
        return FakeAssessment(t, sub, {})

    path = report.personal_interval_path(results, None, "Demo-1", fake_assess, engine="exact")
    assert [c[0] for c in calls] == ["S2", "S3", "S4", "S5"]
    assert calls[0][1] == ["S1", "S2"] and calls[-1][1] == ["S1", "S2", "S3", "S4", "S5"]
    assert calls[0][2] == {"engine": "exact"}
    assert list(path.columns) == ["patient", "analyte", "specimen", "collected_at", "pi_lower",
                                  "pi_upper"]
    assert len(path) == 4 * 3


# --------------------------------------------------------------------------- the report itself
@pytest.fixture(scope="module")
def built(tmp_path_factory):
    d = tmp_path_factory.mktemp("rep")
    a = fake_assessment()
    files = report.build_report(a, fake_pack(), d / "r.html", pdf=d / "r.pdf", png_dir=d / "png",
                                dpi=72)
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
    text = " ".join(" ".join(parse(files.html).text).split())
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
    text = " ".join(" ".join(parse(files.html).text).split())
    i_sum, i_tab = text.find("Panel summary"), text.find("Results over time")
    assert 0 < i_sum < i_tab
    summary_part = text[i_sum: text.find("What to do next")]
    for lab in ("ALT", "Creatinine"):  # p 0.995 and 0.97 are selected
        assert lab in summary_part
    assert "Age at assessed specimen: 8.8 years" in text  # 2017-03-01 to 2025-12-10
    assert "haemolysis index above the pack threshold" in text


def test_pngs_written(built):
    a, files = built
    pngs = [p for p in files.pngs if p.suffix == ".png"]
    assert len(pngs) == len(a.table) + 1
    for p in pngs:
        assert p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_pdf_has_table_and_cautions(built):
    import pypdf
    a, files = built
    raw = files.pdf.read_bytes()
    assert raw[:5] == b"%PDF-"
    reader = pypdf.PdfReader(str(files.pdf))
    assert len(reader.pages) > 0
    text = " ".join(" ".join(page.extract_text() or "" for page in reader.pages).split())
    for lab in a.table["label"]:
        assert lab in text, lab
    for c in CAUTIONS:
        assert c in text
    assert "µmol/L" in text  # Unicode survives (DejaVu font)


def test_patient_name_is_escaped(tmp_path):
    evil = "<script>alert(1)</script>"
    a = fake_assessment(patient=evil, n_analytes=3)
    files = report.build_report(a, fake_pack(), tmp_path / "x.html")
    raw = files.html.read_text(encoding="utf-8")
    assert evil not in raw
    p = parse(files.html)
    assert "script" not in p.tags
    assert evil in "".join(p.text)  # shown as text


def test_several_patients_need_a_choice(tmp_path):
    a1, a2 = fake_assessment("A", 2), fake_assessment("B", 2)
    both = FakeAssessment(pd.concat([a1.table, a2.table]), pd.concat([a1.history, a2.history]),
                          a1.attrs)
    with pytest.raises(BayesbaseError, match="pass patient"):
        report.build_report(both, fake_pack(), tmp_path / "x.html")
    f = report.build_report(both, fake_pack(), tmp_path / "b.html", patient="B")
    assert "patient B" in f.html.read_text(encoding="utf-8")


# --------------------------------------------------------------------------- end to end on cases
CASES = Path(__file__).resolve().parents[1] / "case_library"


@pytest.mark.parametrize("case", ["dog_stable_wellness", "dog_unwell_visit_and_censored"])
def test_case_report_end_to_end(case, tmp_path):
    """A case from the case library through data -> priors -> assess -> report."""
    import tomllib

    from bayesbase.assessment import assess
    from bayesbase.data import load_results
    from bayesbase.priors import load_pack

    meta = tomllib.loads((CASES / case / "case.toml").read_text(encoding="utf-8"))
    pack = load_pack(meta["species"])
    csv = CASES / case / "results.csv"
    files = report.report_for_file(csv, meta["patient"], pack, tmp_path / "r.html",
                                   pdf=tmp_path / "r.pdf", at=meta.get("at"))
    a = assess(load_results(csv), pack=pack, at=meta.get("at"), patient=meta["patient"])
    _check_rows(a.table, files.html)
    text = " ".join(" ".join(parse(files.html).text).split())
    for c in CAUTIONS:
        assert text.count(c) >= 2
    # the header names every earlier specimen with its role
    hist = a.history
    for spec, g in hist.groupby("specimen"):
        assert spec in text
    if (hist["role"] == "unwell").any():
        assert "left out (unwell)" in text
    assert pack.sha256 in text
    import pypdf

    reader = pypdf.PdfReader(str(files.pdf))
    assert len(reader.pages) > 0
    ptext = " ".join(" ".join(pg.extract_text() or "" for pg in reader.pages).split())
    for lab in a.table["label"]:
        assert lab in ptext
