"""Benchmark of ``bayesbase score`` (``bayesbase bench``): a partitioned Parquet dataset of
invented dogs (:mod:`bayesbase.testing`) scored in this process and on a Dask ``LocalCluster``
with 1 and 2 worker processes. Nothing here asserts a time."""
from __future__ import annotations

import tempfile
import time
from pathlib import Path

from ..testing import synthetic_canonical


def _chunk(i: int, n_patients: int, n_specimens: int, n_analytes: int, analytes: set):
    """Invented demo results of ``n_patients`` dogs, ids prefixed with the chunk number."""
    frame = synthetic_canonical(n_patients, n_specimens, 25, seed=1000 + i)
    frame = frame[frame["analyte"].isin(analytes)]
    keep = list(dict.fromkeys(frame["analyte"]))[:n_analytes]
    frame = frame[frame["analyte"].isin(keep)].reset_index(drop=True)
    frame["patient"] = f"C{i:03d}-" + frame["patient"]
    frame["specimen"] = f"C{i:03d}-" + frame["specimen"]
    return frame


def write_demo_dataset(directory, n_patients: int, n_specimens: int = 3, n_analytes: int = 20,
                       n_partitions: int = 32, chunk: int = 10_000) -> int:
    """Write an invented dataset (bounded memory: chunks of ``chunk`` patients, each written as a
    partitioned dataset, then merged partition by partition). Returns the rows written."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    from ..io.parquet import atomic_write_table, file_metadata, write_canonical_dataset
    from ..priors import load_pack

    analytes = set(load_pack("dog").analytes)
    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=False)
    with tempfile.TemporaryDirectory(dir=directory.parent) as tmp:
        rows = 0
        for i in range(-(-n_patients // chunk)):
            frame = _chunk(i, min(chunk, n_patients - i * chunk), n_specimens, n_analytes,
                           analytes)
            write_canonical_dataset(frame, Path(tmp) / f"c{i:03d}", n_partitions,
                                    pseudonymised=False)
            rows += len(frame)
        by_name: dict[str, list] = {}
        for f in sorted(Path(tmp).glob("c*/part-*.parquet")):
            by_name.setdefault(f.name, []).append(f)
        for name, files in sorted(by_name.items()):
            table = pa.concat_tables([pq.read_table(f) for f in files])
            atomic_write_table(table, directory / name, file_metadata(files[0]))
    return rows


def _timed(dataset, out, scheduler=None) -> tuple[float, object]:
    from ..scale import score_dataset

    t = time.perf_counter()
    s = score_dataset(dataset, out, scheduler=scheduler)
    return time.perf_counter() - t, s


def bench_scale(n_patients: int = 100_000, n_specimens: int = 3, n_analytes: int = 20,
                n_partitions: int = 32, workers=(1, 2)) -> dict:
    """Cases per second of ``score`` in this process and on a ``LocalCluster`` of 1 and 2
    worker processes (one thread each; cluster start timed apart). Default: 100,000 invented
    dogs x 20 analytes = 2,000,000 patient-analyte cases, 3 specimens each."""
    from ..scale.cluster import dask_client

    res: dict = {"patients": n_patients, "analytes": n_analytes, "partitions": n_partitions}
    with tempfile.TemporaryDirectory() as d:
        t = time.perf_counter()
        res["rows"] = write_demo_dataset(Path(d) / "ds", n_patients, n_specimens, n_analytes,
                                         n_partitions)
        res["generate_and_write_s"] = round(time.perf_counter() - t, 1)
        secs, s = _timed(Path(d) / "ds", Path(d) / "out0")
        res["cases"] = s.cases
        res["failures"] = len(s.failures)
        res["in_process_cases_per_s"] = round(s.cases / secs)
        for n in workers:
            t = time.perf_counter()
            with dask_client("local", n) as client:  # the cluster `score --scheduler local` starts
                res[f"local_{n}_start_s"] = round(time.perf_counter() - t, 1)
                secs, s = _timed(Path(d) / "ds", Path(d) / f"out{n}", scheduler=client)
            rate = s.cases / secs
            gain = rate / res["in_process_cases_per_s"]
            res[f"local_{n}_cases_per_s"] = round(rate)
            res[f"local_{n}_speedup_vs_in_process"] = round(gain, 2)
            res[f"local_{n}_speedup_per_worker"] = round(gain / n, 2)
    return res
