"""`bayesbase serve`: the clinician's desk, a local web page over the results store
(:mod:`bayesbase.web`). Imports the web stack only when the command runs."""
from __future__ import annotations

import sys

from ..constants import CAUTIONS


def add_parsers(sub) -> None:
    p = sub.add_parser("serve", help="open the clinician's desk: a local web page over the "
                       "results store")
    p.add_argument("--db", help="results store (default: the default store)")
    p.add_argument("--host", default="127.0.0.1",
                   help="address to listen on (default 127.0.0.1: this machine only; any other "
                        "requires the printed access token on every request)")
    p.add_argument("--port", type=int, default=8765, help="port (default 8765; 0: a free one)")
    p.add_argument("--open", action="store_true", help="open the page in the web browser")
    p.add_argument("--max-upload-mb", type=float, default=50,
                   help="largest results file accepted for import, in MB (default 50)")
    p.add_argument("--packs", metavar="FOLDER",
                   help="folder of prior pack files (full packs or fragments, such as "
                        "calibrated ones) to list beside the built-in packs")
    p.set_defaults(run=cmd_serve)


def cmd_serve(args) -> int:
    from ..store import Store, default_db_path
    from ..web import server

    db = args.db or default_db_path()
    with Store(db) as st:  # created (or migrated) now, so a bad file fails before serving
        db = st.path
    plan = server.plan(db, args.host, args.port, max_upload_mb=args.max_upload_mb,
                       packs_dir=args.packs)
    print(f"bayesbase desk: {plan.url}", flush=True)
    print(f"store: {db}", flush=True)
    if plan.config.token:
        print("this address carries an access token: every request needs it; share it only "
              "with people who may see these patients (the connection is not encrypted)",
              flush=True)
    if args.host in ("0.0.0.0", "::"):
        print(f"(on other machines, put this machine's address in place of {args.host})",
              flush=True)
    print(" ".join(CAUTIONS), flush=True)
    print("Ctrl-C stops the desk.", flush=True)

    def ready():
        if args.open:
            import webbrowser

            webbrowser.open(plan.url)

    try:
        server.run(plan, on_ready=ready)
    except KeyboardInterrupt:
        pass
    print("desk stopped", file=sys.stderr, flush=True)
    return 0
