"""The one jinja2 set-up of the project's HTML (the report and the web desk's pages): templates
from a package's ``templates`` folder, autoescape on (every string from the data is escaped),
undefined names an error, block tags trimmed. jinja2 is imported when an environment is made."""
from __future__ import annotations

__all__ = ["jinja_environment"]


def jinja_environment(package: str, *, autoescape: bool = True):
    """A jinja2 Environment over ``<package>/templates`` (e.g. ``"bayesbase.report"``).

    ``autoescape=False`` only for templates that are not HTML and take no data (the report's
    style sheet, filled with fixed colours). Callers add their own filters and globals and keep
    the environment (it caches compiled templates).
    """
    import jinja2

    return jinja2.Environment(
        loader=jinja2.PackageLoader(package, "templates"),
        autoescape=autoescape,
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )
