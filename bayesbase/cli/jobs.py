"""Commands of the research and laboratory jobs, each defined in its own package with
``add_parser(sub)`` and ``run(args)``: ``interval`` (population reference interval), ``study`` (biological-variation study), ``calibrate`` (pack calibrated on a results store), ``score`` (a partitioned Parquet dataset, Dask optional)."""
from __future__ import annotations

#: (command, module defining add_parser and run); the modules import nothing heavy at load
JOBS = (
    ("interval", "bayesbase.interval.cli"),
    ("study", "bayesbase.study.cli"),
    ("calibrate", "bayesbase.calibrate.cli"),
    ("score", "bayesbase.scale.cli"),
)


def add_parsers(sub) -> None:
    import importlib

    for command, module in JOBS:
        mod = importlib.import_module(module)
        mod.add_parser(sub)
        sub.choices[command].set_defaults(run=mod.run)
