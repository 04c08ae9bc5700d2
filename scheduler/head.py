"""The head: start-up, reconcile, the loop, and publishing status. The work is done by owners:

| module | owns |
|---|---|
| `commands.py` | the commands from `control`, taken durably (plain functions, one per command) |
| `results.py` | the workers' notices: take, guard, merge, take back a part |
| `dispatch.py` | queueing batches, tickets, leases, reaping, dropping a job's work |
| `assembler.py` | a job run: its tile accumulators and the single writer of its frames |
| `ready_by_keeper.py` | ready-by times: forecast, hold back, stop |
| `scenes.py` | the scenes' files in Redis: held while needed, deleted when not |
| `progress.py`, `history.py`, `metrics.py` | what is published besides the job status |

Each turn of `Head.step()`:
1. carry out commands (commands.take);
2. merge results (results.take);
3. queue again the batches whose lease expired (dispatch.reap);
4. the ready-by keeper's turn;
5. queue batches (dispatch.fill), by job priority then age;
6. keep the scenes' files alive; publish each job's status.

At start-up (and after Redis comes back from a restart) `reconcile()` makes Redis agree with the
disk: what the accumulators hold is done; every other batch is pending, and any batch Redis still
lists as queued but not leased is queued again under a new ticket (the old message, if it still
exists, is then skipped by its worker). Commands and notices a killed head was handling are taken
again (a command at 3 start-ups at most, then it is set aside: `commands.replay`); notices it
cannot read are set aside with the reason; a job that cannot be loaded shows as `failed` with the
reason. Nothing a client or a worker sends can stop the loop.

Finished jobs fold away after `archive_after` seconds: their record becomes `archived.json` (their
frames and tiles stay on disk), the head stops loading and publishing them, their progress keys
(`layout:`, `progress:`, `tiles:`) are deleted, and their last status stays in Redis with
`archived: true`.
"""

from __future__ import annotations

import json
import logging
import secrets
import time
from pathlib import Path

from . import commands
from . import protocol as P
from .accumulator import load_noise_kernel, write_atomic
from .assembler import REWRITE_EVERY, JobRun
from .dispatch import Dispatcher
from .sending import make_sender
from .history import HistoryRecorder
from .jobs import JobFolder, list_jobs
from .metrics import HeadCounters
from .metrics import publish as publish_metrics
from .metrics import snapshot as metrics_snapshot
from .progress import ProgressPublisher
from .ready_by_keeper import ReadyByKeeper
from .results import Results, set_aside_undecodable
from .scenes import SceneKeeper
from .tilestore import TileStore
from .framewriter import FrameWriter
from .submit import submit_request  # noqa: F401  (the client side of `commands.submit`)

log = logging.getLogger("lampyr.head")

ENDED = ("done", "failed", "cancelled")
ARCHIVE_AFTER = 30 * 24 * 3600.0  # seconds after its end a job folds into the archive
# seconds between two status publishes while nothing changes (rule of thumb: the web page and
# `lampyr status` poll about once a second; the metrics endpoint calls a head silent after 10 s)
PUBLISH_IDLE_EVERY = 1.0
# bytes one socket read of the head's Redis client takes: a 64 × 64 tile's result is ~344 KB, which
# 64 KiB reads (redis-py's default) fetch in six pieces, each copied again (measured: 0.57-0.62
# against 0.67-0.73 ms of CPU a result; small replies cost the same within noise)
RESULT_READ_SIZE = 512 * 1024


class Head:
    """Runs a farm whose state lives under `state`; `url` is the Redis to use.

    lease_seconds: how long a silent worker keeps its batches; max_attempts: starts of a batch
    (crashes, lost leases, errors) before it is marked failed; archive_after: seconds after its
    end a job folds away (None: never); durable: False skips fsyncing tile files (a scratch
    state folder); rewrite_every: seconds between two rewrites of a frame not complete yet;
    frame_thread: frames are written by a thread of their own (framewriter.py) while the loop
    goes on merging — what `lampyr head` and `lampyr render` run; False writes them inside the
    turn that merged their samples, so a caller driving `step()` by hand finds them written;
    denoised_errors: False writes complete frames without their tiles' denoised errors (the two
    half-frames are then not denoised; docs/denoising.md) unless a job has a ready-by time —
    `lampyr render`, whose head no one can ask for a `refine` afterwards.
    """

    def __init__(self, state: Path, url: str, lease_seconds: float = 120.0, max_attempts: int = 3,
                 redis_server=None, partial_frames: bool = True,
                 archive_after: float | None = ARCHIVE_AFTER, durable: bool = True,
                 rewrite_every: float = REWRITE_EVERY, frame_thread: bool = False,
                 denoised_errors: bool = True):
        from .store import connect

        self.state = Path(state)
        self.url = url
        self.lease_seconds = float(lease_seconds)
        self.max_attempts = int(max_attempts)
        self.redis_server = redis_server
        self.partial_frames = partial_frames  # False: a frame file appears only when complete
        self.archive_after = archive_after
        self.r = connect(url, read_size=RESULT_READ_SIZE)
        self.jobs: dict[str, JobRun] = {}
        self.broken: dict[str, str] = {}  # job → why it could not be loaded at start
        self.metrics = HeadCounters()
        self.scenes = SceneKeeper(self.r, self.jobs, self._busy_jobs)
        self.dispatcher = Dispatcher(self.r, make_sender(url), self.jobs, max_attempts,
                                     self.metrics, self.scenes.hold)
        self.tiles = TileStore(fsync=durable)  # the tiles in memory, written in groups
        self.frame_writer = FrameWriter(frame_thread)  # frame rewrites off the merge path
        self.results = Results(self.r, self.jobs, self.dispatcher, self.metrics, self.tiles,
                               self.frame_writer)
        self.commands = commands.Context(self.state, self.r, self.jobs, self.dispatcher,
                                         partial_frames, durable, rewrite_every, self.tiles,
                                         denoised_errors)
        self.ready_by = ReadyByKeeper(self.jobs, self.dispatcher, self.r)
        self.progress = ProgressPublisher()  # per-frame / per-tile summary for the web page
        self.history = HistoryRecorder()  # throughput per minute, workers last seen
        self.epoch = None
        self._status_at = 0.0
        self._unpublished = True  # a turn did something since the last publish
        self._published = None  # what the last publish saw (`_signature`)
        self._epoch_at = 0.0
        self._fold_at = 0.0

    # -- start-up ---------------------------------------------------------------------------

    def start(self) -> None:
        load_noise_kernel()  # not in the first group commit, in the middle of the first turns
        # the address may carry the farm's password: readable by the head's user only
        write_atomic(self.state / "head.json", json.dumps({"address": self.url}).encode(),
                     mode=0o600)
        for job in list_jobs(self.state):
            try:
                self.jobs[job] = commands.job_run(self.commands,
                                                  JobFolder(self.state, job).load())
            except Exception as err:  # a broken job must not keep the farm down
                reason = str(err).strip().splitlines()
                self.broken[job] = (f"cannot be resumed: {type(err).__name__}: "
                                    f"{reason[0] if reason else ''}")
                log.error("job %s %s", job, self.broken[job])
        for run in self.jobs.values():
            run.settle_written()  # frames already on disk are not written again
            run.write_frames(run.frames)
        set_aside_undecodable(self.r)
        self.reconcile(starting=True)

    def reconcile(self, starting: bool = False) -> None:
        """Make Redis agree with the disk (see the module docstring). starting: the head's
        start-up (commands taken again count as replays, `commands.replay`)."""
        r = self.r
        epoch = r.get(P.K_EPOCH)
        if epoch is None:
            epoch = secrets.token_hex(8).encode()
            r.set(P.K_EPOCH, epoch)
        self.epoch = epoch
        r.set(P.K_PROTOCOL, P.PROTOCOL_VERSION)
        r.hset(P.K_CONFIG, mapping={"lease_seconds": self.lease_seconds,
                                    "max_attempts": self.max_attempts})
        # notices a killed head was merging, and commands it was carrying out (or that Redis
        # errors interrupted), go back in front of their queues
        while r.lmove(P.K_PROCESSING, P.K_RESULTS, "RIGHT", "LEFT") is not None:
            pass
        self.results.forget_in_hand()  # parked notices went back with the others
        commands.replay(r, count=starting)
        for run in self.jobs.values():
            run.replan()
            r.zadd(P.K_JOBS, {run.rec.id: run.rec.submitted})
        # a Redis that lost its data lost the scenes' files too: held again (and put back from
        # the job folders) before the next batch of each job is queued
        self.scenes.held.clear()
        self.dispatcher.restore()
        self.publish(force=True)

    # -- the loop ---------------------------------------------------------------------------

    def run(self, stop=lambda: False, idle: float = 0.2) -> None:
        """Turns until `stop()`; after a turn with nothing to do, or one that took every notice
        waiting, the head sleeps in Redis for up to `idle` seconds, woken at once by a worker's
        notice (`Results.wait`), instead of a turn that would find nothing."""
        from .store import transient_errors

        lost = transient_errors()
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
                if not busy or self.results.drained:  # no notice left when the turn took them
                    self.results.wait(idle)
            except lost as err:
                log.warning("Redis unreachable (%s); retrying", err)
                down = True
                time.sleep(0.5)
                continue
            except Exception:  # noqa: BLE001 — a fault of the head's own: logged, never a loop
                log.exception("the head's turn failed; going on")
                time.sleep(1.0)
        self.tiles.close()  # a clean stop leaves no spare file beside the tiles (file_swap.py)

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
        for run in self.jobs.values():  # frame rewrites held back (JobRun.rewrite_every)
            due = list(run.due.values())  # the frame writer's thread edits it
            if due:  # the in-flight scan below only for a job with a rewrite held back
                all_now = not run.pending and not self.dispatcher.inflight(run.rec.id)
                if all_now or min(due) <= now:
                    self.frame_writer.write_due(run, all_now)
        self.hold_files()
        self._unpublished |= busy
        self.publish()
        return busy

    # -- the owners' entry points (also what tests drive) -------------------------------------

    def take_commands(self, limit: int = 100) -> bool:
        return commands.take(self.commands, limit)

    def command(self, op: str, **args) -> None:
        """Carry out one command now (as if taken from `control`); errors are raised."""
        commands.COMMANDS[op](self.commands, **args)

    def take_results(self, limit: int = 256) -> int:
        return self.results.take(limit)

    def reap(self, every: float = 0.2) -> None:
        self.dispatcher.reap(every)

    def dispatch(self) -> int:
        return self.dispatcher.fill(self.ready_by.admit)

    def worker_cores(self) -> int:
        return self.dispatcher.free_cores()

    def hold_files(self, every: float = 60.0) -> None:
        self.scenes.hold_all(every)

    @property
    def leases(self):
        return self.dispatcher.leases

    def _busy_jobs(self) -> set:
        return {e.batch.job for e in self.dispatcher.leases.table.values()}

    # -- status -----------------------------------------------------------------------------

    def job_state(self, run: JobRun) -> str:
        state = self._job_state(run)
        if state in ENDED and self.frame_writer.busy(run):
            return "running"  # ended once its frames hold every merged sample
        return state

    def _job_state(self, run: JobRun) -> str:
        if run.rec.cancelled:
            return "cancelled"
        if run.rec.error:
            return "failed"
        queued = self.dispatcher.inflight(run.rec.id)
        if not run.pending and not queued and not self.ready_by.waiting(run):
            if run.rec.failed:
                return "failed"
            if run.rec.ready_by_reached or all(run.frame_complete(f) for f in run.frames):
                return "done"
            # samples missing with nothing pending or in flight: a batch was lost on the way
            # (never to be read as done) — planned again from what the tiles hold
            run.replan()
            self.dispatcher.skip_in_flight(run)
            log.warning("job %s: %d batch(es) lost on the way are queued again", run.rec.id,
                        len(run.pending))
            if not run.pending:
                run.stop_with_error("its frames lack samples that no batch of its plan covers")
                return "failed"
        if run.rec.paused:
            return "paused"
        held, _ = run.pixel_samples()
        return "running" if held or any(e.leased for e in queued) else "queued"

    def status(self, run: JobRun, state: str, errors: dict) -> dict:
        held, total = run.pixel_samples()
        elapsed = max(time.time() - run.started, 1e-6)
        rate = run.samples_merged / elapsed
        st = {
            "job": run.rec.id, "name": run.rec.name, "state": state,
            "frames": len(run.frames), "frames_done": run.frames_done(),
            "samples": run.rec.samples, "pixel_samples_done": held,
            "pixel_samples_total": total, "samples_per_second": round(rate, 1),
            "eta_seconds": round((total - held) / rate, 1) if rate > 0 else None,
            "priority": run.rec.priority, "out": run.rec.out,
            "failed": [{"batch": k, "error": v} for k, v in sorted(run.rec.failed.items())],
            "submitted": run.rec.submitted,
            "tile_size": run.rec.tile_size, "batch_samples": run.rec.batch_samples,
            "error": run.rec.error, "command_error": errors.get(run.rec.id),
        }
        st.update(self.ready_by.status(run))  # ready_by, ready_by_reached, forecast
        return st

    def publish(self, force: bool = False, every: float = 0.25,
                idle_every: float = PUBLISH_IDLE_EVERY) -> None:
        """Every job's status, replaced whole in one transaction (a reader sees the old status
        or the new one, never none), with the progress, metrics and history of this turn: at
        most every `every` seconds while something changes (a turn that carried out a command,
        merged, queued; a frame written; a lease taken or lost), else every `idle_every`
        seconds (the metrics' `updated`, the rates, the ready-by forecast)."""
        now = time.monotonic()
        if not force and now - self._status_at < every:
            return
        signature = self._signature()
        if (not force and not self._unpublished and signature == self._published
                and now - self._status_at < idle_every):
            return
        self._status_at = now
        self._unpublished = False
        self._published = signature
        errors = commands.errors(self.r)
        states = {job: self.job_state(run) for job, run in self.jobs.items()}
        self._note_ends(states)
        pipe = self.r.pipeline(transaction=True)  # MULTI … EXEC
        for job, run in self.jobs.items():
            _replace_hash(pipe, P.k_job(job), self.status(run, states[job], errors))
        if force:
            for job, reason in self.broken.items():
                _replace_hash(pipe, P.k_job(job), {"job": job, "name": job, "state": "failed",
                                                   "error": reason, "failed": [],
                                                   "frames": 0, "frames_done": 0})
                pipe.zadd(P.K_JOBS, {job: 0}, nx=True)
        publish_metrics(pipe, metrics_snapshot(self, states))
        self.progress.publish(self.jobs, self.dispatcher.leased_tiles(), pipe, force)
        self.history.record(self, pipe)
        pipe.execute()
        self._fold(force)

    def _signature(self) -> tuple:
        """What a status publish shows that can change between turns without a busy turn."""
        m = self.metrics
        return (m.batches_merged, m.batch_errors, m.batches_failed, m.lease_expiries,
                len(self.leases), self.leases.waiting(), self.frame_writer.finished,
                tuple((job, run.changes, len(run.pending), run.rec.paused, run.rec.cancelled,
                       run.rec.error, len(run.rec.failed), id(run))
                      for job, run in self.jobs.items()))

    # -- ends of jobs -------------------------------------------------------------------------

    def _note_ends(self, states: dict) -> None:
        """A job that has just ended: its time noted, its attempt counts cleared, its scene's
        files deleted from Redis when no unfinished job needs them."""
        ended = [run for job, run in self.jobs.items()
                 if states[job] in ENDED and run.rec.ended is None]
        if not ended:
            return
        unfinished = [run for job, run in self.jobs.items() if states[job] not in ENDED]
        for run in ended:
            run.rec.ended = time.time()
            try:
                run.save()
            except OSError as err:
                log.error("job %s: cannot save its record: %s", run.rec.id, err)
            self.dispatcher.forget_attempts(run.rec.id)
            self.scenes.release(run, unfinished)

    def _fold(self, force: bool = False, every: float = 60.0) -> None:
        """Jobs ended more than `archive_after` seconds ago leave the head's table (looked at
        once a minute, and at every forced publish)."""
        now = time.monotonic()
        if self.archive_after is None or (not force and now - self._fold_at < every):
            return
        self._fold_at = now
        old = [run for run in self.jobs.values() if run.rec.ended is not None
               and time.time() - run.rec.ended > self.archive_after
               and not self.dispatcher.inflight(run.rec.id)]
        for run in old:
            try:
                run.folder.record.rename(run.folder.archived)
            except OSError as err:
                log.error("job %s: cannot fold it into the archive: %s", run.rec.id, err)
                continue
            del self.jobs[run.rec.id]
            job = run.rec.id
            pipe = self.r.pipeline(transaction=True)
            pipe.hset(P.k_job(job), "archived", json.dumps(True))
            pipe.hdel(P.K_COMMAND_ERRORS, job)
            # its per-frame and per-tile progress goes; the small status hash stays
            pipe.delete(P.k_layout(job), P.k_progress(job), P.k_tiles(job))
            pipe.execute()
            log.info("job %s folded into the archive", run.rec.id)


def _replace_hash(pipe, key: str, fields: dict) -> None:
    pipe.delete(key)
    pipe.hset(key, mapping={k: json.dumps(v) for k, v in fields.items()})
