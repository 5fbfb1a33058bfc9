"""bayesbase: subject-based interpretation of animal laboratory results.

Decision support, not a diagnosis. See README.md for cautions.

The top level is light: heavy modules (pandas, PyMC) load on first use.
"""
from __future__ import annotations

__version__ = "0.1.0"

# The prior packs (models/) and the case library (case_library/) live at the top of the source
# tree and are installed as the subpackages bayesbase.models and bayesbase.case_library. When the
# package is imported from a source checkout (tests run from the repository root), let those two
# subpackages resolve to the top-level folders.
from pathlib import Path as _Path

_here = _Path(__file__).resolve().parent
if not (_here / "models").is_dir() and (_here.parent / "models" / "__init__.py").is_file():
    __path__.append(str(_here.parent))  # noqa: F821 (module __path__)
del _Path, _here

__all__ = ["assess", "load_results", "validate", "load_pack", "__version__"]


def __getattr__(name):  # lazy exports keep `bayesbase --help` fast
    if name == "assess":
        from .assessment import assess
        return assess
    if name == "load_results":  # the older name of bayesbase.io.read_results
        from .io import read_results
        return read_results
    if name == "validate":  # the package; its validate() is bayesbase.validate.validate
        from . import validate
        return validate
    if name == "load_pack":
        from .priors import load_pack
        return load_pack
    raise AttributeError(name)
