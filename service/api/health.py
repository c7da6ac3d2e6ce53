"""Liveness, readiness and metrics."""

from __future__ import annotations

from fastapi import APIRouter, Request
from fastapi.responses import JSONResponse, Response

from service.deps import StoreDep
from service.errors import ServiceError
from service.metrics import CONTENT_TYPE_LATEST

router = APIRouter(tags=["health"])


@router.get("/healthz", summary="Process alive")
def healthz() -> dict[str, str]:
    return {"status": "ok"}


@router.get("/readyz", summary="Store reachable and live bundles loadable",
            responses={503: {"description": "store unavailable, or a live version cannot be loaded (named)"}})
def readyz(store: StoreDep) -> JSONResponse:
    # A plain ``def`` (FastAPI's thread pool): the store check is a query. Versions already loaded, or loaded
    # and verified once, are not read again (see ServingCache.readiness).
    try:
        problems = store.readiness()
    except ServiceError as exc:
        return JSONResponse({"status": "unavailable", "detail": str(exc.detail)}, status_code=503)
    if problems:
        return JSONResponse({"status": "degraded", "detail": problems}, status_code=503)
    return JSONResponse({"status": "ready"})


@router.get("/metrics", summary="Prometheus text exposition")
def metrics(request: Request) -> Response:
    return Response(request.app.state.metrics.exposition(), media_type=CONTENT_TYPE_LATEST)
