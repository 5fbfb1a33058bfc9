"""Import rules and size rules of DEVELOPERS.md, enforced by parsing every module with ast.

A *unit* is a top-level module or sub-package of bayesbase (``model``, ``store``, ``report``...).
Units have layers; a unit imports project units only from its own layer or below; the graph of
imports between units (lazy imports inside functions included) has no circle.
"""
from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

PKG = Path(__file__).resolve().parents[1] / "bayesbase"

#: layer of every unit (DEVELOPERS.md, "Module map")
LAYER = {
    "constants": 0, "errors": 0, "contract": 0,
    "units": 1, "classical": 1, "evidence": 1, "privacy": 1, "testing": 1,
    "io": 2, "validate": 2, "priors": 2,
    "model": 3, "mcmc": 3,
    "assessment": 4, "store": 4,
    "research": 5, "report": 5, "study": 5, "interval": 5, "calibrate": 5, "scale": 5,
    "bench": 6, "cli": 6, "web": 6,
}
#: modules that may import PyMC / PyTensor / ArviZ (each builds a graph or reads its output)
PYMC_ALLOWED_UNITS = {"mcmc"}
PYMC_ALLOWED_MODULES = {"study.bayes", "calibrate.model", "calibrate.split", "calibrate._locop"}
#: units that may import matplotlib (figures, reports, benchmarks)
MPL_ALLOWED = {"report", "research", "study", "interval", "calibrate", "bench"}
HEAVY = {"pymc", "pytensor", "arviz", "nutpie"}

#: functions allowed past MAX_FUNCTION_LINES, each with the reason (empty when none is needed)
MAX_FUNCTION_LINES = 100
LONG_FUNCTION_EXCEPTIONS: dict[str, str] = {
}


def _modules() -> list[Path]:
    return sorted(p for p in PKG.rglob("*.py") if p.name != "__main__.py")


def _dotted(path: Path) -> str:
    """'model.engine' for bayesbase/model/engine.py, 'model' for bayesbase/model/__init__.py."""
    rel = path.relative_to(PKG).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def _is_package(path: Path) -> bool:
    return path.name == "__init__.py"


def _imports(path: Path):
    """Yield (absolute module name, node, at_module_level) for every import in the file."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    me = _dotted(path)
    pkg_parts = ["bayesbase"] + (me.split(".") if me else [])
    if not _is_package(path):
        pkg_parts = pkg_parts[:-1]
    top_level = set(map(id, tree.body))
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for a in node.names:
                yield a.name, node, id(node) in top_level
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = pkg_parts[: len(pkg_parts) - (node.level - 1)]
                if node.module:
                    yield ".".join(base + [node.module]), node, id(node) in top_level
                else:
                    for a in node.names:
                        yield ".".join(base + [a.name]), node, id(node) in top_level
            elif node.module:
                yield node.module, node, id(node) in top_level


def _unit(name: str) -> str | None:
    """The bayesbase unit an absolute module name belongs to (None outside the package)."""
    parts = name.split(".")
    if parts[0] != "bayesbase" or len(parts) < 2:
        return None
    return parts[1]


def test_every_unit_has_a_layer():
    units = {_dotted(p).split(".")[0] for p in _modules() if _dotted(p)}
    missing = sorted(u for u in units if u not in LAYER and u not in ("models", "case_library"))
    assert not missing, f"add these units to DEVELOPERS.md and LAYER: {missing}"


@pytest.mark.parametrize("path", _modules(), ids=_dotted)
def test_imports_point_down(path):
    me = _dotted(path)
    if not me:
        return  # bayesbase/__init__.py: lazy top-level exports only
    my_unit = me.split(".")[0]
    for name, node, _ in _imports(path):
        top = name.split(".")[0]
        if top in HEAVY:
            assert my_unit in PYMC_ALLOWED_UNITS or me in PYMC_ALLOWED_MODULES, (
                f"{me} imports {name} (line {node.lineno}); only the PyMC modules may")
        if top == "matplotlib":
            assert my_unit in MPL_ALLOWED, f"{me} imports matplotlib (line {node.lineno})"
        other = _unit(name)
        if other is None or other == my_unit or other not in LAYER or my_unit == "cli":
            continue
        assert LAYER[other] <= LAYER[my_unit], (
            f"{me} (layer {LAYER[my_unit]}) imports {other} (layer {LAYER[other]}), line {node.lineno}")


def test_unit_import_graph_has_no_circle():
    edges: dict[str, set[str]] = {u: set() for u in LAYER}
    for path in _modules():
        me = _dotted(path)
        if not me:
            continue
        mine = me.split(".")[0]
        for name, _, _ in _imports(path):
            other = _unit(name)
            if other and other != mine and other in LAYER:
                edges.setdefault(mine, set()).add(other)
    # depth-first search for a back edge
    state: dict[str, int] = {}
    cycle: list[str] = []

    def visit(u: str, stack: list[str]) -> bool:
        state[u] = 1
        for v in sorted(edges.get(u, ())):
            if state.get(v) == 1:
                cycle.extend(stack[stack.index(v):] + [v] if v in stack else [u, v])
                return True
            if v not in state and visit(v, stack + [v]):
                return True
        state[u] = 2
        return False

    for u in sorted(edges):
        if u not in state and visit(u, [u]):
            break
    assert not cycle, "import circle between units: " + " -> ".join(cycle)


def test_circle_check_can_fail(tmp_path):
    """The DFS above finds a planted circle (guards against a check that cannot fail)."""
    a = {"x": {"y"}, "y": {"z"}, "z": {"x"}}
    seen, found = {}, []

    def visit(u, stack):
        seen[u] = 1
        for v in a[u]:
            if seen.get(v) == 1:
                found.append(v)
                return True
            if v not in seen and visit(v, stack + [v]):
                return True
        seen[u] = 2
        return False

    assert visit("x", ["x"]) and found == ["x"]


def test_mcmc_imported_only_inside_functions():
    for path in _modules():
        me = _dotted(path)
        if me.split(".")[0] == "mcmc" or me in PYMC_ALLOWED_MODULES:
            continue
        for name, node, at_top in _imports(path):
            if not at_top:
                continue
            if _unit(name) == "mcmc" or name in {f"bayesbase.{m}" for m in PYMC_ALLOWED_MODULES}:
                pytest.fail(f"{me} imports the PyMC engine {name} at module level (line {node.lineno})")


def _long_functions() -> list[tuple[str, int]]:
    out = []
    for path in _modules():
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                n = node.end_lineno - node.lineno + 1
                if n > MAX_FUNCTION_LINES:
                    out.append((f"{_dotted(path)}.{node.name}", n))
    return out


def test_no_function_grows_past_the_limit():
    long = [(name, n) for name, n in _long_functions() if name not in LONG_FUNCTION_EXCEPTIONS]
    assert not long, (f"functions over {MAX_FUNCTION_LINES} lines (split them, or list them in "
                      f"LONG_FUNCTION_EXCEPTIONS with the reason): {long}")


def test_listed_exceptions_are_still_long():
    """An exception that has been split since is removed from the list."""
    names = {name for name, _ in _long_functions()}
    stale = [name for name in LONG_FUNCTION_EXCEPTIONS if name not in names]
    assert not stale, f"remove from LONG_FUNCTION_EXCEPTIONS: {stale}"


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
        "import bayesbase.model.engine, bayesbase.assessment, bayesbase.io, bayesbase.priors\n"
        "print(','.join(m for m in ('pymc', 'pytensor', 'arviz', 'matplotlib') if m in sys.modules))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""
