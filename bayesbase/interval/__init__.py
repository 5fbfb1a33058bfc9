"""Population reference intervals from a healthy reference sample (``bayesbase interval``).

``estimate(frame_or_path, *, analytes=None, species=None, partition=None, method="auto",
keep_outliers=False, seed=0)`` returns an :class:`~bayesbase.interval.core.IntervalResult`
(``.table``, ``.outliers``, ``.dataset``, ``.attrs``, ``.write(dir)``, ``.pack_fragment()``).

Modules: ``stats`` (numpy/scipy kernels), ``core`` (the pipeline; pandas, no plotting), ``pack``
(pack fragment TOML), ``report`` (HTML; the only module importing matplotlib), ``outputs``
(all-or-nothing file writing), ``cli`` (``add_parser``/``run``); its benchmark is
:func:`bayesbase.bench.interval.bench_interval`.

The package import is light (nothing below is imported until used) so that the command line's
``--help`` stays fast.
"""
from __future__ import annotations

__all__ = ["estimate", "IntervalResult", "IntervalError"]


def __getattr__(name):  # lazy exports
    if name in ("estimate", "IntervalResult", "IntervalError"):
        from . import core

        return getattr(core, name)
    raise AttributeError(name)
