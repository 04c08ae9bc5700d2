"""Working hours against an injected clock: windows across midnight, weekends, time zones.

Calendar facts used below come from published rules, not from the code under test:
2026-12-02 is a Wednesday (ISO 8601 calendar); the European Union changes to summer time on the
last Sunday of March and back on the last Sunday of October at 01:00 UTC (Directive 2000/84/EC),
so 2026-03-29 loses an hour and 2026-10-25 gains one; US Eastern time changes on the second
Sunday of March (2026-03-08) at 02:00 local (Energy Policy Act of 2005).
"""

from __future__ import annotations

import time
from datetime import datetime
from zoneinfo import ZoneInfo

import pytest

from lampyr.errors import UsageError
from lampyr.worker.hours import Schedule, parse_days, parse_hours, parse_zone

PARIS = ZoneInfo("Europe/Paris")


def at(zone, *fields) -> float:
    """Epoch seconds of a wall-clock time in `zone`."""
    return datetime(*fields, tzinfo=zone).timestamp()


def night(weekend="all-day", zone=PARIS, days="sat,sun") -> Schedule:
    return Schedule(parse_hours("19:00-07:30"), weekend, parse_days(days), zone)


@pytest.mark.parametrize("wall, open_", [
    ((2026, 12, 2, 12, 0), False),   # Wednesday noon
    ((2026, 12, 2, 18, 59), False),
    ((2026, 12, 2, 19, 0), True),    # the window opens
    ((2026, 12, 3, 0, 0), True),     # across midnight
    ((2026, 12, 3, 7, 29), True),
    ((2026, 12, 3, 7, 30), False),   # and closes: the end is not inside
])
def test_a_window_runs_across_midnight(wall, open_):
    assert night().is_open(at(PARIS, *wall)) is open_


@pytest.mark.parametrize("weekend, wall, open_", [
    ("all-day", (2026, 12, 5, 12, 0), True),     # Saturday noon
    ("same-hours", (2026, 12, 5, 12, 0), False),
    ("off", (2026, 12, 5, 12, 0), False),
    ("off", (2026, 12, 5, 6, 0), True),          # Friday night's window ends Saturday 07:30
    ("off", (2026, 12, 5, 20, 0), False),        # but none starts on Saturday
    ("all-day", (2026, 12, 7, 6, 0), True),      # Sunday night's window runs to Monday 07:30
    ("off", (2026, 12, 7, 6, 0), False),
])
def test_weekend_rules(weekend, wall, open_):
    assert night(weekend).is_open(at(PARIS, *wall)) is open_


def test_weekend_days_can_be_other_days():
    s = night(days="fri,sat")
    assert s.is_open(at(PARIS, 2026, 12, 4, 12, 0))      # Friday noon
    assert not s.is_open(at(PARIS, 2026, 12, 6, 12, 0))  # Sunday noon is a working day


def test_one_instant_is_judged_in_the_schedules_own_zone():
    instant = at(ZoneInfo("UTC"), 2026, 12, 2, 12, 0)  # 21:00 in Tokyo (UTC+9), noon in London
    assert night(zone=ZoneInfo("Asia/Tokyo")).is_open(instant)
    assert not night(zone=ZoneInfo("Europe/London")).is_open(instant)


@pytest.mark.parametrize("night_of, hours", [
    ((2026, 3, 28), 11.5),   # 19:00 → 07:30 is 12.5 h of wall clock, one hour is skipped
    ((2026, 10, 24), 13.5),  # one hour is lived twice
    ((2026, 12, 2), 12.5),
])
def test_a_window_across_a_clock_change_keeps_its_wall_clock_ends(night_of, hours):
    s = night("same-hours")
    start, end = s.window_at(at(PARIS, *night_of, 23, 0))
    assert (start, end) == (at(PARIS, *night_of, 19, 0), s.window_at(start)[1])
    assert datetime.fromtimestamp(end, PARIS).strftime("%H:%M") == "07:30"
    assert end - start == hours * 3600


def test_the_machines_local_time_is_used_without_a_zone(monkeypatch):
    monkeypatch.setenv("TZ", "America/New_York")
    time.tzset()
    try:
        s = Schedule(parse_hours("19:00-07:30"), "same-hours")
        ny = ZoneInfo("America/New_York")
        start, end = s.window_at(at(ny, 2026, 3, 7, 23, 0))  # the night the clocks go forward
        assert (start, end) == (at(ny, 2026, 3, 7, 19, 0), at(ny, 2026, 3, 8, 7, 30))
        assert end - start == 11.5 * 3600
    finally:
        monkeypatch.undo()
        time.tzset()


def test_the_heartbeat_lists_the_windows_of_the_next_36_hours():
    now = at(PARIS, 2026, 12, 2, 12, 0)  # Wednesday noon
    assert night().heartbeat_windows(now) == [
        [at(PARIS, 2026, 12, 2, 19, 0), at(PARIS, 2026, 12, 3, 7, 30)],
        [at(PARIS, 2026, 12, 3, 19, 0), at(PARIS, 2026, 12, 4, 7, 30)],
    ]


def test_a_weekend_window_is_published_whole():
    now = at(PARIS, 2026, 12, 4, 12, 0)  # Friday noon: open from 19:00 until Monday 07:30
    assert night().heartbeat_windows(now) == [
        [at(PARIS, 2026, 12, 4, 19, 0), at(PARIS, 2026, 12, 7, 7, 30)]]


def test_the_window_in_progress_keeps_its_true_start():
    now = at(PARIS, 2026, 12, 3, 2, 0)
    assert night().heartbeat_windows(now)[0] == [at(PARIS, 2026, 12, 2, 19, 0),
                                                  at(PARIS, 2026, 12, 3, 7, 30)]


def test_without_hours_a_worker_is_always_available():
    s = Schedule()
    assert s.always and s.heartbeat_windows(time.time()) == [] and s.is_open(time.time())


def test_weekdays_only_without_hours():
    s = Schedule((), "off", parse_days("sat,sun"), PARIS)
    assert s.is_open(at(PARIS, 2026, 12, 4, 23, 0)) and not s.is_open(at(PARIS, 2026, 12, 5, 1, 0))
    assert not s.always


def test_several_spans_a_day():
    s = Schedule(parse_hours("12:00-13:30, 19:00-07:30"), "same-hours", frozenset(), PARIS)
    assert s.is_open(at(PARIS, 2026, 12, 2, 12, 45))
    assert not s.is_open(at(PARIS, 2026, 12, 2, 14, 0))


def test_the_waiting_line_names_the_next_opening():
    line = night().waiting_line(at(PARIS, 2026, 12, 2, 12, 0))
    assert line == ("outside working hours (19:00-07:30; sat,sun: all day); "
                    "next window opens Wed 19:00")


@pytest.mark.parametrize("text", ["19-07", "19:00", "25:00-07:00", "19:00-07:60", "09:00-09:00",
                                  "19:00-24:30"])
def test_bad_hours_are_refused_naming_the_option(text):
    with pytest.raises(UsageError, match="^--hours: "):
        parse_hours(text)


def test_a_whole_day_span_is_allowed():
    s = Schedule(parse_hours("00:00-24:00"), "off", parse_days("sun"), PARIS)
    assert s.is_open(at(PARIS, 2026, 12, 2, 3, 0)) and not s.is_open(at(PARIS, 2026, 12, 6, 3, 0))


@pytest.mark.parametrize("parse, text, option", [
    (parse_days, "sat,holiday", "--weekend-days"),
    (parse_zone, "Mars/Olympus", "--time-zone"),
])
def test_bad_days_and_zones_are_refused_naming_the_option(parse, text, option):
    with pytest.raises(UsageError, match=f"^{option}: "):
        parse(text)


@pytest.mark.parametrize("option, value", [
    ("--hours", "25:00-07:00"),
    ("--weekend-days", "sat,funday"),
    ("--time-zone", "Mars/Olympus"),
])
def test_the_worker_command_refuses_bad_hours_in_one_line_with_status_2(option, value):
    import subprocess
    import sys

    res = subprocess.run([sys.executable, "-m", "lampyr.cli", "worker", "redis://127.0.0.1:1/0",
                          option, value], capture_output=True, text=True, timeout=60)
    assert res.returncode == 2
    (line,) = res.stderr.strip().splitlines()
    assert line.startswith(f"lampyr: {option}: ") and value.split(",")[-1].split("-")[0] in line
