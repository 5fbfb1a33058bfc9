"""Command-line front end. Thin: every command imports what it needs lazily, so
``bayesbase --help`` loads neither pandas nor PyMC. One module per group of commands; each adds
its parsers with ``add_parsers(sub)`` and sets ``run`` to the function that carries it out."""
from __future__ import annotations

import argparse
import sys

from .. import __version__
from ..constants import CAUTIONS
from . import jobs, priors_cmd, research_cmds, results, serve_cmd, store_cmds
from .common import err

#: groups of commands in the order `bayesbase --help` lists them
GROUPS = (results, priors_cmd, store_cmds, jobs, research_cmds, serve_cmd)


def build_parser() -> argparse.ArgumentParser:
    ap = argparse.ArgumentParser(
        prog="bayesbase",
        description="Does this animal's new laboratory result differ from the values usual for it? "
        "Bayesian set points and personal intervals with the RCV beside them. "
        + " ".join(CAUTIONS),
    )
    ap.add_argument("--version", action="version", version=f"bayesbase {__version__}")
    sub = ap.add_subparsers(dest="command", metavar="COMMAND")
    for group in GROUPS:
        group.add_parsers(sub)
    return ap


def main(argv=None) -> int:
    ap = build_parser()
    args = ap.parse_args(argv)
    if not args.command:
        ap.print_help()
        return 0
    from ..errors import BayesbaseError

    try:
        return args.run(args)
    except BayesbaseError as exc:
        return err(str(exc))
    except FileNotFoundError as exc:
        return err(f"file not found: {exc.filename or exc}")
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:  # output piped into head or similar
        try:
            sys.stdout = None
        finally:
            return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
