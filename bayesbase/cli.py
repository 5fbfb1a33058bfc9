"""Command-line front end. Thin: every command imports what it needs lazily, so
``bayesbase --help`` loads neither pandas nor PyMC."""
from __future__ import annotations

import argparse
import sys
from pathlib import Path

from . import __version__
from .constants import CAUTIONS, DEFAULT_COVERAGE

DEMO_DIR = "bayesbase-output"


def _err(msg: str) -> int:
    print(f"bayesbase: error: {msg}", file=sys.stderr)
    return 2


def _add_assess_options(p):
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


def build_parser() -> argparse.ArgumentParser:
    ap = argparse.ArgumentParser(
        prog="bayesbase",
        description="Is this animal's new laboratory result a true change from its own normal? "
        "Bayesian set points and personal intervals with the RCV beside them. "
        + " ".join(CAUTIONS),
    )
    ap.add_argument("--version", action="version", version=f"bayesbase {__version__}")
    sub = ap.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser("demo", help="assess every case of the built-in case library and write reports")
    p.add_argument("--out", default=DEMO_DIR, help=f"output folder (default: ./{DEMO_DIR})")
    p.add_argument("--no-pdf", action="store_true", help="HTML only")

    p = sub.add_parser("check", help="validate a results file and print the normalised table or every problem")
    p.add_argument("file")
    p.add_argument("--rows", type=int, default=40, help="rows of the normalised table to print")

    p = sub.add_parser("priors", help="show or check prior packs")
    psub = p.add_subparsers(dest="priors_command", metavar="ACTION")
    q = psub.add_parser("show", help="print a pack's values with their sources")
    q.add_argument("pack", nargs="?", default="dog")
    q.add_argument("--analyte")
    q.add_argument("--priors", help="lab override CSV to layer over the pack")
    psub.add_parser("list", help="list the built-in packs")
    q = psub.add_parser("check", help="validate a pack TOML or a lab override CSV")
    q.add_argument("file")

    p = sub.add_parser("assess", help="assess the latest (or --at) specimen against the animal's history")
    p.add_argument("file", nargs="?", help="results file (CSV/XLSX/FHIR JSON), or use --db")
    _add_assess_options(p)
    p.add_argument("--format", choices=["table", "csv", "json"], default="table")
    p.add_argument("--out", help="write the output to this file instead of stdout")
    p.add_argument("--idata", help="mcmc engine: save the InferenceData to this netCDF file")

    p = sub.add_parser("report", help="write the clinician's report (HTML, optional PDF) for one patient")
    p.add_argument("file", nargs="?", help="results file, or use --db")
    _add_assess_options(p)
    p.add_argument("--out", default="report.html")
    p.add_argument("--pdf", help="also write a PDF here")
    p.add_argument("--png-dir", help="also save the plots as PNG here")

    p = sub.add_parser("import", help="import CSV/XLSX/FHIR files into the results store")
    p.add_argument("files", nargs="+")
    p.add_argument("--db")
    p.add_argument("--replace", action="store_true", help="overwrite conflicting stored values (recorded)")

    p = sub.add_parser("patients", help="list the patients in the store")
    p.add_argument("--db")

    p = sub.add_parser("history", help="one patient's results over time, from the store")
    p.add_argument("patient", help="patient id; an id beginning with '-' goes after '--', "
                   "options first: bayesbase history --db s.sqlite -- -REX-1")
    p.add_argument("--analyte")
    p.add_argument("--db")

    p = sub.add_parser("export", help="export one patient's results (pseudonymised by default)")
    p.add_argument("--patient", required=True,
                   help="patient id; write an id beginning with '-' with '=': --patient=-REX-1")
    p.add_argument("--format", choices=["csv", "fhir"], default="csv")
    p.add_argument("--out", required=True)
    p.add_argument("--db")
    p.add_argument("--identified", action="store_true", help="keep the real ids (default: pseudonymise)")

    p = sub.add_parser("forget", help="remove a patient and everything under it from the store")
    p.add_argument("patient", help="patient id; an id beginning with '-' goes after '--', "
                   "options first: bayesbase forget --db s.sqlite -- -REX-1")
    p.add_argument("--db")

    p = sub.add_parser("compare", help="simulate animals and compare how well each method detects change")
    p.add_argument("--species", default="dog")
    p.add_argument("--analytes", default="creatinine,alt")
    p.add_argument("--priors")
    p.add_argument("--baselines", default="0,1,2,3,5")
    p.add_argument("--shifts", default="0,10,20,30,50")
    p.add_argument("--animals", type=int, default=100_000)
    p.add_argument("--scenarios", default="model")
    p.add_argument("--seed", type=int, default=1)
    p.add_argument("--out", default="bayesbase-compare")

    p = sub.add_parser("bench", help="run the benchmarks and print the timings")
    p.add_argument("--quick", action="store_true", help="smaller sizes, for a smoke run")
    p.add_argument("--only", help="comma-separated benchmark names")
    return ap


def _load_frame(args):
    if getattr(args, "db", None):
        from .store import Store

        with Store(args.db) as st:
            return st.results(args.patient) if getattr(args, "patient", None) else st.results()
    if not args.file:
        raise SystemExit(_err("give a results FILE or --db PATH"))
    path = Path(args.file)
    if path.suffix.lower() == ".json":
        from . import data, fhir

        return data.validate(fhir.read_bundle(path), source=path.name)
    from .data import load_results

    return load_results(path)


def _run_assess(args, frame, patient=None):
    from .assess import assess

    return assess(
        frame, pack=args.pack, priors=args.priors, engine=args.engine, coverage=args.coverage,
        prior_change=args.prior_change, at=args.at, patient=patient or args.patient,
        keep_compromised=args.keep_compromised, seed=args.seed,
        mcmc_options={"idata_path": args.idata} if getattr(args, "idata", None) else None,
    )


def cmd_check(args) -> int:
    from .data import load_results

    frame = load_results(args.file)
    import pandas as pd

    with pd.option_context("display.width", 200, "display.max_columns", 30):
        cols = ["patient", "species", "specimen", "collected_at", "analyte", "value", "unit",
                "reported_value", "reported_unit", "censor", "state"]
        print(frame[cols].head(args.rows).to_string(index=False))
    notes = frame.attrs.get("notes") or []
    print(f"\n{len(frame)} rows, {frame['patient'].nunique()} patient(s), "
          f"{frame['specimen'].nunique()} specimen(s): valid.")
    for n in notes:
        print(f"note: {n}")
    return 0


def cmd_priors(args) -> int:
    from . import priors

    if args.priors_command in (None, "list"):
        for name in priors.available_packs():
            pk = priors.load_pack(name)
            print(f"{name}\t{len(pk.analytes)} analytes\t{pk.title}")
        return 0
    if args.priors_command == "show":
        pk = priors.load_pack(args.pack, overrides=args.priors)
        df = priors.describe(pk, analyte=args.analyte)
        import pandas as pd

        print(f"pack {pk.id}  version {pk.version}  sha256 {pk.sha256}")
        print("index of individuality shown as Harris's CVI/CVG (low < 0.6: the population interval "
              "tells little about change in one animal)")
        with pd.option_context("display.width", 250, "display.max_colwidth", 140, "display.max_rows", 10000):
            print(df.to_string(index=False))
        return 0
    problems = priors.check_file(args.file)
    if problems:
        for p in problems:
            print(p, file=sys.stderr)
        return 1
    print(f"{args.file}: valid")
    return 0


def _table_text(a) -> str:
    import pandas as pd

    t = a.table.copy()
    rows = []
    for r in t.to_dict("records"):
        rows.append({
            "patient": r["patient"], "analyte": r["label"],
            "value": f"{r['value']:.4g} {r['unit']}",
            "population": f"{r['pop_lower']:.3g}-{r['pop_upper']:.3g}",
            "personal": f"{r['pi_lower']:.3g}-{r['pi_upper']:.3g}",
            "pctile": f"{100*r['percentile']:.0f}",
            "P(change)": f"{r['p_change']:.2f}",
            "dir": ("up" if r["p_increase"] >= 0.5 else "down") if r["p_change"] >= 0.5 else "",
            "RCV": {True: "exceeded", False: "within"}.get(r["rcv_exceeded_last"], "n/a"),
            "n_base": r["n_baseline"],
            "drift": (f"{r['trend_pct_per_year']:+.1f}%/yr P={r['trend_p_drift']:.2f}"
                      if r.get("trend_p_drift") == r.get("trend_p_drift") and r.get("trend_p_drift") is not None else ""),
            "notes": "; ".join(r["flags"])[:90],
        })
    with pd.option_context("display.width", 250, "display.max_colwidth", 90):
        text = pd.DataFrame(rows).to_string(index=False)
    head = (f"pack {a.attrs['pack_id']} ({a.attrs['pack_sha256'][:12]}), engine {a.attrs['engine']}, "
            f"personal interval coverage {a.attrs['coverage']:.0%}")
    return head + "\n" + text + "\n\n" + " ".join(CAUTIONS)


def cmd_assess(args) -> int:
    frame = _load_frame(args)
    a = _run_assess(args, frame)
    if args.format == "json":
        text = a.to_json()
    elif args.format == "csv":
        t = a.table.copy()
        t["flags"] = t["flags"].map(lambda f: "; ".join(f))
        text = t.to_csv(index=False)
    else:
        text = _table_text(a)
    if args.out:
        Path(args.out).write_text(text, encoding="utf-8")
        print(f"wrote {args.out}")
    else:
        print(text)
    if not a.converged:
        print("warning: the MCMC fit did not converge; every row is marked", file=sys.stderr)
        return 3
    return 0


def cmd_report(args) -> int:
    from . import report

    frame = _load_frame(args)
    patients = sorted(frame["patient"].unique())
    pid = args.patient
    if pid is None:
        if len(patients) != 1:
            return _err(f"the file holds {len(patients)} patients; choose one with --patient")
        pid = patients[0]
    files = report.report_for_file(frame, pid, args.pack, args.out, pdf=args.pdf, at=args.at,
                                   engine=args.engine, png_dir=args.png_dir, priors=args.priors,
                                   coverage=args.coverage, prior_change=args.prior_change,
                                   keep_compromised=args.keep_compromised, seed=args.seed)
    print(f"wrote {files.html}" + (f" and {files.pdf}" if files.pdf else ""))
    return 0


def cmd_demo(args) -> int:
    import tomllib
    from importlib import resources

    from . import report
    from .assess import assess
    from .data import load_results

    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    root = resources.files("bayesbase.case_library")
    lines = []
    for case_dir in sorted((p for p in root.iterdir() if p.is_dir() and (p / "case.toml").is_file()),
                           key=lambda p: p.name):
        case = tomllib.loads((case_dir / "case.toml").read_text(encoding="utf-8"))
        with resources.as_file(case_dir / "results.csv") as csv_path:
            frame = load_results(csv_path)
        a = assess(frame, patient=case["patient"], at=case.get("at"))
        (out / f"{case['id']}.json").write_text(a.to_json(), encoding="utf-8")
        files = report.report_for_file(
            frame, case["patient"], None, out / f"{case['id']}.html",
            pdf=None if args.no_pdf else out / f"{case['id']}.pdf", at=case.get("at"))
        from .report import select_changes

        t = a.table
        listed = t[select_changes(t["p_change"].to_numpy())]
        parts = [f"{r.label} {'up' if r.p_increase >= 0.5 else 'down'} (P(change) {r.p_change:.2f}"
                 + (", compromised sample" if r.quality != "ok" else "") + ")"
                 for r in listed.itertuples()]
        if "trend_p_drift" in t:
            for r in t[t["trend_p_drift"] >= 0.9].itertuples():
                parts.append(f"{r.label} drifting {r.trend_pct_per_year:+.1f} %/year (P(drift) {r.trend_p_drift:.2f})")
        comp = t[(t["quality"] != "ok") & ~t.index.isin(listed.index)]
        parts += [f"{r.label} compromised sample" for r in comp.itertuples()]
        if not t["comparable"].all():
            parts.append("method changed: not directly comparable")
        summary = "; ".join(parts) or "no probable change"
        lines.append(f"{case['id']:<42} {summary}")
        del files
    print("\n".join(lines))
    print(f"\nwrote an HTML{'' if args.no_pdf else ' and PDF'} report and a JSON assessment per case to {out}/")
    print(" ".join(CAUTIONS))
    return 0


def _store(args):
    from .store import Store, default_db_path

    return Store(args.db or default_db_path())


def cmd_import(args) -> int:
    total = 0
    with _store(args) as st:
        for f in args.files:
            s = st.import_file(f, replace=args.replace)
            total += s.rows_added
            if s.rows_added == 0 and s.rows_replaced == 0:
                print(f"{f}: nothing new ({s.rows_skipped} rows already stored)")
            else:
                print(f"{f}: {s.rows_added} rows added, {s.rows_skipped} already stored, "
                      f"{s.rows_replaced} replaced")
    return 0


def cmd_patients(args) -> int:
    with _store(args) as st:
        df = st.patients()
    print(df.to_string(index=False) if len(df) else "no patients stored")
    return 0


def cmd_history(args) -> int:
    import pandas as pd

    with _store(args) as st:
        df = st.history_table(args.patient, analyte=args.analyte)
    with pd.option_context("display.width", 250, "display.max_columns", 60, "display.max_rows", 100000):
        print(df.to_string(index=False))
    return 0


def cmd_export(args) -> int:
    with _store(args) as st:
        if args.format == "csv":
            st.export_csv(args.patient, args.out, pseudonymise=not args.identified)
        else:
            st.export_fhir(args.patient, args.out, pseudonymise=not args.identified)
    print(f"wrote {args.out}" + ("" if args.identified else " (pseudonymised)"))
    return 0


def cmd_forget(args) -> int:
    with _store(args) as st:
        n = st.forget(args.patient)
    print(f"removed patient {args.patient} ({n} rows)")
    return 0


def cmd_compare(args) -> int:
    from . import research

    def progress(done, total):
        print(f"\r{done}/{total}", end="", file=sys.stderr, flush=True)

    comp = research.compare(
        species=args.species, analytes=tuple(a.strip() for a in args.analytes.split(",")),
        priors=args.priors, baselines=tuple(int(x) for x in args.baselines.split(",")),
        shifts=tuple(float(x) for x in args.shifts.split(",")), animals=args.animals, seed=args.seed,
        scenarios=tuple(s.strip() for s in args.scenarios.split(",")), progress=progress,
    )
    print(file=sys.stderr)
    paths = research.write_outputs(comp, args.out)
    print(comp.summary_text)
    print("wrote " + ", ".join(str(p) for p in paths))
    return 0


def cmd_bench(args) -> int:
    from . import bench

    only = args.only.split(",") if args.only else None
    for name, res in bench.run(quick=args.quick, only=only):
        print(f"{name}: " + ", ".join(f"{k}={v}" for k, v in res.items()), flush=True)
    return 0


COMMANDS = {
    "demo": cmd_demo, "check": cmd_check, "priors": cmd_priors, "assess": cmd_assess,
    "report": cmd_report, "import": cmd_import, "patients": cmd_patients, "history": cmd_history,
    "export": cmd_export, "forget": cmd_forget, "compare": cmd_compare, "bench": cmd_bench,
}


def main(argv=None) -> int:
    ap = build_parser()
    args = ap.parse_args(argv)
    if not args.command:
        ap.print_help()
        return 0
    from .errors import BayesbaseError

    try:
        return COMMANDS[args.command](args)
    except BayesbaseError as exc:
        return _err(str(exc))
    except FileNotFoundError as exc:
        return _err(f"file not found: {exc.filename or exc}")
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:  # output piped into head or similar
        try:
            sys.stdout = None
        finally:
            return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
