"""The clinician's desk: a local web application over the results store (layer 6, beside
``cli``), started with ``bayesbase serve``.

It shows the same content as the report (no second implementation of any rule: the rows, the
panel summary, the advice, the specimen roles and the figures all come from
:mod:`bayesbase.report`), over the same store (:class:`bayesbase.store.Store`) and engines
(:func:`bayesbase.assessment.assess`).

Modules
-------
``config``    :class:`DeskConfig` (store path, access token, upload limit, hosts, packs folder);
``security``  one ASGI middleware: host check, access token, CSRF cookie, upload size limit,
              security headers (Content-Security-Policy without inline script);
``render``    the jinja2 environment (autoescape on) and page responses;
``patients``  the patient list: search, sort and pagination in SQL on the store;
``summaries`` the list's "probable changes" count and drift marker, computed for the rows on
              screen when the page asks (a small script fetches them) and cached per patient
              until its stored results change;
``patient``   one patient: settings, the cached assessment, the page's sections, figures and
              downloads (HTML, PDF report, JSON assessment);
``reportparts`` every use of the report's content model in one place;
``importing`` uploads staged aside, the store's dry-run plan, confirm as one transaction;
``packs``     the prior packs (built-in and fragment files in a folder), every number with
              its source and provenance;
``app``       the routes (:func:`create_app`); ``server`` binds the socket and runs uvicorn.
"""
from __future__ import annotations

from .config import DEFAULT_MAX_UPLOAD_MB, DEFAULT_PORT, DeskConfig, is_loopback

__all__ = ["DeskConfig", "DEFAULT_MAX_UPLOAD_MB", "DEFAULT_PORT", "create_app", "is_loopback"]


def create_app(config: DeskConfig):
    """The ASGI application (Starlette) for ``config``."""
    from .app import create_app as _create

    return _create(config)
