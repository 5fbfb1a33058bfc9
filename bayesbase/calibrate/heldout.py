"""Held-out proof of a calibration: does a pack calibrated on other animals interpret a new
animal's result better than the pack the priors came from?

Design (k-fold over animals, seeded):

1. the animals of the species are dealt into ``folds`` folds at random (``numpy.random.default_rng(seed)``
   permutes the sorted animal ids; animal number r of the permutation goes to fold r mod k);
2. for each fold, :func:`bayesbase.calibrate.job.calibrate` is fitted to every result of the
   animals of the other folds (sampler seed ``seed + fold``) and its pack fragment
   (:func:`bayesbase.calibrate.output.fragment_toml`, checked by the pack schema) is loaded over
   the prior pack: the *calibrated* arm. The folds' fits run in this process one after the
   other, so a fold whose training set has the shape of an earlier one (same padded sizes and
   breed levels: folds of equal size) samples with that fold's compiled graph, its data swapped
   in (:mod:`bayesbase.calibrate.split` keeps the graphs; the draws are those of a fresh compile);
3. for each animal of the held-out fold and each analyte, its last usable specimen (usable by the
   calibration's own selection, i.e. the assessment's baseline rules) is assessed against its
   earlier usable specimens with ``bayesbase.assessment.assess`` (exact engine, the public API)
   twice: with the prior pack as it is (arm ``builtin``: by default the species' built-in pack)
   and with the calibrated pack (arm ``calibrated``), each once as measured and once with that
   last result multiplied by ``1 + shift`` (a simulated true change, +30 % by default);
4. in the calibrated arm every held-out result of a non-reference method is first put on the
   reference method's scale by the calibrated bias (value / (1 + bias), posterior median), which
   is what a calibrated between-method bias is for; the bias's own uncertainty (its credible
   interval is in calibration.csv) is not added, and the method biases the fragment carries are
   taken out of the calibrated pack so the assessment does not correct the values a second time.
   The built-in arm reads the values as reported.

Measures, per analyte and arm (``HELDOUT_COLUMNS``; proportions with Wilson 95 % intervals from
``scipy.stats.binomtest``):

* ``coverage``: share of unshifted last results inside the central personal interval of level
  ``coverage`` (nominal 0.95), read from the assessment's ``percentile`` (inside <=> (1 - c)/2 <=
  percentile <= (1 + c)/2, as the engine documents it);
* ``false_alarm``: share of unshifted last results outside that interval (nominal 1 - c; for this
  rule exactly 1 - coverage) and ``false_alarm_high``: above its upper limit (nominal (1 - c)/2);
* ``sensitivity``: share of shifted last results outside the interval (no nominal value).

A fold whose fit failed a convergence check is still scored (so the failure is visible) and
marked in ``folds``; :attr:`HeldOut.converged` is then False and every page and print says so.
"""
from __future__ import annotations

import tempfile
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from ..contract import CANONICAL_COLUMNS

__all__ = ["HELDOUT_COLUMNS", "MEASURES", "ARMS", "DEFAULT_SHIFT", "HeldOut", "assign_folds", "heldout_proof",
           "heldout_table", "heldout_section", "write_heldout"]

HELDOUT_COLUMNS = ("analyte", "pack", "measure", "nominal", "estimate", "lower", "upper", "k", "n")
MEASURES = ("coverage", "false_alarm", "false_alarm_high", "sensitivity")
ARMS = ("builtin", "calibrated")
#: Simulated true change added to the held-out result (fraction): the +30 % of the issue's
#: measured consequence (bayesbase choice of a clinically sizeable change).
DEFAULT_SHIFT = 0.30
CASE_COLUMNS = ("fold", "patient", "analyte", "pack", "specimen", "method", "value", "n_baseline", "pi_lower",
                "pi_upper", "percentile", "percentile_shifted", "covered", "alarm", "alarm_high", "detected")
FOLD_COLUMNS = ("fold", "n_train_animals", "n_heldout_animals", "n_cases", "converged", "max_r_hat",
                "min_ess_bulk", "min_ess_tail", "divergences", "seconds", "calibrated_pack_id",
                "calibrated_pack_sha256")


@dataclass
class HeldOut:
    """Result of :func:`heldout_proof`: ``table`` (tidy, :data:`HELDOUT_COLUMNS`), ``cases`` (one
    row per held-out animal, analyte and arm), ``folds`` (one row per fold: training size and
    convergence), ``parameters`` (each fold's calibration table with a ``fold`` column), ``attrs`` (stamps: prior pack id and sha256, engine, seed, folds, shift,
    coverage, sampler settings)."""

    table: pd.DataFrame
    cases: pd.DataFrame
    folds: pd.DataFrame
    parameters: pd.DataFrame = field(default_factory=pd.DataFrame)
    attrs: dict = field(default_factory=dict)

    @property
    def converged(self) -> bool:
        return bool(len(self.folds)) and bool(self.folds["converged"].all())

    def to_dataset(self):
        """xarray Dataset: ``estimate`` on (analyte, pack, measure), ``interval`` on (..., ci_bound),
        counts ``k`` and ``n``; the attrs stamped."""
        import xarray as xr

        from ..constants import CI_BOUNDS, DIM_ANALYTE, DIM_CI

        t = self.table.set_index(["analyte", "pack", "measure"])
        ds = xr.Dataset.from_dataframe(t[["estimate", "lower", "upper", "k", "n", "nominal"]])
        ds = ds.rename({"analyte": DIM_ANALYTE})
        ds["interval"] = xr.concat([ds["lower"], ds["upper"]], dim=DIM_CI).transpose(..., DIM_CI)
        ds = ds.drop_vars(["lower", "upper"]).assign_coords({DIM_CI: list(CI_BOUNDS)})
        ds.attrs.update({k: v if isinstance(v, (int, float, str)) and not isinstance(v, bool) else str(v)
                         for k, v in self.attrs.items()})
        return ds


def assign_folds(patients, folds: int, seed: int = 0) -> pd.Series:
    """patient id -> fold (0 .. folds-1): a seeded permutation of the sorted distinct ids, dealt
    in turn, so fold sizes differ by at most one."""
    ids = sorted({str(p) for p in patients})
    if folds < 2:
        raise ValueError(f"held-out proof needs at least 2 folds, got {folds}")
    if len(ids) < folds:
        raise ValueError(f"held-out proof with {folds} folds needs at least {folds} animals, got {len(ids)}")
    order = np.random.default_rng(seed).permutation(len(ids))
    fold = np.empty(len(ids), dtype=int)
    fold[order] = np.arange(len(ids)) % folds
    return pd.Series(fold, index=pd.Index(ids, name="patient"), name="fold")


# ----------------------------------------------------------------------------- one fold
def _calibrated_pack(cal):
    """The fold's fragment (schema-checked by loading it over its base pack) as a Pack."""
    from ..priors import load_pack
    from .output import fragment_toml

    import dataclasses

    with tempfile.TemporaryDirectory(prefix="bayesbase-heldout-") as tmp:
        path = Path(tmp) / "pack.toml"
        path.write_text(fragment_toml(cal), encoding="utf-8")
        pk = load_pack(path)
    # the values are put on the reference method's scale here (_harmonised); a pack that also
    # carries the method biases would have the assessment correct them a second time
    analytes = {a: dataclasses.replace(p, method_biases={}) if getattr(p, "method_biases", None) else p
                for a, p in pk.analytes.items()}
    return dataclasses.replace(pk, analytes=analytes)


def _bias_factors(cal) -> dict:
    """(analyte, method) -> 1 + calibrated bias (posterior median) of every non-reference method."""
    t = cal.table[(cal.table["parameter"] == "method_bias")]
    return {(r.analyte, r.group): 1.0 + float(r.estimate) for r in t.itertuples(index=False)}


def _harmonised(rows: pd.DataFrame, factors: dict) -> pd.DataFrame:
    """Values of non-reference methods divided by 1 + their calibrated bias (module docstring)."""
    from .core import UNSTATED_METHOD

    meth = rows["method"].fillna(UNSTATED_METHOD).astype(str).replace("", UNSTATED_METHOD)
    f = np.array([factors.get((a, m), 1.0) for a, m in zip(rows["analyte"].astype(str), meth)])
    out = rows.copy()
    out["value"] = out["value"].to_numpy(float) / f
    return out


def _shifted(rows: pd.DataFrame, assessed: pd.DataFrame, shift: float) -> pd.DataFrame:
    """``rows`` with the assessed specimen of each patient multiplied by ``1 + shift``."""
    key = rows["patient"].astype(str) + "\x1f" + rows["specimen"].astype(str)
    hit = key.isin(set(assessed["patient"].astype(str) + "\x1f" + assessed["specimen"].astype(str))).to_numpy()
    out = rows.copy()
    out.loc[hit, "value"] = out.loc[hit, "value"].to_numpy(float) * (1.0 + shift)
    return out


def _scored(rows: pd.DataFrame, pack, coverage: float, shift: float, seed: int) -> pd.DataFrame:
    """Per case (patient, analyte): the assessment of the last result as measured and shifted.
    One analyte at a time, so each animal's latest specimen is its last usable one of that analyte."""
    from ..assessment import assess

    frames = []
    for _, r in rows.groupby(rows["analyte"].astype(str), sort=True):
        r = r[list(CANONICAL_COLUMNS)].reset_index(drop=True)
        plain = assess(r, pack=pack, engine="exact", coverage=coverage, seed=seed, trend=False).table
        moved = assess(_shifted(r, plain, shift), pack=pack, engine="exact", coverage=coverage, seed=seed,
                       trend=False).table
        t = plain[["patient", "analyte", "specimen", "value", "n_baseline", "pi_lower", "pi_upper", "percentile"]]
        t = t.merge(moved[["patient", "specimen", "percentile"]].rename(columns={"percentile": "percentile_shifted"}),
                    on=["patient", "specimen"], how="left", validate="one_to_one")
        meth = r.drop_duplicates(["patient", "specimen"]).set_index(["patient", "specimen"])["method"]
        t["method"] = meth.reindex(pd.MultiIndex.from_arrays([t["patient"], t["specimen"]])).to_numpy()
        frames.append(t)
    out = pd.concat(frames, ignore_index=True)
    out = out[out["n_baseline"] > 0].copy()  # an animal with one usable specimen has nothing to compare
    lo, hi = 0.5 * (1.0 - coverage), 0.5 * (1.0 + coverage)
    p, ps = out["percentile"].to_numpy(float), out["percentile_shifted"].to_numpy(float)
    out["covered"] = (p >= lo) & (p <= hi)
    out["alarm"] = ~out["covered"]
    out["alarm_high"] = p > hi
    out["detected"] = (ps < lo) | (ps > hi)
    return out


def _fold_record(f: int, cal, calibrated, n_train: int, n_held: int, n_cases: int) -> dict:
    d = cal.diagnostics
    return dict(fold=f, n_train_animals=n_train, n_heldout_animals=n_held, n_cases=n_cases,
                converged=bool(cal.converged), max_r_hat=float(d["max_r_hat"]), min_ess_bulk=float(d["min_ess_bulk"]),
                min_ess_tail=float(d["min_ess_tail"]), divergences=int(d["divergences"]),
                seconds=float(cal.attrs["seconds"]), calibrated_pack_id=calibrated.id,
                calibrated_pack_sha256=calibrated.sha256)


def _one_fold(f: int, frame, usable, fold_of, prior_pack, opts: dict, fit_kw: dict):
    """Calibrate on the other folds, score the held-out fold with both packs."""
    from .job import calibrate

    held = fold_of.index[fold_of == f]
    train = frame[~frame["patient"].astype(str).isin(held)]
    cal = calibrate(train, pack=opts["pack_arg"], seed=opts["seed"] + f, **fit_kw)
    calibrated = _calibrated_pack(cal)
    rows = usable[usable["patient"].astype(str).isin(held)]
    rows = rows[rows["analyte"].astype(str).isin(cal.attrs["analytes"])]
    arms = {"builtin": (rows, prior_pack), "calibrated": (_harmonised(rows, _bias_factors(cal)), calibrated)}
    cases = []
    for arm, (r, pk) in arms.items():
        c = _scored(r, pk, opts["coverage"], opts["shift"], opts["seed"])
        cases.append(c.assign(fold=f, pack=arm))
    cases = pd.concat(cases, ignore_index=True)
    n_cases = int((cases["pack"] == "builtin").sum())
    record = _fold_record(f, cal, calibrated, int(len(set(cal.data.cell_animal))), len(held), n_cases)
    return cases, record, cal.table.assign(fold=f)


# ----------------------------------------------------------------------------- summary
def _wilson(k: int, n: int) -> tuple[float, float]:
    from scipy.stats import binomtest

    if n == 0:
        return float("nan"), float("nan")
    ci = binomtest(int(k), int(n)).proportion_ci(confidence_level=0.95, method="wilson")
    return float(ci.low), float(ci.high)


def heldout_table(cases: pd.DataFrame, coverage: float = 0.95) -> pd.DataFrame:
    """The tidy table (:data:`HELDOUT_COLUMNS`) of the scored cases: per analyte, arm and measure."""
    col = {"coverage": "covered", "false_alarm": "alarm", "false_alarm_high": "alarm_high", "sensitivity": "detected"}
    nominal = {"coverage": coverage, "false_alarm": 1.0 - coverage, "false_alarm_high": 0.5 * (1.0 - coverage),
               "sensitivity": float("nan")}
    rows = []
    for (a, arm), c in cases.groupby(["analyte", "pack"], sort=True):
        for m in MEASURES:
            x = c[col[m]].to_numpy(bool)
            k, n = int(x.sum()), len(x)
            lo, hi = _wilson(k, n)
            rows.append((a, arm, m, nominal[m], k / n if n else float("nan"), lo, hi, k, n))
    return pd.DataFrame(rows, columns=list(HELDOUT_COLUMNS))


def heldout_proof(results_or_store, *, species: str = "dog", analytes=None, pack=None, folds: int = 5,
                  seed: int = 0, shift: float = DEFAULT_SHIFT, coverage: float = 0.95,
                  reference_method: str | None = None, sampler: str = "pymc", draws: int = 1000, tune: int = 1000,
                  chains: int = 4, cores: int | None = None, target_accept: float = 0.9,
                  keep_compromised: bool = False, now=None, locations: str = "auto") -> HeldOut:
    """k-fold held-out proof of the module docstring on a store (a ``Store`` or its file), a
    results file or a frame. Fold assignment and sampler seeds derive from ``seed``; ``locations``
    as in :func:`bayesbase.calibrate.job.calibrate`. Returns a
    :class:`HeldOut`; never raises on poor convergence (``folds`` and ``converged`` say so)."""
    from ..priors import Pack, load_pack
    from .core import load_input, select_specimens

    if not 0.0 < coverage < 1.0 or shift <= -1.0:
        raise ValueError("coverage must be in (0, 1) and shift > -1")
    frame, source = load_input(results_or_store, now=now)
    pk = pack if isinstance(pack, Pack) else load_pack(pack if pack is not None else species)
    sel = select_specimens(frame, species, pk, analytes, keep_compromised=keep_compromised)
    frame = frame[frame["species"].astype(str) == species]
    fold_of = assign_folds(sel.usable["patient"].astype(str), folds, seed)
    frame = frame[frame["patient"].astype(str).isin(fold_of.index)]
    fit_kw = dict(species=species, analytes=list(sel.analytes), reference_method=reference_method, sampler=sampler,
                  draws=draws, tune=tune, chains=chains, cores=cores, target_accept=target_accept,
                  keep_compromised=keep_compromised, now=now, locations=locations)
    opts = dict(seed=int(seed), coverage=float(coverage), shift=float(shift), pack_arg=pack if pack is not None else pk)
    all_cases, records, params = [], [], []
    for f in range(folds):
        c, rec, par = _one_fold(f, frame, sel.usable, fold_of, pk, opts, fit_kw)
        all_cases.append(c)
        records.append(rec)
        params.append(par)
    cases = pd.concat(all_cases, ignore_index=True)[list(CASE_COLUMNS)]
    fold_table = pd.DataFrame(records, columns=list(FOLD_COLUMNS))
    attrs = dict(pack_id=pk.id, pack_sha256=pk.sha256, engine="exact", seed=int(seed), folds=int(folds),
                 shift=float(shift), coverage=float(coverage), sampler=sampler, draws=int(draws), tune=int(tune),
                 chains=int(chains), source_kind=source.kind, source_label=source.label,
                 source_sha256=source.sha256, analytes=list(sel.analytes), n_cases=int((cases["pack"] == "builtin").sum()),
                 converged=bool(fold_table["converged"].all()), harmonised_methods=True)
    return HeldOut(table=heldout_table(cases, coverage), cases=cases, folds=fold_table,
                   parameters=pd.concat(params, ignore_index=True), attrs=attrs)


# ----------------------------------------------------------------------------- output
def _pct(x) -> str:
    return "" if x != x else f"{100 * x:.1f}"


def heldout_section(ho: HeldOut) -> str:
    """An HTML section: the two arms side by side per analyte and measure, the folds' fits."""
    import html

    a = ho.attrs
    e = html.escape
    head = ("<tr><th>analyte</th><th>measure</th><th>nominal %</th><th>built-in pack %</th><th>95 % CI</th>"
            "<th>calibrated pack %</th><th>95 % CI</th><th>cases</th></tr>")
    t = ho.table.set_index(["analyte", "measure", "pack"])
    body = []
    for an in dict.fromkeys(ho.table["analyte"]):
        for m in MEASURES:
            cells = [f'<td class="l">{e(an)}</td><td class="l">{e(m)}</td>',
                     f"<td>{_pct(t.loc[(an, m, 'builtin'), 'nominal'])}</td>"]
            for arm in ARMS:
                r = t.loc[(an, m, arm)]
                cells.append(f"<td>{_pct(r['estimate'])}</td><td>{_pct(r['lower'])}-{_pct(r['upper'])}</td>")
            cells.append(f"<td>{int(t.loc[(an, m, 'builtin'), 'n'])}</td>")
            body.append("<tr>" + "".join(cells) + "</tr>")
    fh = "".join(f"<th>{e(c)}</th>" for c in ("fold", "train animals", "held-out animals", "converged",
                                               "max R-hat", "min bulk ESS", "divergences"))
    fb = "".join(f"<tr><td>{r.fold}</td><td>{r.n_train_animals}</td><td>{r.n_heldout_animals}</td>"
                 f"<td>{'yes' if r.converged else 'NO'}</td><td>{r.max_r_hat:.4f}</td><td>{r.min_ess_bulk:.0f}</td>"
                 f"<td>{r.divergences}</td></tr>" for r in ho.folds.itertuples(index=False))
    warn = ("" if ho.converged else '<p class="warn">At least one fold\'s fit did not converge: its calibrated '
            "pack, and so these held-out figures, are not to be trusted.</p>")
    return (f"<h2>Held-out proof ({a['folds']} folds over animals, seed {a['seed']})</h2>{warn}"
            f"<p>Each animal's last usable specimen assessed against its earlier ones (exact engine) with the prior "
            f"pack {e(str(a['pack_id']))} and with the pack calibrated on the other folds (values of non-reference "
            f"methods put on the reference method's scale by the calibrated bias); coverage of the central "
            f"{100 * a['coverage']:g} % personal interval, false alarms (outside it; above its upper limit), and "
            f"sensitivity to a simulated {100 * a['shift']:+g} % change of that result. Wilson 95 % intervals.</p>"
            f"<table>{head}{''.join(body)}</table><h3>Fits of the folds</h3><table><tr>{fh}</tr>{fb}</table>")


def write_heldout(cal, out_dir) -> dict:
    """When ``cal`` carries a held-out proof: write ``heldout.csv`` and add its section to
    ``calibration.html`` (already written); returns {name: path} of what it wrote."""
    ho = getattr(cal, "heldout", None)
    if ho is None:
        return {}
    out = Path(out_dir)
    csv = out / "heldout.csv"
    ho.table.to_csv(csv, index=False)
    page = out / "calibration.html"
    if page.exists():
        text = page.read_text(encoding="utf-8")
        tmp = out / ".calibration.html.tmp"
        tmp.write_text(text.replace("</body></html>", heldout_section(ho) + "\n</body></html>", 1), encoding="utf-8")
        tmp.replace(page)
    return {"heldout.csv": csv}
