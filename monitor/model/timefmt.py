"""Times as the project writes and reads them: ISO 8601 in UTC with a ``Z``.

One writer (:func:`iso_utc`) for every time the service, the store, the API and the stream
files put into text, and one lenient reader (:func:`parse_iso_utc`) for times a person or a
file gives us. The ingest of sensor messages has its own strict reader
(:func:`monitor.io.ingest.parse_ts`): there a time without a zone is a rejection with a
counted reason, not a guess.

References: ISO 8601-1:2019; RFC 3339 section 5.6 (the ``Z`` suffix for UTC).
"""

from __future__ import annotations

import datetime as dt
from typing import Literal, overload

Timespec = Literal["auto", "seconds", "milliseconds", "microseconds"]


@overload
def iso_utc(when: float | dt.datetime, *, timespec: Timespec = "auto") -> str: ...
@overload
def iso_utc(when: None, *, timespec: Timespec = "auto") -> None: ...
@overload
def iso_utc(when: float | dt.datetime | None, *, timespec: Timespec = "auto") -> str | None: ...


def iso_utc(when: float | dt.datetime | None, *, timespec: Timespec = "auto") -> str | None:
    """Epoch seconds or a datetime (naive means UTC) -> ``YYYY-MM-DDTHH:MM:SS[.fff...]Z``.

    ``timespec`` as :meth:`datetime.datetime.isoformat` (``auto`` drops a zero fraction,
    ``milliseconds`` always writes three digits). None stays None.
    """
    if when is None:
        return None
    if isinstance(when, dt.datetime):
        t = when.replace(tzinfo=dt.UTC) if when.tzinfo is None else when.astimezone(dt.UTC)
    else:
        t = dt.datetime.fromtimestamp(when, dt.UTC)
    return t.isoformat(timespec=timespec).replace("+00:00", "Z")


def parse_iso_utc(text: str) -> dt.datetime:
    """ISO 8601 date or date-time (``Z``, an offset, or none: UTC) -> aware UTC datetime.

    Raises ValueError naming the text when it is not ISO 8601."""
    try:
        t = dt.datetime.fromisoformat(text.strip().replace("Z", "+00:00"))
    except (ValueError, AttributeError):
        raise ValueError(f"{text!r} is not an ISO 8601 date or time.") from None
    return t.replace(tzinfo=dt.UTC) if t.tzinfo is None else t.astimezone(dt.UTC)
