"""Files of a biological-variation study: estimates.csv, removed.csv, steps.csv, study.html and
pack.toml (a pack fragment). matplotlib is imported here only (inside the figure function).

Nothing half-written: every file is first written into a temporary folder inside the output
folder, then moved into place once all of them exist.

Pack fragment (``pack.toml``)
-----------------------------
Every number is a cited number with provenance ``"estimated"`` and a source naming the study
file and its SHA-256. The fragment carries only what a study measures (``cvi``, ``cvi_log_sd``,
``cvg``, ``cva`` and the analyte's ``unit``) and names the built-in pack it is layered over with
``[pack] extends = "<species>"``. It needs two changes to the pack schema in
:mod:`bayesbase.priors` (described in the study report): the provenance word ``"estimated"`` and
partial packs (``extends``). ``cvi`` is taken from the Bayesian fit when it converged (the median
CVI across animals; ``cvi_log_sd`` = sqrt(spread^2 + se^2), spread the posterior SD of ln CVI
across animals and se the posterior SD of ln median CVI from its 95 % interval / 3.92), else from
the ANOVA (``cvi_log_sd`` = the standard error of ln CVI from its 95 % interval,
ln(upper/lower)/3.92, which assumes one CVI shared by all animals).
"""
from __future__ import annotations

import base64
import html
import io
import math
import os
import shutil
import tempfile
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pandas as pd

from .. import __version__
from ..constants import CAUTIONS
from ..priors import available_packs, load_pack
from .common import DESIRABLE_CVA_FRACTION
from .core import UNCONVERGED, StudyResult, analyte_title

__all__ = ["write_outputs", "pack_fragment", "fragment_entries", "study_html", "analyte_figure", "PROVENANCE"]

#: Provenance word of numbers estimated by a study (needs the schema change in priors).
PROVENANCE = "estimated"
_Z975 = 1.959963984540054  # two-sided 95 % normal quantile (scipy.special.ndtri(0.975))


# --------------------------------------------------------------------------- pack fragment

def _toml_str(s: str) -> str:
    out = s.replace("\\", "\\\\").replace('"', '\\"').replace("\n", " ")
    return f'"{out}"'


def _cited(value: float, source: str, note: str) -> str:
    return (f"{{ value = {value:.6g}, source = {_toml_str(source)}, provenance = \"{PROVENANCE}\", "
            f"note = {_toml_str(note)} }}")


def _log_se(lo: float, up: float) -> float:
    if not (np.isfinite(lo) and np.isfinite(up) and lo > 0 and up > lo):
        return math.nan
    return math.log(up / lo) / (2 * _Z975)


def fragment_entries(result: StudyResult) -> tuple[dict[str, dict], list[str]]:
    """{analyte: {field: (value, note)} + unit} for the fragment, and notes on what was left out."""
    fits = result.attrs.get("fits", {})
    species = result.attrs["species"]
    base = None
    if species in available_packs():
        base = load_pack(species)
    entries: dict[str, dict] = {}
    skipped: list[str] = []
    for aid in result.notes:
        f = fits.get(aid, {})
        use = "bayes" if "bayes" in f else ("anova" if "anova" in f else None)
        if use is None:
            skipped.append(f"{aid}: no converged estimate")
            continue
        if base is not None and aid not in base:
            skipped.append(f"{aid}: not in the built-in '{species}' pack (a fragment cannot add an analyte)")
            continue
        comps = f[use]["comps"]
        counts = f[use]["counts"]
        design = (f"{counts['n_animals']} animals, {counts['n_specimens']} specimens, {counts['n_results']} "
                  f"results after {counts['n_removed']} removed")
        unit = result.estimates.loc[result.estimates["analyte"] == aid, "unit"].iloc[0]
        e: dict = {"unit": unit, "_method": use, "_design": design}
        for c in ("cvi", "cvg", "cva"):
            est, lo, up = comps.get(c, (math.nan,) * 3)
            if np.isfinite(est) and 0 < est < 2:
                e[c] = (est, f"{use}; 95 % interval {100 * lo:.1f}-{100 * up:.1f} %; {design}"
                        + ("; within-run CVA of the study (a laboratory's between-run QC CV may be larger)"
                           if c == "cva" else ""))
            else:
                skipped.append(f"{aid}.{c}: estimate {est!r} not usable (0 or missing)")
        if "cvi" in e:
            se = _log_se(comps["cvi"][1], comps["cvi"][2])
            if use == "bayes":
                spread = comps.get("cvi_spread_log_sd", (math.nan,))[0]
                spread = spread if np.isfinite(spread) else 0.0
                sd = math.sqrt(spread**2 + (se if np.isfinite(se) else 0.0) ** 2)
                note = (f"sqrt(spread^2 + se^2): spread of ln CVI across animals {spread:.3f}, se of ln median "
                        f"CVI {se:.3f} (95 % interval / 3.92)")
            else:
                sd = se
                note = (f"standard error of ln CVI from the 95 % interval (ln(upper/lower)/3.92) = {se:.3f}; "
                        "assumes one CVI shared by all animals")
            if np.isfinite(sd) and 0 <= sd <= 3:
                e["cvi_log_sd"] = (sd, note)
            else:
                skipped.append(f"{aid}.cvi_log_sd: not computable from the interval")
        if any(k in e for k in ("cvi", "cvg", "cva")):
            entries[aid] = e
    return entries, skipped


def pack_fragment(result: StudyResult) -> str | None:
    """TOML text of the pack fragment, or None when no analyte has a usable estimate."""
    entries, skipped = fragment_entries(result)
    if not entries:
        return None
    a = result.attrs
    src = f"bayesbase study of {a['source_file']} (sha256 {a['source_sha256']})"
    stem = Path(str(a["source_file"])).stem.replace(" ", "_") or "study"
    lines = [
        f"# Pack fragment estimated by `bayesbase study` {__version__} from {a['source_file']}.",
        f"# Study file SHA-256: {a['source_sha256']}",
        f"# Method: {a['method']}; seed {a['seed']}; outlier removal {'on' if a['outlier_removal'] else 'off'}.",
        "# Layer it over the built-in pack named in [pack] extends. Decision support, not a diagnosis.",
    ]
    for s in skipped:
        lines.append(f"# left out: {s}")
    lines += [
        "",
        "[pack]",
        f"id = {_toml_str(a['species'] + '+study-' + stem)}",
        f"species = {_toml_str(a['species'])}",
        f"title = {_toml_str('Biological variation estimated from ' + str(a['source_file']))}",
        f"version = {_toml_str(datetime.now(timezone.utc).strftime('%Y.%m.%d'))}",
        f"description = {_toml_str('CVI, CVG and CVA estimated from a designed study of healthy animals; every number has provenance estimated and names the study file and its SHA-256.')}",
        f"extends = {_toml_str(a['species'])}",
    ]
    for aid, e in entries.items():
        lines += ["", f"[analytes.{aid}]", f"unit = {_toml_str(e['unit'])}"]
        for c in ("cvi", "cvi_log_sd", "cvg", "cva"):
            if c in e:
                v, note = e[c]
                lines.append(f"{c} = {_cited(v, src + ': ' + ('Bayesian hierarchical model' if e['_method'] == 'bayes' else 'nested ANOVA on ln values'), note)}")
    return "\n".join(lines) + "\n"


# --------------------------------------------------------------------------- figures

def _png(fig) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=90, metadata={"Software": None})
    return base64.b64encode(buf.getvalue()).decode("ascii")


def analyte_figure(result: StudyResult, aid: str):
    """Figure of one analyte: every animal's series (left) and the CVs with intervals (right)."""
    import matplotlib
    from matplotlib.figure import Figure

    fig = Figure(figsize=(9.0, 3.4))
    ax, bx = fig.subplots(1, 2, gridspec_kw={"width_ratios": [2.2, 1]})
    s = result.series[result.series["analyte"] == aid]
    animals = list(dict.fromkeys(s["animal"]))
    cmap = matplotlib.colormaps["tab20"]
    for i, an in enumerate(animals):
        d = s[s["animal"] == an]
        col = cmap(i % 20)
        kept = d[d["kept"]]
        if len(kept):
            m = kept.groupby("specimen", sort=False).agg(days=("days", "mean"), v=("ln_value", "mean"))
            m = m.sort_values("days")
            ax.plot(m["days"], np.exp(m["v"]), "-", color=col, lw=1.0, alpha=0.9)
            ax.plot(kept["days"], kept["value"], "o", color=col, ms=3.0)
        out = d[~d["kept"]]
        if len(out):
            ax.plot(out["days"], out["value"], "x", color="#333333", ms=6, mew=1.5)
    ax.set_yscale("log")
    from matplotlib import ticker

    ax.yaxis.set_major_locator(ticker.LogLocator(subs=(1.0, 1.5, 2.0, 3.0, 5.0, 7.0)))
    ax.yaxis.set_major_formatter(ticker.FormatStrFormatter("%g"))
    ax.yaxis.set_minor_locator(ticker.NullLocator())
    unit = result.estimates.loc[result.estimates["analyte"] == aid, "unit"]
    ax.set_ylabel(f"{analyte_title(aid)} ({unit.iloc[0] if len(unit) else ''}), log axis")
    ax.set_xlabel("days since the first specimen of the study")
    ax.set_title("each animal's series (x: removed or excluded)", fontsize=9)
    t = result.table[(result.table["analyte"] == aid) & result.table["component"].isin(["cva", "cvi", "cvg"])]
    methods = list(dict.fromkeys(t["method"]))
    markers = {"anova": "o", "bayes": "s", UNCONVERGED: "s", "cv-anova": "D"}
    colours = {"anova": "#0072B2", "bayes": "#009E73", UNCONVERGED: "#999999", "cv-anova": "#E69F00"}
    for k, m in enumerate(methods):
        tm = t[t["method"] == m].set_index("component")
        for j, c in enumerate(["cva", "cvi", "cvg"]):
            if c not in tm.index or not np.isfinite(tm.at[c, "estimate"]):
                continue
            x = j + (k - (len(methods) - 1) / 2) * 0.18
            est, lo, up = (100 * tm.at[c, q] for q in ("estimate", "lower", "upper"))
            yerr = [[max(est - lo, 0)], [max(up - est, 0)]] if np.isfinite(lo) and np.isfinite(up) else None
            bx.errorbar([x], [est], yerr=yerr, fmt=markers.get(m, "o"), color=colours.get(m, "#000000"),
                        capsize=3, label=m if j == 0 or c == "cvi" else None)
    bx.set_xticks([0, 1, 2], ["CVA", "CVI", "CVG"])
    bx.set_ylabel("CV (%) with 95 % interval")
    bx.set_ylim(bottom=0)
    handles, labels = bx.get_legend_handles_labels()
    uniq = dict(zip(labels, handles))
    if uniq:
        bx.legend(uniq.values(), uniq.keys(), fontsize=7, frameon=False)
    bx.set_title("variance components", fontsize=9)
    fig.subplots_adjust(left=0.08, right=0.985, bottom=0.14, top=0.91, wspace=0.28)
    return fig


# --------------------------------------------------------------------------- html

_CSS = """
body { font-family: system-ui, sans-serif; font-size: 14px; max-width: 1100px; margin: 1em auto; color: #111; }
h1 { font-size: 1.4em; } h2 { font-size: 1.15em; margin-top: 1.6em; border-bottom: 1px solid #ccc; }
table { border-collapse: collapse; margin: 0.5em 0; font-size: 12.5px; }
th, td { border: 1px solid #ccc; padding: 2px 6px; text-align: right; }
th { background: #f2f2f2; } td.l, th.l { text-align: left; }
.cautions { border: 1.5px solid #D55E00; border-left: 6px solid #D55E00; padding: 4px 10px; margin: 8px 0; }
.warn { border-left: 6px solid #E69F00; padding: 4px 10px; background: #fff8e6; }
.mark { color: #8a3200; font-weight: bold; }
img { max-width: 100%; }
small { color: #555; }
"""


def _e(x) -> str:
    return html.escape(str(x), quote=True)


def _fmt(x, digits=1) -> str:
    if x is None or (isinstance(x, float) and not np.isfinite(x)) or x is pd.NA:
        return ""
    try:
        if pd.isna(x):
            return ""
    except (TypeError, ValueError):
        pass
    if isinstance(x, (int, np.integer)):
        return str(int(x))
    return f"{float(x):.{digits}f}"


def _cautions() -> str:
    return ('<div class="cautions" role="note"><b>Cautions</b><ul>'
            + "".join(f"<li>{_e(c)}</li>" for c in CAUTIONS)
            + "<li>Estimates describe the animals, analyser and conditions of this study; check that they fit "
              "your population before using them as priors.</li></ul></div>")


def _ii_words(ii) -> str:
    if ii is None or not np.isfinite(ii):
        return ""
    if ii < 0.6:
        return "low: population interval insensitive for one animal"
    if ii > 1.4:
        return "high: population interval useful"
    return "intermediate"


def _steps_words(result: StudyResult, aid: str) -> list[str]:
    out = []
    rem = result.removed[result.removed["analyte"] == aid]
    st = result.steps[result.steps["analyte"] == aid]
    alpha = result.attrs["alpha"]
    inp = rem[rem["step"] == 0]
    if len(inp):
        out.append(f"Input: {len(inp)} result(s) excluded before the analysis (censored or taken while unwell), "
                   "listed below.")
    names = {1: "Step 1, Cochran's C on the replicate variances (analytical outliers)",
             2: "Step 2, Cochran's C on the within-animal variances",
             3: "Step 3, Reed's criterion on the animal means"}
    for step, name in names.items():
        r = rem[rem["step"] == step]
        t = st[st["step"] == step]
        parts = []
        for x in r.itertuples(index=False):
            who = f"animal {x.animal}" + (f", specimen {x.specimen}" if x.specimen else "")
            parts.append(f"{who}: statistic {x.statistic:.3f} > critical {x.critical_value:.3f} ({x.action})")
        for x in t.itertuples(index=False):
            parts.append(f"then nothing more ({x.detail})")
        if not parts:
            parts.append("not tested (see notes)")
        out.append(f"{name} at alpha {alpha:g}: " + "; ".join(parts) + ".")
    for x in st[st["step"].isin([4, 5, 6])].itertuples(index=False):
        p = f", p = {x.p_value:.3g}" if np.isfinite(x.p_value) else ""
        out.append(f"{x.test}: statistic {x.statistic:.3g}{p}: {x.detail}." + (" (flag)" if x.flagged else ""))
    out.extend(result.notes.get(aid, []))
    return out


def _html_head(result: StudyResult) -> list[str]:
    """Page head, title, cautions, provenance line and the warnings to read first."""
    a = result.attrs
    out = ["<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
           f"<title>Biological-variation study: {_e(a['source_file'])}</title>",
           f"<style>{_CSS}</style></head><body>",
           f"<h1>Biological-variation study: {_e(a['source_file'])}</h1>", _cautions()]
    out.append("<p>Study file <b>{}</b> (SHA-256 <code>{}</code>), species {}, method {}, seed {}, outlier removal "
               "{}, bayesbase {}, written {}.</p>".format(
                   _e(a["source_file"]), _e(a["source_sha256"]), _e(a["species"]), _e(a["method"]), _e(a["seed"]),
                   "on" if a["outlier_removal"] else "off (outliers listed, kept)", _e(a["version"]), _e(a["created"])))
    if result.warnings:
        out.append("<div class='warn'><b>Read these first</b><ul>"
                   + "".join(f"<li>{_e(w)}</li>" for w in result.warnings) + "</ul></div>")
    return out


_ESTIMATE_HEADER = ["analyte", "method", "animals", "specimens", "results", "removed", "CVA %", "CVI %",
                    "CVI spread (SD ln)", "CVG %", "II (CVI/CVG)", "RCV %", "n for set point", "desirable CVA %"]


def _ci_cell(p, lo, up) -> str:
    return f"{_fmt(p)} ({_fmt(lo)}-{_fmt(up)})" if np.isfinite(p) else ""


def _estimate_row(r) -> str:
    """One row of the estimates table (``r`` a row of ``result.estimates``)."""
    mcls = " class='l mark'" if r.method == UNCONVERGED else " class='l'"
    des = DESIRABLE_CVA_FRACTION * r.cvi_pct if np.isfinite(r.cvi_pct) else math.nan
    met = "" if not (np.isfinite(des) and np.isfinite(r.cva_pct)) else (" met" if r.cva_pct <= des else " NOT met")
    return (f"<tr><td class='l'>{_e(analyte_title(r.analyte))}</td><td{mcls}>{_e(r.method)}</td>"
            f"<td>{r.n_animals}</td><td>{r.n_specimens}</td><td>{r.n_results}</td><td>{r.n_removed}</td>"
            f"<td>{_ci_cell(r.cva_pct, r.cva_lower, r.cva_upper)}</td>"
            f"<td>{_ci_cell(r.cvi_pct, r.cvi_lower, r.cvi_upper)}</td>"
            f"<td>{_fmt(r.cvi_spread_log_sd, 3)}</td><td>{_ci_cell(r.cvg_pct, r.cvg_lower, r.cvg_upper)}</td>"
            f"<td>{_fmt(r.ii, 2)} <small>{_e(_ii_words(r.ii))}</small></td><td>{_fmt(r.rcv_pct)}</td>"
            f"<td>{_e(_fmt(r.n_for_setpoint))}</td><td>{_fmt(des)}{_e(met)}</td></tr>")


def _html_estimates(result: StudyResult) -> list[str]:
    """Estimates table, predictive CVI of a new animal and the formulas behind the columns."""
    out = ["<h2>Estimates (95 % intervals)</h2>",
           "<table><tr>" + "".join(f"<th class='l'>{_e(h)}</th>" if i < 2 else f"<th>{_e(h)}</th>"
                                   for i, h in enumerate(_ESTIMATE_HEADER)) + "</tr>"]
    out += [_estimate_row(r) for r in result.estimates.itertuples(index=False)]
    out.append("</table>")
    newa = result.table[(result.table["component"] == "cvi_new_animal") & result.table["estimate"].notna()]
    if len(newa):
        out.append("<p>Predictive CVI of a new animal (Bayesian): " + "; ".join(
            f"{_e(r.analyte)} {100 * r.estimate:.1f} % ({100 * r.lower:.1f}-{100 * r.upper:.1f} %)"
            for r in newa.itertuples(index=False)) + ".</p>")
    out.append("<p><small>CV = sqrt(exp(s<sup>2</sup>) - 1) of the log-scale variance s<sup>2</sup>. II = CVI/CVG "
               "(Harris orientation; &lt; 0.6 low, &gt; 1.4 high, Fraser &amp; Harris 1989). RCV = sqrt(2) x 1.96 x "
               "sqrt(CVA<sup>2</sup> + CVI<sup>2</sup>) (Fraser 2012). n for set point: results for the set point "
               "within +/-10 % (Fraser &amp; Harris 1989). Desirable CVA &lt;= 0.5 CVI (common practice).</small></p>")
    return out


def _html_steps(result: StudyResult) -> list[str]:
    """The outlier and check steps of each analyte, in the order applied."""
    out = ["<h2>Steps, in the order applied</h2>"]
    for aid in result.notes:
        out.append(f"<h3>{_e(analyte_title(aid))}</h3><ol>"
                   + "".join(f"<li>{_e(s)}</li>" for s in _steps_words(result, aid)) + "</ol>")
    return out


_REMOVED_COLS = ["analyte", "step", "test", "level", "animal", "specimen", "n_results", "statistic",
                 "critical_value", "action", "reason"]


def _html_removed(result: StudyResult) -> list[str]:
    """Table of removed or flagged results and the animals flagged by the steady-state check."""
    out = ["<h2>Removed or flagged results</h2>"]
    if len(result.removed):
        out.append("<table><tr>" + "".join(f"<th class='l'>{_e(c)}</th>" for c in _REMOVED_COLS) + "</tr>")
        for r in result.removed[_REMOVED_COLS].itertuples(index=False):
            cells = [f"<td class='l'>{_fmt(v, 3) if isinstance(v, float) else _e(v)}</td>" for v in r]
            out.append("<tr>" + "".join(cells) + "</tr>")
        out.append("</table>")
    else:
        out.append("<p>Nothing was removed: no input exclusion and no outlier found.</p>")
    if len(result.slopes):
        fl = result.slopes[result.slopes["flagged"]]
        if len(fl):
            out.append("<p>Animals with a slope different from 0 (steady-state check, flagged, kept): "
                       + "; ".join(f"{_e(r.analyte)} {_e(r.animal)} {r.pct_per_week:+.2f} %/week (p {r.p_value:.3g})"
                                   for r in fl.itertuples(index=False)) + ".</p>")
    return out


def _html_figures(result: StudyResult) -> list[str]:
    """One embedded PNG figure per analyte with a series."""
    out = ["<h2>Figures</h2>"]
    for aid in result.notes:
        if not len(result.series) or not (result.series["analyte"] == aid).any():
            continue
        fig = analyte_figure(result, aid)
        out.append(f"<h3>{_e(analyte_title(aid))}</h3><img alt='{_e(aid)}: series and variance components' "
                   f"src='data:image/png;base64,{_png(fig)}'>")
    return out


def _html_methods(result: StudyResult) -> list[str]:
    """Methods with their sources, and the priors of the Bayesian model when it was fitted."""
    out = ["<h2>Methods and sources</h2><ul>"
           "<li>Outlier steps in the published order (Fraser CG, Harris EK. Crit Rev Clin Lab Sci 1989;27:409; "
           "Roraas T et al. Clin Chem 2012;58:1306): Cochran's C on replicate variances, Cochran's C on "
           "within-animal variances, Reed's criterion on animal means (Reed AH et al. Clin Chem 1971;17:275). "
           "Cochran's critical value 1/(1 + (k-1)/F), F the upper alpha/k point of F(n-1, (n-1)(k-1)).</li>"
           "<li>Homogeneity: Bartlett's and Levene's (median) tests; normality: Shapiro-Wilk; steady state: "
           "least-squares slope of each animal's ln values on time and a t test of the slopes.</li>"
           "<li>Nested random-effects ANOVA on ln values (method of moments, unbalanced coefficients); "
           "intervals: chi-square for CVA, modified large-sample (Burdick RK, Graybill FA. Confidence Intervals "
           "on Variance Components. Dekker 1992) for CVI and CVG, Satterthwaite degrees of freedom for the "
           "unbalanced animal level.</li>"
           "<li>CV-ANOVA (optional): Roraas T et al. Clin Chem 2016;62:725.</li>"
           "<li>Bayesian model (optional): animal-specific CVI log-normal across animals (Roraas T et al. Clin "
           "Chem 2019, doi 10.1373/clinchem.2018.300145).</li></ul>"]
    pri = {aid: getattr(f, "priors", None) or {} for aid, f in result.bayes.items() if f is not None}
    if pri:
        out.append("<h3>Priors of the Bayesian model (weakly informative, stated per analyte)</h3>")
        for aid, p in pri.items():
            out.append(f"<p><b>{_e(analyte_title(aid))}</b></p><ul>"
                       + "".join(f"<li>{_e(k)}: {_e(v)}</li>" for k, v in p.items()) + "</ul>")
    return out


def study_html(result: StudyResult, figures: bool = True) -> str:
    """Self-contained HTML report of a study (figures as base64 PNG, cautions at top and bottom):
    head and provenance, estimates, steps, removed results, figures, methods, cautions again."""
    out = _html_head(result) + _html_estimates(result) + _html_steps(result) + _html_removed(result)
    if figures:
        out += _html_figures(result)
    out += _html_methods(result)
    out += [_cautions(), "</body></html>"]
    return "\n".join(out)


# --------------------------------------------------------------------------- files

def write_outputs(result: StudyResult, out_dir, figures: bool = True) -> dict[str, Path]:
    """Write estimates.csv, removed.csv, steps.csv, study.html and (when any analyte has a usable
    estimate) pack.toml into ``out_dir``; returns {name: path}. Files appear only when all of
    them were written."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    contents: dict[str, str] = {
        "estimates.csv": result.estimates.to_csv(index=False, float_format="%.6g"),
        "removed.csv": result.removed.to_csv(index=False, float_format="%.6g"),
        "steps.csv": result.steps.to_csv(index=False, float_format="%.6g"),
        "study.html": study_html(result, figures=figures),
    }
    frag = pack_fragment(result)
    if frag is not None:
        contents["pack.toml"] = frag
    tmp = Path(tempfile.mkdtemp(prefix=".study-", dir=out))
    try:
        for name, text in contents.items():
            (tmp / name).write_text(text, encoding="utf-8")
        paths = {}
        for name in contents:
            os.replace(tmp / name, out / name)
            paths[name] = out / name
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    if frag is None and (out / "pack.toml").exists():
        (out / "pack.toml").unlink()  # a stale fragment from an earlier run would mislead
    return paths

