"""`bayesbase bench` lists only benchmarks that exist (a moved or renamed one fails here, not
silently at run time). No timings are asserted anywhere in the tests."""
from __future__ import annotations

import pytest

from bayesbase.bench import core


@pytest.mark.parametrize("entry", core.PLAN, ids=lambda e: e[0])
def test_every_benchmark_resolves_to_a_function_taking_its_quick_arguments(entry):
    import inspect

    name, module, func, quick_kw = entry
    fn = core.resolve(module, func)
    params = inspect.signature(fn).parameters
    assert callable(fn)
    assert set(quick_kw) <= set(params), f"{name}: {set(quick_kw) - set(params)} not accepted"


def test_benchmark_names_are_unique():
    names = [e[0] for e in core.PLAN]
    assert len(names) == len(set(names))
