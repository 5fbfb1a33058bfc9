"""Commands on the results store: import (files or Parquet datasets), patients, history, export
(CSV, FHIR or a Parquet dataset), forget."""
from __future__ import annotations

from .common import add_chunk_option, err, open_store


def add_parsers(sub) -> None:
    p = sub.add_parser("import", help="import CSV/XLSX/FHIR files or Parquet datasets into the "
                       "results store")
    p.add_argument("files", nargs="+", help="results files, or Parquet dataset directories")
    p.add_argument("--db")
    p.add_argument("--replace", action="store_true", help="overwrite conflicting stored values (recorded)")
    p.add_argument("--dry-run", action="store_true",
                   help="show the rows each file would add, find already stored, replace or "
                        "conflict with, and write nothing")
    add_chunk_option(p)
    p.set_defaults(run=cmd_import)

    p = sub.add_parser("patients", help="list the patients in the store")
    p.add_argument("--db")
    p.set_defaults(run=cmd_patients)

    p = sub.add_parser("history", help="one patient's results over time, from the store")
    p.add_argument("patient", help="patient id; an id beginning with '-' goes after '--', "
                   "options first: bayesbase history --db s.sqlite -- -REX-1")
    p.add_argument("--analyte")
    p.add_argument("--db")
    p.set_defaults(run=cmd_history)

    p = sub.add_parser("export", help="export one patient's results (pseudonymised by default); "
                       "with --format parquet every patient's, as a partitioned dataset")
    p.add_argument("--patient",
                   help="patient id (required for csv and fhir; parquet: default every patient); "
                   "write an id beginning with '-' with '=': --patient=-REX-1")
    p.add_argument("--format", choices=["csv", "fhir", "parquet"], default="csv")
    p.add_argument("--out", required=True, help="output file (parquet: a new directory)")
    p.add_argument("--partitions", type=int, default=None,
                   help="parquet: number of partitions (default 64); a patient's partition is a "
                   "stable hash of its id")
    p.add_argument("--db")
    p.add_argument("--identified", action="store_true", help="keep the real ids (default: pseudonymise)")
    p.set_defaults(run=cmd_export)

    p = sub.add_parser("forget", help="remove a patient and everything under it from the store")
    p.add_argument("patient", help="patient id; an id beginning with '-' goes after '--', "
                   "options first: bayesbase forget --db s.sqlite -- -REX-1")
    p.add_argument("--db")
    p.set_defaults(run=cmd_forget)


def cmd_import(args) -> int:
    if args.dry_run:
        return _dry_run(args)
    total = 0
    with open_store(args) as st:
        for f in args.files:
            s = _import_one(st, f, args.replace, chunk_rows=args.chunk_rows)
            total += s.rows_added
            if s.rows_added == 0 and s.rows_replaced == 0:
                print(f"{f}: nothing new ({s.rows_skipped} rows already stored)")
            else:
                print(f"{f}: {s.rows_added} rows added, {s.rows_skipped} already stored, "
                      f"{s.rows_replaced} replaced")
    return 0


def _dry_run(args) -> int:
    import contextlib
    import tempfile
    from pathlib import Path

    from ..store import Store, default_db_path

    db = Path(args.db or default_db_path()).expanduser()
    with contextlib.ExitStack() as stack:
        if not db.exists():  # compared with an empty store, made aside: nothing is created
            db = Path(stack.enter_context(tempfile.TemporaryDirectory())) / "empty.sqlite"
        st = stack.enter_context(Store(db))
        for f in args.files:  # each file is compared with the store as it is now
            print(_dry_run_text(f, _import_one(st, f, args.replace, dry_run=True,
                                               chunk_rows=args.chunk_rows), args.replace))
    return 0


def _import_one(st, f, replace: bool, dry_run: bool = False, chunk_rows: int | None = None):
    """Import one input: a Parquet dataset (a directory or ``.parquet`` file, read whole by
    :func:`bayesbase.io.read_results_hashed`, one transaction), a large text table (or any with
    ``--chunk-rows``) chunk by chunk in one transaction, or a results file read whole."""
    from ..io.chunked import stream_chunksize
    from ..io.parquet import is_parquet_path

    chunksize = None if is_parquet_path(f) else stream_chunksize(f, chunk_rows)
    if chunksize is not None:
        from ..store.importer import import_file_chunked

        return import_file_chunked(st.connection, f, chunksize, replace=replace,
                                   dry_run=dry_run, result_rows=st._result_rows)

    if is_parquet_path(f):
        from pathlib import Path

        from ..io import read_results_hashed

        frame, sha = read_results_hashed(f)
        return st.import_frame(frame, Path(f).name, sha, replace=replace, dry_run=dry_run)
    return st.import_file(f, replace=replace, dry_run=dry_run)


def _dry_run_text(f, s, replace: bool) -> str:
    lines = [f"{f} (dry run, nothing written): {s.rows_added} rows to add, {s.rows_skipped} "
             f"already stored, {s.rows_replaced} to replace, {len(s.conflicts)} conflicts"]
    lines += [f"  {c}" for c in s.conflicts[:50]]
    if len(s.conflicts) > 50:
        lines.append(f"  ... and {len(s.conflicts) - 50} more")
    if s.conflicts and not replace:
        lines.append("  without --replace this import would be refused and store nothing")
    return "\n".join(lines)


def cmd_patients(args) -> int:
    with open_store(args) as st:
        df = st.patients()
    print(df.to_string(index=False) if len(df) else "no patients stored")
    return 0


def cmd_history(args) -> int:
    import pandas as pd

    with open_store(args) as st:
        df = st.history_table(args.patient, analyte=args.analyte)
    with pd.option_context("display.width", 250, "display.max_columns", 60, "display.max_rows", 100000):
        print(df.to_string(index=False))
    return 0


def cmd_export(args) -> int:
    if args.format == "parquet":
        return _export_parquet(args)
    if args.patient is None:
        return err(f"export --format {args.format} needs --patient")
    with open_store(args) as st:
        if args.format == "csv":
            st.export_csv(args.patient, args.out, pseudonymise=not args.identified)
        else:
            st.export_fhir(args.patient, args.out, pseudonymise=not args.identified)
    if args.format == "csv":  # the CSV starts with the cautions line (README, "Cautions in every output")
        from ..assessment.result import prepend_csv_caution

        prepend_csv_caution(args.out)
    print(f"wrote {args.out}" + ("" if args.identified else " (pseudonymised)"))
    return 0


def _export_parquet(args) -> int:
    from ..store.export import store_to_parquet

    with open_store(args) as st:
        files = store_to_parquet(st, args.patient, args.out, args.partitions,
                                 pseudonymise=not args.identified)
    print(f"wrote {args.out} ({len(files)} partition files)"
          + ("" if args.identified else " (pseudonymised)"))
    return 0


def cmd_forget(args) -> int:
    with open_store(args) as st:
        n = st.forget(args.patient)
    print(f"removed patient {args.patient} ({n} rows)")
    return 0
