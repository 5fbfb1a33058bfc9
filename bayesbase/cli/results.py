"""Commands on a results file: demo, check, assess, report."""
from __future__ import annotations

import sys
from pathlib import Path

from ..constants import CAUTIONS
from .common import add_assess_options, add_chunk_option, err, load_frame, run_assess

DEMO_DIR = "bayesbase-output"
#: worker processes of ``bayesbase demo``: its cases are independent, and the machine it was
#: measured on has 2 cores (the outputs are the same with any number)
DEMO_JOBS = 2


def add_parsers(sub) -> None:
    p = sub.add_parser("demo", help="assess every patient case of the built-in case library and write reports")
    p.add_argument("--out", default=DEMO_DIR, help=f"output folder (default: ./{DEMO_DIR})")
    p.add_argument("--no-pdf", action="store_true", help="HTML only")
    p.add_argument("--jobs", type=int, default=DEMO_JOBS,
                   help=f"worker processes, one case each at a time (default {DEMO_JOBS}; 1: this process only)")
    p.set_defaults(run=cmd_demo)

    p = sub.add_parser("check", help="validate a results file and print the normalised table or every problem")
    p.add_argument("file")
    p.add_argument("--rows", type=int, default=40, help="rows of the normalised table to print")
    add_chunk_option(p)
    p.set_defaults(run=cmd_check)

    p = sub.add_parser("assess", help="assess the latest (or --at) specimen against the animal's history")
    p.add_argument("file", nargs="?", help="results file (CSV/XLSX/FHIR JSON), or use --db")
    add_assess_options(p)
    p.add_argument("--format", choices=["table", "csv", "json"], default="table")
    p.add_argument("--out", help="write the output to this file instead of stdout")
    p.add_argument("--idata", help="mcmc engine: save the InferenceData to this netCDF file")
    p.add_argument("--jobs", type=int, default=1,
                   help="worker processes for a large store or file (exact engine, no --at; the same "
                   "numbers as one process; default 1)")
    p.set_defaults(run=cmd_assess)

    p = sub.add_parser("report", help="write the clinician's report (HTML, optional PDF) for one patient")
    p.add_argument("file", nargs="?", help="results file, or use --db")
    add_assess_options(p)
    p.add_argument("--out", default="report.html")
    p.add_argument("--pdf", help="also write a PDF here")
    p.add_argument("--png-dir", help="also save the plots as PNG here")
    p.set_defaults(run=cmd_report)


_CHECK_COLUMNS = ["patient", "species", "specimen", "collected_at", "analyte", "value", "unit",
                  "reported_value", "reported_unit", "censor", "state"]


def cmd_check(args) -> int:
    from ..io.chunked import stream_chunksize

    chunksize = stream_chunksize(args.file, args.chunk_rows)
    if chunksize is not None:
        return _check_chunked(args, chunksize)
    from ..io import read_results

    frame = read_results(args.file)
    _print_head(frame, args.rows)
    print(f"\n{len(frame)} rows, {frame['patient'].nunique()} patient(s), "
          f"{len(frame[['patient', 'specimen']].drop_duplicates())} specimen(s): valid.")
    for n in frame.attrs.get("notes") or []:
        print(f"note: {n}")
    return 0


def _print_head(frame, rows: int) -> None:
    import pandas as pd

    with pd.option_context("display.width", 200, "display.max_columns", 30):
        print(frame[_CHECK_COLUMNS].head(rows).to_string(index=False))


def _check_chunked(args, chunksize: int) -> int:
    """``check`` of a large text table, read and validated a chunk at a time (the first rows
    printed are the first chunk's, in the canonical order within it)."""
    from ..io.chunked import iter_results

    chunks = iter_results(args.file, chunksize=chunksize)
    printed = False
    for frame in chunks:
        if not printed:
            _print_head(frame, args.rows)
            printed = True
    print(f"\n{chunks.n_rows} rows, {chunks.n_patients} patient(s), {chunks.n_specimens} "
          f"specimen(s): valid (read in chunks of {chunksize} rows).")
    for n in chunks.notes:
        print(f"note: {n}")
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
    if args.jobs < 1:
        return err("--jobs must be at least 1")
    frame = load_frame(args)
    a = run_assess(args, frame)
    if args.format == "json":
        text = a.to_json()
    elif args.format == "csv":
        from ..assessment.result import csv_with_caution

        t = a.table.copy()
        t["flags"] = t["flags"].map(lambda f: "; ".join(f))
        text = csv_with_caution(t.to_csv(index=False))
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
    from .. import report

    frame = load_frame(args)
    patients = sorted(frame["patient"].unique())
    pid = args.patient
    if pid is None:
        if len(patients) != 1:
            return err(f"the file holds {len(patients)} patients; choose one with --patient")
        pid = patients[0]
    files = report.report_for_file(frame, pid, args.pack, args.out, pdf=args.pdf, at=args.at,
                                   engine=args.engine, png_dir=args.png_dir, priors=args.priors,
                                   coverage=args.coverage, prior_change=args.prior_change,
                                   keep_compromised=args.keep_compromised, seed=args.seed)
    print(f"wrote {files.html}" + (f" and {files.pdf}" if files.pdf else ""))
    print(" ".join(CAUTIONS))
    return 0


#: case.toml tables of a research job's case (the reference-interval job's settings): such a
#: folder holds a study population, not one patient's history
_RESEARCH_TABLES = ("interval",)


def research_kind(case: dict) -> str | None:
    """What a case folder holds when it is not one patient's history: its ``kind`` (``study``),
    or the research job whose table it carries (``interval``); None for a patient case."""
    kind = case.get("kind")
    if kind and kind != "patient":
        return str(kind)
    return next((t for t in _RESEARCH_TABLES if t in case), None)


def _demo_summary(t) -> str:
    """One line: the probable changes, drifts, compromised samples and method changes."""
    from ..report import select_changes

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
    return "; ".join(parts) or "no probable change"


def _demo_case(case: dict, frame, out: Path, pdf: bool):
    """Assess one patient case once and write its JSON and report (as ``report_for_file`` does
    with the species' pack; each species' pack is loaded once for the whole demo, through the
    process-wide cache :func:`bayesbase.priors.cached_pack`)."""
    from .. import report
    from ..assessment import assess
    from ..priors import cached_pack

    pid = str(case["patient"])
    sub = frame[frame["patient"].astype(str) == pid]
    pack = cached_pack(str(sub["species"].iloc[0]))
    a = assess(sub, pack=pack, at=case.get("at"))
    (out / f"{case['id']}.json").write_text(a.to_json(), encoding="utf-8")
    path = report.personal_interval_path(sub, pack, pid, assess, engine="exact", trend=False)
    report.build_report(a, pack, out / f"{case['id']}.html", pdf=out / f"{case['id']}.pdf" if pdf else None,
                        interval_path=path, patient=pid)
    return a


def _demo_one(case_dir: str, out: str, pdf: bool) -> str:
    """One patient case of the demo from its folder on disk (read, assess, write its files);
    its summary line. Runs in a worker process or in this one."""
    import tomllib

    from ..io import read_results as load_results

    d = Path(case_dir)
    case = tomllib.loads((d / "case.toml").read_text(encoding="utf-8"))
    a = _demo_case(case, load_results(d / "results.csv"), Path(out), pdf)
    return f"{case['id']:<42} {_demo_summary(a.table)}"


def _demo_in_process(case: dict, case_dir, out: Path, pdf: bool) -> str:
    """:func:`_demo_one` in this process for a case folder that may not be a folder on disk
    (a package read from an archive)."""
    from importlib import resources

    from ..io import read_results as load_results

    with resources.as_file(case_dir / "results.csv") as csv_path:
        frame = load_results(csv_path)
    a = _demo_case(case, frame, out, pdf)
    return f"{case['id']:<42} {_demo_summary(a.table)}"


def _demo_pool(n: int):
    """A pool of ``n`` worker processes forked from this one once the report's modules are
    imported (each worker starts with them, so they are imported once), or None where this
    system cannot fork."""
    import multiprocessing as mp
    from concurrent.futures import ProcessPoolExecutor

    if "fork" not in mp.get_all_start_methods():
        return None
    from .. import assessment, io, report  # noqa: F401  (imported before the fork)

    return ProcessPoolExecutor(n, mp_context=mp.get_context("fork"))


def _demo_lines(todo: list, out: Path, pdf: bool, jobs: int) -> list[str]:
    """The summary line of each patient case ``(case, folder)``, in order: the cases in
    ``jobs`` worker processes when there are several and their folders are on disk, else (or
    when the workers cannot be started) one after the other in this process. The files are
    the same either way (each case writes its own)."""
    from concurrent.futures.process import BrokenProcessPool
    from itertools import repeat

    on_disk = all(isinstance(d, Path) for _, d in todo)
    pool = _demo_pool(min(jobs, len(todo))) if jobs > 1 and len(todo) > 1 and on_disk else None
    if pool is not None:
        try:
            with pool:
                return list(pool.map(_demo_one, [str(d) for _, d in todo], repeat(str(out)),
                                     repeat(pdf)))
        except (OSError, BrokenProcessPool):
            pass  # no worker could start or one died: every case again, in this process
    return [_demo_in_process(case, d, out, pdf) for case, d in todo]


def cmd_demo(args) -> int:
    import tomllib
    from importlib import resources

    if args.jobs < 1:
        return err("--jobs must be at least 1")
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    root = resources.files("bayesbase.case_library")
    todo, skipped = [], []
    for case_dir in sorted((p for p in root.iterdir() if p.is_dir() and (p / "case.toml").is_file()),
                           key=lambda p: p.name):
        case = tomllib.loads((case_dir / "case.toml").read_text(encoding="utf-8"))
        kind = research_kind(case)
        if kind is not None:
            skipped.append(f"{case['id']} ({kind})")
            continue
        todo.append((case, case_dir))
    lines = _demo_lines(todo, out, not args.no_pdf, args.jobs)
    print("\n".join(lines))
    if skipped:
        print(f"\nskipped the research cases (a population, not one patient's history): {', '.join(skipped)}")
    print(f"\nwrote an HTML{'' if args.no_pdf else ' and PDF'} report and a JSON assessment per patient case to {out}/")
    print(" ".join(CAUTIONS))
    return 0
