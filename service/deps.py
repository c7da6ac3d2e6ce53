"""Named dependencies: a route signature reads as a list of what it needs."""

from __future__ import annotations

from typing import Annotated, Any, Callable

from fastapi import Depends, Request

from service.auth import LOCAL_ACTOR, SCOPES, KeyRing
from service.errors import MissingKey, ScopeDenied
from service.settings import Settings
from service.store import BundleStore


# Every dependency here is ``async def`` although none awaits: FastAPI runs a plain ``def`` dependency in
# its thread pool, a round trip that costs more than the assign work itself.


async def get_app_settings(request: Request) -> Settings:
    return request.app.state.settings


async def get_store(request: Request) -> BundleStore:
    return request.app.state.store


SettingsDep = Annotated[Settings, Depends(get_app_settings)]
StoreDep = Annotated[BundleStore, Depends(get_store)]


def authorize(request: Request, key: str | None, scope: str) -> None:
    """Raise unless ``key`` is a known API key carrying ``scope`` (or ``admin``); no-op when auth is off.

    The API's bearer header and any other caller that holds a key (a console session, say) go through here
    (the assign lane, which has no Request, through ``actor_of``). On success the key's name is the request's
    actor (``request.state.actor``), recorded with every write.
    """
    request.state.actor = actor_of(request.app.state.keyring, key, scope)


def actor_of(keyring: KeyRing, key: str | None, scope: str) -> str:
    """The one place that decides whether a key may do something: the key's name when ``key`` is a known API
    key carrying ``scope`` (or ``admin``), ``LOCAL_ACTOR`` when auth is off; else MissingKey or ScopeDenied."""
    if not keyring.auth_required:
        return LOCAL_ACTOR
    caller = keyring.caller(key.strip()) if key else None
    if caller is None:
        raise MissingKey()
    if not caller.may(scope):
        raise ScopeDenied(scope)
    return caller.name


def bearer_key(request: Request) -> str | None:
    """The key of an ``Authorization: Bearer <key>`` header, or None."""
    return key_of_authorization(request.headers.get("authorization", ""))


def key_of_authorization(header: str) -> str | None:
    """The key of an ``Authorization`` header's value when its scheme is Bearer, or None."""
    scheme, _, key = header.partition(" ")
    return key.strip() or None if scheme.lower() == "bearer" else None


# The web console keeps the key a person typed in once in this cookie (HttpOnly, SameSite=Strict; see
# service/console/pages.py), so that the pages and the chart images they show need no header.
CONSOLE_COOKIE = "segscore_console_key"


def bearer_or_console_key(request: Request) -> str | None:
    """The request's Bearer key, else the key of the console's session cookie, else None."""
    return bearer_key(request) or request.cookies.get(CONSOLE_COOKIE) or None


def require_scope(scope: str, key_of: Callable[[Request], str | None] = bearer_key) -> Any:
    """Dependency factory: the request's key (by default its bearer key) must carry ``scope`` (no-op when
    auth is off).

    The check function carries ``required_scope`` so that the route table says which scope each route
    needs (the authorization test reads it; a /v1 route without one fails that test)."""
    if scope not in SCOPES:
        raise ValueError(f"unknown scope {scope!r}; known: {SCOPES}")

    async def check(request: Request) -> None:
        authorize(request, key_of(request), scope)

    check.required_scope = scope  # type: ignore[attr-defined]
    return Depends(check)


async def get_actor(request: Request) -> str:
    """Who makes this write: the verified key's name, or 'local' when auth is off (set by ``authorize``)."""
    return getattr(request.state, "actor", LOCAL_ACTOR)


ActorDep = Annotated[str, Depends(get_actor)]

FitScope = require_scope("fit")
ReadScope = require_scope("read")
AssignScope = require_scope("assign")
DriftScope = require_scope("drift")
AdminScope = require_scope("admin")
# Charts are read by API clients (Bearer header) and by the console's <img> tags (session cookie).
ChartReadScope = require_scope("read", bearer_or_console_key)
