"""Versioned bundle storage (no web imports). Every caller opens its store with ``open_store(settings)``."""

from __future__ import annotations

from typing import TYPE_CHECKING

from service.store.base import BundleStore, LoadedVersion, StoreBackend
from service.store.cache import ServingCache
from service.store.filesystem import FilesystemStore

if TYPE_CHECKING:
    from service.settings import Settings

__all__ = ["BundleStore", "FilesystemStore", "LoadedVersion", "ServingCache", "StoreBackend", "open_backend",
           "open_store"]


def open_backend(settings: "Settings") -> StoreBackend:
    """The configured backend alone (no serving cache): ``local`` or ``postgres``."""
    if settings.store_backend == "postgres":
        from service.store.postgres import PostgresStore   # psycopg is imported only when it is used

        return PostgresStore(settings.database_url, settings.store_dir, pool_size=settings.database_pool_size,
                             timeout=settings.database_timeout_seconds)
    return FilesystemStore(settings.store_dir)


def open_store(settings: "Settings") -> ServingCache:
    """The store every caller uses (server, CLI, demo): the configured backend under the serving cache."""
    return ServingCache(open_backend(settings), cache_size=settings.bundle_cache_size)
