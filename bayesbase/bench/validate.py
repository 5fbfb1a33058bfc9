"""Benchmarks of ``validate`` for ``bayesbase bench`` (timings and memory, no assertions):
in memory on a frame, the bounded-memory chunked read of a large tidy CSV file, and the real
``bayesbase import`` of a large file into a fresh store (peak resident memory of the CLI
process)."""
from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

__all__ = ["bench_validate", "bench_validate_file", "bench_import_file", "write_bench_csv"]


def _bench_frame(n_rows: int, seed, start: int = 0) -> pd.DataFrame:
    """Invented results (demo data for the benchmark only): 10 analytes per specimen; rows
    ``start`` .. ``start + n_rows`` of one long file (``start`` a multiple of 10)."""
    rng = np.random.default_rng(seed)
    panel = [("CREA", "mg/dL", 0.5, 2.0), ("BUN", "mg/dL", 8, 30), ("ALT", "U/L", 20, 120),
             ("ALKP", "U/L", 20, 150), ("GLU", "mmol/L", 3.5, 7.0), ("TP", "g/dL", 5.5, 7.5),
             ("ALB", "g/L", 25, 40), ("Na", "mEq/L", 140, 155), ("K", "mmol/L", 3.6, 5.6),
             ("HCT", "%", 35, 55)]
    n_spec = -(-n_rows // len(panel))
    spec = np.repeat(np.arange(n_spec), len(panel))[:n_rows] + start // len(panel)
    k = np.tile(np.arange(len(panel)), n_spec)[:n_rows]
    patient = spec // 5
    visit = spec % 5
    days = (patient % 365) + visit * 60
    base = np.datetime64("2018-01-01T08:00")
    when = base + days.astype("timedelta64[D]") + (patient % 600).astype("timedelta64[m]")
    lo = np.array([p[2] for p in panel])[k]
    hi = np.array([p[3] for p in panel])[k]
    vals = np.round(rng.uniform(lo, hi), 2)
    vtext = np.char.mod("%.2f", vals).astype(object)
    # a few censored enzyme results (ALT, ALKP): '<5' is plausible only for analytes that low
    vtext[(rng.random(n_rows) < 0.01) & np.isin(k, (2, 3))] = "<5"
    return pd.DataFrame({
        "patient": np.char.add("P", patient.astype(str)).astype(object),
        "species": np.where(patient % 3 == 0, "cat", "dog").astype(object),
        "specimen": np.char.add("S", spec.astype(str)).astype(object),
        "collected_at": np.datetime_as_string(when, unit="m").astype(object),
        "analyte": np.array([p[0] for p in panel], dtype=object)[k],
        "value": vtext,
        "unit": np.array([p[1] for p in panel], dtype=object)[k],
        "state": np.where(visit == 4, "unwell", "").astype(object),
        "fasted": np.where(visit % 2 == 0, "yes", "no").astype(object),
        # one index per specimen (the store holds sample-quality indices per specimen)
        "haemolysis": np.char.mod("%d", (spec * 7919) % 50).astype(object),
    })


def bench_validate(n_rows: int = 1_000_000, seed: int = 20240601) -> dict:
    """Time ``validate`` on ``n_rows`` invented rows (a benchmark, not a test)."""
    from ..validate import validate

    raw = _bench_frame(n_rows, seed)
    t0 = time.perf_counter()
    frame = validate(raw, source="<bench>", now="2030-01-01")
    seconds = time.perf_counter() - t0
    return {"n_rows": int(len(frame)), "seconds": seconds, "rows_per_second": len(frame) / seconds}


def write_bench_csv(path: Path, n_rows: int, seed: int = 20240601, block: int = 500_000) -> Path:
    """Write ``n_rows`` invented results as a tidy CSV, ``block`` rows at a time (the file is
    never whole in memory)."""
    with open(path, "w", encoding="utf-8", newline="") as fh:
        for k, start in enumerate(range(0, n_rows, block)):
            part = _bench_frame(min(block, n_rows - start), [seed, k], start=start)
            part.to_csv(fh, index=False, header=(k == 0), lineterminator="\n")
    return path


#: Run in a child process, so that its peak resident memory is that of the read alone.
_CHILD = """
import json, resource, sys, time
from bayesbase.io.chunked import iter_results
from bayesbase.io import read_results
path, chunksize = sys.argv[1], int(sys.argv[2])
t = time.perf_counter()
if chunksize > 0:
    chunks = iter_results(path, chunksize=chunksize, now="2030-01-01")
    n = sum(len(c) for c in chunks)
else:
    n = len(read_results(path, now="2030-01-01"))
seconds = time.perf_counter() - t
use = resource.getrusage(resource.RUSAGE_SELF)
print(json.dumps({"n": n, "seconds": seconds, "cpu_seconds": use.ru_utime + use.ru_stime,
                  "peak_mib": use.ru_maxrss / 1024}))  # ru_maxrss: KiB on Linux
"""


def _measure(path: Path, chunksize: int) -> dict:
    out = subprocess.run([sys.executable, "-c", _CHILD, str(path), str(chunksize)],
                         capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def bench_validate_file(n_rows: int = 10_000_000, chunksize: int = 250_000,
                        whole_file_rows: int = 1_000_000) -> dict:
    """Read and validate an ``n_rows`` tidy CSV (written to a temporary file in blocks) with
    :func:`bayesbase.io.iter_results`, in a child process: rows per second and peak resident
    memory (``ru_maxrss``). For comparison, the whole-file path (``read_results``) on
    ``whole_file_rows`` rows (0: skip). Nothing asserted; the target (peak under 1.5 GB at ten
    million rows) is read from the numbers."""
    with tempfile.TemporaryDirectory() as d:
        path = write_bench_csv(Path(d) / "bench.csv", n_rows)
        size_mb = path.stat().st_size / 1e6
        got = _measure(path, chunksize)
        res = {"n_rows": got["n"], "file_mb": round(size_mb, 1), "chunksize": chunksize,
               "seconds": round(got["seconds"], 1), "cpu_seconds": round(got["cpu_seconds"], 1),
               "rows_per_second": round(got["n"] / got["seconds"]),
               "peak_rss_mib (chunked)": round(got["peak_mib"])}
        if whole_file_rows:
            small = write_bench_csv(Path(d) / "whole.csv", whole_file_rows)
            whole = _measure(small, 0)
            res[f"peak_rss_mib (whole file, {whole_file_rows} rows)"] = round(whole["peak_mib"])
            res[f"peak_rss_mib (chunked, {whole_file_rows} rows)"] = round(
                _measure(small, chunksize)["peak_mib"])
    return res


def _run_cli(args: list[str], workdir: Path) -> dict:
    """Run ``bayesbase <args>`` as a child process: wall time, exit code, peak resident memory
    of that process alone (``ru_maxrss`` from ``os.wait4``: KiB on Linux) and its last output
    line (output goes to files, so the child is reaped here by ``wait4``)."""
    out_p, err_p = workdir / "cli.out", workdir / "cli.err"
    t = time.perf_counter()
    with open(out_p, "w") as out, open(err_p, "w") as errs:
        proc = subprocess.Popen([sys.executable, "-m", "bayesbase.cli", *args],
                                stdout=out, stderr=errs)
        _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t
    proc.returncode = os.waitstatus_to_exitcode(status)
    lines = (out_p.read_text().strip().splitlines()
             or err_p.read_text().strip().splitlines() or [""])
    return {"returncode": proc.returncode, "seconds": wall, "peak_mib": usage.ru_maxrss / 1024,
            "last_line": lines[-1][:300]}


def bench_import_file(n_rows: int = 10_000_000, chunk_rows: int | None = None,
                      path: str | None = None, keep_dir: str | None = None) -> dict:
    """Peak resident memory (``ru_maxrss`` of the child process) and wall time of the real
    ``bayesbase import FILE --db NEW`` of an ``n_rows`` tidy CSV (invented, written in blocks;
    or an existing ``path`` of ``n_rows`` rows, e.g. from :func:`write_bench_csv`) into a fresh
    store; ``chunk_rows`` passes ``--chunk-rows``
    (None: the command's own choice, chunked above its size threshold). Nothing asserted; the
    target of issue 11 (peak under 1.5 GB at ten million rows) is read from the numbers.
    The peak is that of the import process alone (``os.wait4``)."""
    with tempfile.TemporaryDirectory(dir=keep_dir) as d:
        src = Path(path) if path else write_bench_csv(Path(d) / "bench.csv", n_rows)
        db = Path(d) / "fresh.sqlite"
        args = ["import", str(src), "--db", str(db)]
        if chunk_rows is not None:
            args += ["--chunk-rows", str(chunk_rows)]
        got = _run_cli(args, Path(d))
        db_mb = sum(f.stat().st_size for f in Path(d).glob("fresh.sqlite*")) / 1e6
        return {"rows_in_file": n_rows,
                "file_mb": round(src.stat().st_size / 1e6, 1),
                "chunk_rows": chunk_rows, "returncode": got["returncode"],
                "seconds": round(got["seconds"], 1),
                "rows_per_second": round(n_rows / got["seconds"]),
                "peak_rss_mib (bayesbase import)": round(got["peak_mib"]),
                "store_mb": round(db_mb, 1), "output": got["last_line"]}
