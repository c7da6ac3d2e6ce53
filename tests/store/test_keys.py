"""API keys in the store and as a server sees them (service.store.keys, service.auth)."""

from __future__ import annotations

import hashlib
import hmac
import sqlite3

import pytest

from service.auth import KeyRing, is_loopback
from service.errors import KeyNameTaken, KeyNotFound
from service.store import FilesystemStore
from service.store.keys import SHOWN_PREFIX, key_digest


@pytest.fixture
def store(tmp_path):
    return FilesystemStore(tmp_path / "s")


def test_the_digest_is_hmac_sha256_of_the_key_under_its_own_salt(store):
    key = store.create_key("crm", ["assign"])
    (stored,) = store.stored_keys()
    # Reference: the standard library's HMAC (RFC 2104) with SHA-256, computed here independently.
    assert stored.digest == hmac.new(stored.salt, key.encode(), hashlib.sha256).digest()
    assert len(stored.salt) == 16 and stored.prefix == key[:SHOWN_PREFIX]
    other = store.create_key("erp", ["assign"])
    assert store.stored_keys()[1].salt != stored.salt
    assert key_digest(stored.salt, other) != stored.digest


def test_keys_are_long_random_and_distinct(store):
    keys = [store.create_key(f"k{i}", ["read"]) for i in range(20)]
    assert len(set(keys)) == 20
    assert all(len(k) == 43 for k in keys)            # 32 bytes, URL-safe base64 without padding


def test_the_counter_moves_with_every_key_change_only(store):
    start = store.keys_counter()
    store.create_key("a", ["read"])
    store.create_key("b", ["fit"])
    assert store.keys_counter() == start + 2
    store.revoke_key("a")
    assert store.keys_counter() == start + 3
    with pytest.raises(KeyNameTaken):
        store.create_key("b", ["read"])
    with pytest.raises(KeyNotFound):
        store.revoke_key("a")
    assert store.keys_counter() == start + 3            # refused changes leave it alone


def test_the_keyring_verifies_remembers_and_forgets(store):
    key = store.create_key("crm", ["assign", "read"])
    ring = KeyRing(store, open_without_keys=True)
    caller = ring.caller(key)
    assert (caller.name, caller.may("read"), caller.may("fit")) == ("crm", True, False)
    assert ring.caller(key[:-1]) is None and ring.caller(key + "x") is None
    # A tampered digest in the index: the remembered answer stands until the keys change, then it is re-checked.
    with sqlite3.connect(store.root / "index.sqlite3") as db:
        db.execute("UPDATE api_keys SET digest=zeroblob(32)")
    assert ring.caller(key) is not None
    store.create_key("other", ["read"])                # moves the counter
    assert ring.refresh() is True
    assert ring.caller(key) is None


def test_admin_implies_every_scope(store):
    key = store.create_key("ops", ["admin"])
    caller = KeyRing(store, open_without_keys=False).caller(key)
    assert all(caller.may(scope) for scope in ("read", "fit", "assign", "drift", "admin", "a-future-scope"))


@pytest.mark.parametrize("host, loopback", [("127.0.0.1", True), ("127.5.0.1", True), ("::1", True),
                                            ("[::1]", True), ("localhost", True), ("0.0.0.0", False),
                                            ("::", False), ("192.168.1.4", False), ("example.org", False)])
def test_is_loopback(host, loopback):
    assert is_loopback(host) is loopback


def test_auth_is_required_once_a_key_exists_or_off_loopback(store):
    assert KeyRing(store, open_without_keys=True).auth_required is False
    assert KeyRing(store, open_without_keys=False).auth_required is True
    store.create_key("k", ["read"])
    assert KeyRing(store, open_without_keys=True).auth_required is True
