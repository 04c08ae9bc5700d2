"""The head's side of ready-by times: forecast the farm, hold back what the night cannot afford,
stop a job at its ready-by time with every frame written.

The keeper is given the parts it needs — the job table, the dispatcher (its lease table, to
count what is in flight and to drop a stopped job's work) and Redis (the heartbeats) — and
`Head` calls three hooks:
- `tick()` every step: a job whose ready-by time has come is stopped (queued batches dropped, every
  frame file written with what its tiles hold, `ready_by_reached` set; the job ends "done");
  every EVERY seconds the forecast and each ready-by job's plan are recomputed;
- `admit(run, b)` in dispatch: False (and the batch is kept aside) when the batch goes beyond
  its tile's target in the current plan; a later plan that affords it puts it back in order;
- `waiting(run)`: batches kept aside, so a job with a ready-by time still to come is not "done"
  just because the plan is reached early (a better forecast may afford more).

The policy itself is `ready_by.plan_night`; the throughput is `forecast.Forecaster`. Jobs share
the farm in dispatch order: a ready-by job gets the capacity left after the remaining work of
the jobs queued before it. Tile noise is the mean relative standard error of the tile's
luminance (`Film.rel_noise`, as `refine --noise` judges it), which the head keeps per tile as
it merges (`JobRun.noise`, see progress.py); no accumulator is read for it. When every tile of
the job has a denoised error (its frames were written complete and denoised, docs/denoising.md:
`JobRun.denoised_error`), the plan aims at that instead: the delivered frame is the denoised one.
"""

from __future__ import annotations

import logging
import math
import time

from .accumulator import samples_held
from .ready_by import TileState, night_forecast, reached
from .forecast import Forecaster, read_hosts
from .planner import TARGET_SECONDS

log = logging.getLogger("lampyr.head")

EVERY = 3.0  # seconds between forecasts (workers come and go on a scale of minutes)
LOOK_EVERY = 0.5  # seconds between looks at the slots' speeds (a slot record lives one batch)
HORIZON = 36 * 3600.0  # how far ahead the working windows reach


class ReadyByKeeper:
    def __init__(self, runs: dict, dispatch, r, every: float = EVERY):
        self.runs = runs  # job id → JobRun (the head's table, read here)
        self.dispatch = dispatch  # dispatch.Dispatcher
        self.r = r
        self.every = every
        self.forecaster = Forecaster()
        self.plans: dict = {}  # job → NightPlan
        self.fields: dict = {}  # job → the `forecast` status object
        self.deferred: dict = {}  # job → [Batch] beyond the plan's targets
        self.stopped: dict = {}  # job → its sample plan when stopped (a refine changes it)
        self._at = -math.inf
        self._looked = -math.inf
        self._hosts: list = []  # (name, cores, windows) of the live hosts, last look
        self._speeds: list = []  # (host, speed) seen since the last forecast
        self._merged: dict = {}  # job → JobRun.samples_merged at the last recompute
        self._stamps: dict = {}  # job → (JobRun, LeaseKeeper) ids a stopped job was checked with
        self._late: dict = {}  # job → (JobRun id, samples merged) when its frames were written

    # -- hooks --------------------------------------------------------------------------------

    def active(self, run) -> bool:
        rec = run.rec
        return rec.ready_by is not None and not rec.ready_by_reached and not rec.cancelled

    def tick(self, now: float | None = None) -> None:
        now = time.time() if now is None else now
        for run in list(self.runs.values()):
            if run.rec.ready_by_reached:
                self._keep_stopped(run)
            elif self.active(run) and reached(now, run.rec.ready_by):
                self.stop(run)
        if time.monotonic() - self._looked >= LOOK_EVERY:
            self.look()
            self._write_late()
        if time.monotonic() - self._at >= self.every:
            self.recompute(now)

    def admit(self, run, b) -> bool:
        if not self.active(run):
            return True
        plan = self.plans.get(run.rec.id)
        if plan is None:
            self.recompute()
            plan = self.plans.get(run.rec.id)
        if plan is None or plan.admits((b.frame, b.tile), b.first, b.count):
            return True
        self.deferred.setdefault(run.rec.id, []).append(b)
        return False

    def waiting(self, run) -> bool:
        return self.active(run) and bool(self.deferred.get(run.rec.id))

    def status(self, run) -> dict:
        fc = self.fields.get(run.rec.id) if run.rec.ready_by is not None else None
        return {"ready_by": run.rec.ready_by, "ready_by_reached": bool(run.rec.ready_by_reached),
                "forecast": fc}

    # -- the forecast -------------------------------------------------------------------------

    def look(self) -> None:
        """Read the heartbeats and the slots' speeds (only while a ready-by time job runs)."""
        self._looked = time.monotonic()
        if any(self.active(run) for run in self.runs.values()):
            self._hosts, speeds = read_hosts(self.r)
            self._speeds.extend(speeds)

    def recompute(self, now: float | None = None) -> None:
        self._at = time.monotonic()
        now = time.time() if now is None else now
        jobs = self.runs
        if not any(self.active(run) for run in jobs.values()):
            return
        self.look()
        hosts, speeds, self._speeds = self._hosts, self._speeds, []
        for job, run in jobs.items():
            merged = run.samples_merged - self._merged.get(job, 0)
            if merged > 0:
                self.forecaster.merged(now, merged)
            self._merged[job] = run.samples_merged
        fc = self.forecaster
        fc.update(now, hosts, speeds, saturated=self.dispatch.leases.waiting() > 0)
        ahead = 0.0  # pixel-samples the jobs queued before this one still need
        for run in sorted(jobs.values(), key=lambda r: (-r.rec.priority, r.rec.submitted)):
            inflight = self._inflight(run)
            if not self.active(run):
                if run.pending and not run.rec.paused and not run.rec.cancelled:
                    ahead += sum(b.w * b.h * b.count for b in run.pending)
                ahead += sum(inflight.values())  # queued or rendering, even with none pending
                continue
            fc.prior = _prior_speed(run)
            spent_before = ahead + sum(inflight.values())
            t0 = run.tiles[0]
            plan, f = night_forecast(self.tile_states(run, inflight), fc, now, run.rec.ready_by,
                                     t0.w * t0.h * run.rec.batch_samples, spent_before, HORIZON)
            self.plans[run.rec.id] = plan
            if self.fields.get(run.rec.id, {}).get("feasible") != f["feasible"]:
                log.info("job %s: forecast %s (%.0f of %.0f spp by the ready-by time)", run.rec.id,
                         "feasible" if f["feasible"] else "infeasible", plan.spp_expected,
                         plan.full_spp)
            self.fields[run.rec.id] = f
            ahead += plan.work + sum(inflight.values())
            self._readmit(run, plan)

    def _inflight(self, run) -> dict:
        """(frame, tile) → pixel-samples queued or rendering now."""
        out: dict = {}
        for e in self.dispatch.inflight(run.rec.id):
            b = e.batch
            out[(b.frame, b.tile)] = out.get((b.frame, b.tile), 0) + b.w * b.h * b.count
        return out

    def tile_states(self, run, inflight: dict) -> list[TileState]:
        ends = sorted({a + c for a, c in run.rec.ranges})
        out = []
        denoised: dict | None = {}
        for key in ((f, i) for f in run.frames for i in range(len(run.tiles))):
            known = run.denoised_error(*key)
            if known is None:  # not known for every tile: the raw noise, one scale for all
                denoised = None
                break
            denoised[key] = known
        for f in run.frames:
            for i, t in enumerate(run.tiles):
                held = samples_held(run.held[(f, i)])
                noise = run.noise.get((f, i))  # measured at the last merge, at `held` samples
                at = held if noise is not None else 0
                if denoised is not None:  # measured at the frame's last denoised write
                    noise, at = denoised[(f, i)]
                px = t.w * t.h
                extra = run.rec.extra.get(f"{f}/{i}", ())
                steps = tuple(sorted(set(ends) | {a + c for a, c in extra}))
                out.append(TileState((f, i), px, held + inflight.get((f, i), 0) // px, steps,
                                     noise, at))
        return out

    def _readmit(self, run, plan) -> None:
        kept = self.deferred.get(run.rec.id)
        if not kept:
            return
        back, still = [], []
        for b in kept:
            if run.is_done(b) or b.id in self.dispatch.leases:
                continue
            (back if plan.admits((b.frame, b.tile), b.first, b.count) else still).append(b)
        self.deferred[run.rec.id] = still
        if back:
            # the plan's order: sample range first, then frame, then tile (planner.plan_batches)
            merged = sorted(list(run.pending) + back, key=lambda b: (b.first, b.frame, b.tile))
            run.pending.clear()
            run.pending.extend(merged)

    # -- the ready-by time -------------------------------------------------------------------------

    def stop(self, run) -> None:
        """Stop queueing `run`, drop its queued batches, write every frame with what is held."""
        job = run.rec.id
        run.rec.ready_by_reached = True
        self.deferred.pop(job, None)
        self.dispatch.drop_job(run)
        for f in run.frames:
            write_held_frame(run, f)
        # saved only now: a head killed while writing stops the job again after its restart,
        # which writes the frames (a restarted head keeps a saved stop as it is)
        run.save()
        self.stopped[job] = _sample_plan(run.rec)
        self._late[job] = (id(run), run.samples_merged)
        if job in self.fields:
            self.fields[job]["updated"] = round(time.time(), 1)
        log.info("job %s reached its ready-by time: %d frame(s) written with the samples held", job,
                 len(run.frames))

    def _write_late(self) -> None:
        """A batch that was rendering at the ready-by time may still deliver: it is merged (work is
        never thrown away) and the frame file rewritten to hold it, as at the stop."""
        for job, run in self.runs.items():
            if not run.rec.ready_by_reached:
                continue
            seen = self._late.setdefault(job, (id(run), run.samples_merged))
            if seen != (id(run), run.samples_merged):
                self._late[job] = (id(run), run.samples_merged)
                for f in run.frames:
                    write_held_frame(run, f)

    def _keep_stopped(self, run) -> None:
        """After a restart the replanned job stays stopped; a refine (a changed sample plan)
        lifts the ready-by time and lets it run. Looked at again only when the job's runtime view or
        the head's lease table was rebuilt (refine, restart, reconcile) or work was queued."""
        job = run.rec.id
        stamp = (id(run), id(self.dispatch.leases))
        if self._stamps.get(job) == stamp and not run.pending:
            return
        self._stamps[job] = stamp
        plan = _sample_plan(run.rec)
        seen = self.stopped.setdefault(job, plan)
        if plan != seen:
            run.rec.ready_by_reached = False
            run.rec.ready_by = None
            run.save()
            self.stopped.pop(job)
            return
        self.dispatch.drop_job(run)


def write_held_frame(run, frame: int) -> None:
    """The frame file with everything its tiles hold (missing tiles stay empty, spp 0), as final:
    the ready-by time is as final as the frame gets, so it is denoised."""
    run.write_frames([frame], held=True)


def _sample_plan(rec) -> tuple:
    return (rec.samples, tuple(sorted((k, tuple(map(tuple, v))) for k, v in rec.extra.items())))


def _prior_speed(run) -> float:
    """A slot's speed before anything is measured: the planner sized a batch to take about
    TARGET_SECONDS on a machine like the head's."""
    return run.rec.tile_size ** 2 * run.rec.batch_samples / TARGET_SECONDS

