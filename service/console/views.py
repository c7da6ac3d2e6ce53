"""What the console's tables show, computed from reports (plain dicts in, plain dicts out; no web imports)."""

from __future__ import annotations

from typing import Any

DISTINCTIVE_FEATURES = 3     # features listed per segment: those whose mean lies furthest from the overall mean
WORST_FEATURES = 3           # features listed per drift report: the largest PSI


def segment_rows(report: dict[str, Any]) -> list[dict[str, Any]]:
    """One row per segment: id, label, size, share and its most distinctive features (largest |z|)."""
    rows = []
    for segment in report["segments"]:
        scored = [(name, item["z"], item["mean"]) for name, item in segment["profile"].items() if item["z"] is not None]
        scored.sort(key=lambda entry: (-abs(entry[1]), entry[0]))
        rows.append({
            "id": segment["id"], "label": segment["label"], "size": segment["size"], "share": segment["share"],
            "distinctive": [{"feature": name, "z": z, "mean": mean} for name, z, mean in scored[:DISTINCTIVE_FEATURES]],
        })
    return rows


def drift_rows(reports: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """One row per stored drift report (newest first): when, version, size, status of each item, worst PSI."""
    rows = []
    for report in reports:
        worst = sorted(report["features"], key=lambda item: -item["psi"])[:WORST_FEATURES]
        rows.append({
            "id": report["id"], "created_at": report["created_at"], "version": report["version"],
            "n_records": report["n_records"], "status": report["status"],
            "segments_status": report["segments"]["status"], "outliers_status": report["outliers"]["status"],
            "worst": [{"feature": item["name"], "psi": item["psi"], "status": item["status"]} for item in worst],
        })
    return rows


EVENT_TIME_FIELDS = ("at", "created_at", "time", "timestamp")
EVENT_KIND_FIELDS = ("kind", "type", "event", "action")


def event_rows(events: list[Any]) -> list[dict[str, Any]]:
    """Events of a segmentation, whatever fields they carry: a time, a kind, and the rest as details."""
    rows = []
    for event in events:
        if not isinstance(event, dict):
            rows.append({"time": "", "kind": "", "details": [("event", str(event))]})
            continue
        time_field = next((f for f in EVENT_TIME_FIELDS if f in event), None)
        kind_field = next((f for f in EVENT_KIND_FIELDS if f in event), None)
        details = [(key, value) for key, value in event.items() if key not in (time_field, kind_field)]
        rows.append({"time": event.get(time_field, "") if time_field else "",
                     "kind": event.get(kind_field, "") if kind_field else "", "details": details})
    return rows
