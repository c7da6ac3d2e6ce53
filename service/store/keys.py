"""API keys: how they are made and how the store keeps them (only a salted HMAC-SHA256 digest).

Why HMAC-SHA256 with a per-key random salt and not a slow password hash (scrypt, PBKDF2): a key is 32 random
bytes from ``secrets`` (256 bits), not a password a person chose, so there is no dictionary to walk and a
brute-force search of 2**256 values is out of reach however fast each guess is. What the store must prevent
is that a copy of the index gives away usable keys or lets two stores' keys be matched: a keyed digest with a
random 16-byte salt per key does both. A slow hash would only add milliseconds to every first use of a key.
Digests are compared with ``hmac.compare_digest`` (constant time).
"""

from __future__ import annotations

import hashlib
import hmac
import secrets

KEY_BYTES = 32            # entropy of a key (secrets.token_urlsafe: 43 URL-safe characters)
SALT_BYTES = 16
SHOWN_PREFIX = 6          # characters of a key kept in clear to tell keys apart; at most this many are shown


def new_key() -> str:
    return secrets.token_urlsafe(KEY_BYTES)


def new_salt() -> bytes:
    return secrets.token_bytes(SALT_BYTES)


def key_digest(salt: bytes, key: str) -> bytes:
    return hmac.new(salt, key.encode("utf-8", "surrogatepass"), hashlib.sha256).digest()


def digest_matches(salt: bytes, expected: bytes, key: str) -> bool:
    return hmac.compare_digest(key_digest(salt, key), expected)
