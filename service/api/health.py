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
    problems = []
    try:
        store.check()
        for row in store.list_segmentations():
            if row["live_version"] is None:
                continue
            try:
                store.load(row["name"], row["live_version"])
            except ServiceError as exc:
                problems.append({"segmentation": row["name"], "version": row["live_version"], "message": str(exc.detail)})
    except ServiceError as exc:
        return JSONResponse({"status": "unavailable", "detail": str(exc.detail)}, status_code=503)
    if problems:
        return JSONResponse({"status": "degraded", "detail": problems}, status_code=503)
    return JSONResponse({"status": "ready"})


@router.get("/metrics", summary="Prometheus text exposition")
def metrics(request: Request) -> Response:
    return Response(request.app.state.metrics.exposition(), media_type=CONTENT_TYPE_LATEST)
