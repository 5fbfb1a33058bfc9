"""Benchmarks of the results store (``bayesbase bench``): bulk import, one patient's history,
and assessing every patient of a store. Invented data (:mod:`bayesbase.testing`); nothing here
asserts a time."""
from __future__ import annotations

import tempfile
import time
from pathlib import Path

from ..io import to_tidy_csv
from ..store import Store
from ..testing import synthetic_canonical


def bench_import(n_rows: int = 1_000_000, workdir=None, *, via_file: bool = True) -> dict:
    """Time a bulk import of ``n_rows`` invented results into an empty store (one transaction,
    executemany): from a canonical frame (store only), a re-import of the same rows (all
    skipped), and, with ``via_file``, from a tidy CSV file into another empty store (reading +
    validation + store). Returns timings in seconds."""
    n_a = 25
    n_spec = 240
    n_pat = max(1, -(-n_rows // (n_a * n_spec)))
    t0 = time.perf_counter()
    frame = synthetic_canonical(n_pat, n_spec, n_a).iloc[:n_rows]
    t_gen = time.perf_counter() - t0
    out = {"n_rows": int(len(frame)), "generate_s": t_gen}
    with tempfile.TemporaryDirectory(dir=workdir) as d:
        db = Path(d) / "bench.sqlite"
        with Store(db) as store:
            t0 = time.perf_counter()
            s1 = store.import_frame(frame, "bench", "0" * 64)
            out["import_frame_s"] = time.perf_counter() - t0
            t0 = time.perf_counter()
            s2 = store.import_frame(frame, "bench", "0" * 64)
            out["reimport_frame_s"] = time.perf_counter() - t0
        out.update(rows_added=s1.rows_added, reimport_skipped=s2.rows_skipped,
                   db_bytes=db.stat().st_size)
        if via_file:
            csv = to_tidy_csv(frame, Path(d) / "bench.csv")
            with Store(Path(d) / "bench2.sqlite") as store:
                t0 = time.perf_counter()
                s3 = store.import_file(csv)
                out["import_file_s"] = time.perf_counter() - t0
            out["file_rows_added"] = s3.rows_added
    return out


def bench_history(n_specimens: int = 240, n_analytes: int = 25, repeats: int = 20,
                  workdir=None) -> dict:
    """Time :meth:`Store.history` for one patient with ``n_specimens`` monthly panels of
    ``n_analytes`` analytes (20 years = 240 specimens), among 50 other invented patients."""
    frame = synthetic_canonical(51, n_specimens, n_analytes)
    target = str(frame["patient"].iloc[0])
    with tempfile.TemporaryDirectory(dir=workdir) as d:
        with Store(Path(d) / "bench.sqlite") as store:
            store.import_frame(frame, "bench", "0" * 64)
            times = []
            for _ in range(repeats):
                t0 = time.perf_counter()
                h = store.history(target)
                times.append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            store.history_table(target)
            t_table = time.perf_counter() - t0
    times.sort()
    return {"rows": int(len(h)), "history_median_s": times[len(times) // 2],
            "history_max_s": times[-1], "history_table_s": t_table}


def bench_assess_store(n_patients: int = 10_000, n_specimens: int = 3, n_analytes: int = 20,
                       repeat: int = 1, at: str | None = None, jobs: int = 1) -> dict:
    """Assess every patient of an invented store (exact engine): import, read back, assess.
    The read and the assessment are timed apart (best of ``repeat``), with their CPU time and
    the 1-minute load average (the machine may be shared). With ``at`` (a date or specimen id)
    the assessment is timed again with ``at=`` (``assess_at_s``, ``assess_at_cpu_s``). With
    ``jobs`` above 1 it is timed again in that many worker processes (``assess_jobs_s``,
    ``assess_jobs_cpu_s``: this process and its workers), and ``jobs_same`` says whether the
    table is exactly the one-process table."""
    from ..assessment import assess
    from ..priors import load_pack
    from .pipeline import load_average

    frame = synthetic_canonical(n_patients, n_specimens, 40)
    frame = frame[frame["analyte"].isin(set(load_pack("dog").analytes))]
    keep = list(dict.fromkeys(frame["analyte"]))[:n_analytes]
    frame = frame[frame["analyte"].isin(keep)].reset_index(drop=True)
    t_read = c_read = t_assess = c_assess = float("inf")
    with tempfile.TemporaryDirectory() as d:
        with Store(Path(d) / "bench.sqlite") as st:
            st.import_frame(frame, source="bench")
            for _ in range(max(1, repeat)):
                t, c = time.perf_counter(), time.process_time()
                res = st.results()
                t_read, c_read = min(t_read, time.perf_counter() - t), min(c_read, time.process_time() - c)
        for _ in range(max(1, repeat)):
            t, c = time.perf_counter(), time.process_time()
            a = assess(res)
            t_assess, c_assess = min(t_assess, time.perf_counter() - t), min(c_assess, time.process_time() - c)
    # 4 decimals: a small store's read takes a few milliseconds (2 decimals gave 0.0 s, and a
    # ratio to the floor of floor / 0)
    out = {"patients": n_patients, "cases": len(a.table), "read_s": round(t_read, 4),
           "read_cpu_s": round(c_read, 4), "assess_s": round(t_assess, 4), "assess_cpu_s": round(c_assess, 4),
           "cases_per_s": round(len(a.table) / t_assess), "load_average_1min": load_average()}
    if jobs > 1:
        import resource

        import pandas as pd

        def cpu():
            kids = resource.getrusage(resource.RUSAGE_CHILDREN)
            return time.process_time() + kids.ru_utime + kids.ru_stime

        t, c = time.perf_counter(), cpu()
        aj = assess(res, jobs=jobs)
        out.update(jobs=jobs, assess_jobs_s=round(time.perf_counter() - t, 2), assess_jobs_cpu_s=round(cpu() - c, 2))
        try:
            pd.testing.assert_frame_equal(aj.table, a.table, check_exact=True)
            out["jobs_same"] = True
        except AssertionError:
            out["jobs_same"] = False
    if at is not None:
        t, c = time.perf_counter(), time.process_time()
        assess(res, at=at)
        out.update(assess_at_s=round(time.perf_counter() - t, 2), assess_at_cpu_s=round(time.process_time() - c, 2))
    return out
