"""Tokens: making them, hashing them for the lab config, and telling who is calling.

Theory of operation. A token is a random string handed to a team (or an admin) once, by
``rungway lab token``; the lab config keeps only its salted PBKDF2-HMAC-SHA256 hash
(RFC 8018, section 5.2), written ``pbkdf2-sha256$<iterations>$<salt hex>$<hash hex>``. A
request's token is checked against every configured hash with a constant-time comparison.

PBKDF2 is slow on purpose (about 0.1 s at 200,000 iterations), so :class:`Authenticator`
caches the outcome of each lookup, success or failure, keyed by an HMAC-SHA256 of the token
under a random key made when the process starts. The cache never holds the token, and its
keys are useless outside this process. :func:`token_fingerprint` gives the first 8 hex digits
of that same digest, so log lines can be correlated without containing the token.

Known cost: a token that matches nothing costs one PBKDF2 per configured hash (the hashes are
salted, so there is no index); the failure is cached, but a caller trying many different
tokens costs that much each time, so the HTTP layer should limit failed attempts.
"""

from __future__ import annotations

import hashlib
import hmac
import re
import secrets
import threading
from collections import OrderedDict
from collections.abc import Iterable
from dataclasses import dataclass
from typing import TYPE_CHECKING

from .models import Caller

if TYPE_CHECKING:
    from .config import LabConfig

__all__ = [
    "TOKEN_PREFIX",
    "HASH_SCHEME",
    "DEFAULT_ITERATIONS",
    "TokenHash",
    "new_token",
    "hash_token",
    "parse_token_hash",
    "verify_token",
    "token_fingerprint",
    "Authenticator",
]

TOKEN_PREFIX = "rgw_"
HASH_SCHEME = "pbkdf2-sha256"
DEFAULT_ITERATIONS = 200_000
SALT_BYTES = 16
_DIGEST_HEX = 64  # SHA-256 output, the derived key's length (dkLen = hLen)
_MAX_ITERATIONS = 10_000_000  # a typo of a few zeros must not make every request take minutes

_HASH_RE = re.compile(
    rf"{re.escape(HASH_SCHEME)}\$([1-9][0-9]{{0,7}})\$([0-9a-f]{{{2 * SALT_BYTES}}})\$([0-9a-f]{{{_DIGEST_HEX}}})"
)

# Per-process key for the cache and for fingerprints: digests made with it mean nothing to
# anyone who reads a log or a memory dump of another process.
_PROCESS_KEY = secrets.token_bytes(32)


@dataclass(frozen=True, slots=True)
class TokenHash:
    """The parts of a stored token hash."""

    iterations: int
    salt: bytes
    digest: bytes


def new_token() -> str:
    """A fresh token: ``rgw_`` and 32 random bytes, URL-safe base64 (43 characters)."""
    return TOKEN_PREFIX + secrets.token_urlsafe(32)


def _derive(token: str, salt: bytes, iterations: int) -> bytes:
    return hashlib.pbkdf2_hmac("sha256", token.encode("utf-8"), salt, iterations)


def hash_token(token: str, *, salt: bytes | None = None, iterations: int = DEFAULT_ITERATIONS) -> str:
    """The stored form of ``token``: ``pbkdf2-sha256$<iterations>$<salt hex>$<hash hex>``.

    ``salt`` (16 bytes) is random unless given, so two hashes of one token differ.
    """
    if not isinstance(token, str) or not token:
        raise ValueError("the token must be a non-empty string")
    if isinstance(iterations, bool) or not isinstance(iterations, int) or not 1 <= iterations <= _MAX_ITERATIONS:
        raise ValueError(f"iterations must be an integer from 1 to {_MAX_ITERATIONS}, got {iterations!r}")
    if salt is None:
        salt = secrets.token_bytes(SALT_BYTES)
    elif len(salt) != SALT_BYTES:
        raise ValueError(f"the salt must be {SALT_BYTES} bytes, got {len(salt)}")
    digest = _derive(token, salt, iterations)
    return f"{HASH_SCHEME}${iterations}${salt.hex()}${digest.hex()}"


def parse_token_hash(stored: str) -> TokenHash:
    """The parts of a stored hash; ``ValueError`` (which never quotes ``stored``: it may be a
    token pasted by mistake) if it is not in the format :func:`hash_token` writes."""
    match = _HASH_RE.fullmatch(stored) if isinstance(stored, str) else None
    if match is None or int(match.group(1)) > _MAX_ITERATIONS:
        raise ValueError(
            f"not a token hash: expected {HASH_SCHEME}$<iterations>$<{2 * SALT_BYTES} hex digits of salt>"
            f"$<{_DIGEST_HEX} hex digits of hash>, iterations from 1 to {_MAX_ITERATIONS}"
        )
    return TokenHash(int(match.group(1)), bytes.fromhex(match.group(2)), bytes.fromhex(match.group(3)))


def verify_token(token: str, stored: str) -> bool:
    """Whether ``token`` hashes to ``stored``. A malformed ``stored`` verifies nothing."""
    if not isinstance(token, str) or not token:
        return False
    try:
        parts = parse_token_hash(stored)
    except ValueError:
        return False
    return hmac.compare_digest(_derive(token, parts.salt, parts.iterations), parts.digest)


def _keyed_digest(token: str) -> bytes:
    return hmac.new(_PROCESS_KEY, token.encode("utf-8"), hashlib.sha256).digest()


def token_fingerprint(token: str) -> str:
    """8 hex digits that identify ``token`` in this process's logs (never log the token).
    Stable only within one process: the key is made at start-up."""
    return _keyed_digest(token).hex()[:8]


class Authenticator:
    """Who a token belongs to, per a :class:`LabConfig`; make a new one when the config changes.

    Thread-safe; the slow hash checks run outside the lock, so concurrent lookups of
    different tokens do not wait for each other.
    """

    def __init__(self, config: LabConfig, *, cache_size: int = 1024) -> None:
        if cache_size < 0:
            raise ValueError(f"cache_size must be >= 0, got {cache_size!r}")
        entries: list[tuple[TokenHash, Caller]] = []
        for team in config.teams:
            entries += _entries(team.tokens, Caller(name=team.name, team=team.name, admin=False))
        for admin in config.admins:
            entries += _entries(admin.tokens, Caller(name=admin.name, team=None, admin=True))
        self._entries = tuple(entries)
        self._cache: OrderedDict[bytes, Caller | None] = OrderedDict()
        self._cache_size = cache_size
        self._lock = threading.Lock()

    def identify(self, token: str | None) -> Caller | None:
        """The caller ``token`` belongs to, or None (no token, or one that matches nothing)."""
        if not token or not isinstance(token, str):
            return None
        key = _keyed_digest(token)
        with self._lock:
            if key in self._cache:
                self._cache.move_to_end(key)
                return self._cache[key]
        caller = self._match(token)
        with self._lock:
            if self._cache_size:
                self._cache[key] = caller
                self._cache.move_to_end(key)
                while len(self._cache) > self._cache_size:
                    self._cache.popitem(last=False)
        return caller

    def known(self, token: str | None) -> Caller | None:
        """The caller of a token already verified in this process, without hashing (None if
        it was not, or did not match): lets a valid caller through while its address is
        locked out for others' failed attempts."""
        if not token or not isinstance(token, str):
            return None
        with self._lock:
            return self._cache.get(_keyed_digest(token))

    def _match(self, token: str) -> Caller | None:
        # Stopping at the first match only tells a token's holder where their own entry
        # stands; a token that matches nothing always costs the full scan.
        for parts, caller in self._entries:
            if hmac.compare_digest(_derive(token, parts.salt, parts.iterations), parts.digest):
                return caller
        return None

    def statistics(self) -> dict[str, int]:
        """How many hashes are configured and how many lookups are cached."""
        with self._lock:
            return {"hashes": len(self._entries), "cached": len(self._cache)}


def _entries(hashes: Iterable[str], caller: Caller) -> list[tuple[TokenHash, Caller]]:
    return [(parse_token_hash(stored), caller) for stored in hashes]
