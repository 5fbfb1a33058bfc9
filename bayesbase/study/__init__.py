"""Biological-variation studies: estimate CVA, CVI and CVG (classical and Bayesian), plan a
study, and write a prior-pack fragment from it.

Public API (loaded lazily, so ``bayesbase --help`` stays light):

``estimate(data, ...)``      -> :class:`~bayesbase.study.core.StudyResult`
``write_outputs(result, dir)`` estimates.csv, removed.csv, steps.csv, study.html, pack.toml
``plan_design(...)``         -> :class:`~bayesbase.study.plan.DesignPlan`

Modules: ``common`` (names, errors), ``anova`` and ``outliers`` and ``plan`` (numpy/scipy
numerics), ``core`` (estimate), ``bayes`` (the only PyMC importer), ``output`` (files, the only
matplotlib importer), ``cli`` (argparse; the only printer).
"""
from __future__ import annotations

__all__ = ["estimate", "StudyResult", "write_outputs", "plan_design", "DesignPlan", "StudyError"]

_WHERE = {
    "estimate": "core", "StudyResult": "core", "write_outputs": "output", "plan_design": "plan",
    "DesignPlan": "plan", "StudyError": "common",
}


def __getattr__(name):
    if name in _WHERE:
        import importlib

        return getattr(importlib.import_module(f".{_WHERE[name]}", __name__), name)
    raise AttributeError(name)
