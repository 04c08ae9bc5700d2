"""The farm's throughput until a ready-by time, from what the head measures.

Three sources, cheapest first:
- each worker slot's measured speed (`slot:<name>:<pid>` carries `pixel_samples_per_second`;
  kept per host here as a moving average, since a slot record exists only while it renders);
- each host's working windows (`host:<name>` may carry `"windows": [[start, end], ...]` in epoch
  seconds for the next 36 hours; absent or empty: always available) — a host contributes its
  speed only inside its windows, and only until the ready-by time;
- the pixel-samples the head merged per unit time: the fallback speed for a farm no slot has
  reported on yet, and an efficiency factor (queueing, transfer, scene set-up between batches
  are not in a slot's render speed) measured while the queue stayed full.

Capacity is in pixel-samples: Σ_hosts slots × speed × seconds available before the ready-by time.
Everything here is plain data in, numbers out, so the head and the farm simulation
(tests/scheduler/farmsim.py) run this same code; `read_hosts` is the one function that
touches Redis.
"""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass, field

SPEED_WEIGHT = 0.3  # weight of a new observation in a host's moving average (rule of thumb)
EFFICIENCY_FLOOR = 0.5  # never believe the farm loses more than half its time between batches
RATE_WINDOW = 120.0  # seconds of merges the rate and the efficiency are measured over


@dataclass(frozen=True)
class HostView:
    """One worker host as the forecast sees it.

    slots: batches it renders at once (its cores); speed: pixel-samples per second of one slot,
    or None when not measured yet; windows: ((start, end), ...) epoch seconds, () = always.
    """

    name: str
    slots: int
    speed: float | None = None
    windows: tuple = ()


def available_seconds(windows, start: float, end: float) -> float:
    """Seconds of [start, end] inside the union of `windows` (all of it when there are none)."""
    if end <= start:
        return 0.0
    if not windows:
        return end - start
    spans = sorted((max(float(a), start), min(float(b), end)) for a, b in windows)
    total, reach = 0.0, start
    for a, b in spans:  # union of overlapping windows, clipped to [start, end]
        a = max(a, reach)
        if b > a:
            total += b - a
            reach = b
    return total


def in_window(windows, t: float) -> bool:
    return not windows or any(float(a) <= t < float(b) for a, b in windows)


def capacity(hosts, now: float, until: float, efficiency: float = 1.0,
             default_speed: float = 0.0) -> float:
    """Pixel-samples the hosts can render in [now, until]; `default_speed` stands in for a
    host whose speed is not measured yet."""
    total = 0.0
    for h in hosts:
        speed = h.speed if h.speed is not None else default_speed
        total += h.slots * speed * available_seconds(h.windows, now, until)
    return total * efficiency


def finish_time(hosts, now: float, work: float, horizon: float, efficiency: float = 1.0,
                default_speed: float = 0.0) -> float | None:
    """Earliest t ≤ now + horizon by which `work` pixel-samples fit, or None (bisection on
    the capacity, which grows monotonically with t)."""
    if work <= 0:
        return now
    hi = now + horizon
    if capacity(hosts, now, hi, efficiency, default_speed) < work:
        return None
    lo = now
    for _ in range(40):  # 36 h / 2**40: far below a second
        mid = (lo + hi) / 2
        if capacity(hosts, now, mid, efficiency, default_speed) >= work:
            hi = mid
        else:
            lo = mid
    return hi


class SpeedBook:
    """Per host, a moving average of its slots' measured speeds (pixel-samples per second)."""

    def __init__(self):
        self.speeds: dict[str, float] = {}

    def observe(self, host: str, speed: float) -> None:
        if speed <= 0:
            return
        old = self.speeds.get(host)
        self.speeds[host] = speed if old is None else (1 - SPEED_WEIGHT) * old + SPEED_WEIGHT * speed

    def get(self, host: str) -> float | None:
        return self.speeds.get(host)

    def mean(self) -> float | None:
        return sum(self.speeds.values()) / len(self.speeds) if self.speeds else None


@dataclass
class RateMeter:
    """Pixel-samples merged over the last RATE_WINDOW seconds, and the nominal rate the hosts
    promised meanwhile; their ratio is the farm's efficiency while the queue stayed full."""

    merges: deque = field(default_factory=deque)  # (t, pixel-samples)
    nominal: deque = field(default_factory=deque)  # (t, promised pixel-samples/s, saturated)
    since: float | None = None
    last: float = 1.0  # the latest efficiency measured over a full window

    def merged(self, t: float, pixel_samples: float) -> None:
        self.merges.append((t, float(pixel_samples)))
        self._trim(t)

    def promise(self, t: float, rate: float, saturated: bool) -> None:
        if self.since is None:
            self.since = t
        self.nominal.append((t, float(rate), bool(saturated)))
        self._trim(t)

    def _trim(self, t: float) -> None:
        for q in (self.merges, self.nominal):
            while q and q[0][0] < t - RATE_WINDOW:
                q.popleft()

    def rate(self, t: float) -> float:
        """Merged pixel-samples per second over the window (0 before anything merged)."""
        self._trim(t)
        span = min(RATE_WINDOW, t - self.since) if self.since is not None else 0.0
        return sum(p for _, p in self.merges) / span if span > 0 else 0.0

    def efficiency(self, t: float) -> float:
        """merged / promised over a full window in which the queue never ran dry; while the
        window cannot judge (the queue ran dry, as it does when a plan holds work back), the
        last such measurement; 1 before there is any."""
        self._trim(t)
        if self.since is None or t - self.since < RATE_WINDOW or len(self.nominal) < 2:
            return self.last
        if not all(s for _, _, s in self.nominal):
            return self.last
        promised = 0.0
        for (t0, rate, _), (t1, _, _) in zip(self.nominal, list(self.nominal)[1:]):
            promised += rate * (t1 - t0)
        span = self.nominal[-1][0] - self.nominal[0][0]
        if promised <= 0 or span <= 0:
            return self.last
        merged = sum(p for s, p in self.merges if s > self.nominal[0][0])  # in (t0, t1]
        self.last = min(1.0, max(EFFICIENCY_FLOOR, merged / promised))
        return self.last


class Forecaster:
    """The farm's throughput as the head (or the simulation) last measured it."""

    def __init__(self):
        self.book = SpeedBook()
        self.meter = RateMeter()
        self.hosts: list[HostView] = []
        self.prior = 0.0  # a slot's speed to assume before anything is measured or merged

    def update(self, t: float, hosts, slot_speeds, saturated: bool) -> None:
        """hosts: [(name, slots, windows)] of the live hosts; slot_speeds: [(host, speed)]
        measured since the last update; saturated: batches were waiting unclaimed."""
        for name, speed in slot_speeds:
            self.book.observe(name, speed)
        self.hosts = [HostView(n, int(s), self.book.get(n), tuple(map(tuple, w or ())))
                      for n, s, w in hosts]
        rate = sum(h.slots * (h.speed or self.default_speed(t)) for h in self.hosts
                   if in_window(h.windows, t))
        self.meter.promise(t, rate, saturated)

    def merged(self, t: float, pixel_samples: float) -> None:
        self.meter.merged(t, pixel_samples)

    def default_speed(self, t: float) -> float:
        """A slot's speed where its own is not measured: the farm's mean, else the merged rate
        shared among the slots working now, else the prior."""
        mean = self.book.mean()
        if mean is not None:
            return mean
        slots = sum(h.slots for h in self.hosts if in_window(h.windows, t))
        rate = self.meter.rate(t) / slots if slots else 0.0
        return rate if rate > 0 else self.prior

    def capacity(self, now: float, until: float) -> float:
        return capacity(self.hosts, now, until, self.meter.efficiency(now),
                        self.default_speed(now))

    def finish_time(self, now: float, work: float, horizon: float) -> float | None:
        return finish_time(self.hosts, now, work, horizon, self.meter.efficiency(now),
                           self.default_speed(now))


def read_hosts(r):
    """([(name, cores, windows)], [(host, speed)]) from the live heartbeats and slot records."""
    from . import heartbeats

    hosts = [(info["name"], int(info.get("cores") or 1), info.get("windows") or ())
             for info in heartbeats.hosts(r)]
    speeds = []
    for slot in heartbeats.slots(r):
        speed = float(slot.get("pixel_samples_per_second") or 0.0)
        if speed > 0:
            speeds.append((slot["worker"], speed))
    return hosts, speeds
