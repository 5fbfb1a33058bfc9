"""Research and maintenance commands: compare, bench."""
from __future__ import annotations

import sys


def add_parsers(sub) -> None:
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
    p.set_defaults(run=cmd_compare)

    p = sub.add_parser("bench", help="run the benchmarks and print the timings")
    p.add_argument("--quick", action="store_true", help="smaller sizes, for a smoke run")
    p.add_argument("--only", help="comma-separated benchmark names")
    p.set_defaults(run=cmd_bench)


def cmd_compare(args) -> int:
    from ..assessment.result import prepend_csv_caution
    from ..constants import CAUTIONS
    from ..research import compare as research

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
    for p in paths:  # every CSV of results starts with the cautions (README, "Cautions in every output")
        if str(p).endswith(".csv"):
            prepend_csv_caution(p)
    print(comp.summary_text)
    print("wrote " + ", ".join(str(p) for p in paths))
    print(" ".join(CAUTIONS))
    return 0


def cmd_bench(args) -> int:
    from .. import bench

    only = args.only.split(",") if args.only else None
    for name, res in bench.run(quick=args.quick, only=only):
        if "table" in res:  # a benchmark that brings its own text table (speed_issue)
            print(f"{name}:\n{res['table']}", flush=True)
            continue
        print(f"{name}: " + ", ".join(f"{k}={v}" for k, v in res.items()), flush=True)
    return 0
