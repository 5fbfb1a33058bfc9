"""Assessing a large store in worker processes: the patients split into contiguous parts of the
sorted history, each part assessed by the same stages in its own forked process, the parts'
tables and history columns put back together in the original order.

Every patient is assessed from its own rows only, so a part gives the same rows as the whole.
The compiled loops (exact engine, trend) are loaded before the fork, so every part takes the
path the whole job takes once they are loaded; the pool runs only for at least
``NUMBA_MIN_ELEMS / nodes`` patients (each has a case, so the whole job's engine step loads them
too). tests/test_assess_pool.py checks the frames, flags and JSON against one process.

Used only for the exact engine without ``at`` (a specimen or date asked for may belong to one
part only), and only where this system can fork; anything else, or a worker that cannot start,
runs in this process.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = ["MIN_ROWS_PER_JOB", "pooled", "part_bounds", "merge_attrs", "concat_parts"]

#: a part smaller than this many history rows is not worth a process (fork, pickling back)
MIN_ROWS_PER_JOB = 20_000
#: attrs that differ between parts by their content (the packs and prior probabilities a part
#: used); every other attr must be the same in every part
_MERGED = ("pack_id", "pack_sha256", "prior_change")

_PARTS: list = []  # the parts of the history being assessed (read by the forked workers)


def part_bounds(patients: np.ndarray, jobs: int) -> list[tuple[int, int]]:
    """Row ranges ``[a, b)`` of at most ``jobs`` parts of a history sorted by patient (the
    ``patients`` column as codes or texts), of about equal rows: part ``j`` starts at the first
    patient starting at or after row ``n * j / jobs`` (a patient's rows stay in one part)."""
    n = len(patients)
    starts = np.flatnonzero(np.r_[True, patients[1:] != patients[:-1]]) if n else np.zeros(0, np.int64)
    at = np.searchsorted(starts, [n * j / jobs for j in range(1, jobs)])  # first patient from there
    cuts = sorted({int(starts[i]) for i in at.tolist() if i < len(starts)} - {0})
    edges = [0, *cuts, n]
    return [(a, b) for a, b in zip(edges[:-1], edges[1:]) if b > a]


def _one(k: int, opts):
    """Worker: the stages on part ``k`` (a history slice); returns the table, the columns the
    stages added to the history, the attrs and the packs."""
    from .pipeline import _stages_on

    hist = _PARTS[k]
    before = set(hist.columns)
    a = _stages_on(hist, opts)
    added = [c for c in a.history.columns if c not in before]
    return a.table, a.history[added], a.attrs, a.packs


def merge_attrs(attrs: list[dict], packs: dict) -> dict | None:
    """The attrs of the whole from those of its parts (in order): the packs used and the prior
    probabilities of change gathered as one assessment stamps them; None when any other attr
    differs between parts (the caller then assesses in one process)."""
    first = attrs[0]
    if any({k: v for k, v in a.items() if k not in _MERGED}
           != {k: v for k, v in first.items() if k not in _MERGED} for a in attrs[1:]):
        return None
    ids = sorted(packs)
    return {**first, "pack_id": ",".join(ids), "pack_sha256": ",".join(packs[k].sha256 for k in ids),
            "prior_change": sorted({x for a in attrs for x in a["prior_change"]})}


def concat_parts(frames: list) -> pd.DataFrame | None:
    """The parts' frames one under the other, each column with the dtype the whole would have:
    a text column is an Arrow string column when any value is a text and an object column of
    missing values otherwise (:func:`.cases.text_column`), so a part whose column holds only
    missing values takes the others' dtype. None when the parts' dtypes disagree otherwise."""
    frames = list(frames)
    if any(list(f.columns) != list(frames[0].columns) for f in frames[1:]):
        return None
    kinds = [[str(d) for d in f.dtypes] for f in frames]
    for j, c in enumerate(frames[0].columns):
        if len({k[j] for k in kinds}) == 1:
            continue
        parts = [f[c] for f in frames]
        typed = {str(p.dtype) for p in parts if not (p.dtype == object and p.isna().all())}
        if len(typed) != 1:
            return None
        dtype = next(p.dtype for p in parts if str(p.dtype) in typed)
        frames = [f if f[c].dtype == dtype else f.assign(**{c: f[c].astype(dtype)}) for f in frames]
    return pd.concat(frames, ignore_index=True)


def _workers(n: int):
    """A pool of ``n`` processes forked from this one, or None where this system cannot fork."""
    import multiprocessing as mp
    from concurrent.futures import ProcessPoolExecutor

    if "fork" not in mp.get_all_start_methods():
        return None
    return ProcessPoolExecutor(n, mp_context=mp.get_context("fork"))


def _run_parts(hist: pd.DataFrame, bounds: list, opts):
    """The workers' answers for the parts ``bounds`` of ``hist``, in order; None when the
    workers could not run."""
    from concurrent.futures.process import BrokenProcessPool
    from itertools import repeat

    from ..model import normal, trend

    # loaded before the fork: every part takes the path the whole job takes once they are loaded
    normal.have_numba()
    trend.have_numba()
    pool = _workers(len(bounds))
    if pool is None:
        return None
    _PARTS[:] = [hist.iloc[a:b].reset_index(drop=True) for a, b in bounds]
    try:
        return list(pool.map(_one, range(len(bounds)), repeat(opts)))
    except (OSError, BrokenProcessPool):
        return None
    finally:
        pool.shutdown(wait=False)  # the workers have answered: they end meanwhile
        _PARTS.clear()


def pooled(hist: pd.DataFrame, opts):
    """The :class:`~.result.Assessment` of ``hist`` (as :func:`.frame.history_frame` gives it)
    in ``opts.jobs`` worker processes, or None when it should run in this process (one job, the
    PyMC engine, ``at`` given, too few rows, no fork, a worker failed or the parts disagree)."""
    from ..model.normal import NUMBA_MIN_ELEMS
    from .result import Assessment

    jobs = min(int(opts.jobs), len(hist) // MIN_ROWS_PER_JOB)
    if jobs < 2 or opts.engine != "exact" or opts.at is not None:
        return None
    codes, patients = pd.factorize(hist["patient"])
    if len(patients) * opts.nodes < NUMBA_MIN_ELEMS:  # the whole job might not load the compiled loops
        return None
    bounds = part_bounds(codes, jobs)
    if len(bounds) < 2:
        return None
    got = _run_parts(hist, bounds, opts)
    if got is None:
        return None
    tables, added, attrs, packs = zip(*got)
    used = {k: v for p in packs for k, v in p.items()}
    merged = merge_attrs(list(attrs), used)
    if merged is None:
        return None
    table, extra = concat_parts(list(tables)), concat_parts(list(added))
    if table is None or extra is None:
        return None
    for c in extra.columns:
        hist[c] = extra[c].to_numpy() if extra[c].dtype == object else extra[c].array
    return Assessment(table=table, history=hist, attrs=merged, packs=used)
