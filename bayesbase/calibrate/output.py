"""Files of a calibration: ``pack.toml`` (a pack fragment), ``calibration.csv``, ``idata.nc``,
``calibration.html`` and ``cvi_prior_posterior.png``.

The fragment layers over the pack the priors came from (``[pack] extends``). Per analyte it
sets ``center``, ``cvg``, ``cvi``, ``cvi_log_sd`` (the predictive SD of ln CVI of a new animal,
:func:`bayesbase.calibrate.job.predictive_log_sd`), ``cva`` when replicates taught it, and the
breed centres of every recorded breed; each a cited number with provenance ``"calibrated"``
whose source names the store or file and its SHA-256 and whose note gives the 95 % credible
interval, the animals and specimens it rests on, the date and the pack's own value (the prior).
Method biases go into ``[analytes.<id>.method_biases]``: per non-reference method, ``log_bias`` and
``log_sd`` (posterior mean and SD of the natural-log bias against the reference method, from the
draws of ``method_log_bias``; a calibration without draws, e.g. one built by hand, gives ln(1 +
median) and the 95 % interval's log width / 3.92) and ``reference`` (the analyte's reference
method), with the same source, provenance "calibrated" and a note with the fraction's 95 % credible
interval, the animals and specimens of that method and the date. ``bayesbase assess`` uses them
for a method change (:mod:`bayesbase.assessment.cases`). No biases are written for an analyte whose
reference method is not stated, and no bias for results without a method.

The optional age term (analytes the pack marks ``age_dependent``) is not a pack key: its slope
(``age_slope`` rows of calibration.csv: fraction per year of age, from the analyte's reference
age) is reported in calibration.html, with the reference age and the number of animals without a
birth date (read at the reference age, x = 0), and kept in idata.nc (``age_log_slope``,
``age_slope``).

calibration.html names, beside the sampler settings, the form the fit used for the location
parameters (:data:`LOCATION_WORDS`, read from the posterior's ``locations`` attr; ``--locations``).
calibration.csv's columns and the fragment's citations are unchanged by it; idata.nc keeps the attr.

Never silent: a fit that failed a convergence check writes no fragment unless ``force=True``,
and a forced fragment says so in its header and description. The fragment is checked by the
pack schema (``bayesbase.priors.load_pack``) before it is put in place; a fragment the schema
refuses is not written (the error lists the problems).
"""
from __future__ import annotations

import base64
import html
import io
import json
import math
import os
from pathlib import Path

import numpy as np

from .. import __version__
from ..constants import CAUTIONS
from ..errors import PackError
from .core import UNKNOWN_BREED, UNSTATED_METHOD
from .job import Calibration

__all__ = ["PROVENANCE", "LOCATION_WORDS", "fragment_toml", "write_outputs", "cvi_figure", "calibration_html"]

PROVENANCE = "calibrated"


def _s(text) -> str:
    """A TOML basic string (JSON string escapes are valid TOML escapes)."""
    return json.dumps(str(text), ensure_ascii=False)


def _num(x: float) -> str:
    return repr(float(f"{x:.6g}"))


def _breed_key(breed: str) -> str:
    from ..priors.schema import breed_key

    key = breed_key(breed)
    return key if key.replace("_", "a").isalnum() and key.isascii() else _s(key)


def _source(cal: Calibration) -> str:
    a = cal.attrs
    what = {"store": "results store", "file": "results file", "frame": "results frame"}[a["source_kind"]]
    return (f"{what} {a['source_label']} (sha256 {a['source_sha256']}); bayesbase {__version__} calibrate, "
            f"{a['sampler']} NUTS, seed {a['seed']}, {a['date']}")


def _cited(value: float, source: str, note: str) -> str:
    return f"{{ value = {_num(value)}, source = {_s(source)}, provenance = {_s(PROVENANCE)}, note = {_s(note)} }}"


def _note(r, pack, field: str, what: str) -> str:
    prior = pack.cited.get(r.analyte, {}).get(field)
    was = (f"prior: pack {pack.id} value {r.prior_value:.4g}"
           + (f" ({prior.provenance}: {prior.source[:120]})" if prior is not None else ""))
    ci = "" if not np.isfinite(r.lower) else f", 95 % CrI {r.lower:.4g} to {r.upper:.4g}"
    return f"{what}{ci}; {r.n_animals} animals, {r.n_specimens} specimens; {was}"


def method_log_bias(cal: Calibration, analyte: str, method: str, row) -> tuple[float, float, str]:
    """(estimate, SD, how they were found) of the natural-log bias of ``method`` against the
    analyte's reference method (module docstring; ``row``: its row of the summary table)."""
    post = getattr(cal.idata, "posterior", None)
    pairs = list(getattr(cal.data, "bias_pairs", []))
    if post is not None and "method_log_bias" in post and (analyte, method) in pairs:
        v = np.asarray(post["method_log_bias"].values)
        d = v.reshape((-1,) + v.shape[2:])[:, pairs.index((analyte, method))]
        return float(np.mean(d)), float(np.std(d, ddof=1)), "posterior mean and SD of the draws of method_log_bias"
    return (math.log1p(row.estimate), (math.log1p(row.upper) - math.log1p(row.lower)) / 3.92,
            "ln(1 + posterior median), SD = log width of the 95 % CrI / 3.92 (no draws kept)")


def _method_bias_lines(cal: Calibration, analyte: str, src: str) -> list[str]:
    from .model import METHOD_SD_PRIOR_TEXT

    t = cal.table[(cal.table["analyte"] == analyte) & (cal.table["parameter"] == "method_bias")]
    ref = cal.data.reference[analyte]
    rows = [r for r in t.itertuples() if r.group not in (ref, UNSTATED_METHOD)]
    if ref == UNSTATED_METHOD or not rows:
        return []
    lines = ["", f"[analytes.{analyte}.method_biases]"]
    for r in rows:
        b, sd, how = method_log_bias(cal, analyte, r.group, r)
        if not (np.isfinite(b) and np.isfinite(sd) and sd > 0):
            continue
        note = (f"natural-log bias against {ref}: {how}; as a fraction, posterior median {r.estimate:+.4g}, "
                f"95 % CrI {r.lower:+.4g} to {r.upper:+.4g}; {r.n_animals} animals, {r.n_specimens} specimens "
                f"on this method; {cal.attrs['date']}; prior: Normal(0, method SD), method SD ~ "
                f"{METHOD_SD_PRIOR_TEXT} (calibration model)")
        lines.append(f"{_s(r.group)} = {{ log_bias = {_num(b)}, log_sd = {_num(sd)}, reference = {_s(ref)}, "
                     f"source = {_s(src)}, provenance = {_s(PROVENANCE)}, note = {_s(note)} }}")
    return lines if len(lines) > 2 else []


def _analyte_lines(cal: Calibration, pack, analyte: str, src: str) -> list[str]:
    t = cal.table[cal.table["analyte"] == analyte]
    one = {p: r for p, r in zip(t["parameter"], t.itertuples()) if p not in ("breed_center", "method_bias")}
    lines = ["", f"[analytes.{analyte}]", f"unit = {_s(pack.analytes[analyte].unit)}"]
    at = cal.attrs.get("age_reference_years", {}).get(analyte)  # the age term's reference age, if any
    age_words = "" if at is None else f", at age {at:.2f} years (age term: see calibration.html)"
    lines.append(f"center = {_cited(one['center'].estimate, src, _note(one['center'], pack, 'center', 'posterior median of exp(mu), the centre of the breeds on the reference method ' + cal.data.reference[analyte] + age_words))}")
    lines.append(f"cvg = {_cited(one['cvg'].estimate, src, _note(one['cvg'], pack, 'cvg', 'posterior median; between animals within a breed'))}")
    lines.append(f"cvi = {_cited(one['cvi'].estimate, src, _note(one['cvi'], pack, 'cvi', 'posterior median of the median animal CVI'))}")
    pred = cal.attrs["cvi_predictive_log_sd"][analyte]
    r = one["cvi_log_sd"]
    what = (f"predictive SD of ln CVI of a new animal, sqrt(E[s^2] + Var[ln CVI median]); the spread across "
            f"animals s has posterior median {r.estimate:.3g}")
    lines.append(f"cvi_log_sd = {_cited(pred, src, _note(r, pack, 'cvi_log_sd', what))}")
    if one["cva"].group == "":
        lines.append(f"cva = {_cited(one['cva'].estimate, src, _note(one['cva'], pack, 'cva', 'posterior median from replicates'))}")
    breeds = t[(t["parameter"] == "breed_center") & (t["group"] != UNKNOWN_BREED)]
    if len(breeds):
        lines += ["", f"[analytes.{analyte}.breed_centers]"]
        for b in breeds.itertuples():
            lines.append(f"{_breed_key(b.group)} = {_cited(b.estimate, src, _note(b, pack, 'breed_centers.' + _breed_key(b.group), 'posterior median of exp(mu + breed offset), partial pooling'))}")
    return lines + _method_bias_lines(cal, analyte, src)


def fragment_toml(cal: Calibration, pack=None) -> str:
    """TOML text of the pack fragment of a calibration (module docstring)."""
    from ..priors import load_pack

    a = cal.attrs
    pack = pack or load_pack(a["pack_ref"])
    sha = a["source_sha256"]
    src = _source(cal)
    state = "" if a["converged"] else (" NOT CONVERGED: written only because the user forced it; do not use "
                                       "it for animals' care.")
    desc = (f"Population centres, CVG, CVI, breed centres and method biases calibrated by bayesbase calibrate on {a['n_animals']} "
            f"animals and {a['n_specimens']} usable specimens ({a['n_results']} results) of {a['source_label']} (sha256 {sha}), {a['date']}; "
            f"priors from pack '{a['pack_id']}' (sha256 {a['pack_sha256']}), widened. Every number has provenance "
            f"calibrated.{state}")
    lines = ["# bayesbase pack fragment: calibrated on a results store by `bayesbase calibrate`.",
             "# Every number has provenance \"calibrated\"; its source names the store or file and its SHA-256.",
             "# " + " ".join(CAUTIONS),
             "# It describes the animals, analysers and conditions of this store; layer it over the species' pack.",
             "# method_biases: per method, log_bias = posterior mean of the natural-log bias against the analyte's",
             "# reference method (a result of that method reads exp(log_bias) times the reference's) and log_sd = its",
             "# posterior SD; bayesbase assess corrects a method change with them (calibration.csv has the fractions)."]
    if not a["converged"]:
        lines.insert(0, "# WARNING: THE FIT DID NOT CONVERGE. This fragment was forced; do not use it for care.")
    # a forced fragment says so in its id and title, which every assessment, table and report
    # made with it prints (never silent)
    mark = "" if a["converged"] else "-not-converged"
    title = ("" if a["converged"] else "NOT CONVERGED (forced), not for care: ") + "Calibrated on "
    lines += ["", "[pack]", f"id = {_s(a['species'] + '+calibrated-' + sha[:8] + mark)}", f"species = {_s(a['species'])}",
              f"title = {_s(title + Path(a['source_label']).name)}",
              f"version = {_s(__version__ + '+' + sha[:8])}", f"description = {_s(desc)}",
              f"extends = {_s(a['pack_ref'])}"]
    for analyte in a["analytes"]:
        lines += _analyte_lines(cal, pack, analyte, src)
    return "\n".join(lines) + "\n"


# --------------------------------------------------------------------------- figure
def cvi_figure(cal: Calibration):
    """Prior (the pack's value, widened) and posterior of the median animal's CVI, per analyte."""
    from matplotlib.figure import Figure
    from scipy import stats

    analytes = cal.attrs["analytes"]
    fig = Figure(figsize=(3.2 * len(analytes) + 0.4, 2.8))
    axes = np.atleast_1d(fig.subplots(1, len(analytes)))
    post = cal.idata.posterior["cvi"]
    from .model import prior_values

    from ..priors import load_pack

    pri = prior_values(load_pack(cal.attrs["pack_ref"]), analytes)
    for i, (ax, a) in enumerate(zip(axes, analytes)):
        x = 100 * np.ravel(post.sel(analyte=a).values)
        grid = np.linspace(max(0.2 * x.min(), 1e-3), 2.0 * x.max(), 300)
        dens = stats.lognorm.pdf(grid / 100, s=pri["ln_cvi_sd"][i], scale=np.exp(pri["ln_cvi"][i])) / 100
        ax.hist(x, bins=40, density=True, color="#0072B2", alpha=0.6, label="posterior")
        ax.plot(grid, dens, color="#D55E00", lw=1.5, label="prior (pack, widened)")
        ax.set_xlabel(f"CVI of the median animal (%), {a}")
        ax.set_yticks([])
        ax.legend(fontsize=7, frameon=False)
    fig.subplots_adjust(left=0.04, right=0.98, bottom=0.18, top=0.95, wspace=0.15)
    return fig


def _png_bytes(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=90, metadata={"Software": None})
    return buf.getvalue()


# --------------------------------------------------------------------------- html
_CSS = """body { font-family: system-ui, sans-serif; font-size: 14px; max-width: 1100px; margin: 1em auto; }
table { border-collapse: collapse; font-size: 12.5px; } th, td { border: 1px solid #ccc; padding: 2px 6px; }
td { text-align: right; } td.l { text-align: left; } th { background: #f2f2f2; }
.cautions { border: 1.5px solid #D55E00; border-left: 6px solid #D55E00; padding: 4px 10px; }
.warn { border-left: 6px solid #D55E00; padding: 4px 10px; background: #fff0e6; font-weight: bold; }"""


def _e(x) -> str:
    return html.escape(str(x), quote=True)


def _f(x) -> str:
    return "" if x is None or (isinstance(x, float) and not math.isfinite(x)) else f"{x:.4g}"


def _table_html(cal: Calibration) -> str:
    head = "".join(f"<th>{_e(c)}</th>" for c in cal.table.columns)
    body = []
    for r in cal.table.itertuples(index=False):
        cells = [f'<td class="l">{_e(r.analyte)}</td>', f'<td class="l">{_e(r.parameter)}</td>',
                 f'<td class="l">{_e(r.group)}</td>'] + [f"<td>{_f(v)}</td>" for v in
                                                          (r.prior_value, r.estimate, r.lower, r.upper)]
        cells += [f"<td>{r.n_animals}</td>", f"<td>{r.n_specimens}</td>"]
        body.append("<tr>" + "".join(cells) + "</tr>")
    return f"<table><tr>{head}</tr>{''.join(body)}</table>"


def _diag_html(cal: Calibration) -> str:
    d = cal.diagnostics
    th = d["thresholds"]
    rows = [("max R-hat", d["max_r_hat"], f"<= {th['r_hat_max']}"), ("min bulk ESS", d["min_ess_bulk"], f">= {th['ess_min']:g}"),
            ("min tail ESS", d["min_ess_tail"], f">= {th['ess_min']:g}"), ("divergences", d["divergences"], "0")]
    body = "".join(f'<tr><td class="l">{_e(n)}</td><td>{_f(float(v))}</td><td class="l">{_e(t)}</td></tr>'
                   for n, v, t in rows)
    return f"<table><tr><th>check</th><th>value</th><th>needed</th></tr>{body}</table>"


def _age_html(cal: Calibration) -> str:
    """The age term's section: per analyte the slope, its reference age and the animals without a
    birth date; analytes marked age-dependent but fitted without the term, and why."""
    a = cal.attrs
    if "age_term" not in a:  # a calibration built without the age settings (e.g. by hand)
        return ""
    if not a["age_term"]:
        return "<h2>Age term</h2><p>Off (the default; --age-term or age_term=True adds it): no analyte has an age term.</p>"
    refs, notes = a.get("age_reference_years", {}), a.get("age_notes", {})
    if not refs and not notes:
        return ""
    t = cal.table[cal.table["parameter"] == "age_slope"].set_index("analyte")
    rows = []
    for an, ref in refs.items():
        r = t.loc[an]
        rows.append(f'<tr><td class="l">{_e(an)}</td><td>{ref:.2f}</td><td>{100 * r["estimate"]:+.2f}</td>'
                    f'<td>{100 * r["lower"]:+.2f} to {100 * r["upper"]:+.2f}</td><td>{r["n_animals"]}</td>'
                    f'<td>{a["age_animals_without_birth_date"].get(an, 0)}</td></tr>')
    body = ("<table><tr><th>analyte</th><th>reference age (years)</th><th>slope (% per year)</th><th>95 % CrI</th>"
            "<th>animals with a birth date</th><th>animals without</th></tr>" + "".join(rows) + "</table>") if rows else ""
    off = "".join(f"<li>{_e(an)}: no age term ({_e(why)})</li>" for an, why in notes.items())
    return ("<h2>Age term</h2><p>For the analytes the pack marks age-dependent: ln value = set point at the reference "
            "age (the median age of the analyte's specimens) + slope x (age at collection - reference age). "
            "Specimens of an animal without a birth date are read at the reference age (x = 0): they count for every "
            "other parameter and tell nothing about the slope. Not written into pack.toml (the pack has no such key); "
            "centre, breed centres and CVG are those of animals at the reference age.</p>" + body
            + (f"<ul>{off}</ul>" if off else ""))


#: how the page words each form of the location parameters (the posterior's attr ``locations``,
#: stamped by :func:`bayesbase.calibrate.model.stamp`)
LOCATION_WORDS = {
    "marginal": "integrated out of the model exactly (NUTS sampled only the scale parameters), then drawn for "
                "each posterior draw from their exact conditional distribution given the scales of that draw",
    "sampled": "sampled by NUTS together with the scale parameters",
}


def _locations_html(cal: Calibration) -> str:
    """One sentence: how the fit handled the location parameters (``--locations``)."""
    post = getattr(cal.idata, "posterior", None)
    form = None if post is None else post.attrs.get("locations")
    how = LOCATION_WORDS.get(form, "form not recorded with this fit")
    return (f"<p>Location parameters (population centre, breed offsets, method biases, age slope): {_e(how)}. "
            "Either form gives the same posterior (--locations chooses).</p>")


def calibration_html(cal: Calibration, png: bytes | None = None) -> str:
    """A self-contained page: cautions, convergence, prior vs posterior table, priors, figure."""
    a = cal.attrs
    roles = cal.selection.history["role"].value_counts().to_dict()
    warn = ("" if cal.converged else '<p class="warn">The fit did not converge (see the checks below): no pack '
            "fragment is written unless forced, and none of these numbers should be used for animals' care.</p>")
    parts = [f"<!doctype html><html><head><meta charset='utf-8'><title>Calibration</title><style>{_CSS}</style>"
             "</head><body><h1>Calibration of the population level</h1>",
             '<div class="cautions"><b>Cautions</b><ul>' + "".join(f"<li>{_e(c)}</li>" for c in CAUTIONS)
             + "<li>These numbers describe the animals, analysers and conditions of this store, and count results "
               "with a blank state as healthy; check them before layering the fragment over a pack.</li></ul></div>",
             warn,
             f"<p>Input: {_e(a['source_kind'])} {_e(a['source_label'])} (sha256 {_e(a['source_sha256'])}); species "
             f"{_e(a['species'])}; {a['n_animals']} animals, {a['n_specimens']} usable specimens ({a['n_results']} specimen-analyte results); rows by role: "
             f"{_e(roles)}. Priors from pack {_e(a['pack_id'])} (sha256 {_e(a['pack_sha256'])}). Reference methods: "
             f"{_e(a['reference_methods'])}. Sampler {_e(a['sampler'])}, {a['chains']} chains x {a['draws']} draws "
             f"(tune {a['tune']}, target acceptance {a.get('target_accept', 'not recorded')}), fit form "
             f"{_e(a.get('fit_form', 'joint'))}, seed {a['seed']}, "
             f"{a['seconds']} s; bayesbase {_e(__version__)}, {_e(a['date'])}.</p>", _locations_html(cal),
             "<h2>Convergence</h2>", _diag_html(cal),
             "<h2>Prior (pack value) and posterior (median, 95 % credible interval)</h2>",
             "<p>CVs are fractions; method_bias is the fraction by which a method reads above the reference method "
             "(pack.toml carries each as the posterior mean and SD of its natural-log bias, method_biases, which "
             "bayesbase assess uses to correct a change of method).</p>",
             _table_html(cal), _age_html(cal), "<h2>Priors</h2><ul>"
             + "".join(f"<li><b>{_e(k)}</b>: {_e(v)}</li>" for k, v in a["priors"].items()) + "</ul>"]
    if png is not None:
        parts.append("<h2>CVI of the median animal: prior and posterior</h2><img alt='CVI prior and posterior' "
                     f"src='data:image/png;base64,{base64.b64encode(png).decode('ascii')}'>")
    parts.append("</body></html>")
    return "\n".join(parts)


# --------------------------------------------------------------------------- files
def _check_fragment(tmp: Path) -> None:
    from ..priors import load_pack

    try:
        load_pack(tmp)
    except PackError as exc:
        tmp.unlink(missing_ok=True)
        raise PackError(f"the calibrated fragment fails the pack schema, not written: {exc}") from None


def write_outputs(cal: Calibration, out_dir, force: bool = False, figure: bool = True) -> dict[str, Path]:
    """Write the files of the module docstring into ``out_dir``; ``pack.toml`` only when the fit
    converged or ``force``. Returns {name: path} of the files written."""
    from ..mcmc.engine import save_idata

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    paths: dict[str, Path] = {}
    if cal.converged or force:
        tmp = out / ".pack.toml.tmp"
        tmp.write_text(fragment_toml(cal), encoding="utf-8")
        _check_fragment(tmp)
        os.replace(tmp, out / "pack.toml")
        paths["pack.toml"] = out / "pack.toml"
    elif (out / "pack.toml").exists():
        (out / "pack.toml").unlink()  # an older fragment must not pass for this fit's
    cal.table.to_csv(out / "calibration.csv", index=False)
    paths["calibration.csv"] = out / "calibration.csv"
    kept = ("sampler", "draws", "tune", "chains", "seed", "target_accept")
    save_idata(cal.idata, out / "idata.nc", {k: cal.attrs[k] for k in kept if k in cal.attrs},
               {k: v for k, v in cal.attrs.items() if k != "priors"})
    paths["idata.nc"] = out / "idata.nc"
    png = _png_bytes(cvi_figure(cal)) if figure else None
    if png is not None:
        (out / "cvi_prior_posterior.png").write_bytes(png)
        paths["cvi_prior_posterior.png"] = out / "cvi_prior_posterior.png"
    (out / "calibration.html").write_text(calibration_html(cal, png), encoding="utf-8")
    paths["calibration.html"] = out / "calibration.html"
    from .heldout import write_heldout  # held-out proof, when run: heldout.csv and its section of the page

    paths.update(write_heldout(cal, out))
    return paths
