"""Who is calling: API keys from the store, verified once and then remembered.

A running server keeps the store's keys (name, scopes, salted digest) in memory and re-reads them when the
store's ``keys`` counter changes. The counter is polled by a background task every ``KEY_POLL_SECONDS``; a
request that finds the copy older than ``KEYS_VISIBLE_WITHIN`` re-reads it itself (a safety net when the
loop is busy), so a created or revoked key takes effect within that bound.

A verified key is remembered under a BLAKE2b digest of the presented key (not the key itself), so the
assign hot path costs one fast digest and a dict look-up, never the HMAC and never the index.
"""

from __future__ import annotations

import hashlib
import ipaddress
import threading
import time
from dataclasses import dataclass

from service.errors import ServiceError
from service.settings import SCOPES
from service.store import BundleStore
from service.store.keys import SHOWN_PREFIX, digest_matches

__all__ = ["ADMIN_SCOPE", "SCOPES", "Caller", "KeyRing", "is_loopback"]

ADMIN_SCOPE = "admin"      # implies every scope, including those of routes added later
KEY_POLL_SECONDS = 1.0
KEYS_VISIBLE_WITHIN = 2.0
LOCAL_ACTOR = "local"      # the actor of writes made while authentication is off
MAX_REMEMBERED = 10_000    # verified keys remembered at once (there are few keys; this bounds memory)


@dataclass(frozen=True)
class Caller:
    """A verified key: its name (the actor recorded in events) and scopes."""

    name: str
    scopes: frozenset[str]

    def may(self, scope: str) -> bool:
        return scope in self.scopes or ADMIN_SCOPE in self.scopes


def is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False


def _fingerprint(key: str) -> bytes:
    return hashlib.blake2b(key.encode("utf-8", "surrogatepass"), digest_size=16).digest()


class KeyRing:
    """The store's keys as a running server sees them."""

    def __init__(self, store: BundleStore, *, open_without_keys: bool) -> None:
        self._store = store
        # Without any key the service is open only where it was allowed to be (a loopback address); once keys
        # existed and were all revoked, a server on another address refuses every call instead of opening up.
        self._open_without_keys = open_without_keys
        self._lock = threading.Lock()
        self._counter = -1
        self._keys = ()
        self._verified: dict[bytes, Caller] = {}
        self._checked_at = 0.0
        # Set by the server's lifespan, whose background loop re-reads the keys every second.
        self.refreshed_in_background = False
        self.refresh()

    def refresh(self) -> bool:
        """Re-read the keys if the store's counter moved; return whether it did."""
        counter = self._store.keys_counter()
        self._checked_at = time.monotonic()
        if counter == self._counter:
            return False
        keys = tuple(self._store.stored_keys())
        with self._lock:
            self._counter, self._keys, self._verified = counter, keys, {}
        return True

    @property
    def auth_required(self) -> bool:
        return bool(self._keys) or not self._open_without_keys

    @property
    def has_keys(self) -> bool:
        return bool(self._keys)

    def caller(self, key: str) -> Caller | None:
        """The verified caller for ``key``, or None for an unknown key."""
        if not self.refreshed_in_background and time.monotonic() - self._checked_at > KEYS_VISIBLE_WITHIN:
            # Only where no background loop re-reads the keys (an app used without its lifespan): the query
            # would otherwise sit on the request path. A store that cannot be read keeps the keys as they were.
            try:
                self.refresh()
            except ServiceError:
                self._checked_at = time.monotonic()
        fingerprint = _fingerprint(key)
        known = self._verified.get(fingerprint)
        if known is not None:
            return known
        keys = self._keys
        for stored in keys:
            # The prefix only narrows the candidates; the HMAC digest decides, in constant time.
            if key[:SHOWN_PREFIX] == stored.prefix and digest_matches(stored.salt, stored.digest, key):
                found = Caller(stored.name, frozenset(stored.scopes))
                with self._lock:
                    if self._keys is keys:   # not replaced by a refresh meanwhile
                        if len(self._verified) >= MAX_REMEMBERED:
                            self._verified.clear()
                        self._verified[fingerprint] = found
                return found
        return None
