"""create_app: routers, the error table, and the lifespan. The only place that maps errors to HTTP."""

from __future__ import annotations

import gc
import logging
from contextlib import asynccontextmanager

import anyio
from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from starlette.exceptions import HTTPException as StarletteHTTPException

from service import __version__
from service.api import assign, compare, drift, health, segmentations
from service.api.validation import problems_from_pydantic
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
    items = [p.as_dict() for p in problems_from_pydantic(exc.errors(), skip_prefix=("body", "query", "path"))]
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
    for router in (segmentations.router, compare.router, assign.router, drift.router):
        app.include_router(router, prefix="/v1")
    app.include_router(health.router)
    app.add_middleware(MetricsMiddleware, metrics=metrics)
    return app


