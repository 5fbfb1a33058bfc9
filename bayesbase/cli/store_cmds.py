"""Commands on the results store: import, patients, history, export, forget."""
from __future__ import annotations

from .common import open_store


def add_parsers(sub) -> None:
    p = sub.add_parser("import", help="import CSV/XLSX/FHIR files into the results store")
    p.add_argument("files", nargs="+")
    p.add_argument("--db")
    p.add_argument("--replace", action="store_true", help="overwrite conflicting stored values (recorded)")
    p.add_argument("--dry-run", action="store_true",
                   help="show the rows each file would add, find already stored, replace or "
                        "conflict with, and write nothing")
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

    p = sub.add_parser("export", help="export one patient's results (pseudonymised by default)")
    p.add_argument("--patient", required=True,
                   help="patient id; write an id beginning with '-' with '=': --patient=-REX-1")
    p.add_argument("--format", choices=["csv", "fhir"], default="csv")
    p.add_argument("--out", required=True)
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
            s = st.import_file(f, replace=args.replace)
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
            print(_dry_run_text(f, st.import_file(f, replace=args.replace, dry_run=True),
                                args.replace))
    return 0


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


def cmd_forget(args) -> int:
    with open_store(args) as st:
        n = st.forget(args.patient)
    print(f"removed patient {args.patient} ({n} rows)")
    return 0
