"""Per-patient, per-analyte answers: which result is assessed, which earlier specimens form the
baseline (and which are left out, and why), sample-quality and comparability rules, the model's
answer (exact or PyMC engine) and the classical RCV family beside it.

:func:`assess` runs the stages in order; each lives in its own module and is tested alone:

options -> frame -> packs -> roles -> cases -> flags -> engine_step -> comparisons -> trend_cols
-> table -> result

Every result is stamped with the prior pack id and hash, the engine, its settings and the seed.
Decision support, not a diagnosis.
"""
from __future__ import annotations

import gc
import threading
from contextlib import contextmanager

from ..constants import DEFAULT_CI_PROB, DEFAULT_COVERAGE, DEFAULT_QUAD_NODES
from .cases import build_cases, object_texts, text_column
from .comparisons import classical_comparisons, classical_cvs
from .engine_step import run_engine
from .flags import case_flags, not_converged_flag, quality_column
from .frame import history_frame
from .options import Options
from .packs import packs_by_species, row_priors
from .result import Assessment
from .roles import assessed_specimens, assign_roles, case_rows, rule_context
from .table import provenance, results_table
from .trend_cols import TREND_RULE, trend_columns

__all__ = ["assess", "run"]


def assess(
    results, pack=None, priors=None, engine: str = "exact", coverage: float = DEFAULT_COVERAGE,
    prior_change: float | None = None, shift_scale: float | None = None, at=None, patient=None,
    keep_compromised: bool = False, method_bias: dict | None = None, seed: int = 0,
    ci_prob: float = DEFAULT_CI_PROB, nodes: int = DEFAULT_QUAD_NODES, trend: bool = True,
    prior_drift: float | None = None, mcmc_options: dict | None = None, now=None, jobs: int = 1,
) -> Assessment:
    """Assess the latest (or ``at``) specimen of every patient against its own history.

    Parameters
    ----------
    results : path or DataFrame in the tidy results contract (validated here when raw).
    pack : prior pack name, path or :class:`bayesbase.priors.Pack`; default: the species' pack.
    priors : a lab override CSV layered over the pack.
    engine : ``"exact"`` (conjugate update + quadrature) or ``"mcmc"`` (PyMC, same model; also
        censored baselines).
    coverage : central coverage of the personal interval (0.99 for a specificity-first screen).
    prior_change : prior probability of a true change (default: the pack's, else
        :data:`~bayesbase.constants.DEFAULT_PRIOR_CHANGE`).
    shift_scale : multiplies the SD of a true change under H1 (default 1: tau^2 = sG^2 + sI^2
        unless the pack gives ``shift_sd``).
    at : specimen id or date of the result to assess (default: each patient's latest specimen).
    keep_compromised : keep baselines with an H/L/I index above the pack's threshold, with their
        variance inflated by sI^2 (default: leave them out).
    method_bias : ``{analyte: (bias_fraction, bias_sd_fraction)}`` for a method change between
        baseline and assessed result; the assessed value is corrected by the bias and its
        uncertainty enters the variance, and the comparison is then called comparable. Without
        it, a pack whose analyte carries ``method_biases`` (e.g. from ``bayesbase calibrate``)
        covering every method of the case corrects the change with them (calibrated correction,
        :mod:`bayesbase.assessment.cases`); an analyte given here always uses the stated bias.

    Baseline rule: earlier specimens of the same analyte whose state is healthy or blank (blank
    is reported as "assumed healthy"); unwell specimens are shown but never used; a specimen
    whose H/L/I index exceeds the pack's threshold for the analyte is left out (unless
    ``keep_compromised``); for feeding-sensitive analytes a non-fasted specimen is left out when
    fasted ones exist. Vectorised over patients: a clinic database is scored in one call.

    jobs : worker processes for a large history (exact engine, no ``at``): the patients split
        into parts assessed in forked processes, the same numbers as one process
        (:mod:`bayesbase.assessment.pool`); 1 (default) or where it does not apply: this process.
    """
    opts = Options(pack=pack, priors=priors, engine=engine, coverage=coverage, prior_change=prior_change,
                   shift_scale=shift_scale, at=at, patient=patient, keep_compromised=keep_compromised,
                   method_bias=method_bias, seed=seed, ci_prob=ci_prob, nodes=nodes, trend=trend,
                   prior_drift=prior_drift, mcmc_options=mcmc_options, now=now, jobs=jobs)
    return run(results, opts)


_FROZEN_LOCK = threading.Lock()
_FROZEN = [0, None]  # assessments running with the heap frozen; numpy's hugepage advice before the first


def _hugepage_advice(on: bool):
    """Set whether numpy asks the kernel for transparent huge pages for its large arrays
    (``madvise(MADV_HUGEPAGE)``, numpy's import-time default on Linux 4.6 and newer, also set by the
    environment variable ``NUMPY_MADVISE_HUGEPAGE``); returns the previous setting, or None where
    this numpy has no runtime switch (then nothing changes)."""
    import numpy as np

    core = getattr(np, "_core", None) or getattr(np, "core", None)
    switch = getattr(getattr(core, "multiarray", None), "_set_madvise_hugepage", None)
    return None if switch is None else bool(switch(on))


@contextmanager
def _heap_frozen():
    """Leave the objects that exist when an assessment starts out of Python's cycle collections
    (:func:`gc.freeze`) until the last running assessment ends: the collections that the many
    new objects of a large assessment trigger (one list of flags per case) then walk those new
    objects only, not the whole heap again and again. The collector stays on, for every thread;
    objects frozen meanwhile are collected as usual after :func:`gc.unfreeze`.

    Meanwhile numpy does not advise huge pages for its arrays (:func:`_hugepage_advice`; the
    previous setting comes back with the last assessment's end): an assessment makes many
    short-lived arrays of a few MB, and where the kernel's THP ``defrag`` setting is ``madvise``
    each first touch of such an array compacts memory for a 2 MB page. Measured on the bench's
    10,000-patient store: the first assessment in a process 0.9-1.2 s system CPU with the advice,
    0.3 s without; user CPU unchanged; the arrays' values do not depend on it."""
    with _FROZEN_LOCK:
        _FROZEN[0] += 1
        if _FROZEN[0] == 1:
            gc.freeze()
            _FROZEN[1] = _hugepage_advice(False)
    try:
        yield
    finally:
        with _FROZEN_LOCK:
            _FROZEN[0] -= 1
            if _FROZEN[0] == 0:
                gc.unfreeze()
                if _FROZEN[1] is not None:
                    _hugepage_advice(_FROZEN[1])


def run(results, opts: Options) -> Assessment:
    """The stages of :func:`assess` on checked options (with the heap frozen: :func:`_heap_frozen`),
    in ``opts.jobs`` worker processes where that applies (:func:`.pool.pooled`)."""
    with _heap_frozen():
        hist = history_frame(results, opts.patients, now=opts.now)
        if opts.jobs > 1:
            from .pool import pooled

            out = pooled(hist, opts)
            if out is not None:
                return out
        return _stages_on(hist, opts)


def _role_columns(roles):
    """The history's ``role`` and ``reason`` columns (as pandas infers them from the texts)."""
    if roles.coded is None:
        return object_texts(roles.role), object_texts(roles.reason)
    return tuple(text_column(codes, names) for codes, names in roles.coded)


def _stages_on(hist, opts: Options) -> Assessment:
    """The stages after the history (:func:`.frame.history_frame`), in order; ``hist`` gets the
    role and reason of every row."""
    packs = packs_by_species(hist, opts.pack, opts.priors)
    codes: dict = {}  # the columns factorized once for every stage (.frame.factorized)
    targets = assessed_specimens(hist, opts.at, codes)
    rows = case_rows(hist, targets, codes)
    priors = row_priors(hist, rows.in_case, packs, codes)
    roles = assign_roles(rows, rule_context(hist, rows, priors, opts.keep_compromised))
    hist["role"], hist["reason"] = _role_columns(roles)
    batch = build_cases(hist, rows, roles, priors, packs, opts, codes)
    flags = case_flags(batch)
    result = run_engine(batch.case_arrays(), opts, batch.patient, batch.analyte)
    if not result.converged.all():
        words = not_converged_flag(result.mcmc.diagnostics)
        flags = [f + [words] for f in flags]
    table = results_table(batch, targets, result, classical_comparisons(batch, opts.coverage),
                          classical_cvs(batch), quality_column(batch), flags, opts)
    if opts.trend:
        result.settings["trend_rule"] = TREND_RULE
        for k, v in trend_columns(batch, opts.drift_prior, opts.nodes).items():
            table[k] = v
    packs_used, attrs = provenance(batch, result, opts)
    return Assessment(table=table, history=hist, attrs=attrs, packs=packs_used, mcmc=result.mcmc)
