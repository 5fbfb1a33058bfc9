"""``bayesbase calibrate``: learn a pack's population level from a results store.

``add_parser(sub)`` registers the command; ``run(args)`` imports lazily, prints, and returns 0 on
success, 2 on a user error, 3 when the fit did not converge (no pack fragment is then written
unless ``--force``). Only this module prints.
"""
from __future__ import annotations

import argparse
import sys


#: the forms ``--locations`` offers; the same as :data:`bayesbase.calibrate.model.LOCATIONS` (a
#: test checks it), written out here so that ``bayesbase --help`` does not import the model module
LOCATION_CHOICES = ("auto", "marginal", "sampled")


def _err(msg: str) -> int:
    print(f"bayesbase: error: {msg}", file=sys.stderr)
    return 2


def add_parser(sub) -> None:
    """Add the ``calibrate`` command to the ``bayesbase`` subparsers object."""
    p = sub.add_parser(
        "calibrate",
        help="learn breed centres, method biases, CVG and CVI from a results store (hierarchical PyMC model)",
        description="Fit a hierarchical model to every usable result of a species in a results store (or file): "
        "population centre, breed centres with partial pooling, a bias per method against a reference method, "
        "CVG, and the CVI of each animal drawn from a log-normal across animals. Writes pack.toml (a fragment with "
        "provenance 'calibrated', only when the fit converged), calibration.csv, idata.nc, calibration.html and "
        "cvi_prior_posterior.png. Decision support, not a diagnosis.")
    p.add_argument("file", nargs="?", help="results file (CSV/TSV/XLSX/FHIR JSON) instead of --db")
    p.add_argument("--db", help="results store (SQLite file of `bayesbase store`)")
    p.add_argument("--species", default="dog", help="species to calibrate (default dog)")
    p.add_argument("--analytes", help="comma-separated analytes (default: every analyte the pack carries)")
    p.add_argument("--pack", help="pack whose values are the priors and which the fragment extends "
                   "(default: the species' pack)")
    p.add_argument("--reference-method", help="method whose bias is fixed at 0 (default: each analyte's most "
                   "frequent method)")
    p.add_argument("--out", required=True, help="output folder")
    p.add_argument("--sampler", choices=["pymc", "nutpie"], default="pymc",
                   help="PyMC's NUTS (default) or nutpie (optional extra bayesbase[nutpie])")
    p.add_argument("--draws", type=int, default=1000, help="draws per chain (default 1000)")
    p.add_argument("--tune", type=int, default=1000, help="tuning steps per chain (default 1000)")
    p.add_argument("--chains", type=int, default=4, help="chains (default 4)")
    p.add_argument("--target-accept", type=_accept_rate, default=0.9,
                   help="NUTS target acceptance rate, between 0 and 1 (default 0.9; lower takes longer steps, "
                   "higher shorter ones)")
    p.add_argument("--seed", type=int, default=0, help="sampler seed (default 0)")
    p.add_argument("--keep-compromised", action="store_true",
                   help="keep results whose H/L/I index is above the pack's threshold (as they are: "
                   "no variance inflation in this model)")
    p.add_argument("--force", action="store_true",
                   help="write pack.toml even when the fit did not converge (marked as such; exit code stays 3)")
    p.add_argument("--no-figure", action="store_true", help="no PNG figure (faster)")
    p.add_argument("--age-term", action="store_true",
                   help="add a linear age term on the log scale for the analytes the pack marks age-dependent "
                   "whose results carry birth dates (default: none; the pack's age marks describe young animals)")
    p.add_argument("--locations", choices=LOCATION_CHOICES, default="auto",
                   help="the location parameters (population centre, breed offsets, method biases, age slope): "
                   "'marginal' integrates them out exactly and draws them afterwards for each posterior draw from "
                   "their exact conditional; 'sampled' has NUTS sample them; 'auto' (default) integrates them out "
                   "wherever that is exact (it needs equal replicate counts within each animal), else samples them. "
                   "Same posterior either way; 'marginal' stops with an error where it is not exact")
    p.add_argument("--heldout-folds", type=int, default=0, metavar="K",
                   help="also run the held-out proof: K folds over animals (K >= 2), each calibrated on the others; "
                   "each held-out animal's last usable result assessed with the prior pack and the calibrated pack "
                   "(coverage, false alarms, sensitivity to a +30 %% change); writes heldout.csv (K fits: slow)")


def _print_table(cal) -> None:
    print(f"{'analyte':<14}{'parameter':<14}{'group':<22}{'prior':>10}{'estimate':>11}  95 % CrI")
    for r in cal.table.itertuples(index=False):
        ci = "" if r.lower != r.lower else f"{r.lower:.4g} to {r.upper:.4g}"
        print(f"{r.analyte:<14}{r.parameter:<14}{str(r.group)[:21]:<22}{r.prior_value:>10.4g}{r.estimate:>11.4g}  {ci}")


def _print_heldout(ho) -> None:
    if ho is None:
        return
    a = ho.attrs
    print(f"Held-out proof: {a['folds']} folds, {a['n_cases']} held-out animal-analyte cases; % (95 % CI), "
          f"prior pack {a['pack_id']} vs calibrated; shift {100 * a['shift']:+g} %")
    t = ho.table.set_index(["analyte", "measure", "pack"])
    for an, m in dict.fromkeys(zip(ho.table["analyte"], ho.table["measure"])):
        b, c = t.loc[(an, m, "builtin")], t.loc[(an, m, "calibrated")]
        nom = "" if b["nominal"] != b["nominal"] else f"nominal {100 * b['nominal']:.1f}"
        print(f"  {an:<14}{m:<18}{nom:<14}{100 * b['estimate']:6.1f} ({100 * b['lower']:.1f} to {100 * b['upper']:.1f})"
              f"   {100 * c['estimate']:6.1f} ({100 * c['lower']:.1f} to {100 * c['upper']:.1f})")
    if not ho.converged:
        print("WARNING: at least one held-out fold's fit did not converge; its figures are not to be trusted.",
              file=sys.stderr)


def _accept_rate(text: str) -> float:
    """argparse type of ``--target-accept``: a number strictly between 0 and 1."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a number: {text!r}") from None
    if not 0.0 < value < 1.0:
        raise argparse.ArgumentTypeError(f"must be between 0 and 1 (exclusive), got {text}")
    return value


def run(args) -> int:
    """Run ``bayesbase calibrate``; returns the exit code."""
    from ..errors import BayesbaseError

    if bool(args.file) == bool(args.db):
        return _err("give either a results FILE or --db PATH (one of them)")
    try:
        from .job import calibrate
        from .output import write_outputs

        analytes = [a.strip() for a in (args.analytes or "").split(",") if a.strip()] or None
        cal = calibrate(args.db or args.file, species=args.species, analytes=analytes, pack=args.pack,
                        reference_method=args.reference_method, sampler=args.sampler, draws=args.draws,
                        tune=args.tune, chains=args.chains, seed=args.seed, keep_compromised=args.keep_compromised,
                        heldout_folds=args.heldout_folds, age_term=bool(getattr(args, "age_term", False)),
                        locations=getattr(args, "locations", "auto"),
                        target_accept=getattr(args, "target_accept", 0.9))
        paths = write_outputs(cal, args.out, force=args.force, figure=not args.no_figure)
    except (BayesbaseError, OSError, ValueError, ImportError) as exc:
        return _err(str(exc))
    a, d = cal.attrs, cal.diagnostics
    print(f"Calibrated {', '.join(a['analytes'])} of {a['species']} on {a['n_animals']} animals, {a['n_specimens']} "
          f"usable specimens ({a['n_results']} specimen-analyte results; {a['source_kind']} {a['source_label']}, "
          f"sha256 {a['source_sha256'][:12]}...); "
          f"priors from pack {a['pack_id']}; {a['sampler']}, {a['chains']} x {a['draws']} draws, seed {a['seed']}, "
          f"{a['seconds']} s")
    _print_table(cal)
    print(f"Convergence: max R-hat {d['max_r_hat']:.4f}, min bulk ESS {d['min_ess_bulk']:.0f}, min tail ESS "
          f"{d['min_ess_tail']:.0f}, {d['divergences']} divergences")
    _print_heldout(cal.heldout)
    print("Wrote " + ", ".join(str(p) for p in paths.values()))
    print("Decision support, not a diagnosis; defer to the attending veterinarian, a clinical pathologist and "
          "local regulation.")
    if not cal.converged:
        failed = ", ".join(k for k, ok in d["checks"].items() if not ok)
        msg = ("a pack fragment was written anyway (--force) and is marked NOT CONVERGED" if "pack.toml" in paths
               else "NO pack fragment was written (use more --draws/--tune, or --force to write a marked one)")
        print(f"WARNING: THE FIT DID NOT CONVERGE ({failed}); {msg}.", file=sys.stderr)
        return 3
    return 0
