"""Prometheus metrics, one registry per app (so test apps do not share counters).

With several server processes (``segscore serve --workers N``) each worker counts in its own files under
``PROMETHEUS_MULTIPROC_DIR`` (prometheus_client's multiprocess mode; the serve command makes a fresh directory
per server start and removes it at exit), and ``/metrics``, whichever worker answers it, adds them up. The
library chooses its mode when it is first imported, from that variable, so the mode here follows it too.
"""

from __future__ import annotations

import logging
import os
import threading
import time
from bisect import bisect_left
from typing import Any, Callable, Iterable

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram, generate_latest, multiprocess
from prometheus_client.exposition import CONTENT_TYPE_LATEST

__all__ = ["CONTENT_TYPE_LATEST", "Metrics", "MetricsMiddleware", "RequestTally"]

request_log = logging.getLogger("segscore.requests")


MULTIPROCESS_DIRECTORY_VARIABLE = "PROMETHEUS_MULTIPROC_DIR"


def multiprocess_mode() -> bool:
    return bool(os.environ.get(MULTIPROCESS_DIRECTORY_VARIABLE))


LATENCY_BUCKETS = (0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 5, 10, 30, 60)


class RequestTally:
    """The per-request counters (requests by method, route and status; latency by route; records assigned by
    segmentation, version and segment; outliers by segmentation) as plain integers, added into the Prometheus
    series only when they are read (``Metrics.flush``, before each exposition).

    Per request that is one lock and a few dict updates, where the Prometheus objects cost a label look-up, a
    lock per series and, for the latency histogram, a Python loop over the buckets. Counts are added on the
    event loop and taken by ``/metrics`` from a worker thread, hence the lock. With several worker processes
    the series are written at once instead (``Metrics.tally`` is None): another worker's scrape reads them from
    the files, not from this process's memory."""

    def __init__(self, bounds: Iterable[float]) -> None:
        self.bounds = (*map(float, bounds), float("inf"))       # the histogram's upper bounds, +Inf last
        self.lock = threading.Lock()
        self.requests: dict[tuple[str, str, int], int] = {}
        self.latency: dict[str, list[float]] = {}               # route -> per-bucket counts, then the sum
        self.assigned: dict[tuple[str, int, int], int] = {}
        self.outliers: dict[str, int] = {}

    def request(self, method: str, route: str, status: int, elapsed: float) -> None:
        key = (method, route, status)
        with self.lock:
            requests = self.requests
            requests[key] = requests.get(key, 0) + 1
            series = self.latency.get(route)
            if series is None:
                series = self.latency[route] = [0] * len(self.bounds) + [0.0]
            series[bisect_left(self.bounds, elapsed)] += 1      # the first bound >= elapsed, as observe() picks
            series[-1] += elapsed

    def assigned_records(self, name: str, version: int, counts: Iterable[tuple[int, int]], flagged: int) -> None:
        with self.lock:
            assigned = self.assigned
            for segment, count in counts:
                key = (name, version, segment)
                assigned[key] = assigned.get(key, 0) + count
            if flagged:
                self.outliers[name] = self.outliers.get(name, 0) + flagged

    def take(self) -> tuple[dict, dict, dict, dict]:
        """What was counted since the last call (and start afresh)."""
        with self.lock:
            taken = self.requests, self.latency, self.assigned, self.outliers
            self.requests, self.latency, self.assigned, self.outliers = {}, {}, {}, {}
        return taken


class Metrics:
    def __init__(self) -> None:
        self.multiprocess = multiprocess_mode()
        self.registry = CollectorRegistry()
        # (gauge, function): gauges read from a function at each scrape (see ``track``)
        self._tracked: list[tuple[Any, Callable[[], float]]] = []
        self.requests = Counter("segscore_http_requests", "HTTP requests by route and status",
                                ["method", "route", "status"], registry=self.registry)
        self.latency = Histogram("segscore_http_request_seconds", "HTTP request time by route",
                                 ["route"], registry=self.registry, buckets=LATENCY_BUCKETS)
        self.assigned = Counter("segscore_records_assigned", "Records assigned, by segmentation, version and segment",
                                ["segmentation", "version", "segment"], registry=self.registry)
        self.outliers = Counter("segscore_outliers_flagged", "Assigned records flagged as outliers",
                                ["segmentation"], registry=self.registry)
        self.fits = Counter("segscore_fits", "Versions fitted", registry=self.registry)
        self.fit_seconds = Histogram("segscore_fit_duration_seconds", "Wall time of a fit (worker process included)",
                                     registry=self.registry, buckets=(0.5, 1, 2.5, 5, 10, 30, 60, 120, 300, 900, 1800))
        self.drift_reports = Counter("segscore_drift_reports", "Drift reports computed", ["status"],
                                     registry=self.registry)
        self.drift_status = Gauge("segscore_drift_status", "Status of the last drift report (0 stable, 1 watch, 2 alert)",
                                  ["segmentation"], registry=self.registry, multiprocess_mode="mostrecent")
        self.drift_psi = Gauge("segscore_drift_feature_psi", "Per-feature PSI of the last drift report",
                               ["segmentation", "feature"], registry=self.registry, multiprocess_mode="mostrecent")
        self.store_errors = Counter("segscore_store_errors", "Calls answered 503 because the store was unavailable",
                                    registry=self.registry)
        # Summed over the live workers (each holds its own copies).
        self.bundles_loaded = Gauge("segscore_bundles_loaded", "Compiled versions held in memory (all workers)",
                                    registry=self.registry, multiprocess_mode="livesum")
        self.live_queue_bytes = Gauge("segscore_live_queue_bytes", "Bytes of assigned records queued for the live "
                                      "counts and not yet tallied (all workers)", registry=self.registry,
                                      multiprocess_mode="livesum")
        self.live_inline_tallies = Gauge("segscore_live_inline_tallies", "Times the live queue passed its bound and "
                                         "an assign call tallied it itself, since start (all workers)",
                                         registry=self.registry, multiprocess_mode="livesum")

        # One server process: requests and assigned records are tallied as integers (``RequestTally``) and added
        # into the series above when /metrics reads them. Several: written to the series at once (see there).
        self.tally: RequestTally | None = None if self.multiprocess else RequestTally(LATENCY_BUCKETS)
        self._flush_lock = threading.Lock()
        # Label look-ups bound once per label set: ``labels()`` costs a lock and a tuple hash per call. Series
        # are never removed, so a bound child stays valid; the label sets are bounded by the route table, the
        # statuses and the stored versions' segments.
        self._request_series: dict[tuple[str, str, int], tuple[Any, Any]] = {}
        self._assigned_series: dict[tuple[str, int, int], Any] = {}
        self._outlier_series: dict[str, Any] = {}

        # Live drift (service/live/), over the last live_metrics_window_seconds of the merged (all-replica)
        # counts, per segmentation and live version; refreshed every live_metrics_seconds.
        live_labels = ["segmentation", "version"]
        self.live_records = Gauge("segscore_live_records", "Records assigned in the live window",
                                  live_labels, registry=self.registry, multiprocess_mode="mostrecent")
        self.live_feature_psi = Gauge("segscore_live_feature_psi", "Live PSI of a feature on its training bins",
                                      [*live_labels, "feature"], registry=self.registry, multiprocess_mode="mostrecent")
        self.live_segment_psi = Gauge("segscore_live_segment_mix_psi", "Live PSI of the segment mix",
                                      live_labels, registry=self.registry, multiprocess_mode="mostrecent")
        self.live_outlier_rate = Gauge("segscore_live_outlier_rate", "Share of live records flagged as outliers",
                                       live_labels, registry=self.registry, multiprocess_mode="mostrecent")
        self.live_status = Gauge("segscore_live_drift_status", "Status of the live drift report over the window "
                                 "(0 stable, 1 watch, 2 alert; absent under the minimum record count)",
                                 live_labels, registry=self.registry, multiprocess_mode="mostrecent")

    DRIFT_STATUS_NUMBER = {"stable": 0, "watch": 1, "alert": 2}

    def flush(self) -> None:
        """Add what the tally counted since the last flush into the Prometheus series."""
        if self.tally is None:
            return
        with self._flush_lock:            # two scrapes at once: each batch of counts is added exactly once
            requests, latency, assigned, outliers = self.tally.take()
            for (method, route, status), count in requests.items():
                self._request_series_of(method, route, status)[0].inc(count)
            for route, series in latency.items():
                histogram = self.latency.labels(route)
                # prometheus_client keeps a histogram child's per-bucket counts and sum as value objects
                # (``_buckets``, ``_sum``; what ``observe`` increments): adding the tallied counts there gives the
                # same exposition as one ``observe`` per request.
                for bucket, count in zip(histogram._buckets, series):
                    if count:
                        bucket.inc(count)
                histogram._sum.inc(series[-1])
            for (name, version, segment), count in assigned.items():
                self._assigned_series_of(name, version, segment).inc(count)
            for name, count in outliers.items():
                self._outlier_series_of(name).inc(count)

    def _assigned_series_of(self, name: str, version: int, segment: int):
        key = (name, version, segment)
        series = self._assigned_series.get(key)
        if series is None:
            series = self._assigned_series[key] = self.assigned.labels(name, str(version), str(segment))
        return series

    def _outlier_series_of(self, name: str):
        series = self._outlier_series.get(name)
        if series is None:
            series = self._outlier_series[name] = self.outliers.labels(name)
        return series

    def _request_series_of(self, method: str, route: str, status: int) -> tuple[Any, Any]:
        """(request counter, latency histogram) bound to one request's labels."""
        key = (method, route, status)
        series = self._request_series.get(key)
        if series is None:
            series = (self.requests.labels(method, route, str(status)), self.latency.labels(route))
            self._request_series[key] = series
        return series

    def request_done(self, method: str, template: str, status: int, elapsed: float, path_params: dict,
                     log_request: bool) -> None:
        """Count and time one answered request (and write its access-log line when ``log_request``): the
        middleware's end of every request, and the assign lane's (service/api/assign.py)."""
        if self.tally is not None:
            self.tally.request(method, template, status, elapsed)
        else:
            count, latency = self._request_series_of(method, template, status)
            count.inc()
            latency.observe(elapsed)
        if log_request:
            request_log.info("%s %s %s", method, template, status, extra={
                "method": method, "route": template, "status": status, "duration_ms": round(elapsed * 1000, 3),
                "segmentation": path_params.get("name"), "version": path_params.get("version")})

    def count_assigned(self, name: str, version: int, counts: Iterable[tuple[int, int]], flagged: int) -> None:
        """Add one request's records: ``counts`` holds (segment, records) pairs; ``flagged``: its outliers."""
        if self.tally is not None:
            self.tally.assigned_records(name, version, counts, flagged)
            return
        for segment, count in counts:
            self._assigned_series_of(name, version, segment).inc(count)
        if flagged:
            self._outlier_series_of(name).inc(flagged)

    def live_figures(self, figures: list[dict]) -> None:
        """Replace every live gauge by ``figures``: one dict per (segmentation, live version) with ``n_records``,
        ``feature_psi`` {feature: psi}, ``segment_psi``, ``outlier_rate`` and ``status`` (None: not enough
        records)."""
        gauges = (self.live_records, self.live_feature_psi, self.live_segment_psi, self.live_outlier_rate,
                  self.live_status)
        for gauge in gauges:
            gauge.clear()
        for item in figures:
            labels = (item["name"], str(item["version"]))
            self.live_records.labels(*labels).set(item["n_records"])
            if not item["n_records"]:
                continue
            for feature, value in item["feature_psi"].items():
                self.live_feature_psi.labels(*labels, feature).set(value)
            self.live_segment_psi.labels(*labels).set(item["segment_psi"])
            self.live_outlier_rate.labels(*labels).set(item["outlier_rate"])
            if item["status"] is not None:
                self.live_status.labels(*labels).set(self.DRIFT_STATUS_NUMBER[item["status"]])

    def drift_report(self, report: dict) -> None:
        self.drift_reports.labels(report["status"]).inc()
        self.drift_status.labels(report["name"]).set(self.DRIFT_STATUS_NUMBER.get(report["status"], -1))
        for feature in report["features"]:
            self.drift_psi.labels(report["name"], feature["name"]).set(feature["psi"])

    def track(self, gauge, value: Callable[[], float]) -> None:
        """Report ``value()`` as ``gauge``: read at each scrape with one worker; with several, each worker
        writes its own value (``sync``, called by its background loop and before it answers a scrape)."""
        self._tracked.append((gauge, value))
        if not self.multiprocess:
            gauge.set_function(value)

    def track_bundles_loaded(self, count: Callable[[], int]) -> None:
        self.track(self.bundles_loaded, count)

    def track_live_queue(self, recorder) -> None:
        """The live recorder's backlog (``service.live.recorder``): queued bytes and inline tallies."""
        self.track(self.live_queue_bytes, recorder.queued_bytes)
        self.track(self.live_inline_tallies, lambda: recorder.inline_tallies)

    def sync(self) -> None:
        if self.multiprocess:
            for gauge, value in self._tracked:
                gauge.set(value())

    def exposition(self) -> bytes:
        if not self.multiprocess:
            self.flush()
            return generate_latest(self.registry)
        self.sync()
        merged = CollectorRegistry()
        multiprocess.MultiProcessCollector(merged)
        return generate_latest(merged)

    def process_exit(self) -> None:
        """A worker that stops: its live gauges leave the sums (its counters stay counted)."""
        if self.multiprocess:
            multiprocess.mark_process_dead(os.getpid())


class MetricsMiddleware:
    """Pure ASGI middleware: counts and times every HTTP request by its route template."""

    def __init__(self, app, metrics: Metrics, log_requests: bool = False) -> None:
        self.app = app
        self.metrics = metrics
        self.log_requests = log_requests

    async def __call__(self, scope, receive, send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = time.perf_counter()
        status = [500]

        async def send_wrapper(message) -> None:
            if message["type"] == "http.response.start":
                status[0] = message["status"]
            await send(message)

        try:
            await self.app(scope, receive, send_wrapper)
        finally:
            route = scope.get("route")
            template = getattr(route, "path", "unmatched")
            # Routers are mounted under /v1 and report their path without the mount prefix.
            if scope["path"].startswith("/v1/") and template.startswith("/segmentations"):
                template = "/v1" + template
            params = scope.get("path_params") or {}
            self.metrics.request_done(scope["method"], template, status[0], time.perf_counter() - started,
                                      params, self.log_requests)
