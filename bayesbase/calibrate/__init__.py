"""Calibration of a prior pack on a clinic's own results: a hierarchical PyMC model of breed
centres, method biases, CVG and the CVI of each animal, learned from every usable result of a
store, written as a pack fragment whose numbers have provenance "calibrated".

Public API (loaded lazily, so ``bayesbase --help`` stays light):

``calibrate(results_or_store, ...)`` -> :class:`~bayesbase.calibrate.job.Calibration`
``write_outputs(calibration, dir, force=False)`` pack.toml, calibration.csv, idata.nc,
calibration.html, cvi_prior_posterior.png
``fragment_toml(calibration)``  the pack fragment's text
``simulate_store(...)``       invented store with known truth (tests, benchmarks, demos)
``heldout_proof(...)``        k-fold held-out coverage, false alarms and sensitivity to a +30 %
shift, built-in pack vs calibrated pack

Modules: ``core`` (input, usable results by the assessment's baseline rules, layout), ``model``
(the PyMC model), ``split`` (the same model fitted one analyte at a time, one compile reused;
with ``model`` the only PyMC importers), ``job`` (calibrate, summaries), ``output`` (files; the only matplotlib
importer), ``simulate`` (invented data), ``cli`` (argparse; the only printer).
"""
from __future__ import annotations

__all__ = ["calibrate", "Calibration", "write_outputs", "fragment_toml", "simulate_store",
           "select_specimens", "heldout_proof"]

_WHERE = {
    "calibrate": "job", "Calibration": "job", "write_outputs": "output", "fragment_toml": "output",
    "simulate_store": "simulate", "select_specimens": "core", "heldout_proof": "heldout",
}


def __getattr__(name):
    if name in _WHERE:
        import importlib

        return getattr(importlib.import_module(f".{_WHERE[name]}", __name__), name)
    raise AttributeError(name)
