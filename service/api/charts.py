"""Charts as PNG: three per version (selection, map, profiles) and the drift history of a segmentation.

Drawn by ``service.charts`` from the fit report, the stored training sample and the stored drift reports;
kept in the app's ``ChartCache``. A version is immutable, but its segment labels are not: the cache key of
a version chart holds the labels (and the artifact's SHA-256, so a re-created name never gets an old
picture); the history chart's key holds the newest report's id, so a new report gets a new chart.
"""

from __future__ import annotations

from typing import Annotated, Any, Callable

import numpy as np
from fastapi import APIRouter, Path, Request
from fastapi.responses import Response

from service import charts
from service.api.payload import check_name
from service.api.validation import StrictQuery, VersionNumber, error_responses
from service.core.assign import assign, impute
from service.deps import ChartReadScope, StoreDep
from service.errors import ChartNotFound
from service.store import BundleStore

router = APIRouter(prefix="/segmentations", tags=["charts"])

VERSION_CHARTS = ("selection", "map", "profiles")
HISTORY_REPORTS = 50          # the drift history chart shows at most this many of the newest reports
PNG_HEADERS = {"Cache-Control": "private, no-cache"}   # the server caches; browsers ask again each time
PNG_RESPONSE = {200: {"content": {"image/png": {}}, "description": "a PNG image"},
                **error_responses(401, 403, 404, 422, 503)}


def _map_png(store: BundleStore, report: dict[str, Any]) -> bytes:
    """The map of a version: its stored training sample, imputed, projected and assigned as assign does."""
    loaded = store.load(report["name"], report["version"])
    compiled = loaded.compiled
    filled, _ = impute(compiled, np.asarray(loaded.bundle.reference.sample, dtype=np.float64))
    assignment = assign(compiled, filled)
    layout = charts.map_layout(filled, compiled.project(filled), compiled.centroids, assignment.segment,
                               has_pca=report["components"] is not None,
                               explained_variance_ratio=report["explained_variance_ratio"],
                               scaling=report["config"]["scaling"])
    return charts.map_png(report, layout, assignment.segment, assignment.outlier)


DRAW_VERSION_CHART: dict[str, Callable[[BundleStore, dict[str, Any]], bytes]] = {
    "selection": lambda store, report: charts.selection_png(report),
    "map": _map_png,
    "profiles": lambda store, report: charts.profiles_png(report),
}


def version_chart_png(request: Request, store: BundleStore, name: str, version: int, chart: str) -> bytes:
    """PNG bytes of one chart of a version (from the cache when drawn before). Raises NotFound."""
    if chart not in DRAW_VERSION_CHART:
        raise ChartNotFound(chart, VERSION_CHARTS)
    report = store.version_report(check_name(name), version)
    labels = tuple(segment["label"] for segment in report["segments"])
    key = ("version", name, version, report["bundle_sha256"], chart, labels)
    cache: charts.ChartCache = request.app.state.chart_cache
    return cache.get_or_make(key, lambda: DRAW_VERSION_CHART[chart](store, report))


def history_chart_png(request: Request, store: BundleStore, name: str) -> bytes:
    settings = request.app.state.settings
    reports = store.list_drift_reports(check_name(name), version=None, limit=HISTORY_REPORTS)
    newest = reports[0]["id"] if reports else None
    key = ("history", name, newest, len(reports), settings.drift_psi_watch, settings.drift_psi_alert)
    cache: charts.ChartCache = request.app.state.chart_cache
    return cache.get_or_make(key, lambda: charts.drift_history_png(
        name, reports, psi_watch=settings.drift_psi_watch, psi_alert=settings.drift_psi_alert))


# Plain ``def`` routes: drawing is CPU work and store reads block, so FastAPI runs them in its thread pool.
@router.get("/{name}/versions/{version}/charts/{chart}.png", dependencies=[ChartReadScope, StrictQuery],
            response_class=Response, responses=PNG_RESPONSE,
            summary="A chart of a version as PNG: selection, map or profiles")
def version_chart(name: str, version: Annotated[VersionNumber, Path()], chart: str, request: Request, store: StoreDep) -> Response:
    return Response(version_chart_png(request, store, name, version, chart), media_type="image/png",
                    headers=PNG_HEADERS)


@router.get("/{name}/drift/charts/history.png", dependencies=[ChartReadScope, StrictQuery], response_class=Response,
            responses=PNG_RESPONSE, summary="Per-feature PSI of the stored drift reports over time, as PNG")
def drift_history_chart(name: str, request: Request, store: StoreDep) -> Response:
    return Response(history_chart_png(request, store, name), media_type="image/png", headers=PNG_HEADERS)
