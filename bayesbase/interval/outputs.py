"""Write the files of a reference-interval estimate into a folder, all or nothing.

``intervals.csv`` (exactly :data:`~bayesbase.interval.core.COLUMNS`), ``outliers.csv``,
``interval.html``, ``pack.toml`` and, with a partition, ``partitions.csv``. Every file is built
in memory first, written to a temporary name in the folder and renamed into place; on any failure
the temporary files are removed and no output file is left half-written.
"""
from __future__ import annotations

import os
import tempfile
from pathlib import Path

from .core import COLUMNS, OUTLIER_COLUMNS, IntervalResult

__all__ = ["write_outputs", "FILES"]

FILES = ("intervals.csv", "outliers.csv", "interval.html", "pack.toml")


def _umask() -> int:
    old = os.umask(0o022)
    os.umask(old)
    return old


def _csv(frame, columns) -> str:
    return frame.loc[:, list(columns)].to_csv(index=False, lineterminator="\n")


def write_outputs(result: IntervalResult, out_dir: str | Path) -> dict[str, Path]:
    """Write the outputs of ``result`` into ``out_dir`` (created if needed); returns name -> path."""
    from .report import interval_html  # matplotlib only when a report is written

    out = Path(out_dir)
    contents = {
        "intervals.csv": _csv(result.table, COLUMNS),
        "outliers.csv": _csv(result.outliers, OUTLIER_COLUMNS),
        "interval.html": interval_html(result),
        "pack.toml": result.pack_fragment(),
    }
    if result.attrs.get("partition"):
        contents["partitions.csv"] = result.partitions.to_csv(index=False, lineterminator="\n")
    out.mkdir(parents=True, exist_ok=True)
    temps: dict[str, str] = {}
    try:
        for name, text in contents.items():
            fd, tmp = tempfile.mkstemp(prefix=f".{name}.", suffix=".tmp", dir=out)
            temps[name] = tmp
            with os.fdopen(fd, "w", encoding="utf-8", newline="") as fh:
                fh.write(text)
            os.chmod(tmp, 0o666 & ~_umask())  # mkstemp creates 0600; give the usual file mode
        paths = {}
        for name, tmp in temps.items():
            os.replace(tmp, out / name)
            paths[name] = out / name
        return paths
    except BaseException:
        for tmp in temps.values():
            try:
                os.unlink(tmp)
            except FileNotFoundError:
                pass
        raise
