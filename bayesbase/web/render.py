"""Pages: one jinja2 environment with autoescape on (every value from the store, a file or a
pack is escaped), the cautions and the navigation on every page, and the links' query strings
built in Python (:func:`link`), never by hand in a template."""
from __future__ import annotations

import urllib.parse
from functools import lru_cache

from .. import __version__
from ..constants import CAUTIONS

__all__ = ["environment", "link", "render_page", "error_html", "CSRF_FIELD"]

#: name of the form field that carries the CSRF token
CSRF_FIELD = "csrf"


def link(path: str, **params) -> str:
    """``path`` with a query string of the params that are set (None and "" left out); every
    value percent-encoded, so a patient id such as ``a/b?c`` or ``javascript:`` stays a value."""
    items = [(k, str(v)) for k, v in params.items() if v is not None and v != ""]
    return path + ("?" + urllib.parse.urlencode(items) if items else "")


@lru_cache(maxsize=1)
def environment():
    from ..report.templating import jinja_environment

    env = jinja_environment("bayesbase.web")
    env.globals.update(CAUTIONS=CAUTIONS, link=link, version=__version__,
                       CSRF_FIELD=CSRF_FIELD, age_text=age_text, date_text=date_text)
    env.filters["merged"] = lambda d, **kw: {**d, **kw}
    return env


def age_text(years) -> str:
    """An age as the report writes it ('9.5 years', '7 months'); a dash when unknown."""
    from ..report import wording as w

    return w.DASH if years is None else w.age(years)


def date_text(when) -> str:
    """A date as the report writes it ('18 Nov 2026'); a dash when unknown."""
    from ..report import wording as w

    return w.date(when) if when else w.DASH


def render_page(template: str, *, csrf: str, nav: str = "", **context) -> str:
    """The HTML of one page (``csrf``: the token the page's forms carry)."""
    return environment().get_template(template).render(csrf=csrf, nav=nav, **context)


def error_html(status: int, title: str, message: str = "", *, csrf: str = "") -> str:
    """An error page: the status, what went wrong and the cautions, like every page."""
    return render_page("error.html.j2", csrf=csrf, status=status, title=title,
                       message=message)
