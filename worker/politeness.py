"""Keeping out of the way of the machine's own user: lowest CPU priority, and noticing when the
user is busy (CPU load that is not this worker's stays above a threshold) so that rendering
pauses until the machine is quiet again.

Load is measured as a fraction of the whole machine (all cores): the busy CPU seconds of the
machine (psutil's `cpu_times`: everything but idle and iowait, guest time not counted twice, as
psutil's own `cpu_percent` does) minus the CPU seconds of this worker's process tree (the
supervisor, the Celery worker and its pool processes), over the wall seconds between two samples
times the number of cores. `LoadMeter(user_pids=...)` counts only the given processes (and their
children) as the user's load instead.
"""

from __future__ import annotations

import os
import sys
import time
from collections import deque

import psutil

LOWEST_NICE = 19  # the lowest CPU priority on Linux and macOS (nice(2), setpriority(2))


def lower_priority() -> int | str:
    """Give this process (and the processes it starts later) the lowest CPU priority: nice 19,
    or the idle priority class on Windows. Returns the new niceness (or class name)."""
    if sys.platform == "win32":
        psutil.Process().nice(psutil.IDLE_PRIORITY_CLASS)
        return "idle"
    now = os.nice(0)
    if now < LOWEST_NICE:
        now = os.nice(LOWEST_NICE - now)
    return now


def _machine_busy_seconds() -> tuple[float, float]:
    """(busy CPU seconds, all CPU seconds) of the machine since boot, summed over cores."""
    t = psutil.cpu_times()
    total = sum(t)
    # Linux counts guest time inside user time as well: do not count it twice (as psutil does)
    total -= getattr(t, "guest", 0.0) + getattr(t, "guest_nice", 0.0)
    idle = t.idle + getattr(t, "iowait", 0.0)
    return total - idle, total


def _tree_seconds(roots, seen: dict) -> float:
    """CPU seconds (user + system) of the processes `roots` and all their descendants.

    seen: pid → last CPU seconds read, kept between calls so that a process that ended
    between two samples is still counted up to its last reading."""
    alive = set()
    for root in roots:
        try:
            procs = [root] + root.children(recursive=True)
        except psutil.Error:
            continue
        for p in procs:
            try:
                c = p.cpu_times()
                seen[p.pid] = c.user + c.system
                alive.add(p.pid)
            except psutil.Error:
                pass
    return sum(seen.values())


class LoadMeter:
    """The machine's CPU load that is not the worker's own, as a fraction 0..1 of all cores.

    own_root: pid at the top of the worker's process tree; user_pids: when given, only these
    processes (and their children) count as the user's load.
    """

    def __init__(self, own_root: int | None = None, user_pids=None):
        self.own = psutil.Process(own_root or os.getpid())
        self.user = [psutil.Process(p) for p in user_pids] if user_pids else None
        self.cores = psutil.cpu_count() or 1
        self._own_seen: dict = {}
        self._user_seen: dict = {}
        self._last = self._read()

    def _read(self) -> tuple[float, float, float]:
        """(wall seconds, busy CPU seconds counted as the user's, all CPU seconds)."""
        wall = time.monotonic()
        if self.user is not None:
            return wall, _tree_seconds(self.user, self._user_seen), wall * self.cores
        busy, total = _machine_busy_seconds()
        return wall, busy - _tree_seconds([self.own], self._own_seen), total

    def sample(self) -> float:
        """Load of others since the previous sample, 0..1 of the machine."""
        now = self._read()
        (_, b0, t0), (_, b1, t1) = self._last, now
        self._last = now
        span = t1 - t0
        if span <= 0:
            return 0.0
        return min(1.0, max(0.0, (b1 - b0) / span))


class BusyWatch:
    """Decides "the user is busy" from load samples: busy while the mean load over the last
    `seconds` is above `threshold` (a fraction of the machine), quiet again once it is not.

    Feed it `update(t, load)` with monotonic times; `busy` is the current verdict and
    `busy_since` when it turned busy (None while quiet).
    """

    def __init__(self, threshold: float, seconds: float):
        self.threshold = float(threshold)
        self.seconds = float(seconds)
        self.samples: deque = deque()
        self.busy = False
        self.busy_since: float | None = None
        self.started: float | None = None

    def mean(self) -> float:
        return sum(v for _, v in self.samples) / len(self.samples) if self.samples else 0.0

    def update(self, t: float, load: float) -> bool:
        if self.started is None:
            self.started = t
        self.samples.append((t, load))
        while self.samples and self.samples[0][0] <= t - self.seconds:
            self.samples.popleft()
        # no verdict before the load has been watched for `seconds`
        covered = t - self.started >= self.seconds
        if not self.busy and covered and self.mean() > self.threshold:
            self.busy, self.busy_since = True, t
        elif self.busy and covered and self.mean() <= self.threshold:
            self.busy, self.busy_since = False, None
        return self.busy
