"""The head: one loop that takes commands, merges results, keeps leases and queues batches.

Each turn of `Head.step()`:
1. carry out commands from `control` (submit, retry, pause, resume, cancel, refine);
2. merge batch results: a notice is moved to `results:processing`, its film folded into the tile
   accumulator on disk, and only then removed — a head killed mid-merge finds it again;
3. queue again the batches whose lease expired, or that raised (up to the attempt limit);
4. queue batches, by job priority then age, keeping only a few more queued than there are
   worker cores (Redis has no real priorities, so the head holds the order itself);
5. publish each job's status.

At start-up (and after Redis comes back from a restart) `reconcile()` makes Redis agree with the
disk: what the accumulators hold is done; every other batch is pending, and any batch Redis still
lists as queued but not leased is queued again under a new ticket (the old message, if it still
exists, is then skipped by its worker).
"""

from __future__ import annotations

import json
import logging
import secrets
import time
from pathlib import Path

from . import protocol as P
from .accumulator import write_atomic
from .assembler import JobRun
from .commands import JobCommands
from .ready_by_keeper import ReadyByKeeper
from .history import HistoryRecorder
from .jobs import JobFolder, list_jobs
from .leases import LeaseKeeper
from .metrics import HeadCounters
from .metrics import publish as publish_metrics
from .metrics import snapshot as metrics_snapshot
from .progress import ProgressPublisher
from .submit import submit_request  # noqa: F401  (the client side of `cmd_submit`)

log = logging.getLogger("lampyr.head")


def make_sender(url: str):
    """A Celery app used only to send TASK_RENDER messages (no result backend)."""
    from celery import Celery

    app = Celery("lampyr-head", set_as_current=False)
    app.conf.update(P.celery_settings(url))
    return app


class Head(JobCommands):
    """Runs a farm whose state lives under `state`; `url` is the Redis to use.

    lease_seconds: how long a silent worker keeps its batches; max_attempts: starts of a batch
    (crashes, lost leases, errors) before it is marked failed.
    """

    def __init__(self, state: Path, url: str, lease_seconds: float = 120.0, max_attempts: int = 3,
                 redis_server=None, partial_frames: bool = True):
        from .store import connect

        self.state = Path(state)
        self.url = url
        self.lease_seconds = float(lease_seconds)
        self.max_attempts = int(max_attempts)
        self.redis_server = redis_server
        self.partial_frames = partial_frames  # False: a frame file appears only when complete
        self.r = connect(url)
        self.sender = make_sender(url)
        self.jobs: dict[str, JobRun] = {}
        self.leases = LeaseKeeper()
        self.tickets: dict[str, int] = {}
        self.epoch = None
        self._status_at = 0.0
        self._reap_at = 0.0
        self._epoch_at = 0.0
        self._cores = (0.0, 0)
        self.metrics = HeadCounters()
        self.ready_by = ReadyByKeeper(self)  # forecasts, holds back, stops at ready-by times
        self.progress = ProgressPublisher()  # per-frame / per-tile summary for the web page
        self.history = HistoryRecorder()  # throughput per minute, workers last seen
        self._held: dict[str, float] = {}  # job → when its scene's files were last held
        self._hold_at = 0.0

    # -- start-up ---------------------------------------------------------------------------

    def start(self) -> None:
        # the address may carry the farm's password: readable by the head's user only
        write_atomic(self.state / "head.json", json.dumps({"address": self.url}).encode(),
                     mode=0o600)
        for job in list_jobs(self.state):
            try:
                self.jobs[job] = JobRun(self.state, JobFolder(self.state, job).load(),
                                      self.partial_frames)
            except Exception as err:  # a broken job must not keep the farm down
                log.error("job %s cannot be resumed: %s", job, err)
        for run in self.jobs.values():
            for f in run.frames:
                run.write_frame_if_grown(f)
        self.reconcile()

    def reconcile(self) -> None:
        """Make Redis agree with the disk (see the module docstring)."""
        r = self.r
        epoch = r.get(P.K_EPOCH)
        if epoch is None:
            epoch = secrets.token_hex(8).encode()
            r.set(P.K_EPOCH, epoch)
        self.epoch = epoch
        r.set(P.K_PROTOCOL, P.PROTOCOL_VERSION)
        r.hset(P.K_CONFIG, mapping={"lease_seconds": self.lease_seconds,
                                    "max_attempts": self.max_attempts})
        # notices a killed head was merging go back in front of the queue
        while r.lmove(P.K_PROCESSING, P.K_RESULTS, "RIGHT", "RIGHT") is not None:
            pass
        queued = {k.decode(): int(v) for k, v in r.hgetall(P.K_INFLIGHT).items()}
        for bid, ticket in queued.items():
            self.tickets[bid] = max(self.tickets.get(bid, 0), ticket)
        self.leases = LeaseKeeper(self.leases.backstop)
        for run in self.jobs.values():
            run.replan()
            r.zadd(P.K_JOBS, {run.rec.id: run.rec.submitted})
        pipe = r.pipeline(transaction=False)
        for bid in queued:
            pipe.exists(P.k_lease(bid))
        live = {bid for bid, alive in zip(queued, pipe.execute()) if alive}
        # a Redis that lost its data lost the scenes' files too: held again (and put back from
        # the job folders) before the next batch of each job is queued
        self._held.clear()
        for run in self.jobs.values():
            keep = []
            for b in run.pending:
                if b.id in live and not run.rec.cancelled:
                    self.leases.add(b, queued[b.id])
                    self.leases.get(b.id).leased = True
                else:
                    keep.append(b)
            run.pending.clear()
            run.pending.extend(keep)
        stale = [bid for bid in queued if bid not in self.leases]
        if stale:
            r.hdel(P.K_INFLIGHT, *stale)
        self.publish(force=True)

    # -- the loop ---------------------------------------------------------------------------

    def run(self, stop=lambda: False, idle: float = 0.05) -> None:
        import redis
        from kombu.exceptions import OperationalError

        down = False
        while not stop():
            try:
                if self.redis_server is not None and not self.redis_server.alive():
                    log.warning("embedded Redis stopped; starting it again")
                    self.redis_server.start()
                    down = True
                if down:
                    self.reconcile()
                    down = False
                busy = self.step()
            except (redis.exceptions.ConnectionError, redis.exceptions.TimeoutError,
                    redis.exceptions.BusyLoadingError, OperationalError) as err:
                # OperationalError: Celery's sender (kombu) wraps the same lost connection
                log.warning("Redis unreachable (%s); retrying", err)
                down = True
                time.sleep(0.5)
                continue
            if not busy:
                time.sleep(idle)

    def step(self) -> bool:
        now = time.monotonic()
        if now - self._epoch_at > 1.0:  # Redis came back empty (restarted without its file)
            self._epoch_at = now
            if self.r.get(P.K_EPOCH) != self.epoch:
                log.warning("Redis lost the farm's state; rebuilding it from the head's disk")
                self.reconcile()
        busy = self.take_commands()
        busy |= self.take_results() > 0
        self.reap()
        self.ready_by.tick()
        busy |= self.dispatch() > 0
        self.hold_files()
        self.publish()
        return busy

    # -- scene files ------------------------------------------------------------------------

    def hold_files(self, every: float = 60.0) -> None:
        """Keep alive in Redis the files of every job with work left (transfer.py: keys live
        P.FILE_TTL after their last renewal, so a finished job's files leave by themselves)."""
        now = time.monotonic()
        if now - self._hold_at < every:
            return
        self._hold_at = now
        busy = {e.batch.job for e in self.leases.table.values()}
        for run in list(self.jobs.values()):
            if not run.rec.cancelled and (run.pending or run.rec.id in busy):
                self._hold_files(run)

    def _hold_files(self, run: JobRun) -> None:
        """Renew the job's scene keys at most every P.FILE_REFRESH seconds, putting back from
        the job folder any that Redis lost; a failure is logged (its batches then fail with the
        worker's message) and never stops the head."""
        from .transfer import TransferError, hold

        now = time.monotonic()
        if now - self._held.get(run.rec.id, -1e18) < P.FILE_REFRESH:
            return
        self._held[run.rec.id] = now
        try:
            back = hold(self.r, (run.folder.root / "scene.json").read_bytes(), run.folder.bundle)
        except (OSError, TransferError) as err:
            log.error("job %s: cannot keep its scene's files in Redis: %s", run.rec.id, err)
            return
        if back:
            log.warning("job %s: put back %d bytes of its scene Redis had lost", run.rec.id, back)

    # -- commands ---------------------------------------------------------------------------

    def take_commands(self, limit: int = 100) -> bool:
        n = 0
        while n < limit:
            raw = self.r.lpop(P.K_CONTROL)
            if raw is None:
                break
            n += 1
            cmd = json.loads(raw)
            try:
                getattr(self, "cmd_" + cmd.pop("op"))(**cmd)
            except Exception as err:
                log.error("command %s failed: %s", raw[:200], err)
                job = cmd.get("job")
                if job:
                    self.r.hset(P.k_job(job), mapping={"state": json.dumps("failed"),
                                                       "error": json.dumps(str(err))})
                    self.r.zadd(P.K_JOBS, {job: time.time()})
        return n > 0

    # -- results ----------------------------------------------------------------------------

    def take_results(self, limit: int = 256) -> int:
        """Merge up to `limit` notices as one group commit: every tile file is written and
        fsynced, their folders fsynced once, frames rewritten, and only then are the notices
        removed from `results:processing` (a crash before that replays them; replays drop)."""
        from ..engine.film import from_bytes
        from .accumulator import fsync_folder

        r = self.r
        pipe = r.pipeline(transaction=False)
        for _ in range(limit):
            pipe.lmove(P.K_RESULTS, P.K_PROCESSING, "LEFT", "RIGHT")
        raws = [raw for raw in pipe.execute() if raw is not None]
        if not raws:
            return 0
        notes = [json.loads(raw) for raw in raws]
        pipe = r.pipeline(transaction=False)
        for note in notes:
            pipe.get(P.k_result(note["batch"], int(note["ticket"])))
        blobs = pipe.execute()
        folders, frames, finished = set(), set(), []
        for note, data in zip(notes, blobs):
            bid, ticket = note["batch"], int(note["ticket"])
            job, frame = P.parse_batch_id(bid)[:2]
            run = self.jobs.get(job)
            if run is None or run.rec.cancelled:
                continue
            entry = self.leases.get(bid)
            if note["kind"] == "partial":
                taken, merged = self._take_back(run, entry, ticket, note, data)
                if merged:
                    folders.add(run.folder.tile(entry.batch.frame, entry.batch.tile).parent)
                    frames.add((job, frame))
                if taken:
                    finished.append(bid)
                continue
            if note["kind"] != "result":
                self._on_error(run, bid, ticket, note["error"])
                continue
            b = entry.batch if entry else _batch_of(run, bid)
            if data is not None and b is not None:
                if run.merge(b, from_bytes(data), note.get("seconds", 0.0), sync_folder=False):
                    self.metrics.merged(b.w * b.h * b.count)
                    folders.add(run.folder.tile(b.frame, b.tile).parent)
                    frames.add((job, frame))
                self.leases.pop(bid)
                finished.append(bid)
            elif data is None and entry is not None and entry.ticket == ticket:
                self._requeue(entry.batch)  # the result expired or was lost
        for folder in folders:
            fsync_folder(folder)
        for job, frame in sorted(frames):
            self.jobs[job].write_frame_if_grown(frame)
        pipe = r.pipeline(transaction=False)
        if finished:
            pipe.hdel(P.K_INFLIGHT, *finished)
        for raw, note in zip(raws, notes):
            pipe.lrem(P.K_PROCESSING, 1, raw)
            pipe.delete(P.k_result(note["batch"], int(note["ticket"])))
        pipe.execute()
        return len(raws)

    def _take_back(self, run: JobRun, entry, ticket: int, note: dict, data) -> tuple[bool, bool]:
        """A batch handed back part-way: merge the samples [first, first + done) it holds and
        queue the rest first. Returns (taken, merged). The notice of a dispatch the head has
        replaced is skipped whole: the newer dispatch renders the whole batch."""
        from dataclasses import replace

        from ..engine.film import from_bytes

        if entry is None or entry.ticket != ticket:
            return False, False
        b = entry.batch
        done = max(0, min(int(note.get("done", 0)), b.count))
        if done and data is None:  # the part expired or was lost: the whole batch again
            self._requeue(b)
            return False, False
        part = replace(b, count=done)
        merged = bool(done) and run.merge(part, from_bytes(data), note.get("seconds", 0.0),
                                          sync_folder=False)
        if merged:
            self.metrics.merged(b.w * b.h * done)
        self.leases.pop(b.id)
        if done < b.count:
            run.pending.appendleft(replace(b, first=b.first + done, count=b.count - done))
        log.info("batch %s handed back by %s with %d of %d samples", b.id,
                 note.get("worker", "?"), done, b.count)
        return True, merged

    def _finish(self, bid: str) -> None:
        self.leases.pop(bid)
        self.r.hdel(P.K_INFLIGHT, bid)

    def _on_error(self, run: JobRun, bid: str, ticket: int, error: str) -> None:
        entry = self.leases.get(bid)
        if entry is None or entry.ticket != ticket or run.is_done(entry.batch):
            return  # a message the head had already replaced
        self.metrics.batch_errors += 1
        attempts = int(self.r.hget(P.K_ATTEMPTS, bid) or 0)
        if attempts >= self.max_attempts:
            self._finish(bid)
            self.metrics.batches_failed += 1
            run.rec.failed[bid] = f"{error} (after {attempts} attempt(s))"
            self._save(run)
            run.write_frame_if_grown(P.parse_batch_id(bid)[1])  # without that tile, if need be
            log.warning("batch %s failed: %s", bid, error)
        else:
            self._requeue(entry.batch)

    # -- leases and dispatch ----------------------------------------------------------------

    def reap(self, every: float = 0.2) -> None:
        now = time.monotonic()
        if now - self._reap_at < every:
            return
        self._reap_at = now
        for entry in self.leases.expired(self.r):
            run = self.jobs.get(entry.batch.job)
            if run is None or run.is_done(entry.batch):
                self._finish(entry.batch.id)
                continue
            self.metrics.lease_expiries += 1
            attempts = int(self.r.hget(P.K_ATTEMPTS, entry.batch.id) or 0)
            if attempts >= self.max_attempts:
                self._finish(entry.batch.id)
                self.metrics.batches_failed += 1
                run.rec.failed[entry.batch.id] = (f"its worker stopped answering {attempts} "
                                                  "time(s) (lease expired)")
                self._save(run)
                run.write_frame_if_grown(entry.batch.frame)
            else:
                log.info("lease of %s expired; queueing it again", entry.batch.id)
                self._requeue(entry.batch)

    def _requeue(self, b: P.Batch) -> None:
        self.leases.pop(b.id)
        self._send(b)

    def worker_cores(self) -> int:
        """Cores of the live workers that can take work now (from their heartbeats; re-read
        once a second): a worker outside its working hours or paused for its user takes none,
        and batches queued for it would only wait, in an order frozen at queueing."""
        at, cores = self._cores
        if time.monotonic() - at < 1.0:
            return cores
        total = 0
        for k in self.r.scan_iter(match=P.key("host", "*"), count=500):
            raw = self.r.get(k)
            if raw:
                info = json.loads(raw)
                if info.get("state") not in ("outside working hours", "paused: user busy"):
                    total += int(info.get("cores", 1))
        self._cores = (time.monotonic(), total)
        return total

    def dispatch(self) -> int:
        """Queue pending batches while fewer than `cores + 2` wait unclaimed in the queue."""
        room = max(2, self.worker_cores() + 2) - self.leases.waiting()
        sent = 0
        order = sorted((run for run in self.jobs.values()
                        if run.pending and not run.rec.paused and not run.rec.cancelled),
                       key=lambda run: (-run.rec.priority, run.rec.submitted))
        for run in order:
            while run.pending and sent < room:
                b = run.pending.popleft()
                if run.is_done(b) or b.id in self.leases:
                    continue
                if not self.ready_by.admit(run, b):  # beyond what the night affords
                    continue
                self._send(b)
                sent += 1
        return sent

    def _send(self, b: P.Batch) -> None:
        run = self.jobs[b.job]
        self._hold_files(run)
        ticket = self.tickets.get(b.id, 0) + 1
        self.tickets[b.id] = ticket
        self.r.hset(P.K_INFLIGHT, b.id, ticket)
        task = P.RenderTask(P.PROTOCOL_VERSION, b, ticket, run.rec.bundle, run.rec.shot,
                            run.rec.overrides)
        self.sender.send_task(P.TASK_RENDER, args=[task.to_json()], queue=P.QUEUE)
        self.leases.add(b, ticket)

    # -- status -----------------------------------------------------------------------------

    def job_state(self, run: JobRun) -> str:
        if run.rec.cancelled:
            return "cancelled"
        queued = [e for e in self.leases.table.values() if e.batch.job == run.rec.id]
        if not run.pending and not queued and not self.ready_by.waiting(run):
            return "failed" if run.rec.failed else "done"
        if run.rec.paused:
            return "paused"
        held, _ = run.pixel_samples()
        return "running" if held or any(e.leased for e in queued) else "queued"

    def publish(self, force: bool = False, every: float = 0.25) -> None:
        now = time.monotonic()
        if not force and now - self._status_at < every:
            return
        self._status_at = now
        pipe = self.r.pipeline(transaction=False)
        for run in self.jobs.values():
            held, total = run.pixel_samples()
            elapsed = max(time.time() - run.started, 1e-6)
            rate = run.samples_merged / elapsed
            st = {
                "job": run.rec.id, "name": run.rec.name, "state": self.job_state(run),
                "frames": len(run.frames), "frames_done": run.frames_done(),
                "samples": run.rec.samples, "pixel_samples_done": held,
                "pixel_samples_total": total, "samples_per_second": round(rate, 1),
                "eta_seconds": round((total - held) / rate, 1) if rate > 0 else None,
                "priority": run.rec.priority, "out": run.rec.out,
                "failed": [{"batch": k, "error": v} for k, v in sorted(run.rec.failed.items())],
                "submitted": run.rec.submitted,
                "tile_size": run.rec.tile_size, "batch_samples": run.rec.batch_samples,
            }
            st.update(self.ready_by.status(run))  # ready_by, ready_by_reached, forecast
            pipe.delete(P.k_job(run.rec.id))
            pipe.hset(P.k_job(run.rec.id), mapping={k: json.dumps(v) for k, v in st.items()})
        publish_metrics(pipe, metrics_snapshot(self))
        self.progress.publish(self, pipe, force)
        self.history.record(self, pipe)
        pipe.execute()


def _batch_of(run: JobRun, bid: str) -> P.Batch | None:
    job, frame, tile, first, count = P.parse_batch_id(bid)
    if frame not in run.frames or not 0 <= tile < len(run.tiles):
        return None
    t = run.tiles[tile]
    return P.Batch(job, frame, tile, first, count, t.x0, t.y0, t.w, t.h)
