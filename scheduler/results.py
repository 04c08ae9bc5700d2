"""Results: taking the workers' notices, guarding each one, merging, taking back a part.

`Results.take()` moves up to `limit` notices from `results` to `results:processing` (one Lua
script: a turn with no notice costs one short round trip), merges them into the tiles held in
memory, writes those tiles as one group commit (`tilestore.py`: each tile file written over a
spare, fsynced and exchanged with it, their folders fsynced once) and only then removes them: a
head killed
mid-merge finds them again, and a replayed result is dropped because its tile already holds that
sample range. The frames that grew are handed to the frame writer (`framewriter.py`). A notice
whose tile the disk refused is kept, and what its merge changed in the head's tables is undone
(`Merged`, `_undo`).

No notice can stop the head. Each is handled inside a guard:
- a notice that cannot be decoded (not JSON, no batch id the head can read) is set aside in
  `results:aside` with the reason, and logged;
- a result whose film cannot be decoded or merged fails its batch with the reason (the error
  shows in `status` and on the page; `retry` queues the batch again);
- a result the head's disk refuses (an OSError: a full disk, a read-only folder) stops its job
  with the reason, as a frame that cannot be written does (`JobRun.write_frames`); the notice and
  its result stay (parked in `results:processing`, the batch under its lease, no attempt
  counted) and are taken again once `retry` has cleared the job's error;
- a notice whose handling Redis refused (a write at its memory cap) is parked the same way and
  taken again at the next turn.
At start-up `set_aside_undecodable()` goes through the notices a killed head left behind first.
"""

from __future__ import annotations

import json
import logging
import time
from dataclasses import dataclass, replace

from . import protocol as P

log = logging.getLogger("lampyr.head")

KINDS = ("result", "partial", "error")
ASIDE_KEEP = 1000  # notices kept in results:aside (the newest)


# up to ARGV[1] notices from the front of `results` (KEYS[1]) to the back of
# `results:processing` (KEYS[2]), in one step whatever their number
_MOVE = """
local out = {}
for i = 1, tonumber(ARGV[1]) do
  local raw = redis.call('LMOVE', KEYS[1], KEYS[2], 'LEFT', 'RIGHT')
  if not raw then break end
  out[i] = raw
end
return out
"""


class NoticeError(ValueError):
    """A notice the head cannot read."""


def decode(raw: bytes) -> dict:
    """A notice as a dict with a readable batch id and ticket; NoticeError otherwise."""
    try:
        note = json.loads(raw)
    except ValueError as err:
        raise NoticeError(f"not JSON ({err})") from None
    if not isinstance(note, dict) or note.get("kind") not in KINDS:
        raise NoticeError(f"not a notice of a known kind ({', '.join(KINDS)})")
    try:
        P.parse_batch_id(str(note["batch"]))
        note["ticket"] = int(note["ticket"])
    except (KeyError, TypeError, ValueError):
        raise NoticeError("no readable batch id and ticket") from None
    return note


def set_aside(r, raw: bytes, reason: str, source: str) -> None:
    """Move one notice from the list `source` to `results:aside`, with its reason."""
    entry = json.dumps({"notice": raw.decode("utf-8", "replace")[:2000], "reason": reason,
                        "at": round(time.time(), 1)})
    pipe = r.pipeline(transaction=True)
    pipe.rpush(P.K_ASIDE, entry)
    pipe.ltrim(P.K_ASIDE, -ASIDE_KEEP, -1)  # the newest only: no worker can fill Redis with them
    pipe.lrem(source, 1, raw)
    pipe.execute()
    log.error("result notice set aside (%s): %r", reason, raw[:200])


def set_aside_undecodable(r) -> int:
    """Start-up: set aside every notice waiting or being merged that cannot be decoded."""
    n = 0
    for source in (P.K_PROCESSING, P.K_RESULTS):
        for raw in r.lrange(source, 0, -1):
            try:
                decode(raw)
            except NoticeError as err:
                set_aside(r, raw, str(err), source)
                n += 1
    return n


class Results:
    """runs: the head's job table; dispatch: the `Dispatcher` (leases, requeue, fail);
    metrics: the head's counters."""

    def __init__(self, r, runs: dict, dispatch, metrics, tiles=None, frames=None):
        from .framewriter import FrameWriter
        from .tilestore import TileStore

        self.r = r
        self.tiles = tiles if tiles is not None else TileStore()  # the group commit
        self.frames = frames if frames is not None else FrameWriter(threaded=False)
        self.runs = runs
        self.dispatch = dispatch
        self.metrics = metrics
        self.parked: dict[bytes, str] = {}  # notice → its job (left in results:processing)
        self.early: list[bytes] = []  # notices `wait()` moved to processing, for the next take
        self.drained = False  # the last take found fewer notices than it could take
        self._move = r.register_script(_MOVE)

    def wait(self, seconds: float) -> bool:
        """Sleep in Redis until a notice arrives or `seconds` pass (BLMOVE): an idle head costs
        nothing and wakes at once when a worker reports. The notice moved is merged at the next
        `take`. True when one arrived."""
        raw = self.r.blmove(P.K_RESULTS, P.K_PROCESSING, seconds, "LEFT", "RIGHT")
        if raw is not None:
            self.early.append(raw)
        return raw is not None

    def forget_in_hand(self) -> None:
        """Reconcile moved results:processing back whole: nothing is parked or in hand."""
        self.parked.clear()
        self.early.clear()

    def take(self, limit: int = 256) -> int:
        import redis

        r = self.r
        self._unpark()
        raws, self.early = self.early, []
        if len(raws) < limit:  # one step in Redis, whatever the count (none: nothing to pack)
            raws += self._move(keys=[P.K_RESULTS, P.K_PROCESSING], args=[limit - len(raws)])
        self.drained = len(raws) < limit
        if not raws:
            return 0
        notes = []
        for raw in raws:
            try:
                notes.append((raw, decode(raw)))
            except NoticeError as err:
                set_aside(r, raw, str(err), P.K_PROCESSING)
        pipe = r.pipeline(transaction=False)
        for _, note in notes:
            pipe.get(P.k_result(note["batch"], note["ticket"]))
        blobs = pipe.execute() if notes else []
        from .store import transient_errors

        lost = transient_errors()
        frames, finished, staged = set(), [], []
        for (raw, note), data in zip(notes, blobs):
            try:
                merged = self._one(note, data, frames, finished)
            except lost:
                raise  # Redis went away: the notices stay in processing, taken again (reconcile)
            except (OSError, redis.exceptions.RedisError) as err:  # the disk or Redis, not it
                self._park(raw, note, err)
            except Exception as err:  # noqa: BLE001 — a bad result fails its batch, not the head
                self._bad(note, err, finished)
            else:
                if merged is not None:
                    staged.append((raw, note, merged))
        # the group commit: every tile merged into above is on disk before any notice goes
        failed = self.tiles.commit()
        for raw, note, merged in staged:
            if merged.path in failed:
                self._undo(merged, finished)
                self._park(raw, note, failed[merged.path])
            elif merged.pixels:
                self.metrics.merged(merged.pixels)
        by_job: dict[str, list] = {}
        for job, frame in sorted(frames):
            by_job.setdefault(job, []).append(frame)
        for job, fs in by_job.items():
            run = self.runs.get(job)
            if run is not None:
                self.frames.write(run, fs)  # by the frame writer's thread (framewriter.py)
        pipe = r.pipeline(transaction=False)
        if finished:
            pipe.hdel(P.K_INFLIGHT, *finished)
        for raw, note in notes:
            if raw not in self.parked:
                pipe.lrem(P.K_PROCESSING, 1, raw)
                pipe.delete(P.k_result(note["batch"], note["ticket"]))
        pipe.execute()
        return len(raws)

    def _undo(self, merged: "Merged", finished: list) -> None:
        """The tile of a merged notice could not be written: what the merge changed in the
        head's tables goes back (its lease, its remainder), and the tile holds what its file
        holds."""
        run, bid = merged.run, merged.bid
        while bid in finished:
            finished.remove(bid)
        if merged.entry is not None and bid not in self.dispatch.leases:
            self.dispatch.leases.table[bid] = merged.entry
        if merged.rest is not None:
            try:
                run.pending.remove(merged.rest)
            except ValueError:
                pass
        try:
            run.reread_tile(merged.frame, merged.tile)
        except Exception as err:  # noqa: BLE001 — an unreadable file: the job stops anyway
            log.error("batch %s: cannot read its tile file again: %s", bid, _one_line(err))

    def _park(self, raw: bytes, note: dict, err: Exception) -> None:
        """Keep a notice (and its result) in processing for later: the head's disk refused it
        (its job stops with the reason; `retry` clears it) or Redis refused a write (the next
        turn tries again). Nothing is counted against its batch."""
        bid = note["batch"]
        job = P.parse_batch_id(bid)[0]
        self.parked[raw] = job
        run = self.runs.get(job)
        if not isinstance(err, OSError) or run is None:
            log.warning("batch %s: its notice is kept for the next turn: %s", bid, _one_line(err))
            return
        try:
            run.stop_with_error(f"cannot merge batch {bid} into its tile file: {_one_line(err)}")
        except OSError as again:  # the job's record cannot be saved either: kept in memory
            log.error("job %s: cannot save its record: %s", job, _one_line(again))

    def _unpark(self) -> None:
        """Parked notices go back in front of `results` once their job has no error (retry),
        has gone or was cancelled. Cleared at reconcile (which moves processing back whole)."""
        for raw, job in list(self.parked.items()):
            run = self.runs.get(job)
            if run is not None and run.rec.error and not run.rec.cancelled:
                continue
            del self.parked[raw]
            if self.r.lrem(P.K_PROCESSING, 1, raw):
                self.r.lpush(P.K_RESULTS, raw)

    def _one(self, note: dict, data, frames: set, finished: list) -> "Merged | None":
        """Handle one notice; a result or part merged in memory (or held already) comes back
        as a `Merged`, to be committed with its group."""
        from ..engine.film import from_bytes

        bid, ticket = note["batch"], note["ticket"]
        job, frame = P.parse_batch_id(bid)[:2]
        run = self.runs.get(job)
        if run is None or run.rec.cancelled:
            return None
        entry = self.dispatch.leases.get(bid)
        if note["kind"] == "partial":
            return self._take_back(run, entry, ticket, note, data, frames, finished)
        if note["kind"] == "error":
            self._on_error(run, bid, ticket, str(note.get("error", "?")))
            return None
        b = entry.batch if entry else batch_of(run, bid)
        if data is not None and b is not None:
            merged = run.merge(b, from_bytes(data), float(note.get("seconds", 0.0)),
                               sync_folder=False)
            # also when held already (a replay): its frame may not have been written before
            frames.add((job, frame))
            popped = self.dispatch.leases.pop(bid)
            finished.append(bid)
            return Merged(run, bid, b.frame, b.tile, run.folder.tile(b.frame, b.tile), popped,
                          None, b.w * b.h * b.count if merged else 0)
        if data is None and entry is not None and entry.ticket == ticket:
            self.dispatch.requeue(entry.batch)  # the result expired or was lost
        return None

    def _bad(self, note: dict, err: Exception, finished: list) -> None:
        """A result that could not be decoded or merged: its batch fails with the reason."""
        bid = note["batch"]
        run = self.runs.get(P.parse_batch_id(bid)[0])
        reason = f"its result could not be merged: {_one_line(err)}"
        log.error("batch %s: %s", bid, reason)
        if run is None:
            return
        b = batch_of(run, bid)
        if b is None or run.is_done(b):
            self.dispatch.leases.pop(bid)
            finished.append(bid)
            return
        try:
            self.dispatch.fail(run, bid, reason)
        except Exception as again:  # noqa: BLE001 — e.g. the job's folder is not writable
            log.error("batch %s: cannot record its failure: %s", bid, again)
            self.dispatch.leases.pop(bid)
        finished.append(bid)

    def _take_back(self, run, entry, ticket: int, note: dict, data, frames: set,
                   finished: list) -> "Merged | None":
        """A batch handed back part-way: merge the samples [first, first + done) it holds and
        queue the rest first. The notice of a dispatch the head has replaced is skipped whole:
        the newer dispatch renders the whole batch."""
        from ..engine.film import from_bytes

        if entry is None or entry.ticket != ticket:
            return None
        b = entry.batch
        done = max(0, min(int(note.get("done", 0)), b.count))
        if done and data is None:  # the part expired or was lost: the whole batch again
            self.dispatch.requeue(b)
            return None
        part = replace(b, count=done)
        merged = bool(done) and run.merge(part, from_bytes(data), float(note.get("seconds", 0.0)),
                                          sync_folder=False)
        self.dispatch.leases.pop(b.id)
        rest = None
        if done < b.count:
            rest = replace(b, first=b.first + done, count=b.count - done)
            run.pending.appendleft(rest)
        finished.append(b.id)
        log.info("batch %s handed back by %s with %d of %d samples", b.id,
                 note.get("worker", "?"), done, b.count)
        if not done:
            return None
        frames.add((b.job, b.frame))
        return Merged(run, b.id, b.frame, b.tile, run.folder.tile(b.frame, b.tile), entry, rest,
                      b.w * b.h * done if merged else 0)

    def _on_error(self, run, bid: str, ticket: int, error: str) -> None:
        entry = self.dispatch.leases.get(bid)
        if entry is None or entry.ticket != ticket or run.is_done(entry.batch):
            return  # a message the head had already replaced
        self.metrics.batch_errors += 1
        self.dispatch.give_up_or_requeue(run, entry.batch, error)


@dataclass
class Merged:
    """A notice merged in memory, waiting for its group's commit: what to undo if its tile
    cannot be written (the lease entry taken, the remainder queued) and what to count if it
    can (pixel-samples newly merged; 0 for a range held already)."""

    run: object
    bid: str
    frame: int
    tile: int
    path: object
    entry: object
    rest: object
    pixels: int


def batch_of(run, bid: str) -> P.Batch | None:
    """The batch `bid` of `run` rebuilt from its id (a result of a dispatch the head forgot)."""
    job, frame, tile, first, count = P.parse_batch_id(bid)
    if frame not in run.frames or not 0 <= tile < len(run.tiles):
        return None
    t = run.tiles[tile]
    return P.Batch(job, frame, tile, first, count, t.x0, t.y0, t.w, t.h)


def _one_line(err: BaseException) -> str:
    text = str(err).strip().splitlines()
    return f"{type(err).__name__}: {text[0] if text else ''}"
