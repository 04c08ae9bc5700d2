"""Working hours: when a worker may render, in the machine's local time (or a named zone).

A schedule is a list of daily spans (`19:00-07:30` runs across midnight into the next morning),
a set of weekend days and a weekend rule:

- `all-day`: a weekend day is open from 00:00 to 24:00, and the daily spans that start on it
  still run to their end (Sunday's 19:00-07:30 keeps the farm busy until Monday 07:30);
- `same-hours`: weekend days are ordinary days;
- `off`: no span starts on a weekend day (Friday night's span still ends Saturday morning).

Every answer is computed from an epoch time the caller passes in, so the clock can be injected.
Wall-clock arithmetic goes through the zone's rules (zoneinfo, or the C library's local time
when no zone is named), so a window across a daylight-saving change keeps its wall-clock ends.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from datetime import date, datetime, time as dtime, timedelta

from ..errors import UsageError

DAY_NAMES = ("mon", "tue", "wed", "thu", "fri", "sat", "sun")
WEEKEND_RULES = ("all-day", "same-hours", "off")
HORIZON = 36 * 3600  # seconds of windows a heartbeat publishes
_DAY = 24 * 60

_SPAN = re.compile(r"^\s*(\d{1,2}):(\d{2})\s*-\s*(\d{1,2}):(\d{2})\s*$")


@dataclass(frozen=True)
class Span:
    """A daily span in minutes after midnight; end <= start runs past midnight."""

    start: int
    end: int

    def __str__(self) -> str:
        return f"{_hhmm(self.start)}-{_hhmm(self.end)}"


def _hhmm(minutes: int) -> str:
    return f"{minutes // 60:02d}:{minutes % 60:02d}"


def parse_hours(text: str, option: str = "--hours") -> tuple[Span, ...]:
    """`19:00-07:30` or several spans separated by commas (`12:00-13:00,19:00-07:30`)."""
    spans = []
    for part in text.split(","):
        m = _SPAN.match(part)
        if not m:
            raise UsageError(f"{option}: expected spans like 19:00-07:30 (24-hour clock, "
                             f"several separated by commas), got {text!r}")
        h1, m1, h2, m2 = map(int, m.groups())
        if h1 > 23 or m1 > 59 or h2 > 24 or m2 > 59 or (h2 == 24 and m2):
            raise UsageError(f"{option}: {part.strip()!r} is not a time of day "
                             "(hours 00-23, or 24:00 as an end; minutes 00-59)")
        start, end = h1 * 60 + m1, h2 * 60 + m2
        if start == end % _DAY and end != _DAY:
            raise UsageError(f"{option}: {part.strip()!r} is empty (start and end are equal; "
                             "00:00-24:00 is the whole day)")
        spans.append(Span(start, end))
    return tuple(spans)


def parse_days(text: str, option: str = "--weekend-days") -> frozenset[int]:
    """`sat,sun` → {5, 6} (Monday is 0, as `date.weekday()`)."""
    days = set()
    for part in text.split(","):
        name = part.strip().lower()[:3]
        if name not in DAY_NAMES:
            raise UsageError(f"{option}: expected day names like sat,sun, got {part.strip()!r}")
        days.add(DAY_NAMES.index(name))
    return frozenset(days)


def parse_zone(name: str | None, option: str = "--time-zone"):
    """A zoneinfo zone for an IANA name, or None (the machine's local time)."""
    if not name:
        return None
    from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

    try:
        return ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError):
        raise UsageError(f"{option}: expected a time zone name like Europe/Paris, got {name!r}") from None


class Schedule:
    """When a worker may render.

    spans: daily spans (empty: the whole day); weekend: one of WEEKEND_RULES; weekend_days:
    weekday numbers (Monday 0); tz: a zoneinfo zone, or None for the machine's local time.
    """

    def __init__(self, spans=(), weekend: str = "all-day", weekend_days=frozenset({5, 6}),
                 tz=None):
        if weekend not in WEEKEND_RULES:
            raise UsageError(f"--weekend: expected one of {', '.join(WEEKEND_RULES)}, got {weekend!r}")
        self.spans = tuple(spans)
        self.weekend = weekend
        self.weekend_days = frozenset(weekend_days)
        self.tz = tz

    @property
    def always(self) -> bool:
        """True when every moment is inside working hours (no windows to publish)."""
        return not self.spans and (self.weekend != "off" or not self.weekend_days)

    def describe(self) -> str:
        hours = ",".join(map(str, self.spans)) or "all day"
        if not self.weekend_days or self.weekend == "same-hours":
            return hours
        days = ",".join(DAY_NAMES[d] for d in sorted(self.weekend_days))
        return f"{hours}; {days}: " + ("all day" if self.weekend == "all-day" else "off")

    # -- wall clock ------------------------------------------------------------------------

    def _local(self, t: float) -> datetime:
        return datetime.fromtimestamp(t, self.tz)  # naive local time when tz is None

    def _epoch(self, day: date, minutes: int) -> float:
        # aware + timedelta is wall-clock arithmetic; the zone gives the offset of the result.
        # A naive datetime's timestamp() goes through mktime(): the machine's own rules.
        return (datetime.combine(day, dtime(0), tzinfo=self.tz) + timedelta(minutes=minutes)).timestamp()

    def _day_spans(self, day: date) -> list[tuple[int, int]]:
        """Spans starting on `day`, in minutes after its midnight (end may pass 24:00)."""
        spans = self.spans or (Span(0, _DAY),)
        weekend = day.weekday() in self.weekend_days
        if weekend and self.weekend == "off":
            return []
        out = [(s.start, s.end if s.end > s.start else s.end + _DAY) for s in spans]
        if weekend and self.weekend == "all-day":
            out.append((0, _DAY))
        return out

    # -- questions -------------------------------------------------------------------------

    def windows(self, t0: float, t1: float) -> list[tuple[float, float]]:
        """Open intervals [start, end) in epoch seconds that overlap [t0, t1], merged where they
        touch; each keeps its true start and end (the first may start before t0)."""
        first, last = self._local(t0).date(), self._local(t1).date()
        raw = []
        # a span of the day before may run into t0; a window open at t1 may run on for days
        # (a weekend): look a week past t1 so that its true end is found
        day, stop = first - timedelta(days=1), last + timedelta(days=8)
        while day <= stop:
            raw += [(self._epoch(day, a), self._epoch(day, b)) for a, b in self._day_spans(day)]
            day += timedelta(days=1)
        merged: list[list[float]] = []
        for a, b in sorted(raw):
            if merged and a <= merged[-1][1]:
                merged[-1][1] = max(merged[-1][1], b)
            else:
                merged.append([a, b])
        return [(a, b) for a, b in merged if b > t0 and a <= t1]

    def window_at(self, t: float) -> tuple[float, float] | None:
        """The open window holding `t`, or None outside working hours."""
        for a, b in self.windows(t, t):
            if a <= t < b:
                return (a, b)
        return None

    def is_open(self, t: float) -> bool:
        return self.window_at(t) is not None

    def next_open(self, t: float) -> float | None:
        """When the next window opens after `t` (t itself when open); None if never."""
        if self.is_open(t):
            return t
        for a, b in self.windows(t, t + 8 * 86400):  # a week and a day covers every rule
            if a > t:
                return a
        return None

    def heartbeat_windows(self, now: float, horizon: float = HORIZON) -> list[list[float]]:
        """`windows` of the host heartbeat: [[start, end], ...] over the next `horizon` seconds
        (empty when always open)."""
        if self.always:
            return []
        return [[round(a, 3), round(b, 3)] for a, b in self.windows(now, now + horizon)]

    def waiting_line(self, now: float) -> str:
        """One line for a worker outside its hours."""
        nxt = self.next_open(now)
        when = "never (no window in the schedule)" if nxt is None else \
            self._local(nxt).strftime("%a %H:%M")
        return f"outside working hours ({self.describe()}); next window opens {when}"
