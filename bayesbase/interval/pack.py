"""Pack fragment of a reference-interval estimate (``pack.toml``).

A fragment carries, per analyte, only what a reference sample measures: the population centre,
the interval limits, the CVG derived from them and, with ``partition="breed"`` and separate breed
intervals, the breed centres for the pack's breed table. Every number is a cited number of the
pack schema (:mod:`bayesbase.priors`): ``{ value, source, provenance, note }`` with provenance
``"estimated"`` and the reference-sample file's name and SHA-256 in ``source``.

Layout (the same header as the fragment ``bayesbase study`` writes, so that the two merge)::

    [pack]                         # a partial pack: "extends" names the pack it is layered over
    id, species, title, version, description (names the sample file and its SHA-256)
    extends = "<species>"

    [analytes.<id>]
    unit = "<canonical unit>"
    center / ri_lower / ri_upper / cvg = { value, source, provenance = "estimated", note }

    [analytes.<id>.breed_centers]
    <breed_key> = { value, source, provenance = "estimated", note }

``bayesbase.priors.load_pack`` layers the fragment over the pack named in ``extends``
(``bayesbase.priors.layers``); ``bayesbase priors merge`` writes it and other fragments into one
full pack.
"""
from __future__ import annotations

import json
import math

from .. import __version__

__all__ = ["fragment_toml", "breed_key", "PROVENANCE"]

#: Provenance of every number a bayesbase estimate writes into a pack fragment.
PROVENANCE = "estimated"


def breed_key(breed: str) -> str:
    """The pack's breed-table key: lower case, words joined by underscores (as bayesbase.priors)."""
    return "_".join(str(breed).strip().lower().replace("-", " ").split())


def _s(text) -> str:
    """A TOML basic string (JSON string escapes are valid TOML escapes)."""
    return json.dumps(str(text), ensure_ascii=False)


def _num(x: float) -> str:
    return repr(float(f"{x:.6g}"))


def _cited(value: float, source: str, note: str) -> str:
    return (f"{{ value = {_num(value)}, source = {_s(source)}, provenance = {_s(PROVENANCE)}, "
            f"note = {_s(note)} }}")


def _ci(f, which: str) -> str:
    lo, hi = f.lower_ci if which == "lower" else f.upper_ci
    if not (math.isfinite(lo) and math.isfinite(hi)):
        return ""
    return f"; 90 % CI {lo:.4g}-{hi:.4g} {f.unit}"


def fragment_toml(result) -> str:
    """TOML text of the pack fragment of an :class:`~bayesbase.interval.core.IntervalResult`."""
    a = result.attrs
    file, sha = a["source_file"], a["source_sha256"]
    src = f"reference sample {file} (sha256 {sha}); bayesbase {__version__} interval, seed {a['seed']}"
    desc = (f"Population centre, reference limits, CVG and breed centres estimated by bayesbase interval from "
            f"the reference sample {file} (sha256 {sha}); method {a['method']}, partition "
            f"{a['partition'] or 'none'}, outliers {'kept' if a['keep_outliers'] else 'excluded when flagged'}; "
            f"CVG derived with CVI and CVA of pack '{a['pack_id']}' (sha256 {a['pack_sha256']}). Every number "
            "has provenance estimated.")
    lines = [
        "# bayesbase pack fragment: population reference intervals estimated from a reference sample.",
        "# Every number has provenance \"estimated\"; its source names the sample file and its SHA-256.",
        "# Decision support, not a diagnosis: the interval describes healthy animals like those sampled,",
        "# on the analyser that measured them. Layer it over the species' pack, do not use it alone.",
        "",
        "[pack]",
        f"id = {_s(a['species'] + '+interval-' + sha[:8])}",
        f"species = {_s(a['species'])}",
        f"title = {_s('Population reference intervals estimated from ' + file)}",
        f"version = {_s(__version__ + '+' + sha[:8])}",
        f"description = {_s(desc)}",
        f"extends = {_s(a['pack_id'] or a['species'])}",
    ]
    skipped = []
    for analyte in a["analytes"]:
        f = result.fits.get((analyte, "all"))
        if f is None or f.method == "none" or not (math.isfinite(f.lower) or math.isfinite(f.upper)):
            skipped.append(analyte)
            continue
        how = f"{f.method}, n = {f.n}" + (f", {f.n_outliers} outlier(s) excluded" if f.n_outliers else "")
        lines += ["", f"[analytes.{analyte}]", f"unit = {_s(f.unit)}"]
        centre_word = "median" if f.method == "nonparametric" else "back-transformed centre"
        if math.isfinite(f.center):
            lines.append(f"center = {_cited(f.center, src, f'{centre_word} of the reference sample ({how})')}")
        if math.isfinite(f.lower):
            note = f"2.5th percentile ({how}){_ci(f, 'lower')}"
            lines.append(f"ri_lower = {_cited(f.lower, src, note)}")
        if math.isfinite(f.upper):
            note = f"97.5th percentile ({how}){_ci(f, 'upper')}"
            lines.append(f"ri_upper = {_cited(f.upper, src, note)}")
        if math.isfinite(f.cvg_pct):
            lines.append(f"cvg = {_cited(f.cvg_pct / 100.0, src, f.cvg_note)}")
        breeds = [g for (an, g), gf in result.fits.items()
                  if an == analyte and g.startswith("breed=") and gf.method != "none" and math.isfinite(gf.center)]
        if breeds:
            lines += ["", f"[analytes.{analyte}.breed_centers]"]
            for g in breeds:
                gf = result.fits[(analyte, g)]
                name = g.split("=", 1)[1]
                note = (f"breed centre ({gf.method}, n = {gf.n}); separate breed intervals advised by "
                        "Harris & Boyd's test (Clin Chem 1990;36:265)")
                key = breed_key(name)
                key = key if key.replace("_", "a").isalnum() and key.isascii() else _s(key)
                lines.append(f"{key} = {_cited(gf.center, src, note)}")
    if skipped:
        lines.insert(4, f"# left out (no interval): {', '.join(skipped)}")
    return "\n".join(lines) + "\n"
