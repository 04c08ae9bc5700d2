"""The head's commands (from `control`): submit, retry, pause, resume, cancel, refine, priority.

A mix-in of `Head`: each `cmd_<op>(**args)` carries out one JSON command a client queued.
"""

from __future__ import annotations

import logging
import time

from . import protocol as P
from .accumulator import write_atomic
from .assembler import JobRun
from .jobs import JobFolder, JobRecord

log = logging.getLogger("lampyr.head")


class JobCommands:
    """Needs from the host class: state, r, jobs, leases, partial_frames."""

    def cmd_submit(self, job: str, bundle: str, shot: str, overrides: dict, out: str | None,
                   priority: int = 0, tile_size: int | None = None,
                   batch_samples: int | None = None, submitted: float | None = None,
                   ready_by: float | None = None) -> None:
        from ..engine.shot import load_shot
        from ..worker.cache import FileCache
        from .planner import choose_layout, first_pass_samples, probe_cost, sample_ranges
        from .transfer import read_manifest, safe_name

        if job in self.jobs:
            return
        folder = JobFolder(self.state, job)
        if not (folder.root / "scene.json").exists():
            # the scene's files, linked from the head's file cache; the manifest beside them
            # lets the head put back into Redis whatever it loses (Head._hold_files)
            folder.root.mkdir(parents=True, exist_ok=True)
            _, raw = read_manifest(self.r, bundle)
            FileCache().materialise(self.r, bundle, dest=folder.bundle)
            write_atomic(folder.root / "scene.json", raw)
        spec = load_shot(folder.bundle.joinpath(*safe_name(shot).parts))
        o = dict(overrides)
        if "frames" in o:
            o["frames"] = tuple(o["frames"])
        if o:
            spec = spec.with_overrides(**o)
        if tile_size is None or batch_samples is None:
            layout = choose_layout(spec.width, spec.height, spec.samples, probe_cost(spec))
            tile_size = tile_size or layout.tile_size
            batch_samples = batch_samples or layout.batch_samples
        ranges = sample_ranges(0, spec.samples, batch_samples,
                               first_pass_samples(spec.samples, batch_samples))
        rec = JobRecord(id=job, name=spec.name, bundle=bundle, shot=shot, overrides=overrides,
                        out=out or str(folder.root / "frames"), priority=int(priority),
                        submitted=submitted or time.time(), tile_size=int(tile_size),
                        batch_samples=int(batch_samples), samples=int(spec.samples),
                        ranges=ranges,
                        ready_by=None if ready_by is None else float(ready_by))
        folder.save(rec)
        self.jobs[job] = JobRun(self.state, rec, self.partial_frames)
        self.r.zadd(P.K_JOBS, {job: rec.submitted})
        log.info("job %s: %d batches, tiles %d px, %d samples per batch", job,
                 len(self.jobs[job].pending), tile_size, batch_samples)

    def _save(self, run: JobRun) -> None:
        run.folder.save(run.rec)

    def cmd_retry(self, job: str, frames: list | None = None, tile: int | None = None) -> None:
        """Queue failed batches again: all of the job, of frames [lo, hi], or (with `tile`)
        of that tile of those frames only."""
        run = self.jobs[job]
        lo, hi = frames if frames else (-1, 1 << 30)
        again = [bid for bid in run.rec.failed if lo <= P.parse_batch_id(bid)[1] <= hi
                 and (tile is None or P.parse_batch_id(bid)[2] == int(tile))]
        for bid in again:
            del run.rec.failed[bid]
        if again:
            self.r.hdel(P.K_ATTEMPTS, *again)
        self._save(run)
        run.replan()
        self._drop_inflight_from_pending(run)

    def cmd_pause(self, job: str) -> None:
        self.jobs[job].rec.paused = True
        self._save(self.jobs[job])

    def cmd_resume(self, job: str) -> None:
        self.jobs[job].rec.paused = False
        self._save(self.jobs[job])

    def cmd_priority(self, job: str, priority: int) -> None:
        self.jobs[job].rec.priority = int(priority)
        self._save(self.jobs[job])

    def cmd_cancel(self, job: str) -> None:
        run = self.jobs[job]
        run.rec.cancelled = True
        self._save(run)
        run.pending.clear()
        gone = [bid for bid, e in self.leases.table.items() if e.batch.job == job]
        for bid in gone:
            self.leases.pop(bid)
        if gone:
            self.r.hdel(P.K_INFLIGHT, *gone)

    def cmd_refine(self, job: str, samples: int, noise: float | None = None,
                   frames: list | None = None) -> None:
        """Add samples up to `samples` per pixel, in the job's batch size: to every tile, or
        with a `noise` goal only to tiles whose relative standard error is above it; with
        `frames` (a list of frame numbers) only to the tiles of those frames."""
        from .planner import sample_ranges

        run = self.jobs[job]
        if noise is None and frames is None:
            if samples <= run.rec.samples:
                return
            run.rec.ranges = list(run.rec.ranges) + sample_ranges(run.rec.samples, samples,
                                                                  run.rec.batch_samples)
            run.rec.samples = int(samples)
        else:
            if noise is not None:
                tiles = run.noisy_tiles(noise)
            else:
                tiles = [(f, i) for f in run.frames for i in range(len(run.tiles))]
            if frames is not None:
                chosen = {int(f) for f in frames}
                tiles = [(f, i) for f, i in tiles if f in chosen]
            for f, i in tiles:
                key = f"{f}/{i}"
                have = run.tile_target(f, i)
                if samples > have:
                    run.rec.extra[key] = list(run.rec.extra.get(key, [])) + sample_ranges(
                        have, samples, run.rec.batch_samples)
        self._save(run)
        self.jobs[job] = JobRun(self.state, run.rec, self.partial_frames)
        self.jobs[job].written = dict(run.written)
        self.jobs[job].written_sum = dict(run.written_sum)
        self._drop_inflight_from_pending(self.jobs[job])

    def _drop_inflight_from_pending(self, run: JobRun) -> None:
        keep = [b for b in run.pending if b.id not in self.leases]
        run.pending.clear()
        run.pending.extend(keep)
