"""create_app: routers, the error table, and the lifespan. The only place that maps errors to HTTP."""

from __future__ import annotations

import gc
import logging
from contextlib import asynccontextmanager

import anyio
import swagger_ui_bundle
from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.openapi.docs import get_swagger_ui_html
from fastapi.openapi.utils import get_openapi
from fastapi.responses import HTMLResponse, JSONResponse
from fastapi.staticfiles import StaticFiles
from starlette.exceptions import HTTPException as StarletteHTTPException

from service import __version__
from service.api import assign, drift, health, segmentations
from service.api.validation import body_model_keys, problems_from_pydantic
from service.errors import (
    AuthError,
    BadBody,
    BundleCorrupt,
    Conflict,
    InvalidInput,
    MissingKey,
    NotFound,
    PayloadTooLarge,
    ScopeDenied,
    ServiceError,
    StoreUnavailable,
    UnsupportedMediaType,
)
from service.metrics import Metrics, MetricsMiddleware
from service.settings import Settings, get_settings
from service.store import FilesystemStore

log = logging.getLogger("segscore")

# Error class -> HTTP status; lookup walks the class's MRO, so a base entry covers its subclasses.
STATUS_BY_ERROR: dict[type[ServiceError], int] = {
    BadBody: 400,
    MissingKey: 401,
    ScopeDenied: 403,
    AuthError: 401,
    NotFound: 404,
    Conflict: 409,
    PayloadTooLarge: 413,
    UnsupportedMediaType: 415,
    InvalidInput: 422,
    BundleCorrupt: 500,
    StoreUnavailable: 503,
    ServiceError: 500,
}


def status_for(error: ServiceError) -> int:
    for cls in type(error).__mro__:
        if cls in STATUS_BY_ERROR:
            return STATUS_BY_ERROR[cls]
    return 500


async def _service_error(request: Request, exc: ServiceError) -> JSONResponse:
    status = status_for(exc)
    if status >= 500:
        log.error("request failed: %s %s -> %s: %s", request.method, request.url.path, status, exc.detail)
    headers = {"WWW-Authenticate": "Bearer"} if status == 401 else None
    return JSONResponse({"detail": exc.detail}, status_code=status, headers=headers)


async def _validation_error(request: Request, exc: RequestValidationError) -> JSONResponse:
    known = body_model_keys(request.scope.get("route"))
    items = [p.as_dict() for p in problems_from_pydantic(exc.errors(), skip_prefix=("body", "query", "path"),
                                                         known_keys=known)]
    return JSONResponse({"detail": items}, status_code=422)


async def _http_error(request: Request, exc: StarletteHTTPException) -> JSONResponse:
    return JSONResponse({"detail": exc.detail}, status_code=exc.status_code, headers=getattr(exc, "headers", None))


async def _unexpected(request: Request, exc: Exception) -> JSONResponse:
    log.exception("unexpected error on %s %s", request.method, request.url.path)
    return JSONResponse({"detail": "internal error; see the server log"}, status_code=500)


def create_app(settings: Settings | None = None) -> FastAPI:
    settings = settings or get_settings()
    metrics = Metrics()

    @asynccontextmanager
    async def lifespan(app: FastAPI):
        app.state.fit_limiter = anyio.CapacityLimiter(settings.fit_concurrency)
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
        yield

    app = FastAPI(
        title="segscore",
        version=__version__,
        description="Fit and version customer segmentations; assign new records; report drift.",
        lifespan=lifespan,
        # /docs is served below from the Swagger UI files of an installed package (no CDN: it works offline);
        # ReDoc has no such package, so it is off.
        docs_url=None,
        redoc_url=None,
        exception_handlers={
            ServiceError: _service_error,
            RequestValidationError: _validation_error,
            StarletteHTTPException: _http_error,
            Exception: _unexpected,
        },
    )
    app.state.settings = settings
    app.state.store = FilesystemStore(settings.store_dir, cache_size=settings.bundle_cache_size)
    app.state.metrics = metrics
    for router in (segmentations.router, assign.router, drift.router):
        app.include_router(router, prefix="/v1")
    app.include_router(health.router)
    _offline_docs(app)
    app.add_middleware(MetricsMiddleware, metrics=metrics)
    return app


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


