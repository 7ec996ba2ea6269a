"""
Credentials: board tokens, enrollment codes and the admin token.

Secrets are random (``secrets``), stored only as sha256 hex hashes, and compared in constant time
(``hmac.compare_digest``). A board token carries 256 bits; an enrollment code 80 bits, written in
Crockford-style base32 groups so an installer can type it from a label.
"""

from __future__ import annotations

import hashlib
import hmac
import os
import secrets
from pathlib import Path

from listenpost.core.errors import ConfigError

ADMIN_TOKEN_FILE = "admin-token"
ADMIN_TOKEN_ENV = "LISTENPOST_ADMIN_TOKEN"
_CODE_ALPHABET = "0123456789ABCDEFGHJKMNPQRSTVWXYZ"  # no I, L, O, U: nothing to misread on a label


def new_token() -> str:
    """A fresh bearer token: 32 random bytes (256 bits), URL-safe text."""
    return secrets.token_urlsafe(32)


def hash_secret(secret: str) -> str:
    """sha256 hex of a token or a normalised code: what the store keeps instead of the secret."""
    return hashlib.sha256(secret.encode()).hexdigest()


def same_secret(a: str, b: str) -> bool:
    """Constant-time comparison, so response timing does not reveal how much of a guess was right."""
    return hmac.compare_digest(a.encode(), b.encode())


def new_enrollment_code() -> str:
    """16 base32 characters (80 bits) in four groups: ``7KQ2-M9XD-4TPA-WZ3R``."""
    chars = "".join(secrets.choice(_CODE_ALPHABET) for _ in range(16))
    return "-".join(chars[i : i + 4] for i in range(0, 16, 4))


def normalize_code(code: str) -> str:
    """Upper-case, without separators; read-alike letters mapped the way people mistype them."""
    table = str.maketrans({"I": "1", "L": "1", "O": "0", "U": "V"})
    return "".join(c for c in code.upper() if c.isalnum()).translate(table)


def code_hash(code: str) -> str:
    return hash_secret(normalize_code(code))


def ensure_admin_token(state_dir: str | Path) -> str:
    """
    Return the admin token of ``state_dir``, creating it (mode 0600) at first start.

    The file is created with ``os.open(..., 0o600)`` so it is never readable by others, not even
    for an instant between a write and a chmod.
    """
    d = Path(state_dir)
    d.mkdir(parents=True, exist_ok=True)
    path = d / ADMIN_TOKEN_FILE
    token = new_token()
    try:
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    except FileExistsError:
        return read_admin_token(d)
    with os.fdopen(fd, "w") as f:
        f.write(token + "\n")
        f.flush()
        os.fsync(f.fileno())
    return token


def read_admin_token(state_dir: str | Path) -> str:
    """Read ``state_dir/admin-token``; a missing or empty file is a `ConfigError` naming it."""
    path = Path(state_dir) / ADMIN_TOKEN_FILE
    try:
        token = path.read_text().strip()
    except OSError as e:
        raise ConfigError(f"{path}: cannot read the admin token: {e.strerror or e}") from e
    if not token:
        raise ConfigError(f"{path}: is empty")
    return token


def bearer_token(header: str | None) -> str | None:
    """The token of an ``Authorization: Bearer <token>`` header, or ``None``."""
    if not header:
        return None
    scheme, _, value = header.partition(" ")
    if scheme.lower() != "bearer" or not value.strip():
        return None
    return value.strip()
