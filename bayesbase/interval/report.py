"""Self-contained HTML of a reference-interval estimate (``interval.html``); matplotlib lives here.

Per analyte and group: a histogram of the reference values with the limits (solid lines) and
their 90 % confidence bands (shaded), flagged outliers as marks under the axis, and a normal
Q-Q plot of the values on the scale the method used; the steps in words; every warning; the
outliers; the partition tests; provenance and references. Figures are PNG embedded as base64;
every user-supplied string is escaped; nothing is fetched over the network. Colours: Okabe-Ito
(Okabe M & Ito K, "Color Universal Design", 2008; common practice in scientific figures).
"""
from __future__ import annotations

import base64
import html
import io
import math

import numpy as np
from matplotlib.figure import Figure
from scipy import stats as _st

from .. import __version__
from ..constants import CAUTIONS
from . import stats as S

__all__ = ["interval_html", "figure_for"]

_BLUE, _VERMILLION, _GREY, _SKY = "#0072B2", "#D55E00", "#5A5A5A", "#56B4E9"

REFERENCES = (
    "Friedrichs KR, Harr KE, Freeman KP, Szladovits B, Walton RM, Barnhart KF, Blanco-Chavez J. ASVCP "
    "reference interval guidelines: determination of de novo reference intervals in veterinary species and "
    "other related topics. Vet Clin Pathol 2012;41:441-453.",
    "CLSI EP28-A3c. Defining, Establishing, and Verifying Reference Intervals in the Clinical Laboratory; "
    "Approved Guideline, 3rd ed. Wayne PA: CLSI; 2008.",
    "Horn PS, Pesce AJ, Copeland BE. A robust approach to reference interval estimation and evaluation. "
    "Clin Chem 1998;44:622-631.",
    "Horn PS, Feng L, Li Y, Pesce AJ. Effect of outliers and nonhealthy individuals on reference interval "
    "estimation. Clin Chem 2001;47:2137-2145.",
    "Reed AH, Henry RJ, Mason WB. Influence of statistical method used on the resulting estimate of normal "
    "range. Clin Chem 1971;17:275-284.",
    "Harris EK, Boyd JC. On dividing reference data into subgroups to produce separate reference ranges. "
    "Clin Chem 1990;36:265-270.",
    "Lahti A, Hyltoft Petersen P, Boyd JC, Fraser CG, Jorgensen N. Objective criteria for partitioning "
    "Gaussian-distributed reference values into subgroups. Clin Chem 2002;48:338-352.",
    "Box GEP, Cox DR. An analysis of transformations. J R Stat Soc B 1964;26:211-252.",
    "Tukey JW. Exploratory Data Analysis. Addison-Wesley; 1977.",
)

STEPS = (
    "Input: one healthy specimen per animal. Specimens recorded as unwell and censored results are left out; "
    "analytical replicates are combined by their geometric mean; when an animal has several specimens the "
    "first is kept. The notes below list what was left out.",
    "Outliers: the values are Box-Cox transformed (lambda by maximum likelihood, fitted without the gross "
    "outliers of a first pass on the log scale so that an extreme value cannot hide itself). Listed: values "
    "beyond Tukey's inner fences (1.5 interquartile ranges beyond the quartiles; Horn et al. 2001) and extreme "
    "values whose gap to the next value exceeds one third of the range (Dixon's ratio with Reed's rule; CLSI "
    "EP28-A3c). Excluded, unless outliers were kept on request: the Dixon/Reed outliers and values beyond the "
    "outer fences (3 interquartile ranges); values beyond the inner fences only are kept as suspect. Review "
    "each: a statistical outlier from a healthy animal may be a real value, and a real outlier means the animal "
    "may not be a suitable reference individual.",
    "Method by sample size (ASVCP 2012; CLSI EP28-A3c): 120 values or more - nonparametric 2.5th and 97.5th "
    "percentiles at ranks p(n + 1), each with a 90 % confidence interval bounded by order statistics chosen "
    "from the binomial distribution; 40-119 values - Box-Cox transformation, then a parametric interval "
    "(mean +/- 1.96 SD) when the transformed values pass the Anderson-Darling normality test at 5 %, "
    "otherwise the Horn-Pesce robust (biweight) interval, with 90 % confidence intervals from a seeded "
    "bootstrap; 20-39 values - the same, with a warning; fewer than 20 - no interval.",
    "Partitions (when asked): each group is screened for outliers on its own; Harris & Boyd's test compares "
    "every pair of groups with 20 or more values on a common Box-Cox scale (z against z* = 3 sqrt((n1 + n2)"
    "/240), held at 3 or more for groups under 120 as a choice of this software, and the SD ratio "
    "against 1.5); Lahti's percentage of each group outside the combined limits is "
    "shown beside it. When a pair differs, every group gets its own interval.",
    "Precision: the width of each limit's 90 % confidence interval divided by the width of the interval; "
    "the guideline asks for more reference animals when it exceeds 0.2.",
    "CVG: the between-animal CV implied by the interval, sG^2 = (ln(upper/lower)/3.92)^2 - sI^2 - sA^2 with "
    "the within-animal (CVI) and analytical (CVA) variation of the species' pack; left empty when negative.",
)


def _e(x) -> str:
    return html.escape("" if x is None else str(x), quote=True)


def _fmt(x, sig: int = 4) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return ""
    return f"{x:.{sig}g}"


def _png(fig: Figure) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=90)
    return base64.b64encode(buf.getvalue()).decode("ascii")


def figure_for(fit) -> Figure:
    """Histogram with limits and CI bands (+ normal Q-Q plot when there is an interval)."""
    has_qq = fit.method != "none" and fit.n >= 3
    fig = Figure(figsize=(8.0 if has_qq else 5.0, 2.7))
    axes = fig.subplots(1, 2 if has_qq else 1, gridspec_kw={"width_ratios": [1.6, 1]} if has_qq else None)
    ax = axes[0] if has_qq else axes
    used = fit.used
    out = fit.values[fit.excluded]
    vals = fit.values
    bins = int(min(30, max(6, round(math.sqrt(max(vals.size, 1)) * 1.5))))
    if used.size:
        ax.hist(used, bins=bins, color=_SKY, edgecolor="white", linewidth=0.5)
    for side, lim, ci in (("lower", fit.lower, fit.lower_ci), ("upper", fit.upper, fit.upper_ci)):
        if math.isfinite(ci[0]) and math.isfinite(ci[1]):
            ax.axvspan(ci[0], ci[1], color=_BLUE, alpha=0.18, linewidth=0)
        if math.isfinite(lim):
            ax.axvline(lim, color=_BLUE, linewidth=1.6)
    if out.size:
        ax.plot(out, np.zeros_like(out), linestyle="none", marker="x", color=_VERMILLION, markersize=7,
                clip_on=False, label="excluded outlier")
        ax.legend(fontsize=7, frameon=False, loc="upper right")
    ax.set_xlabel(f"{fit.analyte} ({fit.unit})", fontsize=8)
    ax.set_ylabel("animals", fontsize=8)
    ax.tick_params(labelsize=7)
    ax.set_title(f"{fit.group}: {fit.method}, n = {fit.n}", fontsize=8)
    for s in ("top", "right"):
        ax.spines[s].set_visible(False)
    if has_qq:
        qa = axes[1]
        v = np.sort(used)
        if fit.method == "nonparametric" or not math.isfinite(fit.lam):
            y, label = np.log(v), "ln(value)"
        else:
            y, label = np.sort(S.boxcox(v / math.exp(np.log(v).mean()), fit.lam)), f"Box-Cox (lambda {fit.lam:.2g})"
        n = y.size
        q = _st.norm.ppf((np.arange(1, n + 1) - 0.375) / (n + 0.25))  # Blom plotting positions
        qa.plot(q, y, linestyle="none", marker="o", markersize=2.5, color=_BLUE)
        sd = y.std(ddof=1)
        if sd > 0:
            qa.plot(q, y.mean() + sd * q, color=_GREY, linewidth=0.8)
        qa.set_xlabel("normal quantile", fontsize=8)
        qa.set_ylabel(label, fontsize=8)
        qa.tick_params(labelsize=7)
        qa.set_title("normal Q-Q plot", fontsize=8)
        for s in ("top", "right"):
            qa.spines[s].set_visible(False)
    # fixed margins (no tight layout: one draw per figure keeps the report fast)
    fig.subplots_adjust(left=0.09 if has_qq else 0.13, right=0.98, bottom=0.19, top=0.88, wspace=0.32)
    return fig


_CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", Arial, sans-serif; margin: 1.5em auto; max-width: 1100px;
       color: #111; line-height: 1.35; font-size: 10pt; padding: 0 1em; }
h1 { font-size: 15pt; margin-bottom: 0.2em; } h2 { font-size: 12pt; margin-top: 1.6em; border-bottom: 1px solid #ccc; }
h3 { font-size: 10.5pt; margin: 1.2em 0 0.3em; }
.cautions { border: 1px solid #D55E00; background: #fff5ee; padding: 0.4em 1em; margin: 0.6em 0; }
table { border-collapse: collapse; margin: 0.4em 0; font-size: 9pt; }
th, td { border-bottom: 1px solid #ddd; padding: 2px 6px; text-align: right; vertical-align: top; }
th { background: #f3f3f3; } td.l, th.l { text-align: left; }
.warn { color: #8a3b00; } .flag { background: #fff0e0; } .muted { color: #555; }
img { max-width: 100%; } ol.refs { font-size: 8.5pt; color: #333; } code { font-size: 9pt; }
"""


def _cautions() -> str:
    return ('<div class="cautions" role="note"><b>Cautions</b><ul>'
            + "".join(f"<li>{_e(c)}</li>" for c in CAUTIONS)
            + "<li>A reference interval describes healthy animals like the ones sampled, measured on the same "
              "analyser and method; about 1 healthy animal in 20 falls outside it.</li></ul></div>")


def interval_html(result) -> str:
    """The HTML page of an :class:`~bayesbase.interval.core.IntervalResult`."""
    a = result.attrs
    t = result.table
    title = f"Population reference intervals: {a['source_file']}"
    out = ['<!DOCTYPE html><html lang="en"><head><meta charset="utf-8">',
           '<meta name="viewport" content="width=device-width, initial-scale=1">',
           f"<title>{_e(title)}</title><style>{_CSS}</style></head><body>", _cautions(),
           f"<h1>{_e(title)}</h1>",
           f"<p class='muted'>Species {_e(a['species'])}; method {_e(a['method'])}"
           + (f"; partition by {_e(a['partition'])}" if a["partition"] else "")
           + f"; outliers {'kept' if a['keep_outliers'] else 'excluded when flagged'}; "
             f"sample file SHA-256 <code>{_e(a['source_sha256'])}</code></p>"]
    # summary
    out.append("<h2>Intervals</h2><table><thead><tr>")
    heads = ["analyte", "group", "n", "outliers excluded", "method", "lower (90 % CI)", "upper (90 % CI)",
             "CI / width", "centre", "unit", "CVG %"]
    out.append("".join(f"<th class='{'l' if h in ('analyte', 'group', 'method', 'unit') else ''}'>{_e(h)}</th>"
                       for h in heads))
    out.append("</tr></thead><tbody>")
    for r in t.itertuples(index=False):
        flag = math.isfinite(r.ci_ratio) and r.ci_ratio > S.CI_RATIO_FLAG
        lo = f"{_fmt(r.lower)} ({_fmt(r.lower_ci_low)}-{_fmt(r.lower_ci_high)})" if math.isfinite(r.lower) else "-"
        up = f"{_fmt(r.upper)} ({_fmt(r.upper_ci_low)}-{_fmt(r.upper_ci_high)})" if math.isfinite(r.upper) else "-"
        out.append(
            f"<tr><td class='l'>{_e(r.analyte)}</td><td class='l'>{_e(r.group)}</td><td>{r.n}</td>"
            f"<td>{r.n_outliers}</td><td class='l'>{_e(r.method)}</td><td>{_e(lo)}</td><td>{_e(up)}</td>"
            f"<td class='{'flag' if flag else ''}'>{_e(_fmt(r.ci_ratio, 2))}{' &gt; 0.2' if flag else ''}</td>"
            f"<td>{_e(_fmt(r.center))}</td><td class='l'>{_e(r.unit)}</td><td>{_e(_fmt(r.cvg_pct, 3))}</td></tr>")
    out.append("</tbody></table>")
    if result.notes:
        out.append("<h3>Input notes</h3><ul>" + "".join(f"<li>{_e(x)}</li>" for x in result.notes) + "</ul>")
    out.append("<h2>Steps</h2><ol>" + "".join(f"<li>{_e(s)}</li>" for s in STEPS) + "</ol>")
    # per analyte/group
    out.append("<h2>Analytes</h2>")
    det = {(d.analyte, d.group): d for d in result.details.itertuples(index=False)}
    for (analyte, group), f in result.fits.items():
        d = det[(analyte, group)]
        out.append(f"<h3>{_e(analyte)} - {_e(group)}</h3>")
        alt = f"{analyte} {group}: histogram with limits and 90 % CI bands"
        alt += ", normal Q-Q plot" if f.method != "none" else ""
        out.append(f'<img alt="{_e(alt)}" src="data:image/png;base64,{_png(figure_for(f))}">')
        out.append(f"<p>{_e(d.reason)}</p>")
        if f.method == "none" and f.values.size:
            out.append(f"<p class='muted'>Values: n = {f.values.size}, minimum {_e(_fmt(f.values.min()))}, median "
                       f"{_e(_fmt(float(np.median(f.values))))}, maximum {_e(_fmt(f.values.max()))} {_e(f.unit)}.</p>")
        if d.warnings:
            out.append("<ul class='warn'>" + "".join(f"<li>{_e(w)}</li>" for w in d.warnings.split(" | ")) + "</ul>")
        if d.cvg_note:
            out.append(f"<p class='muted'>{_e(d.cvg_note)}</p>")
    if len(result.outliers):
        out.append("<h2>Flagged outliers</h2><table><thead><tr>")
        cols = ["analyte", "group", "patient", "specimen", "value", "unit", "side", "flagged_by", "action"]
        out.append("".join(f"<th class='l'>{_e(c)}</th>" for c in cols) + "</tr></thead><tbody>")
        for r in result.outliers.itertuples(index=False):
            out.append("<tr>" + "".join(f"<td class='l'>{_e(_fmt(getattr(r, c)) if c == 'value' else getattr(r, c))}</td>"
                                         for c in cols) + "</tr>")
        out.append("</tbody></table>")
    if len(result.partitions):
        out.append("<h2>Partition tests</h2><table><thead><tr>")
        cols = ["analyte", "group_a", "group_b", "n_a", "n_b", "z", "z_crit", "sd_ratio", "pct_outside_a",
                "pct_outside_b", "separate"]
        out.append("".join(f"<th class='l'>{_e(c)}</th>" for c in cols) + "</tr></thead><tbody>")
        for r in result.partitions.itertuples(index=False):
            cells = []
            for c in cols:
                v = getattr(r, c)
                cells.append(_fmt(v, 3) if isinstance(v, float) else v)
            out.append("<tr>" + "".join(f"<td class='l'>{_e(c)}</td>" for c in cells) + "</tr>")
        out.append("</tbody></table><p class='muted'>pct_outside: Lahti's percentage of the group beyond the "
                   "combined limits on its worse side (above 4.1 % suggests separate intervals, below 3.2 % a "
                   "common one; Lahti et al. 2002).</p>")
    # provenance
    out.append("<h2>Method and provenance</h2><table><tbody>")
    prov = [("software", f"bayesbase {__version__}"), ("sample file", a["source_file"]),
            ("sample SHA-256", a["source_sha256"]), ("species", a["species"]),
            ("pack for CVI/CVA", f"{a['pack_id']} (sha256 {a['pack_sha256']})" if a["pack_id"] else "none"),
            ("method", a["method"]), ("partition", a["partition"] or "none"),
            ("outliers", "kept" if a["keep_outliers"] else "excluded when flagged"),
            ("bootstrap", f"{a['n_boot']:,} resamples, seed {a['seed']}"),
            ("confidence level of the limits", "90 %"), ("reference coverage", "central 95 %")]
    for k, v in prov:
        out.append(f"<tr><th class='l'>{_e(k)}</th><td class='l'>{_e(v)}</td></tr>")
    out.append("</tbody></table>")
    if result.pack_info:
        out.append("<p class='muted'>CVI and CVA subtracted to derive CVG, with their sources in the pack:</p><ul>")
        for an, info in result.pack_info.items():
            out.append(f"<li class='muted'>{_e(an)}: CVI {_e(_fmt(100 * info['cvi'], 3))} % ({_e(info['cvi_source'])}); "
                       f"CVA {_e(_fmt(100 * info['cva'], 3))} % ({_e(info['cva_source'])})</li>")
        out.append("</ul>")
    out.append("<h2>References</h2><ol class='refs'>" + "".join(f"<li>{_e(r)}</li>" for r in REFERENCES) + "</ol>")
    out.append(_cautions())
    out.append("</body></html>")
    return "\n".join(out)
