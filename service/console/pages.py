"""Console pages: the list of segmentations, one segmentation (a version of it), one drift report, login.

Read-only: the only form that posts is the login (and its logout twin, which only forgets the session).

Sessions. With API keys configured, a page asks once for a key with the ``read`` scope. The key itself is
kept in a session cookie (no Max-Age: it ends with the browser session) that is HttpOnly (page scripts
cannot read it), SameSite=Strict (other sites' pages cannot make the browser send it), Path=/ (the chart
images under /v1 need it too) and Secure when the console is served over https. Keeping the key rather
than a signed token means no server-side secret to manage, and every request checks the key again through
``service.deps.authorize``: a key that is revoked stops working in the console at once. A ``Bearer``
header works as well as the cookie.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any
from urllib.parse import parse_qs, quote

from fastapi import APIRouter, Query, Request
from fastapi.responses import RedirectResponse, Response
from fastapi.templating import Jinja2Templates

from service.api.charts import HISTORY_REPORTS, VERSION_CHARTS
from service.api.drift import MAX_LIST_LIMIT
from service.api.payload import check_name
from service.console.views import drift_rows, event_rows, segment_rows
from service.deps import CONSOLE_COOKIE, StoreDep, authorize, bearer_or_console_key
from service.errors import AuthError, DriftReportNotFound, NotFound, ScopeDenied
from service.store import BundleStore

HERE = Path(__file__).parent
STATIC_DIR = HERE / "static"
TEMPLATES = Jinja2Templates(directory=HERE / "templates")
# '2026-12-02T06:09:29Z' -> '2026-12-02 06:09:29' (the column headers say UTC).
TEMPLATES.env.filters["when"] = lambda stamp: str(stamp).replace("T", " ").removesuffix("Z")

router = APIRouter(prefix="/console", include_in_schema=False)

DRIFT_ROWS_SHOWN = 20
MAX_LOGIN_BODY = 8192
# Pages carry data: no caching by anyone; no framing; only our own styles and images; forms post here.
PAGE_HEADERS = {
    "Cache-Control": "no-store",
    "Content-Security-Policy": "default-src 'none'; style-src 'self'; img-src 'self'; form-action 'self'; "
                               "frame-ancestors 'none'; base-uri 'none'",
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "same-origin",
}


def _page(request: Request, template: str, status: int = 200, **context: Any) -> Response:
    context.setdefault("auth_enabled", request.app.state.keyring.auth_required)
    return TEMPLATES.TemplateResponse(request, template, context, status_code=status, headers=PAGE_HEADERS)


def _safe_next(target: str | None) -> str:
    """Where to go after logging in: a console path only (never another site, never '//host')."""
    if target and target.startswith("/console") and "//" not in target and "\\" not in target:
        return target
    return "/console"


def _login_form(request: Request, *, status: int, message: str | None, next_path: str) -> Response:
    response = _page(request, "login.html", status=status, message=message, next_path=next_path)
    if request.cookies.get(CONSOLE_COOKIE):
        response.delete_cookie(CONSOLE_COOKIE, path="/", httponly=True, samesite="strict")
    return response


def _login_needed(request: Request) -> Response | None:
    """The login form (401 or 403) unless the request carries a key with ``read``; None when it does."""
    key = bearer_or_console_key(request)
    try:
        authorize(request, key, "read")
    except AuthError as exc:
        if isinstance(exc, ScopeDenied):
            status, message = 403, "That key does not carry the 'read' scope; enter one that does."
        elif key:
            status, message = 401, "That key is not accepted (unknown, or no longer valid)."
        else:
            status, message = 401, None
        path = request.url.path + (f"?{request.url.query}" if request.url.query else "")
        return _login_form(request, status=status, message=message, next_path=_safe_next(path))
    return None


def _not_found(request: Request, error: NotFound) -> Response:
    return _page(request, "not_found.html", status=404, message=error.detail)


# --------------------------------------------------------------------------- session
@router.get("/login")
def login_form(request: Request, next_path: str | None = Query(None, alias="next")) -> Response:
    if not request.app.state.keyring.auth_required:
        return RedirectResponse(_safe_next(next_path), status_code=303)
    return _page(request, "login.html", message=None, next_path=_safe_next(next_path))


@router.post("/login")
async def login(request: Request) -> Response:
    body = await request.body()
    form = parse_qs(body[:MAX_LOGIN_BODY].decode("utf-8", errors="replace"))
    key = form.get("key", [""])[0].strip()
    next_path = _safe_next(form.get("next", [None])[0])
    if not request.app.state.keyring.auth_required:
        return RedirectResponse(next_path, status_code=303)
    try:
        authorize(request, key, "read")
    except ScopeDenied:
        return _login_form(request, status=403, next_path=next_path,
                           message="That key does not carry the 'read' scope; enter one that does.")
    except AuthError:
        return _login_form(request, status=401, next_path=next_path,
                           message="That key is not accepted." if key else "Enter a key.")
    response = RedirectResponse(next_path, status_code=303)
    response.set_cookie(CONSOLE_COOKIE, key, path="/", httponly=True, samesite="strict",
                        secure=request.url.scheme == "https")
    return response


@router.post("/logout")
def logout() -> Response:
    response = RedirectResponse("/console/login", status_code=303)
    response.delete_cookie(CONSOLE_COOKIE, path="/", httponly=True, samesite="strict")
    return response


# --------------------------------------------------------------------------- pages
@router.get("")
def segmentations_page(request: Request, store: StoreDep) -> Response:
    if (login := _login_needed(request)) is not None:
        return login
    rows = []
    for segmentation in store.list_segmentations():
        newest = store.list_drift_reports(segmentation["name"], version=None, limit=1)
        rows.append({**segmentation, "last_drift": newest[0] if newest else None})
    return _page(request, "segmentations.html", segmentations=rows)


def _shown_version(store: BundleStore, detail: dict[str, Any], version: int | None) -> int:
    """The version a segmentation page shows: the one asked for, else the live one, else the newest."""
    if version is not None:
        return store.resolve_version(detail["name"], version)
    return detail["live_version"] or detail["latest_version"]


def chart_urls(name: str, version: int) -> dict[str, str]:
    base = f"/v1/segmentations/{quote(name)}"
    urls = {chart: f"{base}/versions/{version}/charts/{chart}.png" for chart in VERSION_CHARTS}
    urls["history"] = f"{base}/drift/charts/history.png"
    return urls


@router.get("/segmentations/{name}")
def segmentation_page(request: Request, name: str, store: StoreDep, version: int | None = None) -> Response:
    if (login := _login_needed(request)) is not None:
        return login
    try:
        detail = store.get_segmentation(check_name(name))
        shown = _shown_version(store, detail, version)
        report = store.version_report(name, shown)
    except NotFound as error:
        return _not_found(request, error)
    reports = store.list_drift_reports(name, version=None, limit=DRIFT_ROWS_SHOWN)
    return _page(request, "segmentation.html", segmentation=detail, report=report, shown=shown,
                 segments=segment_rows(report), events=event_rows(detail.get("events") or []),
                 has_events="events" in detail, drift=drift_rows(reports), charts=chart_urls(name, shown),
                 history_reports=HISTORY_REPORTS)


@router.get("/segmentations/{name}/drift/{report_id}")
def drift_report_page(request: Request, name: str, report_id: str, store: StoreDep) -> Response:
    if (login := _login_needed(request)) is not None:
        return login
    try:
        # The store lists reports but has no look-up by id; the newest MAX_LIST_LIMIT are searched.
        reports = store.list_drift_reports(check_name(name), version=None, limit=MAX_LIST_LIMIT)
        report = next((r for r in reports if r["id"] == report_id), None)
        if report is None:
            raise DriftReportNotFound(name, report_id)
    except NotFound as error:
        return _not_found(request, error)
    labels = store.labels(name, report["version"])
    segments = [{"id": i, "label": labels.get(i), "expected": expected, "observed": observed}
                for i, (expected, observed) in enumerate(zip(report["segments"]["expected_share"],
                                                              report["segments"]["observed_share"]))]
    return _page(request, "drift_report.html", name=name, report=report, segments=segments)
