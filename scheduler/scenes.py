"""The head's side of scene files in Redis (transfer.py): kept alive while a job needs them,
deleted when no unfinished job does.

- `hold(run)`: renews the job's `scene:`/`blob:` keys at most every P.FILE_REFRESH seconds,
  putting back from the job folder any that Redis lost; a failure is logged (its batches then
  fail with the worker's message) and never stops the head.
- `hold_all()`: every minute, `hold` for every job with work left.
- `release(run)`: a job ended (done, failed, cancelled): its manifest and the chunks no
  unfinished job's manifest names are deleted at once, instead of waiting for their TTL. A
  key renewed since the head's own last renewal of it (its remaining life is longer than that
  renewal left it) is left to its TTL: a submitter may just have found it present and be about
  to name it in a new manifest. A job refined or retried later gets its files back from the
  head's copy (`hold`).
"""

from __future__ import annotations

import logging
import time

from . import protocol as P

log = logging.getLogger("lampyr.head")

RECENT = 300  # seconds: without a renewal of the head's own to compare with, a key renewed
SLACK = 5  # this recently is left to its TTL; SLACK: seconds of clock and round-trip leeway

# delete each key whose remaining life is at most ARGV[1] seconds (not renewed since)
_DELETE_IF_IDLE = """
local n = 0
for i, k in ipairs(KEYS) do
  local ttl = redis.call('ttl', k)
  if ttl >= 0 and ttl <= tonumber(ARGV[1]) then
    n = n + redis.call('del', k)
  end
end
return n
"""


class SceneKeeper:
    """runs: the head's job table; busy(): ids of jobs with batches in flight."""

    def __init__(self, r, runs: dict, busy):
        self.r = r
        self.runs = runs
        self.busy = busy
        self.held: dict[str, float] = {}  # job → when its scene's files were last held
        self.renewed: dict[str, float] = {}  # scene → when the head last renewed its keys
        self._at = 0.0

    def hold_all(self, every: float = 60.0) -> None:
        now = time.monotonic()
        if now - self._at < every:
            return
        self._at = now
        busy = self.busy()
        for run in list(self.runs.values()):
            if not run.rec.cancelled and (run.pending or run.rec.id in busy):
                self.hold(run)

    def hold(self, run) -> None:
        from .transfer import TransferError, hold

        now = time.monotonic()
        if now - self.held.get(run.rec.id, -1e18) < P.FILE_REFRESH:
            return
        self.held[run.rec.id] = now
        try:
            back = hold(self.r, (run.folder.root / "scene.json").read_bytes(), run.folder.bundle)
            self.renewed[run.rec.bundle] = now
        except (OSError, TransferError) as err:
            log.error("job %s: cannot keep its scene's files in Redis: %s", run.rec.id, err)
            return
        if back:
            log.warning("job %s: put back %d bytes of its scene Redis had lost", run.rec.id, back)

    def release(self, run, unfinished) -> int:
        """Delete `run`'s scene keys that none of `unfinished` (JobRuns) needs; returns how many
        keys went."""
        from .transfer import Manifest, TransferError

        self.held.pop(run.rec.id, None)
        held_at = self.renewed.get(run.rec.bundle)
        if held_at is None:
            idle = P.FILE_TTL - RECENT
        else:
            idle = P.FILE_TTL - (time.monotonic() - held_at) + SLACK
        try:
            mine = Manifest.from_bytes((run.folder.root / "scene.json").read_bytes())
            needed = set()
            for other in unfinished:
                if other.rec.bundle == run.rec.bundle:
                    return 0
                needed.update(Manifest.from_bytes(
                    (other.folder.root / "scene.json").read_bytes()).blobs())
        except (OSError, TransferError) as err:
            log.warning("job %s: its scene's files are left to expire: %s", run.rec.id, err)
            return 0
        keys = [P.k_scene(run.rec.bundle)] + [P.k_blob(c) for c in mine.blobs()
                                              if c not in needed]
        gone = int(self.r.eval(_DELETE_IF_IDLE, len(keys), *keys, int(idle)))
        self.renewed.pop(run.rec.bundle, None)
        if gone:
            log.info("job %s ended: %d of its scene's keys deleted from Redis", run.rec.id, gone)
        return gone
