"""The store interface the HTTP layer and the CLI talk to (``BundleStore``), and what a backend implements
(``StoreBackend``).

Callers (routes, dependencies, the CLI) are typed to ``BundleStore`` and get one from
``service.store.open_store(settings)``: a ``ServingCache`` (service/store/cache.py) over the configured backend,
``local`` (service/store/filesystem.py: SQLite + files) or ``postgres`` (service/store/postgres.py).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Protocol

from service.core.assign import CompiledBundle
from service.core.bundle import Bundle
from service.core.serving import ServingBundle


@dataclass(frozen=True)
class LoadedVersion:
    name: str
    version: int
    bundle: ServingBundle            # the fitted bundle without its scikit-learn objects
    compiled: CompiledBundle


@dataclass(frozen=True)
class StoredKey:
    """An API key as the store keeps it: never the key, only a salted digest and its first characters."""

    name: str
    prefix: str
    salt: bytes
    digest: bytes
    scopes: tuple[str, ...]
    created_at: str


class StoreRecords(Protocol):
    """What both the store callers use and the backends implement."""

    # Every write takes ``actor`` (a key name, 'local' when auth is off, 'cli' from the shell) and records an
    # event with it in the same transaction.
    def save_version(self, name: str, bundle: Bundle, *, make_live: bool | None,
                     actor: str = ...) -> dict[str, Any]: ...
    def list_segmentations(self) -> list[dict[str, Any]]: ...
    def get_segmentation(self, name: str) -> dict[str, Any]: ...
    def version_report(self, name: str, version: int) -> dict[str, Any]: ...
    def resolve_version(self, name: str, version: int | None) -> int: ...
    def load(self, name: str, version: int) -> LoadedVersion: ...
    def labels(self, name: str, version: int) -> dict[int, str]: ...
    def set_live(self, name: str, version: int, *, actor: str = ...) -> dict[str, Any]: ...
    def set_label(self, name: str, version: int, segment: int, label: str | None, *,
                  actor: str = ...) -> dict[str, Any]: ...
    def save_drift_report(self, report: dict[str, Any]) -> None: ...
    def list_drift_reports(self, name: str, *, version: int | None, limit: int) -> list[dict[str, Any]]: ...
    def check(self) -> None: ...
    # who did what
    def events(self, name: str | None, *, limit: int) -> list[dict[str, Any]]: ...
    # personal data: erasure and retention
    def delete_version(self, name: str, version: int, *, actor: str = ...) -> None: ...
    def delete_segmentation(self, name: str, *, actor: str = ...) -> None: ...
    def prune_drift_reports(self, older_than: str, *, actor: str = ...) -> int: ...
    # API keys
    def create_key(self, name: str, scopes: list[str], *, actor: str = ...) -> str: ...
    def revoke_key(self, name: str, *, actor: str = ...) -> None: ...
    def stored_keys(self) -> list[StoredKey]: ...
    def keys_counter(self) -> int: ...


class BundleStore(StoreRecords, Protocol):
    """The store as its callers see it (``open_store``): the records, plus the serving state in memory."""

    async def serving(self, name: str, version: int | None) -> tuple[LoadedVersion, dict[int, str]]: ...
    def readiness(self) -> list[dict[str, Any]]: ...
    def loaded_count(self) -> int: ...
    def refresh(self, *, force: bool = False) -> bool: ...
    def watch(self, wake: Callable[[], None]) -> None: ...
    def close(self) -> None: ...


class StoreBackend(StoreRecords, Protocol):
    """A backend: the index (rows) and the artifacts (files). ``load`` reads and verifies every time (the cache
    above the backends keeps what is served); the three reads below let that cache stay in step."""

    def counters(self) -> dict[str, int]: ...            # 'changes' moves with every write that alters serving
    def live_versions(self) -> dict[str, int]: ...       # segmentation -> its live version (those with one)
    def version_keys(self) -> set[tuple[str, int]]: ...  # every stored (segmentation, version)
