"""Pages for people: the overview, a model's page, "try a row", and the training report.

One blueprint, registered by the application factory next to the JSON routes. It reads the
worker's state (store, live models, settings) through :func:`service.app_state.state` and
never changes anything: every route is a GET, release and rollback stay on the command
line and the admin routes. Pages are server-rendered HTML (Jinja templates in
``service/templates``, one stylesheet in ``service/static``), need no JavaScript and load
nothing from the network; the Content-Security-Policy header says so to the browser too.

Routes::

    GET /                                           every model at a glance
    GET /page/<name>                                versions side by side, history, reports
    GET /page/<name>/try[?version=N&f0=…&f1=…]      one row through the predict code
    GET /models/<name>/versions/<N>/report          the version's report.html from the store

The report route takes no file name from the request: name and version are validated and the
one report file the store layout defines for that version is served, or a JSON 404.
"""

from __future__ import annotations

import functools
import logging
from datetime import datetime, timezone
from pathlib import Path

from flask import Blueprint, Response, render_template, request

from service import metrics
from service.app_state import state
from service.cautions import BEFORE_ACTING
from service.errors import ApiError
from service.page_data import overview, safe_message, score_keys, timeline, versions
from service.page_row import DEFAULT_COVERAGE, form_fields, read_numbers, try_row
from service.store import NotFound, StoreError, check_name, check_version
from service.traffic_page import drift_lines, shadow_line

log = logging.getLogger("kridge.pages")

#: Templates and stylesheet live in service/templates and service/static (package data).
bp = Blueprint("pages", __name__, root_path=str(Path(__file__).resolve().parents[1]),
               template_folder="templates", static_folder="static",
               static_url_path="/page/static")

#: Pages load their stylesheet from this service and nothing else; no script runs.
PAGE_POLICY = ("default-src 'none'; style-src 'self'; img-src 'self'; form-action 'self'; "
               "base-uri 'none'; frame-ancestors 'none'")
#: The training report is one self-contained file: inline style, images as data: URLs.
REPORT_POLICY = ("default-src 'none'; style-src 'unsafe-inline'; img-src data:; "
                 "base-uri 'none'; form-action 'none'")


def _services():
    """(store, live models, settings) of this worker."""
    st = state()
    return st.store, st.models, st.settings


@bp.app_context_processor
def _cautions() -> dict:
    return {"before_acting": BEFORE_ACTING}


@bp.after_request
def _headers(response: Response) -> Response:
    if request.endpoint != "pages.report":
        response.headers.setdefault("Content-Security-Policy", PAGE_POLICY)
    response.headers["X-Content-Type-Options"] = "nosniff"
    response.headers["Referrer-Policy"] = "no-referrer"
    if request.endpoint != "pages.static":
        response.headers["Cache-Control"] = "no-store"  # live versions change under it
    return response


@bp.app_template_filter("when")
def when(iso: str | None) -> str:
    """``2026-12-02T12:41:03+00:00`` → ``2026-12-02 12:41:03 UTC``."""
    try:
        moment = datetime.fromisoformat(str(iso))
    except ValueError:
        return str(iso or "–")
    if moment.tzinfo is not None:
        moment = moment.astimezone(timezone.utc)
    return moment.strftime("%Y-%m-%d %H:%M:%S") + (" UTC" if moment.tzinfo else "")


@bp.app_template_filter("ago")
def ago(iso: str | None) -> str:
    """How long ago, coarse: ``3 min ago``, ``5 h ago``, ``12 days ago``."""
    try:
        moment = datetime.fromisoformat(str(iso))
    except ValueError:
        return ""
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=timezone.utc)
    seconds = (datetime.now(timezone.utc) - moment).total_seconds()
    if seconds < 0:
        return "in the future (check the clocks)"
    for size, unit in ((86400, "days"), (3600, "h"), (60, "min")):
        if seconds >= 2 * size or (unit != "days" and seconds >= size):
            return f"{int(seconds // size)} {unit} ago"
    return f"{int(seconds)} s ago"


def _problem_page(title: str, message: str, status: int) -> tuple[str, int]:
    return render_template("problem.html", title=title, message=message), status


def page_view(view):
    """Answer a page's failures with a page: unknown model 404, anything else 500 without
    details (they go to the service log)."""
    @functools.wraps(view)
    def wrapped(**kwargs):
        name = kwargs.get("name")
        store = _services()[0]
        try:
            if name is not None and not store.known(name):
                return _problem_page("Not found", f"There is no model named {name!r} here.",
                                     404)
            return view(**kwargs)
        except StoreError as exc:
            status = 404 if isinstance(exc, NotFound) else 503
            return _problem_page(f"Model {name}" if name else "Models",
                                 safe_message(store, exc), status)
        except Exception:
            log.exception("page %s failed", request.path)
            return _problem_page("Something went wrong",
                                 "This page could not be built; the service log says why.",
                                 500)
    return wrapped


@bp.get("/")
@page_view
def overview_page():
    store, models, _ = _services()
    _, served, _ = models.readiness()
    lines = overview(store, served, metrics.row_counts(), models.refused)
    return render_template("overview.html", models=lines, counted_since=metrics.counted_since(),
                           drift=drift_lines())


@bp.get("/page/<name>")
@page_view
def model_page(name: str):
    store, models, _ = _services()
    entry = store.live(name)
    live = entry["version"] if entry else None
    cards = versions(store, name, live)
    events, history_problem = timeline(store, name)
    served = models.slots.get(name)
    return render_template("model.html", name=name, live=live,
                           since=entry.get("since") if entry else None,
                           served=served.model.version if served and served.model else None,
                           refused=models.refused(name, live),
                           cards=cards, score_keys=score_keys(cards), events=events,
                           history_problem=history_problem, shadow=shadow_line(name))


@bp.get("/page/<name>/try")
@page_view
def try_page(name: str):
    store, models, settings = _services()
    live = store.live_version(name)
    asked = request.args.get("version")
    if asked is not None:
        try:
            model = models.pinned_version(name, check_version(asked))
        except StoreError as exc:
            return _problem_page(f"Model {name}", safe_message(store, exc), 404)
    else:
        model = models.live(name)
    fields = form_fields(model, request.args)
    outcome, coverage_error = None, None
    coverage_text = request.args.get("coverage", f"{DEFAULT_COVERAGE:g}").strip()
    if any(f.key in request.args for f in fields):
        row = read_numbers(fields)
        coverage = None
        if model.has_intervals and coverage_text:
            try:
                coverage = float(coverage_text)
            except ValueError:
                coverage_error = "enter a number between 0 and 1, e.g. 0.9"
        if row is not None and coverage_error is None:
            outcome = try_row(model, row, coverage, settings.max_rows)
    return render_template("try.html", name=name, model=model, live=live,
                           versions=store.versions(name), fields=fields, outcome=outcome,
                           coverage_text=coverage_text, coverage_error=coverage_error)


@bp.get("/models/<name>/versions/<version>/report")
def report(name: str, version: str):
    """The version's training report, read-only; JSON 404 like the other /models routes."""
    store, _, _ = _services()
    try:
        body = store.read_report(check_name(name), check_version(version))
    except StoreError as exc:
        message = (f"model {name!r} has no version {version}" if isinstance(exc, NotFound)
                   else safe_message(store, exc))
        raise ApiError(404, "report_not_found", message) from None
    if body is None:
        raise ApiError(404, "report_not_found",
                       f"{name} v{version} has no training report (trained without one)")
    return Response(body, content_type="text/html; charset=utf-8",
                    headers={"Content-Security-Policy": REPORT_POLICY})
