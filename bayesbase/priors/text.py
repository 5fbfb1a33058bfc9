"""Views of a pack for people: a tidy table (:func:`describe`) and the text that
``bayesbase priors show`` prints (:func:`describe_text`)."""
from __future__ import annotations

import math
import textwrap

__all__ = ["describe", "describe_text"]

_FIELD_UNITS = {"cvg": "fraction", "cvi": "fraction", "cva": "fraction", "mcrc": "fraction",
                "cvi_log_sd": "SD of ln(CVI)", "shift_sd": "log SD", "slope_sd": "log units per year"}


def _study_source(st) -> str:
    return (f"{st.source}" + (f" [{st.locator}]" if st.locator else "")
            + f" ({st.design}, {st.n_animals} animals"
            + (f" x {st.n_specimens} specimens" if st.n_specimens else "")
            + f"; SE ln CVI {st.se_log:.3f} from {st.se_basis}; {'pooled' if st.pooled else 'listed, not pooled'})")


def _describe_rows(pack, aid: str) -> list[dict]:
    prior = pack.analytes[aid]
    rows = []
    for fld, cn in pack.cited[aid].items():
        unit = "serum index (mg/dL)" if fld.startswith("hil_thresholds.") else _FIELD_UNITS.get(fld, prior.unit)
        rows.append(dict(analyte=aid, field=fld, value=cn.value, unit=unit, source=cn.source,
                         provenance=cn.provenance))
    for i, st in enumerate(prior.cvi_studies, start=1):
        rows.append(dict(analyte=aid, field=f"cvi_study.{i}", value=st.value, unit="fraction",
                         source=_study_source(st), provenance=st.provenance))
    rows.append(dict(analyte=aid, field="ii", value=prior.ii, unit="ratio",
                     source="derived here: CVI / CVG (Harris orientation)", provenance="derived"))
    for b, text in prior.breed_notes.items():
        rows.append(dict(analyte=aid, field=f"breed_notes.{b}", value=math.nan, unit="",
                         source=f"{text}; {prior.sources.get(f'breed_notes.{b}', '')}",
                         provenance=prior.sources.get(f"breed_notes.{b}.provenance", "")))
    if prior.interference:
        rows.append(dict(analyte=aid, field="interference", value=math.nan, unit="",
                         source=f"{', '.join(f'{k} {v}' for k, v in prior.interference.items())}; "
                                f"{prior.sources.get('interference', '')}",
                         provenance=prior.sources.get("interference.provenance", "")))
    for m, b in (getattr(prior, "method_biases", None) or {}).items():
        rows.append(dict(analyte=aid, field=f"method_biases.{m}.log_bias", value=b.log_bias,
                         unit=f"ln ratio to {b.reference}", source=b.source, provenance=b.provenance))
        rows.append(dict(analyte=aid, field=f"method_biases.{m}.log_sd", value=b.log_sd,
                         unit="SD of ln ratio", source=b.source, provenance=b.provenance))
    return rows


def describe(pack, analyte: str | None = None):
    """Tidy table of a pack's cited numbers: analyte, field, value, unit, source, provenance.

    Includes the index of individuality (``ii``, Harris orientation CVI/CVG, derived).
    """
    import pandas as pd  # lazy: keeps `bayesbase --help` free of pandas

    ids = [pack.get(analyte).analyte] if analyte is not None else list(pack.analytes)
    rows = [row for aid in ids for row in _describe_rows(pack, aid)]
    return pd.DataFrame(rows, columns=["analyte", "field", "value", "unit", "source", "provenance"])


def _short(text: str, limit: int) -> str:
    return text if len(text) <= limit else text[: max(limit - 3, 1)].rstrip() + "..."


class _Lines:
    """Source lines cut to one terminal line, or wrapped whole (``full``)."""

    def __init__(self, full: bool, width: int):
        self.full, self.width = full, width

    def source(self, label: str, text: str) -> list[str]:
        first = f"    {label}"
        if not self.full:
            return [_short(f"{first} {text}", self.width)]
        # a label longer than the line (e.g. a breed note's text) is wrapped with its source
        return textwrap.wrap(f"{label} {text}", width=self.width, initial_indent="    ",
                             subsequent_indent=" " * 6)


def _studies_block(prior, lines: _Lines) -> list[str]:
    pooled = [st for st in prior.cvi_studies if st.pooled]
    out = [f"  studies behind CVI ({len(pooled)} pooled of {len(prior.cvi_studies)}):"]
    for i, st in enumerate(prior.cvi_studies, start=1):
        head = (f"  {i}. CVI {st.value:.4g} {st.design}, n={st.n_animals}"
                + (f"x{st.n_specimens}" if st.n_specimens else "")
                + f", SE ln {st.se_log:.3f}, {st.provenance}" + ("" if st.pooled else ", not pooled") + ":")
        text = st.source + (f" [{st.locator}]" if st.locator else "")
        if lines.full and st.note:
            text += f". Note: {st.note}"
        out += lines.source(head.strip(), text)
    out.append(f"    combination: CVI {prior.cvi:.4g}, SD of ln CVI {prior.cvi_log_sd:.3g} "
               "(DerSimonian-Laird; bayesbase.evidence)")
    return out


def _analyte_block(pack, aid: str, lines: _Lines) -> list[str]:
    prior = pack.analytes[aid]
    out = [""] + textwrap.wrap(
        f"{aid} [{prior.unit}]  CVI {prior.cvi:.4g} (SD ln {prior.cvi_log_sd:.3g})  CVG {prior.cvg:.4g}"
        f"  CVA {prior.cva:.4g}  II {prior.ii:.2f}  centre {prior.center:.4g}"
        f" ({prior.ri_lower:.4g}-{prior.ri_upper:.4g})", width=lines.width, subsequent_indent="    ")
    prefix = f"analytes.{aid}: "
    for label, items in (("WARNING", pack.warnings), ("CVs vs interval", getattr(pack, "acknowledged", ()))):
        for w in items:
            if w.startswith(prefix):
                out += textwrap.wrap(f"{label}: " + w[len(prefix):], width=lines.width, initial_indent="  ",
                                     subsequent_indent="    ")
    for fld, cn in pack.cited[aid].items():
        loc = f" [{cn.locator}]" if cn.locator else ""
        out += lines.source(f"{fld} = {cn.value:.4g} ({cn.provenance}):", cn.source + loc)
    for b, text in prior.breed_notes.items():
        out += lines.source(f"breed note ({b}, {prior.sources.get(f'breed_notes.{b}.provenance', '')}): {text}:",
                            prior.sources.get(f"breed_notes.{b}", ""))
    out += _method_bias_block(prior, lines)
    if prior.cvi_studies:
        out += _studies_block(prior, lines)
    return out


def _method_bias_block(prior, lines: _Lines) -> list[str]:
    """Per-method biases against the reference method (``method_biases``), as ratios."""
    biases = getattr(prior, "method_biases", None) or {}
    if not biases:
        return []
    ref = next(iter(biases.values())).reference
    out = [f"  method biases against {ref} (x exp(log bias); 95 % range from the log SD):"]
    for m, b in biases.items():
        lo, hi = math.exp(b.log_bias - 1.96 * b.log_sd), math.exp(b.log_bias + 1.96 * b.log_sd)
        loc = f" [{b.locator}]" if b.locator else ""
        out += lines.source(f"{m}: x{math.exp(b.log_bias):.4g} ({lo:.4g}-{hi:.4g}), {b.provenance}:",
                            b.source + loc + (f". Note: {b.note}" if lines.full and b.note else ""))
    return out


def describe_text(pack, analyte: str | None = None, full: bool = False, width: int = 100) -> str:
    """Readable text of a pack for a terminal of ``width`` columns (what ``bayesbase priors show``
    prints): per analyte the cited numbers, then the studies behind CVI and their combination;
    a consistency warning of the pack (``pack.warnings``) stands under its analyte's header.

    Sources are cut to one line unless ``full`` is true, in which case they are wrapped whole.
    """
    ids = [pack.get(analyte).analyte] if analyte is not None else list(pack.analytes)
    out: list[str] = [f"pack {pack.id}  version {pack.version}  sha256 {pack.sha256[:16]}...",
                      "CVs are fractions; II = CVI/CVG (Harris; < 0.6: subject-based limits preferable)."]
    lines = _Lines(full, width)
    for aid in ids:
        out += _analyte_block(pack, aid, lines)
    return "\n".join(out)
