"""Import rules of DEVELOPERS.md, enforced by parsing every module with ast."""
from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

PKG = Path(__file__).resolve().parents[1] / "bayesbase"

LAYER = {
    "constants": 0, "errors": 0,
    "units": 1, "classical": 1, "evidence": 1,
    "data": 2, "priors": 2,
    "engine": 3, "trend": 3, "mcmc": 3, "mcmc_trend": 3,
    "assess": 4, "store": 4, "fhir": 4,
    "research": 5, "plots": 5, "report": 5,
    "bench": 6, "cli": 6,
}
PYMC_ALLOWED = {"mcmc", "mcmc_trend"}
MPL_ALLOWED = {"plots", "report", "research", "bench"}
HEAVY = {"pymc", "pytensor", "arviz", "nutpie"}


def _imports(path: Path):
    tree = ast.parse(path.read_text(encoding="utf-8"))
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for a in node.names:
                yield a.name, node
        elif isinstance(node, ast.ImportFrom):
            if node.level and node.level > 0:
                base = node.module or ""
                if base:
                    yield "bayesbase." + base, node
                else:
                    for a in node.names:
                        yield "bayesbase." + a.name, node
            elif node.module:
                yield node.module, node


def _modules():
    return sorted(p for p in PKG.glob("*.py") if p.stem != "__init__" and p.stem != "__main__")


def test_every_module_has_a_layer():
    missing = [p.stem for p in _modules() if p.stem not in LAYER]
    assert not missing, f"add these modules to DEVELOPERS.md and LAYER: {missing}"


@pytest.mark.parametrize("path", _modules(), ids=lambda p: p.stem)
def test_imports_point_down(path):
    me = path.stem
    for name, node in _imports(path):
        top = name.split(".")[0]
        if top in HEAVY:
            assert me in PYMC_ALLOWED, f"{me} imports {name} (line {node.lineno}); only mcmc modules may"
        if top == "matplotlib":
            assert me in MPL_ALLOWED, f"{me} imports matplotlib (line {node.lineno})"
        if top == "bayesbase" and "." in name:
            other = name.split(".")[1]
            if other == "__init__" or other not in LAYER:
                continue
            if me == "cli":
                continue
            assert LAYER[other] <= LAYER[me], f"{me} (layer {LAYER[me]}) imports {other} (layer {LAYER[other]})"


def test_mcmc_imported_only_inside_functions():
    for path in _modules():
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in tree.body:  # module level only
            if isinstance(node, ast.ImportFrom) and node.module in ("mcmc", "mcmc_trend"):
                pytest.fail(f"{path.stem} imports {node.module} at module level")
            if isinstance(node, ast.ImportFrom) and node.level and any(a.name in ("mcmc", "mcmc_trend") for a in node.names):
                pytest.fail(f"{path.stem} imports the mcmc engine at module level")


def test_help_does_not_import_heavy_modules():
    code = (
        "import sys\n"
        "from bayesbase.cli import main\n"
        "try:\n    main(['--help'])\nexcept SystemExit:\n    pass\n"
        "bad = [m for m in ('pymc', 'pytensor', 'arviz', 'pandas', 'matplotlib') if m in sys.modules]\n"
        "print('HEAVY:' + ','.join(bad))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip().splitlines()[-1] == "HEAVY:", out.stdout


def test_core_numerics_do_not_import_pymc_at_import_time():
    code = (
        "import sys\n"
        "import bayesbase.engine, bayesbase.assess, bayesbase.data, bayesbase.priors\n"
        "print(','.join(m for m in ('pymc', 'pytensor', 'arviz', 'matplotlib') if m in sys.modules))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""
