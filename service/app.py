"""create_app: routers, the error table, and the lifespan. The only place that maps errors to HTTP."""

from __future__ import annotations

import asyncio
import gc
import logging
import os
import time
from contextlib import asynccontextmanager, suppress
from datetime import datetime, timedelta, timezone

import anyio
import swagger_ui_bundle
from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.openapi.docs import get_swagger_ui_html
from fastapi.openapi.utils import get_openapi
from fastapi.responses import HTMLResponse, JSONResponse
from fastapi.staticfiles import StaticFiles
from starlette.exceptions import HTTPException as StarletteHTTPException

from service import __version__, console
from service.api import assign, charts, compare, drift, health, jobs, segmentations
from service.api.validation import body_model_keys, problems_from_pydantic
from service.auth import KEY_POLL_SECONDS, KeyRing, is_loopback
from service.charts import ChartCache
from service.errors import (
    AuthError,
    BadBody,
    BodyTimeout,
    BundleCorrupt,
    ClusterUnavailable,
    Conflict,
    FitTimeLimit,
    FitWorkerCannotStart,
    FitWorkerDied,
    InvalidInput,
    MissingKey,
    NotFound,
    PayloadTooLarge,
    ScopeDenied,
    ServiceError,
    SourceForbidden,
    StoreUnavailable,
    UnsupportedMediaType,
)
from service.jobs import JobRunner
from service.live import open_live
from service.live.gauges import live_figures
from service.metrics import Metrics, MetricsMiddleware
from service.middleware import BodyReadTimeout, ErrorBoundary, RequestIdMiddleware
from service.settings import Settings, get_settings
from service.store import BundleStore, open_store

log = logging.getLogger("segscore")

# Error class -> HTTP status; lookup walks the class's MRO, so a base entry covers its subclasses.
STATUS_BY_ERROR: dict[type[ServiceError], int] = {
    BadBody: 400,
    MissingKey: 401,
    ScopeDenied: 403,
    AuthError: 401,
    SourceForbidden: 403,  # a fit source outside SEGSCORE_SOURCE_PREFIXES: never read
    NotFound: 404,
    BodyTimeout: 408,
    Conflict: 409,
    PayloadTooLarge: 413,
    UnsupportedMediaType: 415,
    InvalidInput: 422,
    BundleCorrupt: 500,
    FitTimeLimit: 504,     # the server's own worker did not answer in time (documented in the README)
    FitWorkerDied: 503,    # a resource failure of the server (killed, out of memory): retry later
    FitWorkerCannotStart: 503,  # the server's set-up (e.g. a TMPDIR too long for the worker's socket)
    StoreUnavailable: 503,
    ClusterUnavailable: 503,   # the Dask scheduler is unreachable or was lost: retry later
    ServiceError: 500,
}


def status_for(error: ServiceError) -> int:
    for cls in type(error).__mro__:
        if cls in STATUS_BY_ERROR:
            return STATUS_BY_ERROR[cls]
    return 500


async def _service_error(request: Request, exc: ServiceError) -> JSONResponse:
    status = status_for(exc)
    if isinstance(exc, StoreUnavailable):
        request.app.state.metrics.store_errors.inc()
    if status >= 500:
        log.error("request failed: %s %s -> %s: %s", request.method, request.url.path, status, exc.detail)
    headers = {"WWW-Authenticate": "Bearer"} if status == 401 else None
    if status == 408:
        headers = {"Connection": "close"}  # the rest of the body may still be on its way
    return JSONResponse({"detail": exc.detail}, status_code=status, headers=headers)


async def _validation_error(request: Request, exc: RequestValidationError) -> JSONResponse:
    known = body_model_keys(request.scope.get("route"))
    items = [p.as_dict() for p in problems_from_pydantic(exc.errors(), skip_prefix=("body", "query", "path"),
                                                         known_keys=known)]
    return JSONResponse({"detail": items}, status_code=422)


async def _http_error(request: Request, exc: StarletteHTTPException) -> JSONResponse:
    return JSONResponse({"detail": exc.detail}, status_code=exc.status_code, headers=getattr(exc, "headers", None))


RETENTION_EVERY_SECONDS = 3600.0
LEGACY_KEYS_VARIABLE = "SEGSCORE_API_KEYS"


def start_up_refusal(settings: Settings, keyring: KeyRing) -> str | None:
    """Why the server must not start (with the command that fixes it), or None."""
    if os.environ.get(LEGACY_KEYS_VARIABLE):
        # Keys used to be plain text in this variable; it is no longer read. Starting anyway would serve with
        # an authentication other than the one the operator set up.
        return (f"{LEGACY_KEYS_VARIABLE} is no longer read: API keys live in the store. Create one key per caller "
                f"with 'segscore keys create --store {settings.store_dir} --name NAME --scope SCOPE', hand the "
                f"new keys out, then unset {LEGACY_KEYS_VARIABLE} (README: 'Moving from SEGSCORE_API_KEYS').")
    if not keyring.has_keys and not is_loopback(settings.host):
        return (f"refusing to serve on {settings.host}: the store {settings.store_dir} has no API key, so every "
                "caller would have full access. Create one first, e.g.\n"
                f"  segscore keys create --store {settings.store_dir} --scope admin --name ops\n"
                "or bind to a loopback address (127.0.0.1) for local use without keys.")
    return None


def _prune_drift_reports(app: FastAPI) -> None:
    days = app.state.settings.drift_retention_days
    if days:
        cutoff = (datetime.now(timezone.utc) - timedelta(days=days)).strftime("%Y-%m-%dT%H:%M:%SZ")
        gone = app.state.store.prune_drift_reports(cutoff)
        if gone:
            log.info("drift-report retention (%d days): deleted %d report(s)", days, gone)


async def _maintenance(app: FastAPI, wake: asyncio.Event) -> None:
    """Background loop, off the request path: about every second (at once when the store hears of a change
    made elsewhere) bring the serving state and the API keys in step with the store; every hour apply the
    drift-report retention (it also runs once at start-up, before the first request)."""
    next_retention = anyio.current_time() + RETENTION_EVERY_SECONDS
    while True:
        try:
            await anyio.to_thread.run_sync(app.state.store.refresh)
            # A version made live elsewhere is loaded now, not by the first assign (which would then need
            # the index, and fail while the database is down).
            await anyio.to_thread.run_sync(app.state.store.warm)
            await anyio.to_thread.run_sync(app.state.keyring.refresh)
            app.state.metrics.sync()
            if anyio.current_time() >= next_retention:
                next_retention = anyio.current_time() + RETENTION_EVERY_SECONDS
                await anyio.to_thread.run_sync(_prune_drift_reports, app)
        except Exception as exc:  # a store that is briefly unreadable must not end the loop
            log.warning("background store check failed: %s", type(exc).__name__)
        with suppress(asyncio.TimeoutError):
            await asyncio.wait_for(wake.wait(), KEY_POLL_SECONDS)
        wake.clear()


async def _stop_task(task: asyncio.Task) -> None:
    """Cancel a background loop and wait for it to end. Cancelled again until it does: on Python 3.11,
    ``asyncio.wait_for`` drops a cancellation that arrives as its awaited event is set (the store watcher sets
    ``wake`` at any moment, for instance on the notification of the jobs a stopping server marks failed), and
    the loop would then run on, holding up the shutdown for ever."""
    while not task.done():
        task.cancel()
        await asyncio.wait({task}, timeout=1.0)
    with suppress(asyncio.CancelledError):
        task.result()


def _refresh_live_gauges(app: FastAPI) -> None:
    settings: Settings = app.state.settings
    app.state.live.flush()       # this replica's latest counts first
    figures = live_figures(app.state.store, window_seconds=settings.live_metrics_window_seconds,
                           bucket_seconds=settings.live_bucket_seconds, now=time.time(),
                           rules=drift.drift_rules(settings), min_records=settings.drift_min_rows)
    app.state.metrics.live_figures(figures)


async def _live_gauges(app: FastAPI) -> None:
    """Background loop: every live_metrics_seconds, the live Prometheus gauges from the merged counts."""
    while True:
        try:
            await anyio.to_thread.run_sync(_refresh_live_gauges, app)
        except Exception as exc:  # a store that is briefly unreadable must not end the loop
            log.warning("live drift gauges not refreshed: %s", type(exc).__name__)
        await asyncio.sleep(app.state.settings.live_metrics_seconds)


class ServiceApp(FastAPI):
    """The FastAPI app with the assign lane (service/api/assign.py, ``AssignLane``) outside its middleware stack:
    the assign hot path is answered before Starlette's error layers, the service's middlewares and the router;
    every other request goes through them as before. The FastAPI route stays the documented one."""

    def build_middleware_stack(self):
        return assign.AssignLane(super().build_middleware_stack(), self)


def create_app(settings: Settings | None = None, store: BundleStore | None = None) -> FastAPI:
    """The application. ``store``: an open store (its caller closes it); default ``open_store(settings)``,
    which the app closes when it shuts down."""
    settings = settings or get_settings()
    metrics = Metrics()
    owns_store = store is None

    @asynccontextmanager
    async def lifespan(app: FastAPI):
        keyring: KeyRing = app.state.keyring
        refusal = start_up_refusal(settings, keyring)
        if refusal:
            raise RuntimeError(refusal)
        if not keyring.has_keys:
            log.warning("no API key in the store %s: authentication is OFF; serving open on the loopback "
                        "address %s only. Create a key with 'segscore keys create --store %s --scope admin "
                        "--name NAME' to turn it on.", settings.store_dir, settings.host, settings.store_dir)
        await anyio.to_thread.run_sync(_prune_drift_reports, app)
        # Every server process loads the live versions before it takes requests (each worker has its own cache).
        try:
            problems = await anyio.to_thread.run_sync(app.state.store.warm)
        except StoreUnavailable:
            problems = []          # /readyz says so; the background loop tries again
        for problem in problems:
            log.warning("live version '%s' version %d not loaded at start-up: %s", problem["segmentation"],
                        problem["version"], problem["message"])
        loop, wake = asyncio.get_running_loop(), asyncio.Event()
        app.state.store.watch(lambda: loop.call_soon_threadsafe(wake.set))
        maintenance = loop.create_task(_maintenance(app, wake))
        app.state.live.start()
        gauges = loop.create_task(_live_gauges(app)) if app.state.live.enabled else None
        keyring.refreshed_in_background = True
        app.state.fit_limiter = anyio.CapacityLimiter(settings.fit_concurrency)
        # Background fits share the fit slots with synchronous ones; jobs of a killed server are failed here.
        await app.state.jobs.start(app.state.fit_limiter)
        # Bodies over large_body_bytes are read and parsed by at most this many requests at once; the others
        # wait their turn before their body is read, so memory stays bounded (see README, "Limits").
        app.state.large_body_limiter = anyio.CapacityLimiter(settings.large_body_concurrency)
        if settings.gc_gen0_threshold:
            # A 10,000-record body is ~20,000 new containers; at Python's default gen-0 threshold (700) the
            # cyclic collector runs dozens of times per request and now and then walks the whole heap.
            # Request data holds no cycles, so collect less often, and move start-up objects (modules,
            # cached bundles) out of the collector's reach.
            gc.freeze()
            gc.set_threshold(settings.gc_gen0_threshold, *gc.get_threshold()[1:])
        try:
            yield
        finally:
            keyring.refreshed_in_background = False
            await app.state.jobs.stop()
            await _stop_task(maintenance)
            if gauges is not None:
                await _stop_task(gauges)
            await anyio.to_thread.run_sync(app.state.live.stop)     # flushes what is left
            if owns_store:
                await anyio.to_thread.run_sync(app.state.store.close)
            metrics.process_exit()

    app = ServiceApp(
        title="segscore",
        version=__version__,
        description="Fit and version customer segmentations; assign new records; report drift.",
        lifespan=lifespan,
        # Unexpected exceptions are caught by ErrorBoundary (below), not by an ``Exception`` handler here:
        # Starlette re-raises after such a handler, and the server then drops the keep-alive connection.
        exception_handlers={
            ServiceError: _service_error,
            RequestValidationError: _validation_error,
            StarletteHTTPException: _http_error,
        },
        # /docs is served below from the Swagger UI files of an installed package (no CDN: it works offline);
        # ReDoc has no such package, so it is off.
        docs_url=None,
        redoc_url=None,
        # Metrics are Prometheus (service/metrics.py); FastAPI's OpenTelemetry hooks would otherwise ask the
        # global OTel providers on every request whether they are configured.
        telemetry={"tracing": False, "metrics": False, "logs": False},
        openapi_url="/openapi.json" if settings.docs_enabled else None,
    )
    app.state.settings = settings
    app.state.store = store if store is not None else open_store(settings)
    app.state.keyring = KeyRing(app.state.store, open_without_keys=is_loopback(settings.host))
    legacy = getattr(app.state.store, "legacy_versions", lambda: [])()    # the local backend's only
    if legacy:
        log.warning("%d version(s) are stored in the legacy pickle format, which the server does not load "
                    "(first: '%s' version %d); convert them once with 'segscore upgrade-store --store %s'",
                    len(legacy), *legacy[0], settings.store_dir)
    app.state.metrics = metrics
    app.state.jobs = JobRunner(app.state.store, settings, metrics)
    metrics.track_bundles_loaded(lambda: app.state.store.loaded_count())
    app.state.live = open_live(settings, app.state.store)
    metrics.track_live_queue(app.state.live)
    app.state.chart_cache = ChartCache(settings.chart_cache_size)
    for router in (segmentations.router, compare.router, assign.router, drift.router, charts.router, jobs.router):
        app.include_router(router, prefix="/v1")
    app.include_router(health.router)
    console.install(app)
    if settings.docs_enabled:
        _offline_docs(app)
    # The last added is the outermost: the request id is set before anything else runs (so every log line
    # of the request carries it), metrics count the boundary's 500s, and the body timer is innermost.
    app.add_middleware(BodyReadTimeout, seconds=settings.body_read_timeout_seconds)
    app.add_middleware(ErrorBoundary)
    app.add_middleware(MetricsMiddleware, metrics=metrics, log_requests=settings.access_log)
    app.add_middleware(RequestIdMiddleware)
    _build_routes_now(app)
    return app


def worker_app() -> FastAPI:
    """The application of one worker process of ``segscore serve --workers N`` (uvicorn imports this factory
    in each worker; the settings come from the ``SEGSCORE_*`` variables that ``serve`` passed on)."""
    from service.cli import pin_blas_threads
    from service.logs import configure_logging

    settings = get_settings()
    configure_logging(settings.log_level, settings.log_format)
    pin_blas_threads()
    return create_app(settings)


DOCS_ASSETS = "/docs-assets"


def _offline_docs(app: FastAPI) -> None:
    """Swagger UI at /docs from the ``swagger-ui-bundle`` package's files, and a bearer security scheme."""
    app.mount(DOCS_ASSETS, StaticFiles(directory=swagger_ui_bundle.swagger_ui_path), name="docs-assets")

    @app.get("/docs", include_in_schema=False)
    async def docs() -> HTMLResponse:
        return get_swagger_ui_html(
            openapi_url=app.openapi_url, title=f"{app.title} - API",
            swagger_js_url=f"{DOCS_ASSETS}/swagger-ui-bundle.js", swagger_css_url=f"{DOCS_ASSETS}/swagger-ui.css",
            swagger_favicon_url=f"{DOCS_ASSETS}/favicon-32x32.png",
            swagger_ui_parameters={"validatorUrl": None})

    def openapi() -> dict:
        if app.openapi_schema is None:
            schema = get_openapi(title=app.title, version=app.version, description=app.description,
                                 routes=app.routes)
            # Keys (when configured) go in 'Authorization: Bearer <key>' on every /v1 route.
            schema.setdefault("components", {})["securitySchemes"] = {
                "bearer": {"type": "http", "scheme": "bearer",
                           "description": "an API key; needed on /v1 routes when keys are configured"}}
            for path, operations in schema["paths"].items():
                if path.startswith("/v1/"):
                    for operation in operations.values():
                        operation["security"] = [{"bearer": []}]
            app.openapi_schema = schema
        return app.openapi_schema

    app.openapi = openapi


def _build_routes_now(app: FastAPI) -> None:
    """Build every included route's request model now, in one thread.

    FastAPI builds an included router's routes on the first request that reaches it. Concurrent first requests
    to two routers then build models from the same shared annotations (``VersionNumber``) at once, and
    pydantic sees a field changed under it (seen as a warning turned 500 in a test of four simultaneous
    drift posts). Matching a path no route has walks every router and builds them all.
    """
    scope = {"type": "http", "path": "/", "method": "GET", "headers": [], "root_path": "", "query_string": b""}
    for route in app.router.routes:
        route.matches(dict(scope))
