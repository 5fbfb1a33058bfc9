"""`bayesbase priors`: list, show, check and merge prior packs."""
from __future__ import annotations

import sys


def add_parsers(sub) -> None:
    p = sub.add_parser("priors", help="show, check or merge prior packs")
    psub = p.add_subparsers(dest="priors_command", metavar="ACTION")
    q = psub.add_parser("show", help="print a pack's values with their sources")
    q.add_argument("pack", nargs="?", default="dog")
    q.add_argument("--analyte")
    q.add_argument("--full", action="store_true", help="print whole source texts (default: one line each)")
    q.add_argument("--priors", help="lab override CSV to layer over the pack")
    psub.add_parser("list", help="list the built-in packs")
    q = psub.add_parser("check", help="validate a pack TOML (full or fragment) or a lab override CSV")
    q.add_argument("file")
    q = psub.add_parser("merge", help="layer pack fragments over a pack and write one full pack TOML")
    q.add_argument("base", help="pack name (dog) or TOML path the fragments are layered over")
    q.add_argument("fragments", nargs="+", metavar="FRAGMENT",
                   help="pack fragments (TOML), layered in this order; the later wins where two set a number")
    q.add_argument("--out", required=True, help="pack TOML to write")
    p.set_defaults(run=cmd_priors)


def _write_atomically(path: str, text: str) -> None:
    """Write ``text`` to ``path`` through a temporary file in the same folder (nothing half-written)."""
    import os
    import tempfile
    from pathlib import Path

    target = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent or ".")
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="\n") as fh:
            fh.write(text)
        os.replace(tmp, target)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def _merge(args, priors) -> int:
    from pathlib import Path

    from .common import err

    if not Path(args.out).parent.is_dir():
        return err(f"{args.out}: folder {Path(args.out).parent} does not exist")
    text = priors.merge(args.base, *args.fragments)
    _write_atomically(args.out, text)
    pack = priors.load_pack(args.out)
    print(f"{args.out}: pack {pack.id}, {len(pack.analytes)} analytes, sha256 {pack.sha256[:16]}...")
    for w in pack.warnings:
        print(f"{args.out}: warning: {w}")
    return 0


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
    if args.priors_command == "merge":
        return _merge(args, priors)
    problems, warnings = priors.check(args.file)
    if problems:
        for p in problems:
            print(p, file=sys.stderr)
        return 1
    print(f"{args.file}: valid")
    for w in warnings:
        print(w.replace(f"{args.file}: ", f"{args.file}: warning: ", 1))
    return 0
