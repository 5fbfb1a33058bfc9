"""``bayesbase interval``: population reference interval from a healthy reference sample.

The lead wires this into :mod:`bayesbase.cli` with ``add_parser(sub)`` and ``run(args)``. Nothing
heavy is imported at module level (``bayesbase --help`` stays free of pandas and matplotlib).
"""
from __future__ import annotations

import math
import sys

__all__ = ["add_parser", "run"]

_METHODS = ("auto", "nonparametric", "robust", "parametric")
_PARTITIONS = ("breed", "sex", "age_group")


def add_parser(sub) -> None:
    """Add the ``interval`` command to the ``bayesbase`` subparsers object ``sub``."""
    p = sub.add_parser(
        "interval",
        help="population reference interval from a healthy reference sample (one specimen per animal)",
        description="Estimate population reference intervals (central 95 %) with 90 % confidence limits "
                    "from a healthy reference sample, choosing the method by sample size as the ASVCP "
                    "guideline (Friedrichs et al. 2012) and CLSI EP28-A3c do; outliers listed, partitions "
                    "tested, a pack fragment written. Decision support, not a diagnosis.")
    p.add_argument("file", help="results file (tidy results contract: CSV/TSV/XLSX)")
    p.add_argument("--out", required=True, metavar="DIR",
                   help="output folder for intervals.csv, outliers.csv, interval.html and pack.toml")
    p.add_argument("--analytes", help="comma-separated analytes (default: every analyte in the file)")
    p.add_argument("--species", help="species to use (needed when the file holds several)")
    p.add_argument("--partition", choices=_PARTITIONS,
                   help="test whether these groups need separate intervals (Harris & Boyd) and give them")
    p.add_argument("--method", choices=_METHODS, default="auto",
                   help="auto (default: by sample size), nonparametric, robust or parametric")
    p.add_argument("--keep-outliers", action="store_true",
                   help="keep flagged outliers in the estimate (they are listed either way)")
    p.add_argument("--seed", type=int, default=0, help="seed of the bootstrap (default 0)")
    p.add_argument("--boot", type=int, default=1000, metavar="N",
                   help="bootstrap resamples for parametric/robust confidence limits (default 1000)")


def _err(msg: str) -> int:
    print(f"bayesbase: error: {msg}", file=sys.stderr)
    return 2


def _fmt(x, sig: int = 4) -> str:
    return f"{x:.{sig}g}" if isinstance(x, float) and math.isfinite(x) else "-"


def run(args) -> int:
    """Run ``bayesbase interval``: estimate, write the files, print a summary. 0 ok, 2 user error."""
    from ..errors import BayesbaseError
    from .core import estimate

    analytes = [a.strip() for a in args.analytes.split(",") if a.strip()] if args.analytes else None
    try:
        res = estimate(args.file, analytes=analytes, species=args.species, partition=args.partition,
                       method=args.method, keep_outliers=args.keep_outliers, seed=args.seed,
                       n_boot=args.boot)
        paths = res.write(args.out)
    except BayesbaseError as exc:
        return _err(str(exc))
    except FileNotFoundError as exc:
        return _err(f"file not found: {exc.filename or exc}")
    except (NotADirectoryError, FileExistsError, PermissionError) as exc:
        return _err(f"cannot write to {args.out}: {exc}")

    from ..constants import CAUTIONS

    a = res.attrs
    print(f"Reference intervals from {a['source_file']} (species {a['species']}, sha256 {a['source_sha256'][:12]})")
    for note in res.notes:
        print(f"  note: {note}")
    det = {(d.analyte, d.group): d for d in res.details.itertuples(index=False)}
    for r in res.table.itertuples(index=False):
        d = det[(r.analyte, r.group)]
        if r.method == "none":
            head = f"{r.analyte} [{r.group}] n={r.n}: no interval"
        else:
            head = (f"{r.analyte} [{r.group}] n={r.n}: {_fmt(r.lower)} - {_fmt(r.upper)} {r.unit} "
                    f"(90 % CI {_fmt(r.lower_ci_low)}-{_fmt(r.lower_ci_high)} | "
                    f"{_fmt(r.upper_ci_low)}-{_fmt(r.upper_ci_high)}; CI/width {_fmt(r.ci_ratio, 2)}"
                    f"; centre {_fmt(r.center)}; "
                    + (f"CVG {_fmt(r.cvg_pct, 3)} %" if math.isfinite(r.cvg_pct) else "CVG not derived")
                    + f") - {r.method}")
        print(head)
        print(f"    why: {d.reason}")
        for w in filter(None, d.warnings.split(" | ")):
            print(f"    caution: {w}")
    if len(res.outliers):
        print(f"Outliers flagged: {len(res.outliers)} (see outliers.csv)")
    print("Written: " + ", ".join(str(p) for p in paths.values()))
    print(" ".join(CAUTIONS))
    return 0
