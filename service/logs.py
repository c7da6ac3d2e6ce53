"""Request ids in log lines: a context variable set per request, and a filter that puts it on every record.

The id is the caller's ``X-Request-ID`` when it is a short token of safe characters (so it cannot forge log
lines or smuggle data), else a new random one; the response echoes it. Log lines never carry record values:
the service logs routes, statuses, counts and its own messages only.
"""

from __future__ import annotations

import logging
import re
import uuid
from contextvars import ContextVar

REQUEST_ID_HEADER = "x-request-id"
REQUEST_ID_PATTERN = re.compile(r"^[A-Za-z0-9._:-]{1,128}$")
NO_REQUEST = "-"
LOG_FORMAT = "%(asctime)s %(levelname)s %(name)s [%(request_id)s]: %(message)s"

request_id_var: ContextVar[str] = ContextVar("request_id", default=NO_REQUEST)


def request_id_from(value: str | None) -> str:
    """The caller's id if it is acceptable, else a new one."""
    if value is not None and REQUEST_ID_PATTERN.fullmatch(value):
        return value
    return uuid.uuid4().hex


class RequestIdFilter(logging.Filter):
    """Adds ``record.request_id`` (the current request's id, or '-') to every record it sees."""

    def filter(self, record: logging.LogRecord) -> bool:
        record.request_id = request_id_var.get()
        return True


def configure_logging(level: str = "info") -> None:
    """One stderr handler on the root logger, with the request id in every line (uvicorn's loggers
    propagate to it when uvicorn is started with ``log_config=None``)."""
    root = logging.getLogger()
    for handler in root.handlers:
        if any(isinstance(f, RequestIdFilter) for f in handler.filters):
            return
    handler = logging.StreamHandler()
    handler.addFilter(RequestIdFilter())
    handler.setFormatter(logging.Formatter(LOG_FORMAT))
    root.addHandler(handler)
    root.setLevel(level.upper())

