"""The clinician's desk (``bayesbase serve``, :mod:`bayesbase.web`) over HTTP, with Starlette's
test client: every page, the patient list's search/sort/pagination, the patient page and its
downloads, import (dry run, problems, confirm once, idempotent re-import, conflicts), the prior
packs, and the guards (CSRF, access token, host check, upload limit, escaping, CSP).

Outside references: the expected answers of the case library's invented cases
(``case.toml``: ALP is a probable increase for DEMO-D02, nothing changes for DEMO-D01); Python's
own ``sorted`` for the list's order; the standard library's HTML parser for markup and
escaping; the spreadsheet convention for row numbers (header = row 1); pypdf for the PDF.
"""
from __future__ import annotations

import csv
import html
import io
import json
import re
import subprocess
import sys
import tomllib
from html.parser import HTMLParser

import pytest

from bayesbase.constants import CAUTIONS
from bayesbase.store import Store
from bayesbase.testing import synthetic_canonical
from bayesbase.web import DeskConfig, create_app
from bayesbase.web.config import LOOPBACK_HOSTS

from conftest import CASE_DIR

starlette_testclient = pytest.importorskip("starlette.testclient")
TestClient = starlette_testclient.TestClient

BASE = "http://127.0.0.1:8765"
ALP_DIR = CASE_DIR / "dog_alp_personal_change"
STABLE_DIR = CASE_DIR / "dog_stable_wellness"
XSS_ID = "<script>alert(1)</script>"
XSS_BREED = '"onmouseover=alert(1) x'
XSS_SPECIMEN = "javascript:alert(1)"


# --------------------------------------------------------------------------- helpers
class Markup(HTMLParser):
    """Every start tag with its attributes, the text of script elements, the text of the cells
    of each table row (by table class), and all text."""

    def __init__(self, text: str):
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict]] = []
        self.scripts: list[str] = []
        self.rows: dict[str, list[list[str]]] = {}
        self._stack_tables: list[str] = []
        self._in_script = False
        self._row: list[str] | None = None
        self._cell: list[str] | None = None
        self.feed(text)

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append((tag, a))
        if tag == "script":
            self._in_script = True
            self.scripts.append("")
        elif tag == "table":
            self._stack_tables.append(a.get("class") or "")
        elif tag == "tr":
            self._row = []
        elif tag in ("td", "th") and self._row is not None:
            self._cell = []

    def handle_endtag(self, tag):
        if tag == "script":
            self._in_script = False
        elif tag in ("td", "th") and self._cell is not None and self._row is not None:
            self._row.append(" ".join("".join(self._cell).split()))
            self._cell = None
        elif tag == "tr" and self._row is not None and self._stack_tables:
            self.rows.setdefault(self._stack_tables[-1], []).append(self._row)
            self._row = None
        elif tag == "table" and self._stack_tables:
            self._stack_tables.pop()

    def handle_data(self, data):
        if self._in_script:
            self.scripts[-1] += data
        if self._cell is not None:
            self._cell.append(data)

    def table(self, cls: str) -> list[list[str]]:
        """Body rows (first row is the header) of the table whose class contains ``cls``."""
        for k, rows in self.rows.items():
            if cls in k.split():
                return rows[1:]
        raise AssertionError(f"no table with class {cls}")


def csrf_of(page: str) -> str:
    m = re.search(r'name="csrf" value="([^"]+)"', page)
    assert m, "the page has no form with a CSRF token"
    return m.group(1)


def upload(client, name: str, data: bytes, csrf: str | None = None):
    if csrf is None:
        csrf = csrf_of(client.get("/import").text)
    return client.post("/import", data={"csrf": csrf},
                       files={"file": (name, data, "application/octet-stream")})


def staged_uid(page: str) -> str:
    return re.search(r'name="upload" value="([^"]+)"', page).group(1)


def counts(page: str) -> dict[str, int]:
    return {k: int(re.search(rf'id="{k}">(\d+)<', page).group(1))
            for k in ("rows-added", "rows-skipped", "n-conflicts")}


def stored(db) -> tuple[int, int]:
    """(results stored, imports logged)."""
    with Store(db) as st:
        c = st.connection
        return (c.execute("SELECT count(*) FROM results").fetchone()[0],
                c.execute("SELECT count(*) FROM import_log").fetchone()[0])


def xss_csv() -> bytes:
    rows = list(csv.DictReader(io.StringIO((ALP_DIR / "results.csv").read_text(encoding="utf-8"))))
    out = io.StringIO()
    w = csv.DictWriter(out, fieldnames=list(rows[0]))
    w.writeheader()
    for r in rows:
        r = {**r, "patient": XSS_ID, "breed": XSS_BREED}
        if r["specimen"] == "D02-2025-11-12":
            r["specimen"] = XSS_SPECIMEN
        w.writerow(r)
    return out.getvalue().encode("utf-8")


def case(path) -> dict:
    return tomllib.loads((path / "case.toml").read_text(encoding="utf-8"))


def assert_cautions(text: str) -> None:
    plain = html.unescape(text)
    for line in CAUTIONS:
        assert plain.count(line) >= 2, f"caution missing (top and bottom): {line}"


def assert_safe_markup(text: str) -> Markup:
    """No inline script, no event-handler attribute, no javascript: URL."""
    m = Markup(text)
    for tag, attrs in m.tags:
        for k, v in attrs.items():
            assert not k.lower().startswith("on"), f"<{tag} {k}=...> event attribute"
            if k in ("href", "src", "action", "formaction"):
                assert not (v or "").strip().lower().startswith("javascript:"), (tag, k, v)
        if tag == "script":
            assert attrs.get("src") == "/static/desk.js", attrs
    assert all(not s.strip() for s in m.scripts), "inline script"
    return m


def make_client(tmp_path, **cfg):
    cfg.setdefault("db", tmp_path / "store.sqlite")
    cfg.setdefault("staging_dir", tmp_path / "staging")
    return TestClient(create_app(DeskConfig(**cfg)), base_url=BASE)


# --------------------------------------------------------------------------- fixtures
@pytest.fixture(scope="module")
def desk(tmp_path_factory):
    """A desk over a store holding the ALP case, the stable case and the XSS patient."""
    d = tmp_path_factory.mktemp("desk")
    db = d / "store.sqlite"
    with Store(db) as st:
        st.import_file(ALP_DIR / "results.csv")
        st.import_file(STABLE_DIR / "results.csv")
        xss = d / "xss.csv"
        xss.write_bytes(xss_csv())
        st.import_file(xss)
    with make_client(d, db=db) as client:
        yield client


@pytest.fixture(scope="module")
def many(tmp_path_factory):
    """A desk over 120 invented patients (for search, sort and pagination)."""
    d = tmp_path_factory.mktemp("many")
    frame = synthetic_canonical(120, 2, 2)
    with Store(d / "store.sqlite") as st:
        st.import_frame(frame, "synthetic")
        listing = st.patients()
    with make_client(d) as client:
        yield client, listing


# --------------------------------------------------------------------------- every page
PAGES = ["/", "/patients", "/patient?id=DEMO-D02", "/import", "/priors",
         "/priors/pack?kind=builtin&name=dog", "/priors/pack?kind=builtin&name=cat"]


@pytest.mark.parametrize("path", PAGES)
def test_every_page_shows_the_cautions_under_a_strict_policy(desk, path):
    r = desk.get(path)
    assert r.status_code == 200, r.text[-500:]
    assert r.headers["content-type"].startswith("text/html")
    assert_cautions(r.text)
    csp = r.headers["content-security-policy"]
    directives = dict(d.strip().split(" ", 1) for d in csp.split(";"))
    assert directives["script-src"] == "'self'" and "unsafe" not in csp
    assert directives["default-src"] == "'none'" and directives["frame-ancestors"] == "'none'"
    assert r.headers["x-content-type-options"] == "nosniff"
    assert r.headers["cache-control"] == "no-store"
    m = assert_safe_markup(r.text)
    # assets come from the desk itself: no other origin anywhere
    for _, attrs in m.tags:
        for k in ("src", "href"):
            v = attrs.get(k) or ""
            assert not re.match(r"^(https?:)?//", v), v


def test_error_pages_show_the_cautions(desk):
    r = desk.get("/patient?id=NOBODY")
    assert r.status_code == 404 and "NOBODY" in r.text
    assert_cautions(r.text)


def test_static_files_are_served_by_the_desk(desk):
    js = desk.get("/static/desk.js")
    assert js.status_code == 200 and "textContent" in js.text and "innerHTML" not in js.text
    css = desk.get("/static/report.css")
    # the report's palette filled in (figures.PALETTE: baseline blue #0072B2, Okabe-Ito)
    assert css.status_code == 200 and "#0072B2" in css.text and "{{" not in css.text
    assert desk.get("/static/desk.css").status_code == 200


# --------------------------------------------------------------------------- patient list
def _ids(page_text: str) -> list[str]:
    return [row[0] for row in Markup(page_text).table("patients")]


def test_list_pages_in_the_order_python_sorts(many):
    client, listing = many
    ids = sorted(listing["patient"].astype(str))
    got = []
    for page in (1, 2, 3):
        r = client.get(f"/patients?page={page}")
        assert r.status_code == 200
        rows = _ids(r.text)
        assert len(rows) == (50 if page < 3 else 20)
        got += rows
    assert got == ids
    assert _ids(client.get("/patients?sort=id&order=desc").text) == ids[::-1][:50]
    # beyond the last page: the last page
    assert _ids(client.get("/patients?page=99").text) == ids[100:]


def test_list_sorts_by_last_specimen_and_age(many):
    client, listing = many
    by_last = sorted(zip(listing["last"], listing["patient"].astype(str)),
                     key=lambda t: (-t[0].value, t[1]))
    assert _ids(client.get("/patients?sort=last&order=desc").text) == [p for _, p in by_last][:50]
    # youngest first = latest birth date first
    young = sorted(zip(listing["birth_date"], listing["patient"].astype(str)),
                   key=lambda t: (-t[0].value, t[1]))
    assert _ids(client.get("/patients?sort=age&order=asc").text) == [p for _, p in young][:50]


def test_list_search_matches_id_and_breed(many):
    client, listing = many
    ids = listing["patient"].astype(str)
    r = client.get("/patients?q=0011")
    assert _ids(r.text) == sorted(i for i in ids if "0011" in i)
    beagles = sorted(listing.loc[listing["breed"] == "beagle", "patient"].astype(str))
    r = client.get("/patients?q=BEAGLE")  # case-insensitive
    assert f"{len(beagles)} patients" in r.text and _ids(r.text) == beagles[:50]
    # LIKE wildcards are searched for literally
    for q in ("%25", "_"):
        r = client.get(f"/patients?q={q}")
        assert "0 patients" in r.text and "No patient matches" in html.unescape(r.text)


@pytest.mark.parametrize("query", ["sort=owner", "order=up", "page=two"])
def test_bad_list_requests_are_refused(many, query):
    r = many[0].get(f"/patients?{query}")
    assert r.status_code == 400


def test_list_summaries_follow_the_case_library(desk):
    """/api/summaries counts what the report lists: ALP for DEMO-D02 (case.toml: in_summary),
    nothing for DEMO-D01 (every p_change_max 0.5)."""
    alp, stable = case(ALP_DIR), case(STABLE_DIR)
    listed = [e for e in alp["expect"] if e.get("in_summary")]
    r = desk.get("/api/summaries", params=[("id", alp["patient"]), ("id", stable["patient"]),
                                           ("id", "NOBODY")])
    data = r.json()
    assert set(data) == {alp["patient"], stable["patient"]}
    assert data[alp["patient"]]["changes"] == len(listed) == 1
    assert data[stable["patient"]]["changes"] == 0
    # cached afterwards: the list shows the numbers without the script
    page = Markup(desk.get("/patients").text).table("patients")
    row = next(r for r in page if r[0] == alp["patient"])
    assert row[6] == "1"


def test_summaries_are_recomputed_when_the_stored_results_change(tmp_path):
    with make_client(tmp_path) as client:
        csrf = csrf_of(client.get("/import").text)
        rows = (ALP_DIR / "results.csv").read_text(encoding="utf-8").splitlines()
        first = "\n".join(rows[:16]) + "\n"  # the three annual baselines only
        client.post("/import/confirm", data={"csrf": csrf, "upload": staged_uid(
            upload(client, "a.csv", first.encode(), csrf).text)})
        before = client.get("/api/summaries?id=DEMO-D02").json()["DEMO-D02"]
        client.post("/import/confirm", data={"csrf": csrf, "upload": staged_uid(
            upload(client, "b.csv", (ALP_DIR / "results.csv").read_bytes(), csrf).text)})
        after = client.get("/api/summaries?id=DEMO-D02").json()["DEMO-D02"]
    assert before["changes"] == 0 and after["changes"] == 1


# --------------------------------------------------------------------------- one patient
def _panel_rows(text: str) -> dict[str, tuple[dict, list[str]]]:
    m = Markup(text)
    attrs = [a for t, a in m.tags if t == "tr" and "data-analyte" in a]
    cells = m.table("panel")
    return {a["data-analyte"]: (a, c) for a, c in zip(attrs, cells)}


def test_patient_page_shows_the_probable_alp_change(desk):
    expect = {e["analyte"]: e for e in case(ALP_DIR)["expect"]}
    r = desk.get("/patient?id=DEMO-D02")
    rows = _panel_rows(r.text)
    assert set(expect) <= set(rows)
    attrs, cells = rows["alp"]
    p = float(cells[5].split()[0])
    assert p >= expect["alp"]["p_change_min"] and "probable" in attrs["class"]
    assert "\u2191" in cells[5]  # increase
    for a in ("alt", "creatinine", "potassium"):
        assert float(rows[a][1][5].split()[0]) <= expect[a]["p_change_max"]
    text = html.unescape(r.text)
    assert "ALP" in text.split("Panel summary", 1)[1].split("Results", 1)[0]
    # the specimen picker offers every specimen, the figures one image per analyte
    m = Markup(r.text)
    options = [a.get("value") for t, a in m.tags if t == "option"]
    assert {"D02-2023-11-08", "D02-2024-11-13", "D02-2025-11-12", "D02-2026-11-18"} <= set(options)
    figs = [a["src"] for t, a in m.tags if t == "img" and "figure.png" in a.get("src", "")]
    assert len(figs) == len(rows)


def test_an_earlier_specimen_is_assessed_against_its_own_past(desk):
    r = desk.get("/patient?id=DEMO-D02&at=D02-2025-11-12")
    assert r.status_code == 200
    assert "D02-2025-11-12 \u2014 collected 12 Nov 2025" in html.unescape(r.text)
    rows = _panel_rows(r.text)
    # ALP 18 U/L against 19 and 21: no probable change (the case's story: stable until 2026)
    assert float(rows["alp"][1][5].split()[0]) < 0.5
    assert "probable" not in rows["alp"][0].get("class", "")
    # the later specimen is shown, marked as not used
    assert "after the assessed specimen" in html.unescape(r.text)


@pytest.mark.parametrize("query,status,words", [
    ("id=DEMO-D02&coverage=1.5", 400, "coverage"),
    ("id=DEMO-D02&coverage=abc", 400, "coverage"),
    ("id=DEMO-D02&prior_change=0", 400, "prior probability"),
    ("id=DEMO-D02&engine=fast", 400, "engine"),
    ("id=DEMO-D02&at=NOT-A-SPECIMEN", 400, "NOT-A-SPECIMEN"),
    ("id=NOBODY", 404, "NOBODY"),
    ("", 400, "patient"),
])
def test_bad_settings_are_refused_with_the_reason(desk, query, status, words):
    r = desk.get(f"/patient?{query}")
    assert r.status_code == status and words in html.unescape(r.text)
    assert_cautions(r.text)


def test_settings_reach_the_assessment(desk):
    """The JSON download carries the settings; a wider coverage gives a wider personal
    interval (a central interval at 99 % contains the one at 95 %)."""
    base = json.loads(desk.get("/patient/assessment.json?id=DEMO-D02").text)
    wide = json.loads(desk.get("/patient/assessment.json?id=DEMO-D02&coverage=0.99"
                               "&prior_change=0.3&keep_compromised=1").text)

    def alp(doc):
        return next(r for r in doc if r["analyte"] == "alp")

    a, b = alp(base), alp(wide)
    assert a["personal_interval"]["coverage"] == 0.95 and b["personal_interval"]["coverage"] == 0.99
    assert b["personal_interval"]["lower"] < a["personal_interval"]["lower"]
    assert b["personal_interval"]["upper"] > a["personal_interval"]["upper"]
    # a larger prior probability of change raises the posterior probability (Bayes' rule)
    assert b["p_change"] > a["p_change"]


def test_downloads_are_the_report_and_the_assessment(desk):
    page = desk.get("/patient?id=DEMO-D02").text
    p_page = float(_panel_rows(page)["alp"][1][5].split()[0])
    r = desk.get("/patient/assessment.json?id=DEMO-D02")
    assert r.headers["content-disposition"] == 'attachment; filename="assessment-DEMO-D02.json"'
    doc = json.loads(r.text)
    alp = next(x for x in doc if x["analyte"] == "alp")
    assert alp["patient"] == "DEMO-D02" and round(alp["p_change"], 2) == p_page
    h = desk.get("/patient/report.html?id=DEMO-D02")
    assert h.headers["content-disposition"].startswith("attachment;")
    assert "Probability of change \u2014 patient DEMO-D02" in h.text
    assert_cautions(h.text)
    pdf = desk.get("/patient/report.pdf?id=DEMO-D02")
    assert pdf.headers["content-type"] == "application/pdf" and pdf.content.startswith(b"%PDF")
    from pypdf import PdfReader

    text = "".join(p.extract_text() for p in PdfReader(io.BytesIO(pdf.content)).pages)
    assert "DEMO-D02" in text and CAUTIONS[0] in text


@pytest.mark.parametrize("query,kw", [
    ("", {}),
    ("&at=D02-2025-11-12&coverage=0.99", {"at": "D02-2025-11-12", "coverage": 0.99}),
])
def test_the_desk_assesses_as_the_command_line_does(desk, query, kw):
    """No second implementation: the desk's JSON equals ``bayesbase.assess`` on the same file
    (what ``bayesbase assess --format json`` prints)."""
    from bayesbase.assessment import assess
    from bayesbase.io import read_results

    ours = json.loads(desk.get(f"/patient/assessment.json?id=DEMO-D02{query}").text)
    theirs = json.loads(assess(read_results(ALP_DIR / "results.csv"), patient="DEMO-D02",
                               **kw).to_json())
    assert ours == theirs


def test_figures_are_png_images(desk):
    r = desk.get("/patient/figure.png?id=DEMO-D02&analyte=alp")
    assert r.status_code == 200 and r.content.startswith(b"\x89PNG\r\n\x1a\n")
    assert desk.get("/patient/legend.png").content.startswith(b"\x89PNG")
    assert desk.get("/patient/figure.png?id=DEMO-D02&analyte=tsh").status_code == 404


# --------------------------------------------------------------------------- escaping
@pytest.mark.parametrize("path", [
    "/patients", "/patients?q=%3Cscript%3E",
    "/patient?id=%3Cscript%3Ealert(1)%3C%2Fscript%3E",
    "/patient?id=%3Cscript%3Ealert(1)%3C%2Fscript%3E&at=javascript%3Aalert(1)",
    "/patient?id=%3Cb%3Enobody%3C%2Fb%3E",
])
def test_hostile_values_render_as_text(desk, path):
    r = desk.get(path)
    assert r.status_code in (200, 404)
    raw = r.text
    assert "<script>alert(1)" not in raw and "<b>nobody" not in raw
    assert '"onmouseover=' not in raw
    m = assert_safe_markup(raw)
    text = html.unescape(raw)
    if r.status_code == 200 and "patients" not in path:
        assert XSS_ID in text and XSS_BREED in text and XSS_SPECIMEN in text
    if path == "/patients":
        row = next(r for r in m.table("patients") if r[0] == XSS_ID)
        assert row[2] == XSS_BREED
        href = next(a["href"] for t, a in m.tags if t == "a" and "%3Cscript" in a.get("href", ""))
        assert href == "/patient?id=%3Cscript%3Ealert%281%29%3C%2Fscript%3E"


def test_hostile_values_in_problems_render_as_text(tmp_path):
    bad = ("patient,species,specimen,collected_at,analyte,value,unit\n"
           "P1,dog,S1,2025-01-02,<img src=x onerror=alert(1)>,12,U/L\n").encode()
    with make_client(tmp_path) as client:
        r = upload(client, '<svg onload=alert(1)>.csv', bad)
    assert r.status_code == 422
    assert "<img src=x" not in r.text and "<svg onload" not in r.text
    assert_safe_markup(r.text)
    assert "<img src=x onerror=alert(1)>" in html.unescape(r.text)


# --------------------------------------------------------------------------- import
def test_dry_run_writes_nothing_and_confirm_imports_once(tmp_path):
    db = tmp_path / "store.sqlite"
    data = (ALP_DIR / "results.csv").read_bytes()
    n_rows = len(data.decode().strip().splitlines()) - 1
    with make_client(tmp_path, db=db) as client:
        r = upload(client, "results.csv", data)
        assert r.status_code == 200 and "nothing written" in r.text
        assert counts(r.text) == {"rows-added": n_rows, "rows-skipped": 0, "n-conflicts": 0}
        assert stored(db) == (0, 0)  # the dry run stored nothing
        uid = staged_uid(r.text)
        csrf = csrf_of(r.text)
        done = client.post("/import/confirm", data={"csrf": csrf, "upload": uid})
        assert done.status_code == 200 and "Imported results.csv" in done.text
        assert stored(db) == (n_rows, 1)
        again = client.post("/import/confirm", data={"csrf": csrf, "upload": uid})
        assert again.status_code == 409 and "already imported" in again.text
        assert stored(db) == (n_rows, 1)
        # the same file again: nothing new
        r = upload(client, "results.csv", data, csrf)
        assert counts(r.text) == {"rows-added": 0, "rows-skipped": n_rows, "n-conflicts": 0}
        done = client.post("/import/confirm", data={"csrf": csrf, "upload": staged_uid(r.text)})
        assert "Nothing new" in done.text and stored(db)[0] == n_rows
    assert not any((tmp_path / "staging").rglob("*.csv"))  # staged copies removed


def test_validation_problems_name_file_row_and_column(tmp_path):
    lines = (ALP_DIR / "results.csv").read_text(encoding="utf-8").splitlines()
    header = lines[0].split(",")
    bad = lines[2].split(",")
    bad[header.index("value")] = "abc"  # data row 2 = spreadsheet row 3
    lines[2] = ",".join(bad)
    db = tmp_path / "store.sqlite"
    with make_client(tmp_path, db=db) as client:
        r = upload(client, "broken.csv", ("\n".join(lines) + "\n").encode())
    assert r.status_code == 422 and "nothing was stored" in r.text
    problems = Markup(r.text).table("problems")
    assert ["broken.csv", "3", "value"] in [p[:3] for p in problems]
    assert stored(db) == (0, 0)
    assert "confirm" not in r.text.split("problems", 1)[1].split("</table>", 1)[0]


def test_conflicts_are_shown_and_refused_unless_replaced(tmp_path):
    db = tmp_path / "store.sqlite"
    with Store(db) as st:
        st.import_file(ALP_DIR / "results.csv")
    text = (ALP_DIR / "results.csv").read_text(encoding="utf-8").replace(
        "alp,58,U/L", "alp,60,U/L")
    with make_client(tmp_path, db=db) as client:
        r = upload(client, "corrected.csv", text.encode())
        assert counts(r.text)["n-conflicts"] == 1
        assert "specimen D02-2026-11-18, analyte alp: value stored" in html.unescape(r.text)
        csrf, uid = csrf_of(r.text), staged_uid(r.text)
        refused = client.post("/import/confirm", data={"csrf": csrf, "upload": uid})
        assert refused.status_code == 409 and "nothing was imported" in refused.text
        with Store(db) as st:
            assert 58 in set(st.history("DEMO-D02", "alp")["value"])
        done = client.post("/import/confirm", data={"csrf": csrf, "upload": uid, "replace": "1"})
        assert done.status_code == 200
    with Store(db) as st:
        assert 60 in set(st.history("DEMO-D02", "alp")["value"])
        assert len(st.replaced()) >= 1


def test_xlsx_and_fhir_files_are_previewed(tmp_path):
    import openpyxl

    from bayesbase.io import read_results, write_bundle

    rows = list(csv.reader(io.StringIO((ALP_DIR / "results.csv").read_text(encoding="utf-8"))))
    wb = openpyxl.Workbook()
    for row in rows:
        wb.active.append(row)
    xlsx = tmp_path / "results.xlsx"
    wb.save(xlsx)
    bundle = write_bundle(read_results(ALP_DIR / "results.csv"), tmp_path / "bundle.json",
                          pseudonymise=False)
    with make_client(tmp_path) as client:
        for path in (xlsx, bundle):
            r = upload(client, path.name, path.read_bytes())
            assert r.status_code == 200, r.text[-800:]
            assert counts(r.text)["rows-added"] == len(rows) - 1


def test_unsupported_or_missing_files_are_refused(tmp_path):
    with make_client(tmp_path) as client:
        assert upload(client, "notes.docx", b"x").status_code == 400
        csrf = csrf_of(client.get("/import").text)
        assert client.post("/import", data={"csrf": csrf}).status_code == 400


# --------------------------------------------------------------------------- guards
def test_forms_without_the_csrf_token_are_refused(tmp_path):
    db = tmp_path / "store.sqlite"
    data = (ALP_DIR / "results.csv").read_bytes()
    with make_client(tmp_path, db=db) as client:
        good = csrf_of(client.get("/import").text)
        for form in ({}, {"csrf": "x" * 43}):
            r = client.post("/import", data=form, files={"file": ("r.csv", data, "text/csv")})
            assert r.status_code == 403 and "security token" in r.text
        r = client.post("/import", data={"csrf": good}, files={"file": ("r.csv", data, "text/csv")},
                        headers={"origin": "http://elsewhere.example"})
        assert r.status_code == 403
        uid = staged_uid(upload(client, "r.csv", data, good).text)
        r = client.post("/import/confirm", data={"upload": uid})
        assert r.status_code == 403
        # another browser (no cookie) with a token copied from a page is refused too
        client.cookies.clear()
        r = client.post("/import/confirm", data={"csrf": good, "upload": uid})
        assert r.status_code == 403
    assert stored(db) == (0, 0)


def test_every_form_that_changes_something_carries_the_token(desk):
    text = desk.get("/import").text
    forms = re.findall(r"<form[^>]*>.*?</form>", text, re.S)
    posts = [f for f in forms if 'method="post"' in f]
    assert posts and all('name="csrf"' in f for f in posts)
    for path in PAGES:  # GET forms (search, settings) change nothing
        for f in re.findall(r"<form[^>]*>", desk.get(path).text):
            assert 'method="post"' in f or 'method="get"' in f


def test_a_desk_on_another_host_requires_its_token(tmp_path):
    token = "t" * 43
    with make_client(tmp_path, token=token, allowed_hosts=None) as client:
        for path in ("/", "/patients", "/static/desk.js", "/api/summaries", "/import"):
            r = client.get(path)
            assert r.status_code == 401, path
        r = client.get("/")
        assert "Access token required" in r.text
        assert_cautions(r.text)
        assert client.get("/?token=wrong").status_code == 401
        assert client.get("/", headers={"authorization": f"Bearer {token}"}).status_code == 200
        r = client.get(f"/patients?q=x&token={token}", follow_redirects=False)
        assert r.status_code == 303 and r.headers["location"] == "/patients?q=x"
        assert "HttpOnly" in r.headers["set-cookie"] and "SameSite=Strict" in r.headers["set-cookie"]
        assert client.get("/patients?q=x").status_code == 200  # the cookie now
        client.cookies.clear()
        assert client.get("/patients").status_code == 401


def test_loopback_desk_refuses_other_host_names(desk):
    r = desk.get("/", headers={"host": "attacker.example:8765"})
    assert r.status_code == 400 and "unknown host" in r.text
    for host in ("localhost:8765", "127.0.0.1:8765", "[::1]:8765"):
        assert desk.get("/import", headers={"host": host}).status_code == 200
    assert set(LOOPBACK_HOSTS) == {"127.0.0.1", "localhost", "::1"}


def test_uploads_over_the_limit_are_refused_with_a_clear_message(tmp_path):
    db = tmp_path / "store.sqlite"
    data = (ALP_DIR / "results.csv").read_bytes()
    with make_client(tmp_path, db=db, max_upload_bytes=1024) as client:
        r = upload(client, "results.csv", data)
    assert r.status_code == 413
    assert "larger than this desk's limit of 1024 bytes" in html.unescape(r.text)
    assert "nothing was stored" in r.text
    assert stored(db) == (0, 0)
    from bayesbase.web.security import limit_text

    assert limit_text(DeskConfig(db=db)) == "50 MB"  # the default of bayesbase serve


def test_a_body_without_a_length_is_counted_against_the_limit(tmp_path):
    """A chunked body (no Content-Length) is cut off once past the limit."""
    import asyncio

    app = create_app(DeskConfig(db=tmp_path / "s.sqlite", max_upload_bytes=1000,
                                staging_dir=tmp_path / "staging"))
    head = (b'--b\r\nContent-Disposition: form-data; name="file"; filename="a.csv"\r\n'
            b"Content-Type: text/csv\r\n\r\n")
    chunks = [head, b"x" * 600, b"y" * 600, b"z" * 600]
    sent = []

    async def receive():
        body = chunks.pop(0) if chunks else b""
        return {"type": "http.request", "body": body, "more_body": bool(chunks)}

    async def send(message):
        sent.append(message)

    scope = {"type": "http", "method": "POST", "path": "/import", "raw_path": b"/import",
             "query_string": b"", "root_path": "", "scheme": "http", "http_version": "1.1",
             "headers": [(b"host", b"127.0.0.1:8765"),
                         (b"content-type", b"multipart/form-data; boundary=b")],
             "client": ("127.0.0.1", 5), "server": ("127.0.0.1", 8765)}
    asyncio.run(app(scope, receive, send))
    assert sent[0]["status"] == 413 and b"limit" in sent[1]["body"]


# --------------------------------------------------------------------------- priors
def test_pack_page_shows_every_number_with_its_source(desk):
    from bayesbase.priors import describe, load_pack

    r = desk.get("/priors/pack?kind=builtin&name=dog")
    text = html.unescape(r.text)
    table = describe(load_pack("dog"))
    for src in set(table["source"]):
        assert " ".join(str(src).split()) in " ".join(text.split())
    for prov in set(table["provenance"]):
        assert f'<span class="prov">{prov}</span>' in text
    m = Markup(r.text)
    numbers = [row for cls, rows in m.rows.items() if "numbers" in cls for row in rows[1:]]
    assert len(numbers) >= len(table)
    longest = max(len(c) for row in numbers for c in row)
    assert longest < 300, f"a table cell of {longest} characters"
    # every source number in a table points at a listed source
    refs = {int(n) for n in re.findall(r'href="#src-(\d+)"', r.text)}
    listed = {int(n) for n in re.findall(r'<li id="src-(\d+)"', r.text)}
    assert refs == listed and listed == set(range(1, len(listed) + 1))


def test_pack_files_in_a_folder_are_listed(tmp_path):
    import hashlib

    folder = tmp_path / "packs"
    folder.mkdir()
    study = tmp_path / "study.csv"
    study.write_text("animal,specimen,analyte,value\nA,1,creatinine,90\n", encoding="utf-8")
    sha = hashlib.sha256(study.read_bytes()).hexdigest()
    source = f"bayesbase calibrate on store study.csv (sha256 {sha})"
    (folder / "dog-clinic.toml").write_text(
        '[pack]\nid = "dog+clinic"\nspecies = "dog"\ntitle = "clinic calibration"\n'
        'version = "1"\nextends = "dog"\n\n[analytes.creatinine]\n'
        f'cvg = {{ value = 0.2, source = "{source}", provenance = "calibrated" }}\n',
        encoding="utf-8")
    (folder / "broken.toml").write_text("[pack]\nid = 3\n", encoding="utf-8")
    with make_client(tmp_path, packs_dir=folder) as client:
        listing = client.get("/priors").text
        assert "dog+clinic" in listing and "broken.toml" in listing
        page = client.get("/priors/pack?kind=folder&name=dog-clinic.toml")
        assert page.status_code == 200 and source in html.unescape(page.text)
        assert client.get("/priors/pack?kind=folder&name=..%2Fstudy.csv").status_code == 404
        assert client.get("/priors/pack?kind=builtin&name=horse-x").status_code == 404


# --------------------------------------------------------------------------- the command
def test_serve_command_is_listed_and_stays_lazy():
    from bayesbase.cli.main import build_parser

    ap = build_parser()
    args = ap.parse_args(["serve", "--db", "x.sqlite", "--port", "0", "--max-upload-mb", "5"])
    assert (args.host, args.port, args.max_upload_mb, args.open) == ("127.0.0.1", 0, 5.0, False)
    code = ("import sys\nfrom bayesbase.cli import main\n"
            "try:\n    main(['--help'])\nexcept SystemExit:\n    pass\n"
            "print([m for m in ('starlette', 'uvicorn', 'jinja2', 'bayesbase.web') "
            "if m in sys.modules])\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip().splitlines()[-1] == "[]"


def test_serving_plan_guards_other_hosts(tmp_path):
    from bayesbase.errors import BayesbaseError
    from bayesbase.web import server

    local = server.plan(tmp_path / "s.sqlite", "127.0.0.1", 0)
    try:
        assert local.config.token is None and local.config.allowed_hosts == LOOPBACK_HOSTS
        assert local.port > 0 and local.url == f"http://127.0.0.1:{local.port}/"
        with pytest.raises(BayesbaseError, match="choose another port"):
            server.plan(tmp_path / "s.sqlite", "127.0.0.1", local.port)
    finally:
        local.sock.close()
    wide = server.plan(tmp_path / "s.sqlite", "0.0.0.0", 0, max_upload_mb=2)
    try:
        token = wide.config.token
        assert token and len(token) >= 40 and wide.url.endswith(f"/?token={token}")
        assert wide.config.allowed_hosts is None
        assert wide.config.max_upload_bytes == 2 * 1024 * 1024
    finally:
        wide.sock.close()
    with pytest.raises(BayesbaseError, match="max-upload-mb"):
        server.plan(tmp_path / "s.sqlite", "127.0.0.1", 0, max_upload_mb=0)
