"""Command-line front end (``bayesbase``); imports every heavy module lazily inside commands."""
from .main import build_parser, main

__all__ = ["main", "build_parser"]
