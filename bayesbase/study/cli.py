"""``bayesbase study``: estimate CVA, CVI and CVG from a designed study, or plan one (--plan).

``add_parser(sub)`` registers the command; ``run(args)`` imports lazily, prints and returns 0 on
success, 2 on a user error (``bayesbase: error: ...`` on stderr). Only this module prints.
"""
from __future__ import annotations

import argparse
import sys


def _err(msg: str) -> int:
    print(f"bayesbase: error: {msg}", file=sys.stderr)
    return 2


def add_parser(sub) -> None:
    """Add the ``study`` command to the ``bayesbase`` subparsers object."""
    p = sub.add_parser(
        "study",
        help="estimate CVA, CVI and CVG from a biological-variation study, or plan one (--plan)",
        description="Estimate analytical (CVA), within-animal (CVI) and between-animal (CVG) variation from a "
        "designed study of healthy animals (repeated specimens, analytical replicates), with the published "
        "outlier steps, nested ANOVA with confidence intervals and optionally a Bayesian model; writes "
        "estimates.csv, removed.csv, steps.csv, study.html and a prior-pack fragment pack.toml. With --plan, "
        "simulate a design and print the expected width of the CVI confidence interval. Decision support, "
        "not a diagnosis.",
    )
    p.add_argument("file", nargs="?", help="study results file (tidy results contract: patient, specimen, "
                   "collected_at, replicate, analyte, value, unit ...)")
    p.add_argument("--out", help="output folder (required unless --plan)")
    p.add_argument("--analytes", help="comma-separated analytes (default: every analyte in the file)")
    p.add_argument("--species", help="species to analyse (needed when the file holds several)")
    p.add_argument("--method", choices=["anova", "bayes", "both"], default="anova",
                   help="classical nested ANOVA, the Bayesian model, or both (default: anova)")
    p.add_argument("--seed", type=int, default=0, help="seed of the Bayesian sampler and of --plan (default 0)")
    p.add_argument("--no-outlier-removal", action="store_true",
                   help="keep every result (outliers are still tested and listed as kept)")
    p.add_argument("--alpha", type=float, default=0.05, help="significance level of the outlier and "
                   "homogeneity tests (default 0.05)")
    p.add_argument("--cv-anova", action="store_true", help="also report CV-ANOVA (Roraas et al. 2016) rows")
    p.add_argument("--robust", action="store_true", help="Bayesian model with Student-t animals and results")
    p.add_argument("--draws", type=int, default=1000, help="Bayesian draws per chain (default 1000)")
    p.add_argument("--tune", type=int, default=1000, help="Bayesian tuning steps per chain (default 1000)")
    p.add_argument("--chains", type=int, default=4, help="Bayesian chains (default 4)")
    p.add_argument("--sampler", choices=["auto", "pymc", "nutpie"], default="auto",
                   help="Bayesian sampler: nutpie (optional package) or PyMC; auto uses nutpie when installed "
                   "(default auto). All analytes are fitted in one model, sampled once")
    p.add_argument("--no-figures", action="store_true", help="HTML without figures (faster)")
    g = p.add_argument_group("design planning (--plan)")
    g.add_argument("--plan", action="store_true", help="simulate a planned design instead of reading a file")
    g.add_argument("--animals", type=int, default=10, help="animals (default 10)")
    g.add_argument("--specimens", type=int, default=6, help="specimens per animal (default 6)")
    g.add_argument("--replicates", type=int, default=2, help="replicates per specimen (default 2)")
    g.add_argument("--cva", type=float, default=3.0, help="expected CVA in percent (default 3)")
    g.add_argument("--cvi", type=float, default=10.0, help="expected CVI in percent (default 10)")
    g.add_argument("--cvg", type=float, default=25.0, help="expected CVG in percent (default 25)")
    g.add_argument("--dropout", type=float, default=0.0, help="percent of results expected missing at random "
                   "(default 0: a complete balanced design)")
    g.add_argument("--simulations", type=int, default=4000, help="simulated studies per design (default 4000)")


def _run_plan(args) -> int:
    from .plan import plan_design

    plan = plan_design(args.animals, args.specimens, args.replicates, args.cva / 100, args.cvi / 100,
                       args.cvg / 100, n_sim=args.simulations, seed=args.seed, dropout=args.dropout / 100)
    s = plan.summary
    print(f"Planned design: {args.animals} animals x {args.specimens} specimens x {args.replicates} replicates; "
          f"CVA {args.cva:g} %, CVI {args.cvi:g} %, CVG {args.cvg:g} %"
          + (f"; {args.dropout:g} % of results missing at random" if args.dropout else ""))
    print(f"Expected 95 % confidence interval of CVI: {s['cvi_lower_pct']:.1f} - {s['cvi_upper_pct']:.1f} % "
          f"(mean width {s['width_pct']:.1f} percentage points, 90th percentile {s['width_p90_pct']:.1f}; "
          f"relative half-width {100 * s['relative_half_width']:.0f} % of CVI; simulated coverage "
          f"{100 * s['coverage']:.1f} %)")
    print(f"Simulated {plan.attrs['n_sim']} studies per design, seed {plan.attrs['seed']} ({plan.attrs['method']}).")
    print("")
    print(f"Expected width of the CVI interval (percentage points), {args.replicates} replicates; rows animals, "
          "columns specimens per animal:")
    grid = plan.width_grid()
    print("animals " + "".join(f"{c:>7d}" for c in grid.columns))
    for a, row in grid.iterrows():
        mark = "*" if a == args.animals else " "
        print(f"{a:>6d}{mark} " + "".join(
            (f"{v:>6.1f}*" if (a == args.animals and c == args.specimens) else f"{v:>7.1f}")
            for c, v in row.items()))
    print("(* the requested design)")
    print("Decision support, not a diagnosis: a plan assumes healthy animals in a steady state, log-normal "
          "variation and one CVI shared by all animals.")
    return 0


def _check_sampler(args) -> None:
    """An explicit ``--sampler nutpie`` without the optional package stops before any work."""
    import importlib.util

    if getattr(args, "sampler", None) == "nutpie" and args.method in ("bayes", "both"):
        try:
            found = importlib.util.find_spec("nutpie") is not None
        except ValueError:  # a module entry of None (removed) behaves as not installed
            found = False
        if not found:
            from ..errors import MissingExtra
            raise MissingExtra("--sampler nutpie needs the optional package nutpie "
                               "(pip install 'bayesbase[nutpie]' or pip install 'nutpie>=0.16,<0.17'); "
                               "or use --sampler pymc")


def run(args) -> int:
    """Run ``bayesbase study``; returns the exit code."""
    from ..errors import BayesbaseError

    try:
        if args.plan:
            return _run_plan(args)
        if not args.file:
            return _err("give a study results FILE (or --plan to size a study)")
        if not args.out:
            return _err("give an output folder with --out DIR")
        _check_sampler(args)
        from .core import estimate
        from .output import write_outputs

        analytes = [a for a in (args.analytes or "").split(",") if a.strip()] or None
        result = estimate(args.file, analytes=analytes, species=args.species, method=args.method, seed=args.seed,
                          outlier_removal=not args.no_outlier_removal, alpha=args.alpha, cv_anova=args.cv_anova,
                          robust=args.robust, draws=args.draws, tune=args.tune, chains=args.chains,
                          sampler=args.sampler)
        paths = write_outputs(result, args.out, figures=not args.no_figures)
    except BayesbaseError as exc:
        return _err(str(exc))
    except (OSError, ValueError) as exc:
        return _err(str(exc))
    est = result.estimates
    print(f"Study {result.attrs['source_file']} ({result.attrs['species']}), method {result.attrs['method']}; "
          "CVs in % with 95 % intervals")
    print(f"{'analyte':<16}{'method':<22}{'n':>5}{'rm':>4}  {'CVA':<18}{'CVI':<18}{'CVG':<20}{'II':>6}{'RCV':>7}")
    for r in est.itertuples(index=False):
        def ci(p, lo, up):
            return "" if p != p else f"{p:.1f} ({lo:.1f}-{up:.1f})"
        print(f"{r.analyte:<16}{r.method:<22}{r.n_results:>5}{r.n_removed:>4}  {ci(r.cva_pct, r.cva_lower, r.cva_upper):<18}"
              f"{ci(r.cvi_pct, r.cvi_lower, r.cvi_upper):<18}{ci(r.cvg_pct, r.cvg_lower, r.cvg_upper):<20}"
              f"{'' if r.ii != r.ii else f'{r.ii:.2f}':>6}{'' if r.rcv_pct != r.rcv_pct else f'{r.rcv_pct:.1f}':>7}")
    n_rm = int((result.removed["action"] == "removed").sum()) if len(result.removed) else 0
    n_kept = len(result.removed) - n_rm
    print(f"{n_rm} removal(s)" + (f", {n_kept} outlier(s) kept" if n_kept else "") + " listed in removed.csv")
    for w in result.warnings:
        print(f"WARNING: {w}")
    if "pack.toml" not in paths:
        print("No pack fragment written: no analyte has a usable (converged) estimate.")
    print("Wrote " + ", ".join(str(p) for p in paths.values()))
    print("Decision support, not a diagnosis; defer to the attending veterinarian, a clinical pathologist and "
          "local regulation.")
    return 0


def main(argv=None) -> int:  # pragma: no cover - convenience for `python -m bayesbase.study.cli`
    ap = argparse.ArgumentParser(prog="bayesbase")
    sub = ap.add_subparsers(dest="command")
    add_parser(sub)
    return run(ap.parse_args(argv))


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
