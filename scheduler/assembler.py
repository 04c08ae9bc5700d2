"""The job run: a job's tile accumulators and the single writer of its frame files.

A job's runtime view (`JobRun`) keeps the sample ranges and noise of every tile in memory, read
from the accumulators' headers at start-up (films are not read); tile films stay on disk and are
read only to merge or to assemble a frame. A frame file is rewritten whenever the fewest samples
any of its tiles holds grows, so the first pass already gives a complete frame and the last batch
the final one; a frame not complete yet is rewritten at most once per `rewrite_every` seconds
(a growth sooner is written when that time is up), a complete one at once. At start-up a frame
file newer than every tile file of its frame counts as written (`settle_written`), so a restart
does not rewrite old jobs' frames. Tile files are fsynced unless the job run is not `durable`
(`lampyr render`, whose state folder is scratch removed at its end).

Every frame file is written by `write_frame` alone. A frame that cannot be written (an `--out`
that cannot be made, a full disk) does not stop the head: `write_frames` records the reason as
the job's error (the job shows `failed`, queues nothing, and `retry` tries again); the tiles on
disk keep everything merged.
"""

from __future__ import annotations

import logging
import threading
import time
from collections import deque
from pathlib import Path

from .accumulator import TileAccumulator, header_noise_known, read_header, samples_held, tile_noise
from .file_swap import drop_spares_in
from .jobs import JobFolder, JobRecord
from .tilestore import TileStore
from .planner import plan_batches
from .protocol import Batch, parse_batch_id

log = logging.getLogger("lampyr.head")

# seconds between two rewrites of a frame that is not complete yet (rule of thumb: often enough
# to watch a frame grow, rarely enough that EXR and PNG writing stays a small share of the head)
REWRITE_EVERY = 5.0
# the largest share of the frame writer's time that partial rewrites of one frame may take: after
# a partial rewrite that took t seconds, the next waits at least t / REWRITE_SHARE (rule of thumb:
# a tenth). A demo frame (0.05 s) keeps the 5 s above; a 1536 × 1536 frame (2.3 s of EXR and PNG
# writing on one core, all of it taken from merging on a two-core head) is rewritten every 23 s.
REWRITE_SHARE = 0.1
_record_lock = threading.Lock()  # job.json is written whole by one thread at a time


class JobRun:
    """A job as the head runs it: record, shot, tiles, which batches are done, frames written."""

    def __init__(self, state: Path, rec: JobRecord, partial_frames: bool = True, *,
                 durable: bool = True, rewrite_every: float = REWRITE_EVERY, store=None,
                 denoised_errors: bool = True, rewrite_share: float = REWRITE_SHARE):
        from ..engine.render import tiles_for
        from ..engine.shot import load_shot

        self.rec = rec
        self.partial_frames = partial_frames
        self.durable = durable  # False: tile files are not fsynced (a scratch state folder)
        # False: a frame written denoised gets no denoised errors (its two half-frames are not
        # denoised), unless the job has a ready-by time, whose planner reads them
        self.denoised_errors = denoised_errors
        self.rewrite_every = rewrite_every
        self.rewrite_share = rewrite_share
        # the tiles in memory, written in groups (shared by the head's jobs; tilestore.py)
        self.store = store if store is not None else TileStore(fsync=durable)
        self.partial_at: dict[int, float] = {}  # frame → time.monotonic() of its last partial write
        self.partial_gap: dict[int, float] = {}  # frame → seconds from it to the next (see above)
        self.due: dict[int, float] = {}  # frame → when its held-back rewrite is due
        self.folder = JobFolder(state, rec.id)
        shot = load_shot(self.folder.bundle / rec.shot)
        self.shot = shot.with_overrides(**_overrides(rec)) if rec.overrides or rec.samples else shot
        self.tiles = tiles_for(self.shot.width, self.shot.height, rec.tile_size)
        self.frames = list(self.shot.frames())
        self.held: dict[tuple[int, int], list] = {}
        self.noise: dict[tuple[int, int], float | None] = {}  # see progress.py
        for f in self.frames:
            # spares a killed head left (file_swap.py); the tile store makes them again
            drop_spares_in(self.folder.tile(f, 0).parent)
            for i, t in enumerate(self.tiles):
                path = self.folder.tile(f, i)
                ranges, noise = read_header(path)
                if not header_noise_known(noise):  # written before headers kept the noise
                    noise = tile_noise(TileAccumulator.load(path, t.w, t.h).film)
                self.held[(f, i)] = ranges
                self.noise[(f, i)] = noise
        self.dirty: set[int] = set(self.frames)  # frames merged into since progress was published
        self.changes = 0  # counts the edits of `held` (the head's status is published on change)
        self._sums: tuple = (None, (0, 0), 0)  # (key, pixel_samples(), frames_done()) cached
        self.written: dict[int, int] = {}  # frame → its lowest tile sample count when written
        self.written_sum: dict[int, int] = {}  # frame → samples of all its tiles when written
        self.seconds: dict[int, float] = {f: 0.0 for f in self.frames}
        self.pending: deque = deque()
        self.started = time.time()
        self.samples_merged = 0  # pixel-samples merged by this head process (for the rate)
        self._manifest = None  # the names of the shot's ID mattes, read at the first frame write
        # frame → (its tiles' denoised errors, the lowest spp they were measured at), from its
        # last denoised write (engine/dual_buffer.py) or that file's header, read when first asked
        self.denoised: dict[int, tuple[list, int]] = {}
        self._no_errors: dict[int, int] = {}  # frame → mtime_ns of its file, read with no errors
        self.replan()

    def replan(self) -> None:
        """Rebuild `pending` from the plan: every batch neither held nor failed. A batch
        held in part (handed back part-way) is queued as the sub-ranges its tile lacks."""
        batches = plan_batches(self.rec.id, self.frames, self.tiles, self.rec.ranges)
        for key, ranges in self.rec.extra.items():
            f, i = map(int, key.split("/"))
            t = self.tiles[i]
            batches += [Batch(self.rec.id, f, i, a, c, t.x0, t.y0, t.w, t.h) for a, c in ranges]
        self.pending = deque(
            part for b in batches if b.id not in self.rec.failed
            for part in _remainders(b, self.held[(b.frame, b.tile)])
            if part.id not in self.rec.failed
        )

    def save(self) -> None:
        with _record_lock:  # the frame writer thread may save it too (stop_with_error)
            self.folder.save(self.rec)

    def fail_batch(self, bid: str, text: str) -> None:
        """Mark a batch failed for good (retry queues it again) and write its frame without it."""
        self.rec.failed[bid] = text
        self.save()
        self.write_frames([parse_batch_id(bid)[1]])
        log.warning("batch %s failed: %s", bid, text)

    def stop_with_error(self, text: str) -> None:
        """The whole job stops (nothing more is queued) with `text` as its reason."""
        if self.rec.error != text:
            self.rec.error = text
            self.save()
            log.error("job %s stopped: %s", self.rec.id, text)

    def tile_target(self, frame: int, tile: int) -> int:
        return self.rec.samples + samples_held(self.rec.extra.get(f"{frame}/{tile}", ()))

    def is_done(self, b) -> bool:
        """Every sample of the batch is held (a part handed back leaves it not done)."""
        return not _remainders(b, self.held[(b.frame, b.tile)])

    def merge(self, b, film, seconds: float, sync_folder: bool = True) -> bool:
        """Fold a batch's film into its tile accumulator; False when already held. The tile is
        written to disk at the store's next commit: here at once, unless `sync_folder` is False
        (the results owner commits a whole group of merges, then removes their notices)."""
        t = self.tiles[b.tile]
        key = (b.frame, b.tile)
        path = self.folder.tile(b.frame, b.tile)
        acc = self.store.get(path, t.w, t.h)
        self.changes += 1
        if not acc.add(film, b.first, b.count):
            self.held[key] = list(acc.ranges)
            return False
        self.store.stage(acc, lambda noise: self.noise.__setitem__(key, noise))
        if sync_folder:
            failed = self.store.commit()
            if path in failed:
                raise failed[path]
        self.held[key] = list(acc.ranges)
        self.seconds[b.frame] = self.seconds.get(b.frame, 0.0) + seconds
        self.samples_merged += t.w * t.h * b.count
        self.dirty.add(b.frame)
        return True

    def reread_tile(self, frame: int, tile: int) -> None:
        """The tile's file could not be written: what it holds is what its file says."""
        self.held[(frame, tile)] = read_header(self.folder.tile(frame, tile))[0]
        self.changes += 1

    def frame_level(self, frame: int) -> int:
        """The fewest samples a tile of `frame` holds, not counting tiles that hold none because
        their work failed for good: the frame is then written with those pixels empty (spp 0)
        rather than not at all. 0 when no other tile holds a sample."""
        dead = self._failed_and_empty(frame)
        levels = [samples_held(self.held[(frame, i)]) for i in range(len(self.tiles))
                  if i not in dead]
        return min(levels) if levels else 0

    def _failed_and_empty(self, frame: int) -> set[int]:
        out = set()
        for bid in list(self.rec.failed):  # the loop may add one while a frame is written
            _, f, i, _, _ = parse_batch_id(bid)
            if f == frame and not self.held.get((f, i)):
                out.add(i)
        return out

    def frame_complete(self, frame: int) -> bool:
        return all(samples_held(self.held[(frame, i)]) >= self.tile_target(frame, i)
                   for i in range(len(self.tiles)))

    def frame_totals(self, frame: int) -> tuple[int, int]:
        """(lowest tile level as `frame_level`, samples of all its tiles)."""
        return (self.frame_level(frame),
                sum(samples_held(self.held[(frame, i)]) for i in range(len(self.tiles))))

    def grown(self, frame: int) -> bool:
        level, total = self.frame_totals(frame)
        return level > self.written.get(frame, 0) or (
            self.frame_complete(frame) and total > self.written_sum.get(frame, 0))

    def write_frame_if_grown(self, frame: int, force: bool = False) -> Path | None:
        """Rewrite the frame file when its lowest tile sample count grew (or `force`). A frame
        not yet complete is rewritten at most once per `rewrite_every` seconds, and no sooner
        than its last partial rewrite's duration / `rewrite_share` after it: a growth sooner is
        held back until then (`write_due`); a complete frame is written at once."""
        if self.frame_level(frame) == 0 or not (force or self.grown(frame)):
            return None
        complete = self.frame_complete(frame)
        if not self.partial_frames and not complete:
            return None
        if not complete and not force:
            at = self.partial_at.get(frame)
            gap = self.partial_gap.get(frame, self.rewrite_every)
            if at is not None and time.monotonic() - at < gap:
                self.due.setdefault(frame, at + gap)
                return None
        # denoised only when complete (its pass done): the intermediate rewrites stay cheap
        return self.write_frame(frame, final=complete)

    def write_held_frame(self, frame: int) -> Path | None:
        """The frame with everything its tiles hold, as final (a ready-by time was reached)."""
        level, total = self.frame_totals(frame)
        if frame in self.written and self.written_sum.get(frame) == total:
            return None  # the file already holds all of it
        return self.write_frame(frame, final=True)

    def write_frame(self, frame: int, final: bool) -> Path:
        """The one writer of frame files: the tiles' films assembled (missing tiles empty)."""
        from ..engine.film import Film
        from ..engine.layers import layer_plan
        from ..engine.mattes import manifest, matte_plan
        from ..frames import write_frame_files

        began = time.monotonic()
        level, total = self.frame_totals(frame)
        kinds = matte_plan(self.shot)
        film = Film.zeros(self.shot.height, self.shot.width, layer_plan(self.shot)[0], kinds)
        for i, t in enumerate(self.tiles):
            part = self.store.film(self.folder.tile(frame, i), t.w, t.h)
            if part is not None:
                film.add_into(part, t.y0, t.x0)
        if kinds and self._manifest is None:  # the names of the ID mattes: read once per job
            self._manifest = manifest(self.shot)
        report: dict = {}
        measure = self.denoised_errors or self.rec.ready_by is not None
        path = write_frame_files(Path(self.rec.out), self.shot, frame, film,
                                 self.seconds.get(frame, 0.0), final=final, manifest=self._manifest,
                                 tiles=self.tiles if measure else None, report=report)
        if "denoised_errors" in report:
            self.denoised[frame] = (report["denoised_errors"], level)
        self.written[frame] = level
        self.written_sum[frame] = total
        self.due.pop(frame, None)
        if not final:
            self.partial_at[frame] = now = time.monotonic()
            took = now - began  # assembly, EXR and PNG
            self.partial_gap[frame] = max(self.rewrite_every, took / self.rewrite_share)
        return path

    def write_due(self, all_now: bool = False) -> bool:
        """Write the frames whose held-back rewrite is due (the head's turn calls this); all of
        them with `all_now` (the head passes it when nothing of the job is pending or in flight:
        no more samples are coming, and a status of `failed` or `cancelled` must find every
        merged sample in the frame files)."""
        with frame_lock(self.rec.id):
            if not self.due:
                return True
            now = time.monotonic()
            ready = sorted(f for f, at in list(self.due.items()) if all_now or at <= now)
            for f in ready:
                del self.due[f]
            return self.write_frames(ready, force=True) if ready else True

    def write_frames(self, frames, held: bool = False, force: bool = False) -> bool:
        """Write the frames that grew (held: as `write_held_frame`); an error stops the job with
        its reason instead of reaching the head's loop. False when a frame could not be written."""
        with frame_lock(self.rec.id):
            for f in frames:
                try:
                    if held:
                        self.write_held_frame(f)
                    else:
                        self.write_frame_if_grown(f, force)
                except Exception as err:  # noqa: BLE001 — this job's failure, not the head's
                    self.stop_with_error(f"cannot write frame {f} into {self.rec.out}: "
                                         f"{_one_line(err)}")
                    return False
            return True

    def settle_written(self) -> None:
        """At start-up: a frame file at least as new as every tile file of its frame holds what
        they hold, so it is not written again (a tile merged after it was written is newer)."""
        from ..frames import frame_path

        for f in self.frames:
            try:
                at = frame_path(Path(self.rec.out), self.shot.name, f).stat().st_mtime_ns
            except OSError:
                continue
            newest = 0
            for i in range(len(self.tiles)):
                try:
                    newest = max(newest, self.folder.tile(f, i).stat().st_mtime_ns)
                except FileNotFoundError:
                    pass
            if newest and at >= newest:
                self.written[f], self.written_sum[f] = self.frame_totals(f)

    def frames_done(self) -> int:
        return self._counts()[2]

    def pixel_samples(self) -> tuple[int, int]:
        """(pixel-samples held, pixel-samples planned)."""
        return self._counts()[1]

    def _counts(self) -> tuple:
        """(key, pixel_samples(), frames_done()), counted again only when what they depend on
        changed: a sum over every tile of the job, asked for at every status publish."""
        key = (self.changes, self.rec.samples, len(self.rec.extra),
               sum(len(v) for v in self.rec.extra.values()), len(self.written))
        if self._sums[0] != key:
            held = sum(samples_held(r) * self.tiles[i].w * self.tiles[i].h
                       for (f, i), r in self.held.items())
            total = sum(self.tile_target(f, i) * t.w * t.h
                        for f in self.frames for i, t in enumerate(self.tiles))
            done = sum(1 for f in self.frames if self.frame_complete(f) and f in self.written)
            self._sums = (key, (held, total), done)
        return self._sums

    def noisy_tiles(self, goal: float) -> list[tuple[int, int]]:
        """(frame, tile) whose mean relative standard error (luminance) is above `goal`, or not
        known yet; from the noise kept at every merge, so no accumulator is read again."""
        out = []
        for f in self.frames:
            for i in range(len(self.tiles)):
                e = self.noise.get((f, i))
                if e is None or e > goal:
                    out.append((f, i))
        return out


    def denoised_error(self, frame: int, tile: int) -> tuple[float, int] | None:
        """(the tile's denoised error, the spp it was measured at), or None when not known: from
        the frame's last denoised write, else from its frame file's header (read once)."""
        if frame not in self.denoised:
            from ..frames import frame_path, read_errors

            path = frame_path(Path(self.rec.out), self.shot.name, frame)
            try:
                stamp = path.stat().st_mtime_ns
            except OSError:
                return None
            if self._no_errors.get(frame) == stamp:  # this file was read and holds none
                return None
            found = read_errors(path)
            if found is None or len(found[0]) != len(self.tiles):
                self._no_errors[frame] = stamp
                return None
            self.denoised[frame] = ([float("inf") if e is None else e for e in found[0]], found[1])
        errors, at = self.denoised[frame]
        e = errors[tile]
        return None if e is None or e == float("inf") else (e, at)

    def denoised_targets(self, goal: float, cap: int) -> list[tuple[tuple[int, int], int]]:
        """((frame, tile), samples per pixel to reach) of the tiles whose denoised error is above
        `goal`, each in proportion to its error (engine/dual_buffer.py, `tile_targets`: the spp it
        was measured at · error / goal, at most `cap`), and `cap` for tiles whose error is not
        known yet (a frame not yet written complete and denoised)."""
        from ..engine.dual_buffer import tile_targets

        out = []
        for f in self.frames:
            for i in range(len(self.tiles)):
                known = self.denoised_error(f, i)
                if known is None:
                    out.append(((f, i), int(cap)))
                elif known[0] > goal:
                    out.append(((f, i), int(tile_targets([known[0]], [known[1]], goal, cap)[0])))
        return out


_FRAME_LOCKS: dict[str, threading.RLock] = {}
_LOCKS_LOCK = threading.Lock()


def frame_lock(job: str) -> threading.RLock:
    """The lock a job's frame writing holds (the head's loop and its frame writer thread,
    framewriter.py, may both write; one frame of a job at a time, and its record saved whole)."""
    with _LOCKS_LOCK:
        return _FRAME_LOCKS.setdefault(job, threading.RLock())


def _remainders(b: Batch, ranges) -> list[Batch]:
    """The sub-batches of `b` covering the samples of [first, first + count) that no held
    range (first, count) covers, in order; [] when all are held, [b] when none are."""
    from dataclasses import replace

    out, s, end = [], b.first, b.first + b.count
    for f, c in sorted(ranges):
        if f + c <= s or f >= end:
            continue
        if f > s:
            out.append((s, f - s))
        s = max(s, f + c)
    if s < end:
        out.append((s, end - s))
    if out == [(b.first, b.count)]:
        return [b]
    return [replace(b, first=a, count=c) for a, c in out]


def _overrides(rec: JobRecord) -> dict:
    o = dict(rec.overrides)
    if "frames" in o and isinstance(o["frames"], list):
        o["frames"] = tuple(o["frames"])
    o["samples"] = rec.samples
    return o


def _one_line(err: BaseException) -> str:
    text = str(err).strip().splitlines()
    return f"{type(err).__name__}: {text[0]}" if text else type(err).__name__
