"""Database ids as the dashboard takes them from a URL: whole numbers a BIGINT column holds.

A path id beyond that range names no row, so it answers 404 like any unknown id (the URL
converter does not match it); a ``cursor`` beyond it lists from the newest row.
"""

from __future__ import annotations

import re
from typing import Any

from werkzeug.routing import IntegerConverter, Map

from dashboard.errors import BadRequest

#: The largest id a BIGINT (signed 64-bit) column holds: PostgreSQL's bigint, SQLite's INTEGER.
MAX_ID = 2**63 - 1
#: A cursor: a whole number from 1, at most 19 digits (2^63 - 1 has 19).
CURSOR_PATTERN = re.compile(r"[1-9][0-9]{0,18}")


class IdConverter(IntegerConverter):
    """Flask's ``int`` converter bounded to ids the database can hold (0 to :data:`MAX_ID`);
    installed as the app's ``int`` converter, so every ``<int:...>`` route uses it."""

    def __init__(self, url_map: Map, *args: Any, **kwargs: Any) -> None:
        kwargs.setdefault("max", MAX_ID)
        super().__init__(url_map, *args, **kwargs)


def parse_cursor(value: str | None) -> int | None:
    """The ``cursor`` query parameter (the ``next`` of a previous page, ids below it come
    next): None when absent or empty; a whole number from 1 with at most 19 digits
    (:data:`CURSOR_PATTERN`, as dashboard/openapi.json states), one beyond :data:`MAX_ID`
    taken as :data:`MAX_ID`; BadRequest otherwise."""
    if not value:
        return None
    if not CURSOR_PATTERN.fullmatch(value):
        raise BadRequest(f"Parameter 'cursor' must be the 'next' value of a previous page, got {value!r}.")
    return min(int(value), MAX_ID)
