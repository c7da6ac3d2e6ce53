"""The live figures behind the Prometheus gauges: for every live version, the live report over the metrics
window, from the merged counts of every replica (so each replica exports the same figures)."""

from __future__ import annotations

import logging
from typing import Any

from service.core.drift import DriftRules
from service.errors import InvalidInput, ServiceError
from service.live.window import live_drift_report

log = logging.getLogger("segscore.live")


def live_figures(store, *, window_seconds: int, bucket_seconds: int, now: float, rules: DriftRules,
                 min_records: int) -> list[dict[str, Any]]:
    """One dict per segmentation with a live version (see ``Metrics.live_figures``)."""
    figures = []
    for segmentation in store.list_segmentations():
        name, version = segmentation["name"], segmentation["live_version"]
        if version is None:
            continue
        try:
            loaded = store.load(name, version)
            report = live_drift_report(store, loaded, {}, window_text=f"{window_seconds}s",
                                       window_seconds=window_seconds, bucket_seconds=bucket_seconds, now=now,
                                       rules=rules, min_records=1)
        except InvalidInput:                     # no record in the window
            figures.append({"name": name, "version": version, "n_records": 0})
            continue
        except ServiceError as exc:              # a version that cannot be loaded: no figures for it
            log.warning("live figures of '%s' version %s: %s", name, version, type(exc).__name__)
            continue
        figures.append({
            "name": name, "version": version, "n_records": report["n_records"],
            "feature_psi": {row["name"]: row["psi"] for row in report["features"]},
            "segment_psi": report["segments"]["psi"],
            "outlier_rate": report["outliers"]["observed_rate"],
            "status": report["status"] if report["n_records"] >= min_records else None,
        })
    return figures
