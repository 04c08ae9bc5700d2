"""What the farm did over time: merged pixel-samples per minute, and when each worker was last seen.

    throughput  hash  minute (epoch seconds, a multiple of 60) → pixel-samples merged in it;
                      fields older than KEEP_SECONDS are dropped
    seen        hash  worker name → its last heartbeat JSON plus "last_seen" (epoch seconds);
                      entries older than FORGET_SECONDS are dropped

The head writes both (`HistoryRecorder.record`, from its publish step); readers are
`throughput()` and `roster()`. A worker whose heartbeat (`host:<name>`) expired or was removed
but that is still in `seen` is listed as offline, with the time it was last heard from.
"""

from __future__ import annotations

import json
import time
import weakref

from . import protocol as P

MINUTE = 60
KEEP_SECONDS = 24 * 3600  # throughput history kept (the page shows the last hours of it)
FORGET_SECONDS = 7 * 24 * 3600  # an offline worker is listed for a week, then forgotten
SEEN_EVERY = 2.0  # seconds between two updates of `seen`


class HistoryRecorder:
    """Head side. Counts the growth of every `JobRun.samples_merged` since the last call (a run
    replaced by a new object, as `refine` does, starts again from 0) into the current minute."""

    def __init__(self):
        self._last = weakref.WeakKeyDictionary()  # JobRun → samples_merged already counted
        self._trim_at = 0.0
        self._seen_at = 0.0

    def record(self, head, pipe, now: float | None = None) -> None:
        now = time.time() if now is None else now
        grown = 0
        for run in head.jobs.values():
            grown += run.samples_merged - self._last.get(run, 0)
            self._last[run] = run.samples_merged
        if grown > 0:
            pipe.hincrby(P.K_THROUGHPUT, int(now // MINUTE * MINUTE), grown)
        if now - self._trim_at > MINUTE:
            self._trim_at = now
            old = [k for k in head.r.hkeys(P.K_THROUGHPUT) if int(k) < now - KEEP_SECONDS]
            if old:
                pipe.hdel(P.K_THROUGHPUT, *old)
        if now - self._seen_at > SEEN_EVERY:
            self._seen_at = now
            note_hosts(head.r, pipe, now)


def note_hosts(r, pipe, now: float) -> None:
    """Copy every live heartbeat into `seen` with its time; forget entries older than a week."""
    from . import heartbeats

    mapping = {}
    for info in heartbeats.hosts(r):
        info["last_seen"] = now
        mapping[info["name"]] = json.dumps(info)
    if mapping:
        pipe.hset(P.K_SEEN, mapping=mapping)
    stale = [name for name, raw in r.hgetall(P.K_SEEN).items()
             if json.loads(raw).get("last_seen", 0) < now - FORGET_SECONDS]
    if stale:
        pipe.hdel(P.K_SEEN, *stale)


# -- readers ---------------------------------------------------------------------------------------

def throughput(r, hours: float = 6.0, now: float | None = None) -> dict:
    """Pixel-samples merged per minute over the last `hours`, oldest first, zero-filled:
    {"start": epoch of the first minute, "step": 60, "values": [int, ...]}."""
    now = time.time() if now is None else now
    n = max(1, int(hours * 3600 // MINUTE))
    last = int(now // MINUTE * MINUTE)
    start = last - (n - 1) * MINUTE
    values = [0] * n
    for k, v in r.hgetall(P.K_THROUGHPUT).items():
        i = (int(k) - start) // MINUTE
        if 0 <= i < n:
            values[i] = int(v)
    return {"start": start, "step": MINUTE, "values": values}


def forget(r, name: str) -> bool:
    """Drop an offline worker from `seen` (a PC taken out of the farm); False when it is not
    there or is online (a live heartbeat would put it back at once)."""
    if r.exists(P.k_host(name)):
        return False
    return bool(r.hdel(P.K_SEEN, name))


def roster(r, now: float | None = None) -> dict:
    """{"online": [...], "offline": [...]}: live worker hosts (`store.workers`, each with
    "last_seen"), and workers seen before whose heartbeat is gone (their last heartbeat, newest
    first)."""
    from .store import workers

    now = time.time() if now is None else now
    online = workers(r)
    seen = {name.decode(): json.loads(raw) for name, raw in r.hgetall(P.K_SEEN).items()}
    for w in online:
        w["last_seen"] = seen.get(w["name"], {}).get("last_seen", now)
    live = {w["name"] for w in online}
    offline = sorted((info for name, info in seen.items() if name not in live),
                     key=lambda info: -info.get("last_seen", 0))
    return {"online": online, "offline": offline}
