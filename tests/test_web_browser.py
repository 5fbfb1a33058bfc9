"""The clinician's desk end to end in a real browser: ``bayesbase serve`` started as a command on
a free port over a temporary store, driven in headless Debian Chromium (``/usr/bin/chromium``
through the matching ``/usr/bin/chromedriver``; nothing is downloaded).

The path a clinician takes: upload a case-library file through the form, read the dry run
(nothing stored yet), import, open the patient list and the patient, see the probable ALP change
in the table (the case's ``case.toml`` says so), switch to an earlier specimen, download the PDF
(it starts with ``%PDF``), upload a broken file and see its row and column with nothing stored;
then Ctrl-C stops the server cleanly. Screenshots are saved in the test's temporary folder.

Skips when Chromium, chromedriver or selenium is missing, unless ``BAYESBASE_REQUIRE_BROWSER=1``
(set by ``.ci/run``), where it fails instead.
"""
from __future__ import annotations

import os
import queue
import signal
import subprocess
import sys
import threading
import time
import tomllib
from pathlib import Path

import pytest

from bayesbase.constants import CAUTIONS
from bayesbase.store import Store

from conftest import CASE_DIR

CHROMIUM = Path("/usr/bin/chromium")
CHROMEDRIVER = Path("/usr/bin/chromedriver")
REQUIRE = os.environ.get("BAYESBASE_REQUIRE_BROWSER") == "1"
ALP_DIR = CASE_DIR / "dog_alp_personal_change"
FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--disable-dev-shm-usage", "--window-size=1400,1100")


def _need_browser():
    missing = [str(p) for p in (CHROMIUM, CHROMEDRIVER) if not p.exists()]
    try:
        import selenium  # noqa: F401
    except ImportError:
        missing.append("the selenium package")
    if missing:
        msg = "end-to-end browser test needs " + ", ".join(missing)
        if REQUIRE:
            pytest.fail(msg + " (BAYESBASE_REQUIRE_BROWSER=1)")
        pytest.skip(msg)


# --------------------------------------------------------------------------- server
def _reader(stream, lines: queue.Queue):
    for line in iter(stream.readline, ""):
        lines.put(line)
    lines.put(None)


@pytest.fixture
def server(tmp_path):
    """``bayesbase serve`` on a free port (``--port 0``) over an empty temporary store."""
    db = tmp_path / "store.sqlite"
    env = {**os.environ, "MPLBACKEND": "Agg", "PYTHONUNBUFFERED": "1"}
    proc = subprocess.Popen([sys.executable, "-m", "bayesbase.cli", "serve", "--db", str(db),
                             "--port", "0"], stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                            text=True, env=env)
    lines: queue.Queue = queue.Queue()
    reader = threading.Thread(target=_reader, args=(proc.stdout, lines), daemon=True)
    reader.start()
    url, seen, deadline = None, [], time.monotonic() + 120
    while url is None and time.monotonic() < deadline:
        try:
            line = lines.get(timeout=1)
        except queue.Empty:
            continue
        if line is None:
            break
        seen.append(line)
        if line.startswith("bayesbase desk: "):
            url = line.split(": ", 1)[1].strip()
    if url is None:
        proc.kill()
        proc.wait()
        reader.join(timeout=10)
        proc.stdout.close()
        pytest.fail("bayesbase serve did not print its address:\n" + "".join(seen))
    yield url.rstrip("/"), db, proc, seen, lines
    if proc.poll() is None:
        proc.kill()
        proc.wait()
    reader.join(timeout=10)
    proc.stdout.close()


def _stop(proc, lines: queue.Queue, seen: list[str]) -> str:
    """Ctrl-C (SIGINT) and wait for a clean exit; the rest of the output."""
    proc.send_signal(signal.SIGINT)
    code = proc.wait(timeout=30)
    rest = []
    while True:
        try:
            line = lines.get(timeout=5)
        except queue.Empty:
            break
        if line is None:
            break
        rest.append(line)
    out = "".join(seen + rest)
    assert code == 0, out
    assert "Traceback" not in out, out
    return out


# --------------------------------------------------------------------------- browser
@pytest.fixture
def browser(tmp_path):
    _need_browser()
    os.environ.setdefault("SE_OFFLINE", "true")  # selenium-manager must never download
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    downloads = tmp_path / "downloads"
    downloads.mkdir()
    opts = webdriver.ChromeOptions()
    opts.binary_location = str(CHROMIUM)
    for flag in FLAGS:
        opts.add_argument(flag)
    opts.add_argument(f"--user-data-dir={tmp_path / 'chromium-profile'}")
    opts.add_experimental_option("prefs", {"download.default_directory": str(downloads),
                                           "download.prompt_for_download": False})
    driver = webdriver.Chrome(service=Service(str(CHROMEDRIVER)), options=opts)
    driver.execute_cdp_cmd("Browser.setDownloadBehavior",
                           {"behavior": "allow", "downloadPath": str(downloads)})
    driver.set_page_load_timeout(180)
    try:
        yield driver, downloads
    finally:
        driver.quit()


def _wait(driver, condition, timeout: float = 120):
    """Wait for ``condition``; on a timeout, fail with the page's text."""
    from selenium.common.exceptions import (NoSuchElementException, StaleElementReferenceException,
                                            TimeoutException)
    from selenium.webdriver.support.ui import WebDriverWait

    # an element found on the page being left goes stale when the next page loads: the condition
    # is then simply not met yet (selenium's documented wait pattern), not an error
    ignored = (NoSuchElementException, StaleElementReferenceException)
    try:
        return WebDriverWait(driver, timeout, poll_frequency=0.2,
                             ignored_exceptions=ignored).until(condition)
    except TimeoutException:
        pytest.fail(f"timed out at {driver.current_url}; the page reads:\n"
                    + driver.find_element("tag name", "body").text[:3000])


def _by_css(driver, css: str):
    from selenium.webdriver.common.by import By

    return driver.find_element(By.CSS_SELECTOR, css)


def _shot(driver, folder: Path, name: str, height: int | None = None) -> Path:
    """A screenshot of the page; ``height`` enlarges the window first to take the whole page."""
    if height is not None:
        driver.set_window_size(1400, height)
    path = folder / name
    driver.save_screenshot(str(path))
    assert path.read_bytes().startswith(b"\x89PNG")
    return path


def _stored(db) -> int:
    with Store(db) as st:
        return int(st.connection.execute("SELECT count(*) FROM results").fetchone()[0])


# --------------------------------------------------------------------------- steps
def _import_case(driver, url: str, db, shots: Path) -> int:
    """Upload through the form, read the dry run (nothing stored), confirm."""
    n_rows = len((ALP_DIR / "results.csv").read_text(encoding="utf-8").strip().splitlines()) - 1
    driver.get(url + "/patients")
    assert "No patient is stored yet" in _by_css(driver, "main").text
    for line in CAUTIONS:
        assert line in _by_css(driver, "body").text
    _by_css(driver, "nav a[href='/import']").click()
    _wait(driver, lambda d: d.find_elements("css selector", "input#file"))
    _by_css(driver, "input#file").send_keys(str(ALP_DIR / "results.csv"))
    _by_css(driver, "form#upload-form button[type=submit]").click()
    _wait(driver, lambda d: d.find_elements("css selector", "#rows-added"))
    assert "dry run, nothing written" in _by_css(driver, "main").text
    assert int(_by_css(driver, "#rows-added").text) == n_rows
    assert int(_by_css(driver, "#n-conflicts").text) == 0
    _shot(driver, shots, "1_dry_run.png")
    assert _stored(db) == 0
    _by_css(driver, "#confirm").click()
    _wait(driver, lambda d: "Imported results.csv" in d.find_element("id", "verdict").text)
    assert _stored(db) == n_rows
    return n_rows


def _open_patient(driver, url: str, shots: Path, expect: dict) -> None:
    """The list fills its assessed columns; the patient page shows the probable ALP change."""
    driver.get(url + "/patients")
    _wait(driver, lambda d: not d.find_elements("css selector", "td.summary.pending"))
    cells = [c.text for c in driver.find_elements("css selector", "table.patients tbody td")]
    assert cells[0] == "DEMO-D02" and cells[6] == "1", cells
    _shot(driver, shots, "2_patients.png")
    _by_css(driver, "table.patients tbody a").click()
    _wait(driver, lambda d: d.find_elements("css selector", "tr[data-analyte=alp]"))
    row = _by_css(driver, "tr[data-analyte=alp]")
    p = float(row.find_element("css selector", ".p-change").text)
    assert p >= expect["p_change_min"] and "probable" in row.get_attribute("class")
    assert "\u2191" in row.text  # increase (case.toml: direction = increase)
    assert "ALP" in _by_css(driver, "ul.changes").text
    # every figure arrives as an image
    _wait(driver, lambda d: d.execute_script(
        "return Array.from(document.querySelectorAll('.figures img'))"
        ".every(i => i.complete && i.naturalWidth > 0)"), timeout=180)
    _shot(driver, shots, "3_patient.png", height=3400)
    driver.set_window_size(1400, 1100)


def _earlier_specimen(driver, shots: Path) -> None:
    """The specimen picker reassesses at once (desk.js) at an earlier specimen."""
    from selenium.webdriver.support.ui import Select

    Select(_by_css(driver, "select[name=at]")).select_by_value("D02-2025-11-12")
    _wait(driver, lambda d: "at=D02-2025-11-12" in d.current_url)
    _wait(driver, lambda d: d.find_elements("css selector", "tr[data-analyte=alp]"))
    assert "D02-2025-11-12" in _by_css(driver, ".hdr").text
    row = _by_css(driver, "tr[data-analyte=alp]")
    assert float(row.find_element("css selector", ".p-change").text) < 0.5
    assert "probable" not in (row.get_attribute("class") or "")
    _shot(driver, shots, "4_earlier_specimen.png")


def _download_pdf(driver, downloads: Path) -> Path:
    _by_css(driver, "#pdf-link").click()

    def done(_):
        pdfs = [p for p in downloads.glob("*.pdf") if p.stat().st_size > 0]
        partial = list(downloads.glob("*.crdownload"))
        return pdfs[0] if pdfs and not partial else False

    pdf = _wait(driver, done, timeout=180)
    assert pdf.read_bytes().startswith(b"%PDF")
    return pdf


def _broken_upload(driver, url: str, db, shots: Path, tmp_path: Path, n_rows: int) -> None:
    lines = (ALP_DIR / "results.csv").read_text(encoding="utf-8").splitlines()
    header = lines[0].split(",")
    bad = lines[4].split(",")
    bad[header.index("value")] = "about 40"  # data row 4 = spreadsheet row 5
    lines[4] = ",".join(bad)
    broken = tmp_path / "broken.csv"
    broken.write_text("\n".join(lines) + "\n", encoding="utf-8")
    driver.get(url + "/import")
    _by_css(driver, "input#file").send_keys(str(broken))
    _by_css(driver, "form#upload-form button[type=submit]").click()
    _wait(driver, lambda d: d.find_elements("css selector", "table.problems"))
    rows = [[c.text for c in r.find_elements("css selector", "td")]
            for r in driver.find_elements("css selector", "table.problems tbody tr")]
    assert ["broken.csv", "5", "value"] in [r[:3] for r in rows], rows
    assert "nothing was stored" in _by_css(driver, "#verdict").text
    _shot(driver, shots, "5_problems.png")
    assert _stored(db) == n_rows


def test_a_clinician_imports_reads_and_downloads(server, browser, tmp_path):
    url, db, proc, seen, lines = server
    driver, downloads = browser
    shots = tmp_path / "screenshots"
    shots.mkdir()
    case = tomllib.loads((ALP_DIR / "case.toml").read_text(encoding="utf-8"))
    expect = next(e for e in case["expect"] if e["analyte"] == "alp")
    n_rows = _import_case(driver, url, db, shots)
    _open_patient(driver, url, shots, expect)
    _earlier_specimen(driver, shots)
    _download_pdf(driver, downloads)
    _broken_upload(driver, url, db, shots, tmp_path, n_rows)
    # the page made no request to any other origin (resource timing of the last page)
    origins = driver.execute_script(
        "return performance.getEntriesByType('resource').map(e => new URL(e.name).origin)")
    assert set(origins) <= {url}, origins
    out = _stop(proc, lines, seen)
    assert "desk stopped" in out and " ".join(CAUTIONS) in out
    assert sorted(p.name for p in shots.iterdir()) == [
        "1_dry_run.png", "2_patients.png", "3_patient.png", "4_earlier_specimen.png",
        "5_problems.png"]
