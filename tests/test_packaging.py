"""Packaging: a non-editable install (what `pip install .` and CI's demo use) ships every
sub-package, every case folder and the report's template files."""
from __future__ import annotations

import tomllib

from conftest import ROOT


def _setuptools() -> dict:
    with open(ROOT / "pyproject.toml", "rb") as fh:
        return tomllib.load(fh)["tool"]["setuptools"]


def test_every_sub_package_is_listed():
    listed = set(_setuptools()["packages"])
    tree = {".".join(p.parent.relative_to(ROOT).parts) for p in (ROOT / "bayesbase").rglob("__init__.py")
            if "__pycache__" not in p.parts}
    missing = sorted(tree - listed)
    assert not missing, f"add to pyproject.toml [tool.setuptools] packages: {missing}"


def test_listed_packages_exist():
    cfg = _setuptools()
    dirs = cfg.get("package-dir", {})
    for name in cfg["packages"]:
        parts = name.split(".")
        base = next((dirs[".".join(parts[:k])] for k in range(len(parts), 0, -1)
                     if ".".join(parts[:k]) in dirs), None)
        if base is not None:
            k = next(k for k in range(len(parts), 0, -1) if ".".join(parts[:k]) in dirs)
            path = ROOT / base / "/".join(parts[k:])
        else:
            path = ROOT / "/".join(parts)
        assert path.is_dir(), f"{name} is listed in pyproject.toml but {path} does not exist"


def test_report_templates_are_package_data():
    data = _setuptools()["package-data"]
    patterns = data.get("bayesbase.report", [])
    from fnmatch import fnmatch

    files = [p.relative_to(ROOT / "bayesbase" / "report").as_posix()
             for p in (ROOT / "bayesbase" / "report" / "templates").iterdir()]
    assert files
    for f in files:
        assert any(fnmatch(f, pat) for pat in patterns), f"{f} is not shipped (package-data)"
