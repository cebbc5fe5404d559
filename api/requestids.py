"""Self-validating request ids: a random part and its HMAC, so any worker can check an id.

An id is `<32 hex random>.<24 hex HMAC-SHA256 of the random part>`. Every worker holds the
same secret (from HUNCHWISE_REQUEST_SECRET, or a key file in the shared state folder), so
feedback sent to another worker than the one that ranked is accepted, and made-up ids are
rejected without any shared memory or lookup table.
"""

from __future__ import annotations

import hmac
import os
import re
import secrets
from pathlib import Path

KEY_FILE = "request-id.key"
_SHAPE = re.compile(r"^[0-9a-f]{32}\.[0-9a-f]{24}$")


class RequestIds:
    """Issues and checks request ids signed with one secret."""

    def __init__(self, secret: bytes) -> None:
        if len(secret) < 16:
            raise ValueError("the request-id secret must be at least 16 bytes")
        self._key = secret

    def _sign(self, nonce: str) -> str:
        # hmac.digest: the one-shot C path, the same bytes as hmac.new(...).digest() without
        # building an HMAC object per request.
        return hmac.digest(self._key, nonce.encode("ascii"), "sha256").hex()[:24]

    def new(self) -> str:
        """A fresh request id."""
        nonce = os.urandom(16).hex()  # what secrets.token_hex(16) returns, minus two calls
        return f"{nonce}.{self._sign(nonce)}"

    def valid(self, request_id: str) -> bool:
        """True when this server (or a sibling worker) issued `request_id`."""
        if not _SHAPE.match(request_id):
            return False
        nonce, sig = request_id.split(".")
        return hmac.compare_digest(sig, self._sign(nonce))


def shared_secret(configured: str | None, state_dir: Path | None) -> bytes:
    """The configured secret, else the state folder's key file (created once), else a new one."""
    if configured:
        return configured.encode("utf-8")
    if state_dir is None:
        return secrets.token_bytes(32)
    state_dir.mkdir(parents=True, exist_ok=True)
    path = state_dir / KEY_FILE
    tmp = state_dir / f".{KEY_FILE}.{os.getpid()}.tmp"
    # Write under a private name, then link: link() fails if another worker won the race,
    # and no worker ever reads a half-written key.
    tmp.write_text(secrets.token_hex(32), encoding="ascii")
    os.chmod(tmp, 0o600)
    try:
        os.link(tmp, path)
    except FileExistsError:
        pass
    finally:
        tmp.unlink(missing_ok=True)
    return path.read_text(encoding="ascii").strip().encode("ascii")
