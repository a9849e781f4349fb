"""Where the dashboard may send a browser after signing in: a path on this site, nothing else.

A ``next`` parameter is attacker-controlled text. Browsers remove tabs and line breaks
from a URL and read a backslash as a slash (WHATWG URL Standard, "basic URL parser"), so
``/\\t/evil.example`` or ``/\\\\evil.example`` become ``//evil.example``: another host. Such
text is refused outright rather than cleaned, and the caller falls back to the home page.
"""

from __future__ import annotations

import unicodedata
from urllib.parse import urlsplit

#: Longest ``next`` kept; a real path on this site is far shorter.
MAX_NEXT_LENGTH = 2000


def same_origin_path(target: str | None) -> str | None:
    """``target`` when it is a path on this site (``/alarms?state=open``), else None.

    Refused: empty or longer than :data:`MAX_NEXT_LENGTH`; not starting with ``/``;
    starting with ``//``; any backslash; any control, format or line/paragraph separator
    character (Unicode categories Cc, Cf, Zl, Zp); any scheme or host after parsing.
    """
    if not target or len(target) > MAX_NEXT_LENGTH:
        return None
    if not target.startswith("/") or target.startswith("//") or "\\" in target:
        return None
    if any(unicodedata.category(c) in ("Cc", "Cf", "Zl", "Zp") for c in target):
        return None
    parts = urlsplit(target)
    if parts.scheme or parts.netloc:
        return None
    return target


def next_or_home(target: str | None, home: str = "/") -> str:
    """Where to go after signing in: ``target`` if it is a path on this site, else ``home``."""
    return same_origin_path(target) or home
