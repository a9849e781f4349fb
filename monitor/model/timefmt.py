"""Times as the project writes and reads them: ISO 8601 in UTC with a ``Z``; and as people
read them: 24-hour, in the plant's time zone, with the UTC offset.

One writer (:func:`iso_utc`) for every time the service, the store, the API and the stream
files put into text, one lenient reader (:func:`parse_iso_utc`) for times a person or a
file gives us, and one writer for people (:func:`plant_time`; the dashboard's script
``WW.when`` writes the same form in the browser). The ingest of sensor messages has its own strict reader
(:func:`monitor.io.ingest.parse_ts`): there a time without a zone is a rejection with a
counted reason, not a guess.

References: ISO 8601-1:2019; RFC 3339 section 5.6 (the ``Z`` suffix for UTC); the IANA
time zone database (zone names such as ``Europe/Berlin``).
"""

from __future__ import annotations

import datetime as dt
from typing import Literal, overload
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

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


def time_zone(name: str) -> ZoneInfo:
    """The IANA time zone called ``name`` (``UTC``, ``Europe/Berlin``).

    Raises ValueError naming ``name`` when the zone database has no such zone."""
    try:
        return ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError, TypeError):
        raise ValueError(
            f"time zone {name!r} is not an IANA zone name such as 'UTC' or 'Europe/Berlin'."
        ) from None


#: What :func:`plant_time` writes for a missing time.
NO_TIME = "–"


def plant_time(when: float | dt.datetime | str | None, zone: dt.tzinfo) -> str:
    """A time as people read it: ``YYYY-MM-DD HH:MM +HH:MM``, 24-hour, in ``zone``.

    ``when`` is epoch seconds, a datetime (naive means UTC) or ISO 8601 text (as
    :func:`parse_iso_utc` reads it); None or empty text gives :data:`NO_TIME`. The offset
    is the zone's at that instant (ISO 8601-1:2019 "time shift"), so times either side
    of a daylight-saving change stay unambiguous.
    """
    if when is None or when == "":
        return NO_TIME
    if isinstance(when, str):
        t = parse_iso_utc(when)
    elif isinstance(when, dt.datetime):
        t = when.replace(tzinfo=dt.UTC) if when.tzinfo is None else when
    else:
        t = dt.datetime.fromtimestamp(when, dt.UTC)
    local = t.astimezone(zone)
    offset = local.strftime("%z")  # +HHMM
    return f"{local:%Y-%m-%d %H:%M} {offset[:3]}:{offset[3:5]}"
