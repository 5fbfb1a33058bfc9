"""The desk's routes (Starlette). Pages are server-side templates (:mod:`.render`); the only
script is ``static/desk.js``; every request passes :class:`.security.DeskGuard` first.

=======================  ==========================================================
``/`` ``/patients``      the patient list (search ``q``, ``sort``, ``order``, ``page``)
``/api/summaries``       probable changes and drift of the listed patients (JSON)
``/patient``             one patient (``id``; settings ``at``, ``coverage``,
                         ``prior_change``, ``keep_compromised``, ``engine``)
``/patient/figure.png``  one analyte's figure; ``/patient/legend.png`` the legend
``/patient/report.html`` ``/patient/report.pdf`` ``/patient/assessment.json``: downloads
``/import``              upload (POST) -> dry run -> ``/import/confirm`` (POST)
``/priors``              the packs; ``/priors/pack`` one pack's numbers and sources
=======================  ==========================================================
"""
from __future__ import annotations

import contextlib
import logging
import re
import threading

from starlette.applications import Starlette
from starlette.concurrency import run_in_threadpool
from starlette.middleware import Middleware
from starlette.responses import HTMLResponse, JSONResponse, RedirectResponse, Response
from starlette.routing import Mount, Route
from starlette.staticfiles import StaticFiles

from ..errors import BayesbaseError
from . import importing, packs, patients, reportparts, summaries
from .config import DeskConfig, DeskError
from .patient import ENGINES, StateCache, load_state, parse_settings
from .render import error_html, render_page
from .security import DeskGuard, csrf_token, verify_csrf

__all__ = ["create_app", "Desk"]

log = logging.getLogger("bayesbase.web")


class Desk:
    """What one running desk keeps between requests: staged uploads and caches."""

    def __init__(self, config: DeskConfig):
        self.config = config
        self.staging = importing.Staging(config.staging_dir)
        self.states = StateCache(config.cache_size)
        self.summaries = summaries.SummaryCache()

    def store(self):
        from ..store import Store

        return Store(self.config.db)


def _desk(request) -> Desk:
    return request.app.state.desk


def _page(request, template: str, status: int = 200, **context) -> HTMLResponse:
    html = render_page(template, csrf=csrf_token(request), **context)
    return HTMLResponse(html, status_code=status)


def _file_stem(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9._-]+", "_", str(text)).strip("._") or "patient"


# --------------------------------------------------------------------------- patients
def patients_page(request):
    desk, q = _desk(request), request.query_params
    with desk.store() as st:
        page = patients.list_patients(st.connection, q.get("q", ""), q.get("sort", "id"),
                                      q.get("order", "asc"), q.get("page", 1),
                                      desk.config.page_size)
        prints = summaries.fingerprints(st.connection, [r.patient for r in page.rows])
    known = {r.patient: desk.summaries.get(r.patient, prints.get(r.patient)) for r in page.rows}
    return _page(request, "patients.html.j2", nav="patients", page=page, known=known,
                 db=str(desk.config.db), sorts=patients.SORTS)


def summaries_api(request):
    desk = _desk(request)
    ids = request.query_params.getlist("id")[:summaries.MAX_IDS]
    with desk.store() as st:
        found = summaries.summarise(st, ids, desk.summaries)
    return JSONResponse({pid: s.as_json() for pid, s in found.items()})


# --------------------------------------------------------------------------- one patient
def _state(request):
    desk = _desk(request)
    pid = request.query_params.get("id", "")
    if not pid:
        raise DeskError(400, "Bad request", "which patient? (id is missing)")
    settings = parse_settings(request.query_params)
    with desk.store() as st:
        return load_state(st, desk.states, pid, settings)


def patient_page(request):
    state = _state(request)
    params = {"id": state.patient, **state.settings.params()}
    return _page(request, "patient.html.j2", nav="patients", s=state.sections(), state=state,
                 settings=state.settings, params=params, engines=ENGINES,
                 converged=state.assessment.converged, mark=reportparts.star)


def figure(request):
    state = _state(request)
    png = state.figure(request.query_params.get("analyte", ""))
    if png is None:
        raise DeskError(404, "No such figure", "the patient has no result for that analyte")
    return Response(png, media_type="image/png")


def legend(request):
    from .reportparts import legend_png

    return Response(legend_png(), media_type="image/png")


def _download(body, media_type: str, name: str) -> Response:
    return Response(body, media_type=media_type,
                    headers={"content-disposition": f'attachment; filename="{name}"'})


def download_html(request):
    from .reportparts import report_html

    state = _state(request)
    return _download(report_html(state.content()), "text/html; charset=utf-8",
                     f"report-{_file_stem(state.patient)}.html")


def download_pdf(request):
    from .reportparts import report_pdf

    state = _state(request)
    return _download(report_pdf(state.content()), "application/pdf",
                     f"report-{_file_stem(state.patient)}.pdf")


def download_json(request):
    state = _state(request)
    return _download(state.assessment.to_json(), "application/json",
                     f"assessment-{_file_stem(state.patient)}.json")


# --------------------------------------------------------------------------- import
def import_page(request):
    cfg = _desk(request).config
    return _page(request, "import.html.j2", nav="import", stage="choose", outcome=None,
                 limit_mb=cfg.max_upload_mb, suffixes=importing.ALLOWED_SUFFIXES, result=None)


async def _stage_upload(request, desk: Desk):
    async with request.form(max_files=1, max_fields=20) as form:
        verify_csrf(request, form)
        upload = form.get("file")
        if upload is None or isinstance(upload, str) or not upload.filename:
            raise DeskError(400, "No file chosen", "choose a results file to upload")
        uid, path = desk.staging.new_path(upload.filename)
        with open(path, "wb") as fh:
            while chunk := await upload.read(1 << 20):
                fh.write(chunk)
    return desk.staging.add(uid, path)


async def upload(request):
    desk = _desk(request)
    staged = await _stage_upload(request, desk)
    outcome = await run_in_threadpool(importing.dry_run, desk.config.db, staged)
    if not outcome.ok:
        desk.staging.discard(staged)
    return _page(request, "import.html.j2", nav="import", stage="preview", outcome=outcome,
                 limit_mb=desk.config.max_upload_mb, suffixes=importing.ALLOWED_SUFFIXES,
                 result=None, status=200 if outcome.ok else 422)


async def confirm(request):
    desk = _desk(request)
    async with request.form(max_files=0, max_fields=20) as form:
        verify_csrf(request, form)
        uid, replace = str(form.get("upload", "")), form.get("replace") == "1"
    outcome = await run_in_threadpool(importing.confirm, desk.config.db, desk.staging, uid,
                                      replace)
    return _page(request, "import.html.j2", nav="import", stage="done", outcome=outcome,
                 limit_mb=desk.config.max_upload_mb, suffixes=importing.ALLOWED_SUFFIXES,
                 result=outcome.summary, status=200 if outcome.ok else 409)


# --------------------------------------------------------------------------- priors
def priors_page(request):
    cfg = _desk(request).config
    return _page(request, "priors.html.j2", nav="priors", entries=packs.list_packs(cfg.packs_dir),
                 packs_dir=str(cfg.packs_dir) if cfg.packs_dir else None)


def pack_page(request):
    q = request.query_params
    view = packs.pack_page(q.get("kind", ""), q.get("name", ""), _desk(request).config.packs_dir)
    return _page(request, "pack.html.j2", nav="priors", **view)


# --------------------------------------------------------------------------- assets, errors
def report_css(request):
    from .reportparts import report_css_text

    return Response(report_css_text(), media_type="text/css; charset=utf-8")


def _error(request, exc):
    if isinstance(exc, DeskError):
        status, title, message = exc.status, exc.title, exc.message
    else:
        status, title, message = 400, "Could not do that", str(exc)
    return HTMLResponse(error_html(status, title, message, csrf=csrf_token(request)),
                        status_code=status)


def _server_error(request, exc):
    log.exception("request failed: %s", request.url.path, exc_info=exc)
    return HTMLResponse(error_html(500, "Something went wrong",
                                   "the desk could not answer; the error is in its log"),
                        status_code=500)


def _warm_up() -> None:
    """Load the page machinery (templates, pandas, the report) in the background at start, so
    the first page a clinician opens does not wait for it (about 3 s on a busy machine)."""
    from ..report import content  # noqa: F401  (pandas, matplotlib, the report's wording)
    from .render import environment

    for name in ("patients.html.j2", "patient.html.j2", "import.html.j2", "error.html.j2"):
        environment().get_template(name)


def create_app(config: DeskConfig) -> Starlette:
    """The desk for ``config`` (see :class:`~bayesbase.web.config.DeskConfig`)."""
    desk = Desk(config)

    @contextlib.asynccontextmanager
    async def lifespan(app):
        threading.Thread(target=_warm_up, name="desk-warm-up", daemon=True).start()
        yield
        desk.staging.close()

    routes = [
        Route("/", patients_page), Route("/patients", patients_page),
        Route("/api/summaries", summaries_api), Route("/patient", patient_page),
        Route("/patient/figure.png", figure), Route("/patient/legend.png", legend),
        Route("/patient/report.html", download_html), Route("/patient/report.pdf", download_pdf),
        Route("/patient/assessment.json", download_json),
        Route("/import", import_page, methods=["GET"]), Route("/import", upload, methods=["POST"]),
        Route("/import/confirm", confirm, methods=["POST"]),
        Route("/import/confirm", lambda r: RedirectResponse("/import", 303), methods=["GET"]),
        Route("/priors", priors_page), Route("/priors/pack", pack_page),
        Route("/static/report.css", report_css),
        Mount("/static", StaticFiles(packages=[("bayesbase.web", "static")]), name="static"),
    ]
    app = Starlette(routes=routes, middleware=[Middleware(DeskGuard, config=config)],
                    exception_handlers={BayesbaseError: _error, 500: _server_error},
                    lifespan=lifespan)
    app.state.desk = desk
    return app
