"""Benchmarks for ``bayesbase bench`` (speed and memory targets live here, never in tests)."""
from .core import run

__all__ = ["run"]
