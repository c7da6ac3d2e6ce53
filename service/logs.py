"""Request ids in log lines: a context variable set per request, and a filter that puts it on every record.

The id is the caller's ``X-Request-ID`` when it is a short token of safe characters (so it cannot forge log
lines or smuggle data), else a new random one; the response echoes it. Log lines never carry record values:
the service logs routes, statuses, counts and its own messages only.
"""

from __future__ import annotations

import json
import logging
import re
from contextvars import ContextVar
from datetime import datetime, timezone
from random import randbytes

REQUEST_ID_HEADER = "x-request-id"
REQUEST_ID_PATTERN = re.compile(r"^[A-Za-z0-9._:-]{1,128}$")
NO_REQUEST = "-"
LOG_FORMAT = "%(asctime)s %(levelname)s %(name)s [%(request_id)s]: %(message)s"

request_id_var: ContextVar[str] = ContextVar("request_id", default=NO_REQUEST)


def request_id_from(value: str | None) -> str:
    """The caller's id if it is acceptable, else a new one."""
    if value is not None and REQUEST_ID_PATTERN.fullmatch(value):
        return value
    # 128 random bits as 32 hex digits from the process's Mersenne Twister (seeded from os.urandom at start,
    # reseeded in forked children): an id need only be unique, not secret, and this costs under half of a
    # getrandom system call per request (0.4 vs 0.9 us).
    return randbytes(16).hex()


class RequestIdFilter(logging.Filter):
    """Adds ``record.request_id`` (the current request's id, or '-') to every record it sees."""

    def filter(self, record: logging.LogRecord) -> bool:
        record.request_id = request_id_var.get()
        return True


class JsonFormatter(logging.Formatter):
    """One JSON object a line: timestamp (UTC), level, logger, request id, message, and the request fields
    of a request line (method, route, status, duration_ms, segmentation, version) where the record has them."""

    REQUEST_FIELDS = ("method", "route", "status", "duration_ms", "segmentation", "version")

    def format(self, record: logging.LogRecord) -> str:
        entry = {
            "timestamp": datetime.fromtimestamp(record.created, timezone.utc).isoformat(timespec="milliseconds")
            .replace("+00:00", "Z"),
            "level": record.levelname.lower(),
            "logger": record.name,
            "request_id": getattr(record, "request_id", NO_REQUEST),
            "message": record.getMessage(),
        }
        for field in self.REQUEST_FIELDS:
            value = getattr(record, field, None)
            if value is not None:
                entry[field] = value
        if record.exc_info and record.exc_info[0] is not None:
            entry["error"] = record.exc_info[0].__name__     # the class only: a traceback may hold values
        return json.dumps(entry, default=str)


def formatter(log_format: str) -> logging.Formatter:
    return JsonFormatter() if log_format == "json" else logging.Formatter(LOG_FORMAT)


def configure_logging(level: str = "info", log_format: str = "text") -> None:
    """One stderr handler on the root logger, with the request id in every line (uvicorn's loggers
    propagate to it when uvicorn is started with ``log_config=None``); ``log_format`` "json" or "text"."""
    root = logging.getLogger()
    root.setLevel(level.upper())
    for handler in root.handlers:
        if any(isinstance(f, RequestIdFilter) for f in handler.filters):
            handler.setFormatter(formatter(log_format))
            return
    handler = logging.StreamHandler()
    handler.addFilter(RequestIdFilter())
    handler.setFormatter(formatter(log_format))
    root.addHandler(handler)
