"""Parquet interchange (export/import of a partitioned dataset) and scoring a dataset one
partition per task, in process and on a Dask LocalCluster, with the numbers of one ``assess``.

Outside references: the partition of every patient is recomputed here with ``hashlib`` (FIPS
180-4 SHA-256) and checked in a second interpreter with another ``PYTHONHASHSEED``; the files are
read back with pandas' and pyarrow's own Parquet readers; the pack hash is recomputed with
``hashlib`` from the pack file's bytes; the scored tables are compared with one
:func:`bayesbase.assessment.assess` call on the whole frame.
"""
from __future__ import annotations

import hashlib
import os
import subprocess
import sys
from importlib import resources

import numpy as np
import pandas as pd
import pytest

from bayesbase.contract import CANONICAL_COLUMNS, CANONICAL_DTYPES
from bayesbase.errors import BayesbaseError, ValidationError
from bayesbase.io import parquet as bpq
from bayesbase.testing import synthetic_canonical

N_PART = 6


def _hash_partition(patient: str, n: int) -> int:
    """The documented partition rule, written out independently with hashlib."""
    return int.from_bytes(hashlib.sha256(patient.encode("utf-8")).digest()[:8], "big") % n


def _scorable(n_patients: int, n_specimens: int = 3, n_analytes: int = 20):
    """Invented demo frame restricted to analytes the dog pack has priors for."""
    from bayesbase.priors import load_pack

    frame = synthetic_canonical(n_patients, n_specimens, 25)
    frame = frame[frame["analyte"].isin(set(load_pack("dog").analytes))]
    keep = list(dict.fromkeys(frame["analyte"]))[:n_analytes]
    return frame[frame["analyte"].isin(keep)].reset_index(drop=True)


def _with_missing_values(frame):
    """A canonical frame with every kind of missing value and a censored result."""
    f = frame.copy()
    f.loc[1, "fasted"] = pd.NA
    f.loc[2, "birth_date"] = pd.NaT
    f.loc[3, ["breed", "sex", "method"]] = pd.NA
    f.loc[4, ["haemolysis", "lipaemia", "icterus"]] = [0.5, np.nan, 2.0]
    f.loc[5, ["censor", "reported_value"]] = ["left", "<10"]
    f.loc[6, "state"] = "unwell"
    f.loc[7, "source_row"] = pd.NA
    return f


# ---------------------------------------------------------------------------------------------
# interchange
# ---------------------------------------------------------------------------------------------
def test_parquet_round_trip_equals_the_canonical_frame(tmp_path):
    frame = _with_missing_values(synthetic_canonical(40, 3, 5))
    files = bpq.write_canonical_dataset(frame, tmp_path / "ds", N_PART, pseudonymised=False)
    assert [f.name for f in files] == sorted(f.name for f in (tmp_path / "ds").iterdir())
    back = bpq.read_canonical(tmp_path / "ds")
    assert list(back.columns) == list(CANONICAL_COLUMNS)
    assert {c: str(t) for c, t in back.dtypes.items()} == CANONICAL_DTYPES
    pd.testing.assert_frame_equal(back, frame, check_exact=True)
    # pandas' own Parquet reader (pyarrow engine) sees the same rows and values
    other = pd.read_parquet(tmp_path / "ds").astype(CANONICAL_DTYPES)
    other = other.sort_values(["patient", "collected_at", "specimen", "analyte", "replicate"])
    pd.testing.assert_frame_equal(other.reset_index(drop=True), frame, check_exact=True)


def test_arrow_types_of_the_files_follow_the_contract(tmp_path):
    import pyarrow as pa
    import pyarrow.parquet as pq

    bpq.write_canonical_dataset(synthetic_canonical(10, 2, 3), tmp_path / "ds", 2,
                                pseudonymised=False)
    schema = pq.read_schema(next((tmp_path / "ds").iterdir()))
    expected = {"string": pa.string(), "datetime64[ns]": pa.timestamp("ns"),
                "float64": pa.float64(), "Int64": pa.int64(), "boolean": pa.bool_()}
    assert schema.names == list(CANONICAL_COLUMNS)
    for c in CANONICAL_COLUMNS:
        assert schema.field(c).type == expected[CANONICAL_DTYPES[c]], c


def test_partition_hash_is_stable_and_keeps_each_patient_in_one_file(tmp_path):
    import pyarrow.parquet as pq

    frame = synthetic_canonical(120, 2, 2)
    bpq.write_canonical_dataset(frame, tmp_path / "ds", N_PART, pseudonymised=False)
    where: dict[str, set] = {}
    for f in sorted((tmp_path / "ds").iterdir()):
        k = int(f.stem.split("-")[1])
        for p in pq.read_table(f, columns=["patient"]).column("patient").to_pylist():
            assert _hash_partition(p, N_PART) == k, (p, f.name)
            where.setdefault(p, set()).add(f.name)
    assert set(where) == set(frame["patient"])
    assert all(len(v) == 1 for v in where.values())
    # another interpreter with another string-hash seed gives the same partitions
    pats = sorted(where)[:20]
    code = ("import sys; from bayesbase.io.parquet import partition_of; "
            f"print([partition_of(p, {N_PART}) for p in {pats!r}])")
    env = dict(os.environ, PYTHONHASHSEED="12345")
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True,
                         check=True)
    assert out.stdout.strip() == str([_hash_partition(p, N_PART) for p in pats])


def test_reader_refuses_a_patient_in_the_wrong_partition(tmp_path):
    frame = synthetic_canonical(30, 1, 1)
    bpq.write_canonical_dataset(frame, tmp_path / "ds", 3, pseudonymised=False)
    f = sorted((tmp_path / "ds").iterdir())[0]
    k = int(f.stem.split("-")[1])
    stranger = next(p for p in frame["patient"] if _hash_partition(p, 3) != k)
    one, meta = bpq.read_canonical_file(f)
    one.loc[0, "patient"] = stranger
    bpq.atomic_write_table(bpq._canonical_arrow(one), f, meta)
    with pytest.raises(ValidationError) as exc:
        bpq.read_canonical(tmp_path / "ds")
    assert f.name in str(exc.value) and "'patient'" in str(exc.value)
    assert stranger in str(exc.value)


def test_reader_names_a_missing_column_and_an_unreadable_file(tmp_path):
    import pyarrow.parquet as pq

    bpq.write_canonical_dataset(synthetic_canonical(5, 1, 2), tmp_path / "ds", 1,
                                pseudonymised=False)
    f = tmp_path / "ds" / bpq.partition_name(0)
    table = pq.read_table(f)
    pq.write_table(table.drop_columns(["unit"]).replace_schema_metadata(table.schema.metadata), f)
    with pytest.raises(ValidationError, match=r"part-00000.parquet, column 'unit': missing column"):
        bpq.read_canonical(tmp_path / "ds")
    f.write_bytes(b"PAR1 not really parquet")
    with pytest.raises(BayesbaseError, match="not a readable Parquet file"):
        bpq.read_canonical(tmp_path / "ds")


def test_export_refuses_a_non_empty_directory_and_leaves_it_alone(tmp_path):
    (tmp_path / "ds").mkdir()
    (tmp_path / "ds" / "keep.txt").write_text("x")
    with pytest.raises(BayesbaseError, match="not an empty directory"):
        bpq.write_canonical_dataset(synthetic_canonical(3, 1, 1), tmp_path / "ds", 2,
                                    pseudonymised=False)
    assert [p.name for p in (tmp_path / "ds").iterdir()] == ["keep.txt"]
    assert [p.name for p in tmp_path.iterdir()] == ["ds"]  # no temporary directory left


def test_store_export_and_import_through_the_cli(tmp_path, capsys):
    from bayesbase.cli import main
    from bayesbase.store import Store

    frame = synthetic_canonical(25, 2, 3)
    with Store(tmp_path / "a.sqlite") as st:
        st.import_frame(frame, source="demo")
        stored = st.results()
    # identified: the store's own frame comes back from the dataset, through a second store
    assert main(["export", "--format", "parquet", "--identified", "--partitions", "4",
                 "--db", str(tmp_path / "a.sqlite"), "--out", str(tmp_path / "id")]) == 0
    assert main(["import", "--db", str(tmp_path / "b.sqlite"), str(tmp_path / "id")]) == 0
    assert "150 rows added" in capsys.readouterr().out
    with Store(tmp_path / "b.sqlite") as st:
        again = st.results()
    cols = [c for c in CANONICAL_COLUMNS if c not in ("source_file", "source_row")]
    pd.testing.assert_frame_equal(again[cols], stored[cols], check_exact=True)
    # pseudonymised by default: ids replaced, partitioned by the pseudonym written
    assert main(["export", "--format", "parquet", "--db", str(tmp_path / "a.sqlite"),
                 "--out", str(tmp_path / "ps")]) == 0
    assert "(pseudonymised)" in capsys.readouterr().out
    ps = bpq.read_canonical(tmp_path / "ps")
    assert ps["patient"].str.fullmatch(r"P-[0-9a-f]{10}").all()
    assert not set(ps["patient"]) & set(frame["patient"])
    assert ps["source_file"].eq("").all() and ps["source_row"].isna().all()
    np.testing.assert_array_equal(np.sort(ps["value"].to_numpy()),
                                  np.sort(frame["value"].to_numpy()))
    assert bpq.file_metadata(next((tmp_path / "ps").iterdir()))["pseudonymised"] is True


def test_import_of_a_dataset_is_all_or_nothing(tmp_path):
    from bayesbase.cli import main
    from bayesbase.store import Store

    bpq.write_canonical_dataset(synthetic_canonical(30, 1, 2), tmp_path / "ds", 3,
                                pseudonymised=False)
    last = sorted((tmp_path / "ds").iterdir())[-1]
    last.write_bytes(b"garbage")
    assert main(["import", "--db", str(tmp_path / "s.sqlite"), str(tmp_path / "ds")]) == 2
    with Store(tmp_path / "s.sqlite") as st:
        assert len(st.results()) == 0 and len(st.imports()) == 0


# ---------------------------------------------------------------------------------------------
# scoring
# ---------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def scored(tmp_path_factory):
    """A dataset of 120 invented dogs (20 analytes, 3 specimens) and one assess of the whole."""
    from bayesbase.assessment import assess

    d = tmp_path_factory.mktemp("scale")
    frame = _scorable(120)
    bpq.write_canonical_dataset(frame, d / "ds", N_PART, pseudonymised=False)
    whole = assess(frame)
    table = whole.table.sort_values(["patient", "analyte"], kind="mergesort").reset_index(drop=True)
    return d / "ds", table, whole.attrs


@pytest.fixture(scope="module")
def cluster():
    """One small in-process Dask cluster for the module (2 workers, 1 thread each)."""
    import distributed

    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  dashboard_address=":0") as c:
        yield c


#: Columns the engine computes as mixture quantiles by Newton iterations with tolerance 1e-9 on
#: the log scale (``model.engine.mixture_quantile``): the iterations run until the whole batch has
#: converged, so a quantile's last digits depend on the batch it was computed in; they are
#: compared to 2e-9 relative. The other numbers can differ in their last bits too (measured up to
#: 2e-13 relative with ``--at``: the padded baseline width of a batch changes the order of sums),
#: so they are compared to 1e-12 relative, or 1e-11 absolute in the column's own unit for numbers
#: near zero (measured: a change of -0.0015 % differed by 1.7e-13 between the whole assessment and
#: a partition scored in a Dask worker process, 1e-10 relative; the exact engine's compiled pass
#: sums with reassociation, so the order of a sum may follow the arrays' alignment). Partition by partition (in process or on Dask) the
#: batches are the same, and so are the numbers, to the last bit (tested below).
QUANTILE_COLUMNS = ("set_point_lower", "set_point_upper", "pi_lower", "pi_upper",
                    "trend_pct_lower", "trend_pct_upper", "trend_years_to_limit",
                    "trend_years_lower", "trend_years_upper")


def _assert_same_table(got, want):
    """Same columns and rows; numbers as above, everything else identical."""
    from bayesbase.scale import read_scores

    got = read_scores(got)
    assert list(got.columns) == list(want.columns)
    assert len(got) == len(want)
    for c in want.columns:
        a, b = got[c], want[c]
        if c == "flags":
            assert [list(x) for x in a] == [list(x) for x in b]
        elif b.dtype.kind == "f" and c in QUANTILE_COLUMNS:
            np.testing.assert_allclose(a.to_numpy(float), b.to_numpy(float), rtol=2e-9, atol=0,
                                       equal_nan=True, err_msg=c)
        elif b.dtype.kind == "f":
            np.testing.assert_allclose(a.to_numpy(float), b.to_numpy(float), rtol=1e-12, atol=1e-11,
                                       equal_nan=True, err_msg=c)
        else:
            assert a.astype(object).tolist() == b.astype(object).tolist(), c


def test_in_process_scores_equal_one_assess_of_the_whole(scored, tmp_path):
    from bayesbase.scale import score_dataset

    ds, want, attrs = scored
    seen = []
    s = score_dataset(ds, tmp_path / "out", progress=lambda o, i, n: seen.append((i, n)))
    assert s.ok and s.done == s.partitions == len(list(ds.iterdir()))
    assert seen[-1] == (s.partitions, s.partitions)
    assert s.cases == len(want) and s.patients == want["patient"].nunique() == 120
    assert s.probable == int((want["p_change"] >= 0.5).sum())
    written = sorted(p.name for p in (tmp_path / "out").iterdir())
    assert written == sorted(p.name for p in ds.iterdir())
    _assert_same_table(tmp_path / "out", want)


@pytest.mark.slow  # starts Dask workers and scores the dataset twice (> 10 s on a busy machine)
def test_local_cluster_scores_equal_one_assess_of_the_whole(scored, cluster, tmp_path):
    from bayesbase.scale import score_dataset

    ds, want, _ = scored
    from bayesbase.scale import read_scores

    s = score_dataset(ds, tmp_path / "out", scheduler=cluster.scheduler_address)
    assert s.ok and s.done == s.partitions and s.cases == len(want)
    _assert_same_table(tmp_path / "out", want)
    # the same partitions in this process: identical to the last bit
    score_dataset(ds, tmp_path / "here")
    pd.testing.assert_frame_equal(read_scores(tmp_path / "out"), read_scores(tmp_path / "here"),
                                  check_exact=True)


@pytest.mark.slow  # starts two worker processes and kills one
def test_a_killed_worker_loses_no_partition(scored, tmp_path):
    import signal

    import distributed

    from bayesbase.scale import score_dataset

    ds, want, _ = scored
    killed = []
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                       dashboard_address=":0")
    with cluster, distributed.Client(cluster) as client:
        pids = sorted(client.run(os.getpid).values())

        def kill_one_worker(outcome, done, total):  # after the first partition: both are busy
            if not killed:
                os.kill(pids[0], signal.SIGKILL)
                killed.append(pids[0])

        s = score_dataset(ds, tmp_path / "out", scheduler=client, progress=kill_one_worker)
        assert pids[0] not in client.run(os.getpid).values()
    assert killed and s.ok and s.done == s.partitions
    _assert_same_table(tmp_path / "out", want)


def test_metadata_carries_pack_hash_engine_settings_and_version(scored, tmp_path):
    import bayesbase
    from bayesbase.scale import score_dataset, scores_metadata

    ds, _, attrs = scored
    score_dataset(ds, tmp_path / "out", pack="dog")
    pack_bytes = resources.files("bayesbase.models").joinpath("dog.toml").read_bytes()
    for f in (tmp_path / "out").iterdir():
        meta = scores_metadata(f)
        assert meta["pack_id"] == "dog"
        assert meta["pack_sha256"] == hashlib.sha256(pack_bytes).hexdigest()
        assert meta["engine"] == "exact" and meta["version"] == bayesbase.__version__
        assert meta["settings"] == attrs["settings"]
        assert meta["input_sha256"] == hashlib.sha256((ds / f.name).read_bytes()).hexdigest()
        assert meta["flags_encoding"] == "list<string>" and meta["cautions"]


@pytest.mark.slow  # scores the dataset three times (> 10 s on a busy machine)
def test_resume_scores_only_missing_partitions(scored, tmp_path, monkeypatch):
    from bayesbase.scale import score_dataset, task

    ds, want, _ = scored
    calls = []
    real = task.score_partition
    monkeypatch.setattr(task, "score_partition", lambda t: calls.append(t.source.name) or real(t))
    first = score_dataset(ds, tmp_path / "out")
    assert len(calls) == first.partitions
    outs = sorted((tmp_path / "out").iterdir())
    gone = outs[1]
    gone.unlink()
    (tmp_path / "out" / f".{outs[2].name}.dead.tmp").write_bytes(b"half")  # a stopped write
    before = {p.name: (p.stat().st_ino, p.stat().st_mtime_ns) for p in outs if p != gone}
    with pytest.raises(BayesbaseError, match="--resume"):
        score_dataset(ds, tmp_path / "out")
    calls.clear()
    again = score_dataset(ds, tmp_path / "out", resume=True)
    assert calls == [gone.name]
    assert again.done == 1 and again.skipped == first.partitions - 1 and again.ok
    assert again.cases == first.cases and again.probable == first.probable
    for name, stamp in before.items():
        p = tmp_path / "out" / name
        assert (p.stat().st_ino, p.stat().st_mtime_ns) == stamp, name
    assert not list((tmp_path / "out").glob(".*.tmp"))
    calls.clear()  # another request (--at) is not taken for finished work
    score_dataset(ds, tmp_path / "out", resume=True, at="2004-02-10")
    assert len(calls) == first.partitions
    _assert_same_table(tmp_path / "out", _whole_at(ds, "2004-02-10"))


def _whole_at(ds, at):
    from bayesbase.assessment import assess

    t = assess(bpq.read_canonical(ds), at=at).table
    return t.sort_values(["patient", "analyte"], kind="mergesort").reset_index(drop=True)


def test_a_corrupted_partition_is_reported_and_the_rest_completes(scored, tmp_path, capsys):
    import shutil

    from bayesbase.cli import main

    ds, want, _ = scored
    shutil.copytree(ds, tmp_path / "ds")
    bad = sorted((tmp_path / "ds").iterdir())[2]
    bad.write_bytes(bad.read_bytes()[: 200])  # a truncated file
    code = main(["score", str(tmp_path / "ds"), "--out", str(tmp_path / "out")])
    out, err = capsys.readouterr()
    assert code == 1
    assert f"failed: {bad}" in out and "not a readable Parquet file" in out
    assert "failures 1" in out and "Decision support, not a diagnosis." in out
    assert "partitions" in err  # the progress line
    written = sorted(p.name for p in (tmp_path / "out").iterdir())
    assert written == sorted(p.name for p in ds.iterdir() if p.name != bad.name)
    from bayesbase.scale import read_scores

    got = read_scores(tmp_path / "out")
    rest = want[want["patient"].isin(set(got["patient"]))]
    assert len(got) == len(rest) and len(rest) < len(want)


def test_missing_dask_gives_a_clear_message(scored, tmp_path, monkeypatch):
    from bayesbase.scale import score_dataset

    monkeypatch.setitem(sys.modules, "distributed", None)  # import distributed -> ImportError
    with pytest.raises(BayesbaseError, match=r"pip install 'bayesbase\[scale\]'"):
        score_dataset(scored[0], tmp_path / "out", scheduler="local")
    assert not (tmp_path / "out").exists()
