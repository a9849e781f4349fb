"""The signature of a webhook body: HMAC-SHA256 (RFC 2104, with SHA-256 as in RFC 4231)
of the exact body bytes under the configured secret, sent as
``X-Whirlwatch-Signature: sha256=<64 lowercase hex digits>``.

A receiver recomputes it over the raw body it received (before any JSON parsing) and
compares with :func:`hmac.compare_digest`; docs/notifications.md shows how.
"""

from __future__ import annotations

import hashlib
import hmac

#: The request header that carries the signature.
SIGNATURE_HEADER = "X-Whirlwatch-Signature"
#: What precedes the hex digest in the header, naming the hash.
SCHEME = "sha256="


def signature(body: bytes, secret: str) -> str:
    """The header value for ``body`` under ``secret`` (UTF-8): ``sha256=`` + hex digest."""
    return SCHEME + hmac.new(secret.encode("utf-8"), body, hashlib.sha256).hexdigest()


def verify(body: bytes, secret: str, header: str | None) -> bool:
    """Whether ``header`` is the signature of ``body`` under ``secret`` (constant-time
    comparison, so the check does not leak how much of a forged value was right)."""
    return header is not None and hmac.compare_digest(signature(body, secret), header)
