"""A live drift report over a time window: read the merged counts from the store, then compute the report."""

from __future__ import annotations

import re
from datetime import datetime, timezone
from typing import Any

import numpy as np

from service.core.drift import DriftRules
from service.errors import InvalidInput, RecordProblem
from service.live.counts import read_counts
from service.live.recorder import layout_of
from service.live.report import TESTS_CHANGED, compute_live_drift

_WINDOW = re.compile(r"^\s*(\d{1,9})\s*([smhd])\s*$")
_UNIT_SECONDS = {"s": 1, "m": 60, "h": 3600, "d": 86_400}


def parse_window(text: str, *, max_seconds: int) -> int:
    """'90s', '30m', '1h', '7d' -> seconds; anything else, or a window longer than ``max_seconds``, is a 422."""
    match = _WINDOW.match(text or "")
    if not match:
        raise InvalidInput([RecordProblem(None, "window", f"'{text}' is not a window: write a whole number and a "
                                          "unit, s, m, h or d (e.g. 30m, 1h, 7d)")])
    seconds = int(match.group(1)) * _UNIT_SECONDS[match.group(2)]
    if seconds <= 0 or seconds > max_seconds:
        raise InvalidInput([RecordProblem(None, "window", f"the window must be between 1 s and the live-count "
                                          f"retention ({max_seconds // 86_400} days, setting "
                                          "SEGSCORE_LIVE_RETENTION_DAYS)")])
    return seconds


def _iso(seconds: float) -> str:
    return datetime.fromtimestamp(seconds, timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def window_counts(store, loaded, layout, *, since: int) -> np.ndarray:
    """The merged count vector of one version over the buckets starting at or after ``since`` (unix seconds)."""
    counts = np.zeros(layout.n_slots, dtype=np.int64)
    for slot, count in store.live_counts(loaded.name, loaded.version, since=since).items():
        if 0 <= slot < layout.n_slots:
            counts[slot] += count
    return counts


def live_drift_report(store, loaded, labels: dict[int, str], *, window_text: str, window_seconds: int,
                      bucket_seconds: int, now: float, rules: DriftRules, min_records: int) -> dict[str, Any]:
    """The live report of ``loaded`` over the buckets that start within the last ``window_seconds``.

    A bucket is counted whole or not at all: the window starts at the first bucket boundary at or after
    ``now - window_seconds`` (given as ``live.from``). Fewer than ``min_records`` records: a 422 that says so.
    """
    start = -(-int(now - window_seconds) // bucket_seconds) * bucket_seconds     # first boundary at or after
    layout = layout_of(loaded)
    counts = read_counts(layout, window_counts(store, loaded, layout, since=start))
    if counts.n_records < min_records:
        raise InvalidInput([RecordProblem(None, "window", f"the window {window_text} holds {counts.n_records} "
                                          f"assigned records of '{loaded.name}' version {loaded.version}; a drift "
                                          f"report needs at least {min_records} (setting SEGSCORE_DRIFT_MIN_ROWS): "
                                          "widen the window or wait for more traffic")])
    body = compute_live_drift(loaded.bundle.reference, loaded.bundle.features, layout, counts, rules=rules,
                              residual_available=loaded.compiled.has_residual, labels=labels)
    body["live"] = {"window": window_text.strip(), "window_seconds": window_seconds, "from": _iso(start),
                    "to": _iso(now), "bucket_seconds": bucket_seconds, "n_records": counts.n_records,
                    "tests_changed": TESTS_CHANGED}
    return body
