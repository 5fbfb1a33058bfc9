"""``bayesbase score``: assess every patient of a partitioned Parquet results dataset, one task
per partition, in this process or on Dask. Registered in :data:`bayesbase.cli.jobs.JOBS`;
nothing heavy is imported at module level (``bayesbase --help`` stays free of pandas)."""
from __future__ import annotations

import sys

__all__ = ["add_parser", "run", "summary_lines"]


def add_parser(sub) -> None:
    """Add the ``score`` command to the ``bayesbase`` subparsers object ``sub``."""
    p = sub.add_parser(
        "score", help="assess every patient of a partitioned Parquet dataset (Dask optional)",
        description="Assess the latest (or --at) specimen of every patient of a Parquet results "
                    "dataset (bayesbase export --format parquet) with the exact engine, one task "
                    "per partition, and write the assessment table as a Parquet dataset "
                    "partitioned like the input. Decision support, not a diagnosis.")
    p.add_argument("dataset", help="Parquet results dataset (a directory of part-*.parquet)")
    p.add_argument("--out", required=True, metavar="DIR", help="output directory")
    p.add_argument("--pack", help="prior pack name or TOML path (default: each species' pack)")
    p.add_argument("--at", help="specimen id or date to assess (default: each patient's latest)")
    p.add_argument("--scheduler", metavar="ADDRESS|local",
                   help="run on Dask: 'local' starts a cluster on this machine, an address "
                   "(tcp://host:8786) uses a running scheduler whose workers see the same paths; "
                   "default: in this process")
    p.add_argument("--workers", type=int, metavar="N",
                   help="worker processes of a local cluster (default: one per CPU)")
    p.add_argument("--resume", action="store_true",
                   help="keep partitions already scored in --out (same input and request) and "
                   "score only the rest")


def _progress_printer(stream):
    """``progress(outcome, done, total)`` printing a bar on one line (a terminal) or a line per
    tenth of the run (a log)."""
    tty = stream.isatty()
    state = {"cases": 0, "failed": 0, "last_tenth": -1}

    def progress(outcome, done: int, total: int) -> None:
        state["cases"] += outcome.cases
        state["failed"] += outcome.failed
        width = 30
        filled = width * done // max(total, 1)
        text = (f"[{'#' * filled}{'.' * (width - filled)}] {done}/{total} partitions, "
                f"{state['cases']} cases")
        if state["failed"]:
            text += f", {state['failed']} failed"
        if outcome.failed:
            print(("\n" if tty else "") + f"failed: {outcome.source}: {outcome.error}", file=stream)
        if tty:
            print("\r" + text, end="\n" if done == total else "", file=stream, flush=True)
        elif 10 * done // max(total, 1) != state["last_tenth"] or done == total:
            state["last_tenth"] = 10 * done // max(total, 1)
            print(text, file=stream, flush=True)

    return progress


def summary_lines(s) -> list[str]:
    """The closing summary of a run (:class:`bayesbase.scale.ScoreSummary`)."""
    from ..constants import CAUTIONS, PROBABLE_CHANGE

    lines = [f"scored {s.partitions} partitions in {s.seconds:.1f} s ({s.done} now, "
             f"{s.skipped} kept from an earlier run, {len(s.failures)} failed) -> {s.out}",
             f"patients {s.patients}, cases {s.cases}, probable changes {s.probable} "
             f"(P(change) >= {PROBABLE_CHANGE}), failures {len(s.failures)}"]
    lines += [f"  failed: {o.source}: {o.error}" for o in s.failures]
    lines.append(" ".join(CAUTIONS))
    return lines


def run(args) -> int:
    """Run ``bayesbase score``: 0 when every partition was scored, 1 when one or more failed
    (the others are written), 2 for a usage or input error (raised to the CLI)."""
    from .run import score_dataset

    if args.workers is not None and args.scheduler != "local":
        print("note: --workers applies to --scheduler local only; ignored", file=sys.stderr)
    summary = score_dataset(args.dataset, args.out, pack=args.pack, at=args.at,
                            scheduler=args.scheduler, workers=args.workers, resume=args.resume,
                            progress=_progress_printer(sys.stderr))
    print("\n".join(summary_lines(summary)))
    return 0 if summary.ok else 1
