"""`bayesbase priors`: list, show and check prior packs."""
from __future__ import annotations

import sys


def add_parsers(sub) -> None:
    p = sub.add_parser("priors", help="show or check prior packs")
    psub = p.add_subparsers(dest="priors_command", metavar="ACTION")
    q = psub.add_parser("show", help="print a pack's values with their sources")
    q.add_argument("pack", nargs="?", default="dog")
    q.add_argument("--analyte")
    q.add_argument("--full", action="store_true", help="print whole source texts (default: one line each)")
    q.add_argument("--priors", help="lab override CSV to layer over the pack")
    psub.add_parser("list", help="list the built-in packs")
    q = psub.add_parser("check", help="validate a pack TOML or a lab override CSV")
    q.add_argument("file")
    p.set_defaults(run=cmd_priors)


def cmd_priors(args) -> int:
    from .. import priors

    if args.priors_command in (None, "list"):
        for name in priors.available_packs():
            pk = priors.load_pack(name)
            print(f"{name}\t{len(pk.analytes)} analytes\t{pk.title}")
        return 0
    if args.priors_command == "show":
        pk = priors.load_pack(args.pack, overrides=args.priors)
        print(priors.describe_text(pk, analyte=args.analyte, full=args.full))
        return 0
    problems = priors.check_file(args.file)
    if problems:
        for p in problems:
            print(p, file=sys.stderr)
        return 1
    print(f"{args.file}: valid")
    return 0
