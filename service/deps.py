"""Named dependencies: a route signature reads as a list of what it needs."""

from __future__ import annotations

import hmac
from typing import Annotated, Any, Callable

from fastapi import Depends, Request

from service.errors import MissingKey, ScopeDenied
from service.settings import Settings
from service.store import FilesystemStore


# Every dependency here is ``async def`` although none awaits: FastAPI runs a plain ``def`` dependency in
# its thread pool, a round trip that costs more than the assign work itself.


async def get_app_settings(request: Request) -> Settings:
    return request.app.state.settings


async def get_store(request: Request) -> FilesystemStore:
    return request.app.state.store


SettingsDep = Annotated[Settings, Depends(get_app_settings)]
StoreDep = Annotated[FilesystemStore, Depends(get_store)]


def authorize(request: Request, key: str | None, scope: str) -> None:
    """Raise unless ``key`` is a known API key carrying ``scope`` (no-op when auth is off).

    The one place that decides whether a key may do something: the API's bearer header and any other
    caller that holds a key (a console session, say) go through here.
    """
    settings: Settings = request.app.state.settings
    if not settings.auth_enabled:
        return
    if not key:
        raise MissingKey()
    scopes = None
    for known, granted in settings.api_keys.items():
        if hmac.compare_digest(known.encode(), key.strip().encode()):
            scopes = granted
    if scopes is None:
        raise MissingKey()
    if scope not in scopes:
        raise ScopeDenied(scope)


def bearer_key(request: Request) -> str | None:
    """The key of an ``Authorization: Bearer <key>`` header, or None."""
    scheme, _, key = request.headers.get("authorization", "").partition(" ")
    return key.strip() or None if scheme.lower() == "bearer" else None


# The web console keeps the key a person typed in once in this cookie (HttpOnly, SameSite=Strict; see
# service/console/pages.py), so that the pages and the chart images they show need no header.
CONSOLE_COOKIE = "segscore_console_key"


def bearer_or_console_key(request: Request) -> str | None:
    """The request's Bearer key, else the key of the console's session cookie, else None."""
    return bearer_key(request) or request.cookies.get(CONSOLE_COOKIE) or None


def require_scope(scope: str, key_of: Callable[[Request], str | None] = bearer_key) -> Any:
    """Dependency factory: the request's key (by default its bearer key) must carry ``scope`` (no-op when
    auth is off)."""

    async def check(request: Request) -> None:
        authorize(request, key_of(request), scope)

    return Depends(check)


FitScope = require_scope("fit")
ReadScope = require_scope("read")
AssignScope = require_scope("assign")
DriftScope = require_scope("drift")
# Charts are read by API clients (Bearer header) and by the console's <img> tags (session cookie).
ChartReadScope = require_scope("read", bearer_or_console_key)
