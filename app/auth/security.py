"""Secrets: API tokens, password hashes (scrypt, standard library) and session ids."""

from __future__ import annotations

import base64
import hashlib
import hmac
import secrets
from functools import cache

TOKEN_PREFIX = "el_"
# scrypt cost: 2**15 takes ~50 ms and 32 MiB on our machines (OWASP's minimum is 2**17 with r=8
# for 64 MiB; common practice is to raise it as hardware allows, so it is one constant here).
SCRYPT_N = 2**15
SCRYPT_R = 8
SCRYPT_P = 1
SCRYPT_MAXMEM = 64 * 1024 * 1024


def new_api_token() -> str:
    """A bearer token with 256 random bits; shown once, stored only as its hash."""
    return TOKEN_PREFIX + secrets.token_urlsafe(32)


def sha256_hex(secret: str) -> str:
    """Hash of a high-entropy secret (tokens, session ids): a fast hash is enough for those."""
    return hashlib.sha256(secret.encode()).hexdigest()


def hash_password(password: str, *, n: int = SCRYPT_N) -> str:
    """Slow, salted password hash in a self-describing string."""
    salt = secrets.token_bytes(16)
    digest = hashlib.scrypt(
        password.encode(), salt=salt, n=n, r=SCRYPT_R, p=SCRYPT_P, maxmem=SCRYPT_MAXMEM
    )
    b64 = base64.b64encode
    return f"scrypt${n}${SCRYPT_R}${SCRYPT_P}${b64(salt).decode()}${b64(digest).decode()}"


@cache
def dummy_hash() -> str:
    """A hash of a random password, checked when there is no real one to check against, so
    that an unknown user costs the same work as a wrong password."""
    return hash_password(secrets.token_urlsafe(16))


def verify_password(password: str, stored: str | None) -> bool:
    """Constant-time check of a password against a stored hash."""
    if not stored:
        return False
    try:
        scheme, n, r, p, salt_b64, digest_b64 = stored.split("$")
    except ValueError:
        return False
    if scheme != "scrypt":
        return False
    digest = hashlib.scrypt(
        password.encode("utf-8", "surrogatepass"),
        salt=base64.b64decode(salt_b64),
        n=int(n),
        r=int(r),
        p=int(p),
        maxmem=SCRYPT_MAXMEM,
    )
    return hmac.compare_digest(digest, base64.b64decode(digest_b64))


def new_session_id() -> str:
    """Random id carried by the browser's session cookie."""
    return secrets.token_urlsafe(32)


def new_csrf_token() -> str:
    """Random token every state-changing page form must carry."""
    return secrets.token_urlsafe(24)
