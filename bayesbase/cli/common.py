"""Pieces shared by the commands: error output, the options of assess and report, reading the
results a command works on (file or store)."""
from __future__ import annotations

import sys
from pathlib import Path

from ..constants import DEFAULT_COVERAGE


def err(msg: str) -> int:
    print(f"bayesbase: error: {msg}", file=sys.stderr)
    return 2


def add_assess_options(p):
    p.add_argument("--patient", help="patient id (default: every patient in the file)")
    p.add_argument("--at", help="specimen id or date of the result to assess (default: the latest)")
    p.add_argument("--engine", choices=["exact", "mcmc"], default="exact")
    p.add_argument("--pack", help="prior pack name or TOML path (default: the species' pack)")
    p.add_argument("--priors", help="lab override CSV layered over the pack")
    p.add_argument("--coverage", type=float, default=DEFAULT_COVERAGE,
                   help="coverage of the personal interval (0.99 for a specificity-first screen)")
    p.add_argument("--prior-change", type=float, default=None, help="prior probability of a true change")
    p.add_argument("--keep-compromised", action="store_true",
                   help="keep haemolysed/lipaemic/icteric baselines with inflated variance")
    p.add_argument("--seed", type=int, default=0, help="seed for the mcmc engine")
    p.add_argument("--db", help="read results from this store instead of a file")


def add_chunk_option(p):
    p.add_argument("--chunk-rows", type=int, default=None, metavar="N",
                   help="read a CSV/TSV/TXT file N rows at a time (bounded memory; done "
                   "anyway above 64 MiB); XLSX and FHIR JSON files are always read whole")


def load_frame(args):
    if getattr(args, "db", None):
        from ..store import Store

        with Store(args.db) as st:
            return st.results(args.patient) if getattr(args, "patient", None) else st.results()
    if not args.file:
        raise SystemExit(err("give a results FILE or --db PATH"))
    from ..io import read_results
    from ..io.chunked import STREAM_ABOVE_BYTES, stream_chunksize

    if stream_chunksize(args.file) is not None:  # too large to hold whole: the store streams
        from ..errors import BayesbaseError

        raise BayesbaseError(
            f"{args.file} is larger than {STREAM_ABOVE_BYTES // 2**20} MiB, too large to "
            f"{args.command} whole in memory: import it into a store first (bayesbase import "
            f"{args.file} --db STORE, read in chunks) and then run bayesbase {args.command} "
            "--db STORE --patient ID")
    return read_results(Path(args.file))


def run_assess(args, frame, patient=None):
    from ..assessment import assess

    return assess(
        frame, pack=args.pack, priors=args.priors, engine=args.engine, coverage=args.coverage,
        prior_change=args.prior_change, at=args.at, patient=patient or args.patient,
        keep_compromised=args.keep_compromised, seed=args.seed,
        mcmc_options={"idata_path": args.idata} if getattr(args, "idata", None) else None,
        jobs=getattr(args, "jobs", 1),
    )


def open_store(args):
    from ..store import Store, default_db_path

    return Store(args.db or default_db_path())
