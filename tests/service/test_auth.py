"""Tokens and their hashes (rungway.scheduler.service.auth)."""

from __future__ import annotations

import hashlib
import re
import string

import pytest

from rungway.scheduler.service import auth
from rungway.scheduler.service.auth import (
    Authenticator,
    hash_token,
    new_token,
    parse_token_hash,
    token_fingerprint,
    verify_token,
)
from rungway.scheduler.service.config import parse_lab_config
from rungway.scheduler.service.models import Caller

FAST = 1_000  # iterations where a test is not about the iteration count


def test_hash_matches_the_hashlib_documentation_example() -> None:
    # Python's hashlib docs, pbkdf2_hmac: pbkdf2_hmac('sha256', b'password', b'bad salt' * 2,
    # 500_000).hex() == '15530bba...00a9'. PBKDF2 is RFC 8018, section 5.2, with HMAC-SHA256.
    stored = hash_token("password", salt=b"bad salt" * 2, iterations=500_000)
    assert stored == (
        "pbkdf2-sha256$500000$" + (b"bad salt" * 2).hex()
        + "$15530bba69924174860db778f2c6f8104d3aaf9d26241840c8c4a641c8d000a9"
    )
    assert verify_token("password", stored)


def test_hash_format_and_default_iterations() -> None:
    stored = hash_token("rgw_example")
    assert re.fullmatch(r"pbkdf2-sha256\$200000\$[0-9a-f]{32}\$[0-9a-f]{64}", stored)
    parts = parse_token_hash(stored)
    assert parts.iterations == 200_000 and len(parts.salt) == 16
    # The digest is PBKDF2-HMAC-SHA256 of the token's UTF-8 bytes (checked against hashlib).
    assert parts.digest == hashlib.pbkdf2_hmac("sha256", b"rgw_example", parts.salt, 200_000)


def test_right_token_verifies_and_wrong_one_does_not() -> None:
    stored = hash_token("rgw_right", iterations=FAST)
    assert verify_token("rgw_right", stored)
    assert not verify_token("rgw_wrong", stored)
    assert not verify_token("", stored)
    assert not verify_token("rgw_righ", stored)


def test_two_hashes_of_one_token_differ_by_salt() -> None:
    a, b = hash_token("rgw_same", iterations=FAST), hash_token("rgw_same", iterations=FAST)
    assert a != b
    assert parse_token_hash(a).salt != parse_token_hash(b).salt
    assert verify_token("rgw_same", a) and verify_token("rgw_same", b)


def _flip(hex_text: str) -> str:
    return ("1" if hex_text[0] == "0" else "0") + hex_text[1:]


def test_tampered_hashes_fail() -> None:
    stored = hash_token("rgw_token", iterations=FAST)
    scheme, iterations, salt, digest = stored.split("$")
    tampered = [
        f"{scheme}${iterations}${salt}${_flip(digest)}",
        f"{scheme}${iterations}${_flip(salt)}${digest}",
        f"{scheme}${int(iterations) + 1}${salt}${digest}",
    ]
    for text in tampered:
        parse_token_hash(text)  # still well-formed
        assert not verify_token("rgw_token", text)


@pytest.mark.parametrize(
    "stored",
    [
        "",
        "rgw_this-is-a-token-not-a-hash",
        "pbkdf2-sha1$1000$" + "0" * 32 + "$" + "0" * 64,  # another scheme
        "pbkdf2-sha256$0$" + "0" * 32 + "$" + "0" * 64,  # no iterations
        "pbkdf2-sha256$1000$" + "0" * 30 + "$" + "0" * 64,  # short salt
        "pbkdf2-sha256$1000$" + "0" * 32 + "$" + "0" * 63,  # short digest
        "pbkdf2-sha256$1000$" + "A" * 32 + "$" + "0" * 64,  # upper-case hex
        "pbkdf2-sha256$99999999$" + "0" * 32 + "$" + "0" * 64,  # iterations above the limit
    ],
)
def test_malformed_hashes_are_refused(stored: str) -> None:
    with pytest.raises(ValueError) as info:
        parse_token_hash(stored)
    if stored:
        assert stored not in str(info.value)  # may be a pasted token: never echoed
    assert not verify_token("anything", stored)


def test_hash_token_checks_its_arguments() -> None:
    with pytest.raises(ValueError, match="16 bytes"):
        hash_token("t", salt=b"short", iterations=FAST)
    with pytest.raises(ValueError, match="iterations"):
        hash_token("t", iterations=0)
    with pytest.raises(ValueError, match="non-empty"):
        hash_token("", iterations=FAST)


def test_new_tokens() -> None:
    tokens = {new_token() for _ in range(50)}
    assert len(tokens) == 50
    allowed = set(string.ascii_letters + string.digits + "-_")
    for token in tokens:
        # secrets.token_urlsafe(32): 32 bytes in URL-safe base64 without padding = 43 chars.
        assert token.startswith("rgw_") and len(token) == 4 + 43
        assert set(token[4:]) <= allowed


def test_fingerprint_identifies_without_revealing() -> None:
    token = new_token()
    fingerprint = token_fingerprint(token)
    assert re.fullmatch(r"[0-9a-f]{8}", fingerprint)
    assert fingerprint == token_fingerprint(token)
    assert fingerprint != token_fingerprint(token + "x")
    assert fingerprint not in token and token[4:12] != fingerprint


# -- Authenticator ------------------------------------------------------------------------

TEAM_TOKEN, OTHER_TOKEN, ADMIN_TOKEN = "rgw_team-a", "rgw_team-b", "rgw_admin"


@pytest.fixture(scope="module")
def authenticator() -> Authenticator:
    config = parse_lab_config(
        f"""
[[team]]
name = "acoustics"
tokens = ["{hash_token("rgw_old", iterations=FAST)}", "{hash_token(TEAM_TOKEN, iterations=FAST)}"]

[[team]]
name = "optics"
tokens = ["{hash_token(OTHER_TOKEN, iterations=FAST)}"]

[[admin]]
name = "lab-admin"
tokens = ["{hash_token(ADMIN_TOKEN, iterations=FAST)}"]
"""
    )
    return Authenticator(config)


def test_identify_names_team_or_admin(authenticator: Authenticator) -> None:
    assert authenticator.identify(TEAM_TOKEN) == Caller(name="acoustics", team="acoustics", admin=False)
    assert authenticator.identify("rgw_old") == Caller(name="acoustics", team="acoustics", admin=False)
    assert authenticator.identify(OTHER_TOKEN) == Caller(name="optics", team="optics", admin=False)
    assert authenticator.identify(ADMIN_TOKEN) == Caller(name="lab-admin", team=None, admin=True)
    assert authenticator.identify("rgw_nobody") is None
    assert authenticator.identify(None) is None
    assert authenticator.identify("") is None


def _counting(monkeypatch: pytest.MonkeyPatch) -> list[int]:
    calls = [0]
    real = auth._derive

    def derive(token: str, salt: bytes, iterations: int) -> bytes:
        calls[0] += 1
        return real(token, salt, iterations)

    monkeypatch.setattr(auth, "_derive", derive)
    return calls


def test_successes_and_failures_are_cached(monkeypatch: pytest.MonkeyPatch) -> None:
    config = parse_lab_config(
        f'[[team]]\nname = "a"\ntokens = ["{hash_token("rgw_a", iterations=FAST)}"]\n'
        f'[[team]]\nname = "b"\ntokens = ["{hash_token("rgw_b", iterations=FAST)}"]\n'
    )
    calls = _counting(monkeypatch)
    authenticator = Authenticator(config)
    assert authenticator.identify("rgw_b") == Caller(name="b", team="b")
    assert calls[0] == 2  # checked against both hashes
    assert authenticator.identify("rgw_b") == Caller(name="b", team="b")
    assert authenticator.identify("rgw_wrong") is None
    assert calls[0] == 4
    assert authenticator.identify("rgw_wrong") is None
    assert calls[0] == 4  # both answers came from the cache
    # The cache holds digests, never the tokens themselves.
    assert "rgw_b" not in repr(vars(authenticator)) and "rgw_wrong" not in repr(vars(authenticator))


def test_cache_is_bounded_least_recently_used_first(monkeypatch: pytest.MonkeyPatch) -> None:
    config = parse_lab_config(f'[[team]]\nname = "a"\ntokens = ["{hash_token("rgw_a", iterations=FAST)}"]\n')
    calls = _counting(monkeypatch)
    authenticator = Authenticator(config, cache_size=2)
    for token in ("rgw_1", "rgw_2", "rgw_1", "rgw_3"):  # rgw_2 is now the least recently used
        authenticator.identify(token)
    assert calls[0] == 3 and authenticator.statistics() == {"hashes": 1, "cached": 2}
    authenticator.identify("rgw_1")
    assert calls[0] == 3
    authenticator.identify("rgw_2")
    assert calls[0] == 4  # evicted, so checked again
