"""Benchmarks of the clinician's desk (``bayesbase serve``): the patient list of a
10,000-patient store and the page of one patient with a 25-analyte panel over 5 specimens,
over real HTTP (uvicorn in a thread on a free loopback port, stdlib ``urllib`` as client).
Invented data (:mod:`bayesbase.testing` and pack centres); nothing here asserts a time.

Aims (issue 16): first list page < 300 ms, patient page < 1 s."""
from __future__ import annotations

import contextlib
import statistics
import tempfile
import threading
import time
import urllib.parse
import urllib.request
from pathlib import Path

import numpy as np

from ..store import Store
from ..testing import synthetic_canonical

__all__ = ["bench_web"]

PANEL_PATIENT = "BENCH-PANEL-1"


def _panel_frame(n_analytes: int = 25, n_specimens: int = 5, seed: int = 7):
    """One invented dog: ``n_analytes`` analytes of the dog pack at yearly visits, values drawn
    around the pack's centres with its within-animal CV."""
    import pandas as pd

    from ..priors import load_pack

    pack = load_pack("dog")
    rng = np.random.default_rng(seed)
    rows = []
    for k in range(n_specimens):
        for aid in list(pack.analytes)[:n_analytes]:
            p = pack.analytes[aid]
            v = p.center * float(np.exp(rng.normal(0, p.si)))
            rows.append(dict(patient=PANEL_PATIENT, species="dog", specimen=f"BP-S{k}",
                             collected_at=f"{2021 + k}-03-0{1 + k % 3} 09:00", analyte=aid,
                             value=f"{v:.4g}", unit=p.unit, state="healthy"))
    return pd.DataFrame(rows)


@contextlib.contextmanager
def _serving(config):
    """The desk for ``config`` served by uvicorn in a thread; yields its base URL."""
    import uvicorn

    from ..web.app import create_app
    from ..web.server import bind

    sock = bind("127.0.0.1", 0)
    server = uvicorn.Server(uvicorn.Config(create_app(config), log_level="warning",
                                           access_log=False, lifespan="on"))
    thread = threading.Thread(target=server.run, kwargs={"sockets": [sock]}, daemon=True)
    thread.start()
    while not server.started:
        time.sleep(0.01)
    try:
        yield f"http://127.0.0.1:{sock.getsockname()[1]}"
    finally:
        server.should_exit = True
        thread.join(timeout=30)
        sock.close()


def _times(url: str, n: int) -> dict:
    """Median, p95 and max seconds of ``n`` GET requests (each reads the whole answer)."""
    out = []
    for _ in range(n):
        t = time.perf_counter()
        with urllib.request.urlopen(url, timeout=600) as r:
            r.read()
        out.append(time.perf_counter() - t)
    out.sort()
    p95 = out[min(len(out) - 1, int(np.ceil(0.95 * len(out))) - 1)]
    return {"median_s": round(statistics.median(out), 4), "p95_s": round(p95, 4),
            "max_s": round(out[-1], 4), "n": n}


def _fresh_process_first_page(db: Path, wait_s: float) -> dict:
    """``bayesbase serve`` in a new process; the first list page ``wait_s`` after it printed its
    address (it loads the page machinery in the background meanwhile), then Ctrl-C."""
    import signal
    import subprocess
    import sys

    proc = subprocess.Popen([sys.executable, "-m", "bayesbase.cli", "serve", "--db", str(db),
                             "--port", "0"], stdout=subprocess.PIPE, stderr=subprocess.DEVNULL,
                            text=True)
    try:
        url = proc.stdout.readline().split(": ", 1)[1].strip().rstrip("/")
        time.sleep(wait_s)
        return _times(url + "/patients", 1) | {"wait_s": wait_s}
    finally:
        proc.send_signal(signal.SIGINT)
        proc.wait(timeout=60)
        proc.stdout.close()


def _store(db: Path, n_patients: int) -> int:
    frame = synthetic_canonical(n_patients, 3, 5)
    with Store(db) as st:
        st.import_frame(frame, "bench-list")
        st.import_frame(_panel_frame(), "bench-panel")
        return int(st.connection.execute("SELECT count(*) FROM patients").fetchone()[0])


def bench_web(n_patients: int = 10_000, n_requests: int = 50, workdir=None) -> dict:
    """The first request after start; the patient list (first page, and sorted by last
    specimen) of an ``n_patients`` store; the assessed columns of one page (50 patients,
    computed once); the 25-analyte patient page uncached (every request assesses) and cached;
    one figure; ``n_requests`` requests each."""
    from ..web import DeskConfig

    with tempfile.TemporaryDirectory(dir=workdir) as d:
        db = Path(d) / "bench.sqlite"
        t = time.perf_counter()
        n = _store(db, n_patients)
        out = {"patients": n, "build_store_s": round(time.perf_counter() - t, 2)}
        out["new_process_first_page"] = _fresh_process_first_page(db, 8.0)
        q = urllib.parse.urlencode({"id": PANEL_PATIENT})
        with _serving(DeskConfig(db=db, cache_size=0, staging_dir=Path(d) / "s0")) as base:
            # at once after start: the request waits for the page machinery (jinja2, pandas)
            out["first_request_after_start"] = _times(base + "/patients", 1)
            out["list_first_page"] = _times(base + "/patients", n_requests)
            out["list_sorted_by_last"] = _times(base + "/patients?sort=last&order=desc",
                                                n_requests)
            out["patient_page_uncached"] = _times(f"{base}/patient?{q}", n_requests)
        with _serving(DeskConfig(db=db, staging_dir=Path(d) / "s1")) as base:
            ids = "&".join(f"id=DEMO-{i:0{max(len(str(n_patients)), 4)}d}" for i in range(50))
            out["summaries_50_patients_first"] = _times(f"{base}/api/summaries?{ids}", 1)
            out["patient_page_first"] = _times(f"{base}/patient?{q}", 1)
            out["patient_page_cached"] = _times(f"{base}/patient?{q}", n_requests)
            out["figure_first"] = _times(f"{base}/patient/figure.png?{q}&analyte=alp", 1)
    return out
