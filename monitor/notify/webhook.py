"""One webhook delivery: POST the alarm event as JSON, signed (monitor/notify/signing.py).

An answer 2xx is a delivery; any other answer, a redirect included (a signed body is not
sent on to another address), a refused connection or a timeout is a failed attempt that
the dispatcher retries (monitor/notify/dispatch.py).
"""

from __future__ import annotations

import json
import urllib.error
import urllib.request
from collections.abc import Mapping
from typing import Any
from urllib.parse import urlsplit, urlunsplit

from monitor.notify.signing import SIGNATURE_HEADER, signature
from monitor.redact import redact

#: Most characters of an error kept in the delivery record.
DETAIL_CHARS = 300


class DeliveryError(RuntimeError):
    """An attempt failed; the message says how in one sentence (never with a secret)."""


class _NoRedirect(urllib.request.HTTPRedirectHandler):
    def redirect_request(self, *_args: Any, **_kw: Any) -> None:
        return None  # the 3xx answer is then raised as an HTTPError: a failed attempt


_OPENER = urllib.request.build_opener(_NoRedirect)


def shown_url(url: str) -> str:
    """``url`` as it may be shown and stored: scheme, host, port and path only (no user
    information, query or fragment, which may carry a token)."""
    parts = urlsplit(url)
    host = parts.hostname or ""
    netloc = f"[{host}]" if ":" in host else host
    if parts.port is not None:
        netloc += f":{parts.port}"
    return urlunsplit((parts.scheme, netloc, parts.path, "", ""))


def event_body(event: Mapping[str, Any]) -> bytes:
    """The bytes sent and signed: the event as compact UTF-8 JSON."""
    return json.dumps(event, separators=(",", ":"), ensure_ascii=False, allow_nan=False).encode("utf-8")


def post_event(url: str, body: bytes, secret: str, timeout_s: float) -> str:
    """POST ``body`` to ``url`` with its signature under ``secret`` (no signature header
    when the secret is empty); returns ``HTTP <status>`` on a 2xx answer, raises
    :class:`DeliveryError` otherwise."""
    headers = {"Content-Type": "application/json", "User-Agent": "whirlwatch-notify"}
    if secret:
        headers[SIGNATURE_HEADER] = signature(body, secret)
    request = urllib.request.Request(url, data=body, headers=headers, method="POST")
    try:
        with _OPENER.open(request, timeout=timeout_s) as answer:
            status = int(answer.status)
    except urllib.error.HTTPError as exc:
        raise DeliveryError(f"HTTP {exc.code} from {shown_url(url)}") from None
    except (urllib.error.URLError, OSError, ValueError) as exc:
        reason = getattr(exc, "reason", exc)
        raise DeliveryError(redact(f"{shown_url(url)}: {reason}")[:DETAIL_CHARS]) from None
    if not 200 <= status < 300:
        raise DeliveryError(f"HTTP {status} from {shown_url(url)}")
    return f"HTTP {status}"
