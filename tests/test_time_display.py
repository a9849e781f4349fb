"""Times as people read them: one format (``YYYY-MM-DD HH:MM +HH:MM``, 24-hour, in the
plant's time zone with the UTC offset of the instant), on the server and on the pages.

Expected offsets come from the published rules of each zone, not from the code: EU summer
time starts at 01:00 UTC on the last Sunday of March (Directive 2000/84/EC, Article 2);
US daylight time ends at 02:00 local on the first Sunday of November (Energy
Policy Act of 2005, section 110); India keeps UTC+05:30 all year (Indian Standard Time).
"""

from __future__ import annotations

import datetime as dt
import re

import pytest
from dashboard_signin import Browser, make_app, seed_template, seeded_copy

from monitor.config import ConfigError, load_settings
from monitor.model.timefmt import NO_TIME, plant_time, time_zone

BERLIN, NEW_YORK, KOLKATA = (time_zone(z) for z in ("Europe/Berlin", "America/New_York", "Asia/Kolkata"))
SHOWN = re.compile(r"^\d{4}-\d\d-\d\d [0-2]\d:[0-5]\d [+-]\d\d:\d\d$")


def _utc(*args: int) -> dt.datetime:
    return dt.datetime(*args, tzinfo=dt.UTC)


def test_eu_summer_time_starts_at_one_utc_on_the_last_sunday_of_march():
    day = dt.date(2026, 3, 29)
    assert day.weekday() == 6 and (day + dt.timedelta(days=7)).month == 4  # the last Sunday
    # Directive 2000/84/EC, Article 2: 00:59 UTC is still winter time (UTC+1), 01:00 UTC summer (UTC+2).
    assert plant_time(_utc(2026, 3, 29, 0, 59), BERLIN) == "2026-03-29 01:59 +01:00"
    assert plant_time(_utc(2026, 3, 29, 1, 0), BERLIN) == "2026-03-29 03:00 +02:00"


def test_us_daylight_time_ends_on_the_first_sunday_of_november():
    day = dt.date(2026, 11, 1)
    assert day.weekday() == 6  # the first Sunday of November 2026
    # 01:30 local happens twice that night; the offset tells the two apart (EDT -4, EST -5).
    assert plant_time(_utc(2026, 11, 1, 5, 30), NEW_YORK) == "2026-11-01 01:30 -04:00"
    assert plant_time(_utc(2026, 11, 1, 6, 30), NEW_YORK) == "2026-11-01 01:30 -05:00"


def test_every_kind_of_input_and_24_hours():
    t = _utc(2026, 3, 10, 13, 7, 53)
    expected = "2026-03-10 18:37 +05:30"  # IST = UTC + 5 h 30 min
    assert plant_time(t, KOLKATA) == expected
    assert plant_time(t.replace(tzinfo=None), KOLKATA) == expected  # naive: UTC
    assert plant_time(t.timestamp(), KOLKATA) == expected
    assert plant_time("2026-03-10T13:07:53Z", KOLKATA) == expected
    # 24-hour clock, never "1:07 PM" (ISO 8601-1:2019 time of day).
    assert plant_time(t, time_zone("UTC")) == "2026-03-10 13:07 +00:00"
    assert plant_time(None, KOLKATA) == plant_time("", KOLKATA) == NO_TIME


def test_an_unknown_zone_is_one_sentence_naming_it(tmp_path):
    with pytest.raises(ValueError, match="'Mars/Olympus'"):
        time_zone("Mars/Olympus")
    f = tmp_path / "service.toml"
    f.write_text('[dashboard]\ntime_zone = "Mars/Olympus"\n')
    with pytest.raises(ConfigError, match=r"'dashboard.time_zone' must be an IANA time zone name"):
        load_settings(f, env={})
    assert load_settings(None, env={"WHIRLWATCH_DASHBOARD_TIME_ZONE": "Asia/Kolkata"}).dashboard.time_zone == "Asia/Kolkata"


@pytest.fixture(scope="module")
def template(tmp_path_factory):
    return seed_template(tmp_path_factory.mktemp("times"))


def test_pages_show_the_plant_time(template, tmp_path):
    app = make_app(seeded_copy(template, tmp_path), TIME_ZONE="Asia/Kolkata")
    try:
        b = Browser(app).signed_in("ada")
        raised = b.get("/api/v1/alarms/1").get_json()["raised_at"]
        local = dt.datetime.fromisoformat(raised.replace("Z", "+00:00")) + dt.timedelta(hours=5, minutes=30)
        html = b.get("/alarms/").get_data(as_text=True)
        row = re.search(r'<tr data-alarm="1".*?</tr>', html, re.S).group(0)
        assert f"<td>{local:%Y-%m-%d %H:%M} +05:30</td>" in row
        # The browser's formatting reads the zone from the page.
        assert '<meta name="time-zone" content="Asia/Kolkata">' in html
        for page in ("/alarms/", "/audit", "/tokens"):
            text = b.get(page).get_data(as_text=True)
            assert " UTC<" not in text and not re.search(r"\d(:\d\d)+ ?[AP]M", text), page
        times = re.findall(r"<td>(\d{4}-[^<]*)</td>", b.get("/audit").get_data(as_text=True))
        assert times and all(SHOWN.match(t) and t.endswith("+05:30") for t in times), times
    finally:
        app.extensions["whirlwatch_engine"].dispose()
