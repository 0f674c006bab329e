"""Password hashing (argon2id) and random tokens.

References
----------
Biryukov, Dinu, Khovratovich, Josefsson. "Argon2 Memory-Hard Function for
Password Hashing and Proof-of-Work Applications", RFC 9106 (2021).
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
from functools import lru_cache

from argon2 import PasswordHasher
from argon2.exceptions import InvalidHashError, VerificationError, VerifyMismatchError

_HASHER = PasswordHasher()


@lru_cache(maxsize=1)
def _dummy_hash() -> str:
    """Verified against when the user name is unknown, so that a wrong name costs as
    much time as a wrong password (made on first use, not at import)."""
    return _HASHER.hash("rawproof-dummy-password")


def hash_password(password: str) -> str:
    """An argon2id hash string (salt and parameters included)."""
    return _HASHER.hash(password)


def verify_password(stored_hash: str | None, password: str) -> bool:
    """True when ``password`` matches ``stored_hash``; constant work for a missing user."""
    try:
        return _HASHER.verify(stored_hash or _dummy_hash(), password) and stored_hash is not None
    except (VerifyMismatchError, VerificationError, InvalidHashError):
        return False


def new_token(nbytes: int = 32) -> str:
    """A URL-safe random token."""
    return secrets.token_urlsafe(nbytes)


def token_digest(token: str) -> str:
    """The sha256 hex digest under which a session or API token is stored."""
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


def same(a: str, b: str) -> bool:
    """Constant-time string comparison."""
    return hmac.compare_digest(a.encode("utf-8"), b.encode("utf-8"))
