"""The threaded harness of the tests of an assessment's process-wide guard
(``bayesbase.assessment.pipeline._heap_frozen``: Python's cycle collector frozen, numpy's
huge-page advice off): overlapping runs in threads, then a run that fails inside the guard.

Used by tests/test_assess_equivalence_speed.py (the freeze) and tests/test_assess_memory_advice.py
(the advice); each test states what its probes must read at each step.
"""
from __future__ import annotations

import threading
from dataclasses import dataclass
from typing import Any, Callable

import pytest


@dataclass(frozen=True)
class Observed:
    """What the probes read: ``inside`` in each thread while every thread held the guard,
    ``meanwhile`` in the main thread at that time, ``after`` once every thread had left it and
    ``after_failure`` once a run that raised inside the guard had left it."""

    inside: list
    meanwhile: Any
    after: Any
    after_failure: Any


def _overlapping(guard: Callable, probe_inside: Callable, probe_main: Callable, n_threads: int):
    """``n_threads`` threads each enter ``guard()`` and stay in until the main thread has read
    ``probe_main()``; each reads ``probe_inside()`` before it leaves. No timeouts: a thread that
    fails breaks the barrier (BrokenBarrierError in the main thread), and the main thread always
    lets the threads go; a thread's error is raised here after the join."""
    started, release = threading.Barrier(n_threads + 1), threading.Event()
    inside, errors = [], []

    def work():
        try:
            with guard():
                started.wait()
                release.wait()
                inside.append(probe_inside())
        except BaseException as exc:  # reported in the main thread
            errors.append(exc)
            started.abort()

    threads = [threading.Thread(target=work) for _ in range(n_threads)]
    for t in threads:
        t.start()
    try:
        started.wait()
        meanwhile = probe_main()
    finally:
        release.set()
        for t in threads:
            t.join()
    if errors:
        raise errors[0]
    return inside, meanwhile


def observe_threaded_runs(guard: Callable, probe_inside: Callable, probe_main: Callable,
                          n_threads: int = 2) -> Observed:
    """Run ``n_threads`` overlapping guarded runs in threads (:func:`_overlapping`), read
    ``probe_main()`` after they all ended, then run one that raises ZeroDivisionError inside
    ``guard()`` (checked to pass through unchanged) and read ``probe_main()`` again."""
    inside, meanwhile = _overlapping(guard, probe_inside, probe_main, n_threads)
    after = probe_main()
    with pytest.raises(ZeroDivisionError):
        with guard():
            1 / 0
    return Observed(inside=inside, meanwhile=meanwhile, after=after, after_failure=probe_main())
