"""bayesbase: subject-based interpretation of animal laboratory results.

Decision support, not a diagnosis. See README.md for cautions.

The top level is light: heavy modules (pandas, PyMC) load on first use.
"""
from __future__ import annotations

__version__ = "0.1.0"

__all__ = ["assess", "load_results", "validate", "load_pack", "__version__"]


def __getattr__(name):  # lazy exports keep `bayesbase --help` fast
    if name == "assess":
        from .assess import assess
        return assess
    if name in ("load_results", "validate"):
        from . import data
        return getattr(data, name)
    if name == "load_pack":
        from .priors import load_pack
        return load_pack
    raise AttributeError(name)
