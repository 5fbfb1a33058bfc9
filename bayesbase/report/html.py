"""The self-contained HTML report: the content model through a jinja2 template with autoescape
on (every string from the data is escaped; the only markup not from the template is the P(change)
star, built in :func:`.figures.star_svg` from a number and fixed colours). Figures are embedded as base64 PNG; the page
references nothing over the network."""
from __future__ import annotations

import base64
from functools import lru_cache

from . import figures
from . import wording
from .content import ReportContent, Row
from .templating import jinja_environment

__all__ = ["render"]


@lru_cache(maxsize=1)
def _environment():
    env = jinja_environment("bayesbase.report")
    env.filters["b64"] = lambda data: base64.b64encode(data).decode("ascii")
    return env


def _mark(row: Row):
    """The P(change) star of a table row: the figures' mark as inline SVG (markup built from a
    number and fixed colours only)."""
    from markupsafe import Markup

    if row.p_change is None:
        return ""
    return Markup(figures.star_svg(row.p_change))


def render(content: ReportContent) -> str:
    """The report as one HTML document."""
    template = _environment().get_template("report.html.j2")
    return template.render(c=content, w=wording, mark=_mark, ramp=figures.CHANGE_RAMP,
                           palette=figures.PALETTE)
