"""Shared test configuration: non-interactive matplotlib, case-library helpers."""
from __future__ import annotations

import os
import tomllib
from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import pytest  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
CASE_DIR = ROOT / "case_library"


def case_dirs():
    return sorted(p for p in CASE_DIR.iterdir() if (p / "case.toml").is_file())


def load_case(path: Path) -> dict:
    with open(path / "case.toml", "rb") as fh:
        return tomllib.load(fh)


@pytest.fixture(scope="session")
def root() -> Path:
    return ROOT


os.environ.setdefault("MPLBACKEND", "Agg")
