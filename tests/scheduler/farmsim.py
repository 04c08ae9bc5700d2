"""A discrete-event simulation of a farm working one job through a night, with no rendering.

The head's decisions are the real ones: the planner's sample ranges and dispatch order
(`planner.sample_ranges`, `plan_batches`), the forecast (`forecast.Forecaster`, fed from what the
simulated head would measure: heartbeats with working windows, slot speeds, merged batches) and
the spending policy (`ready_by.night_forecast`, `NightPlan.admits`). What is simulated is the
world: workers of different speeds that come online, work inside their windows, and leave
(some switched off without notice, some joining unannounced), batches that take
pixels × samples / speed seconds, and a tile's relative noise, modelled by the Monte Carlo error
law σ/√n (standard error of a mean of n independent samples) with a per-tile σ.

Time runs in seconds from `start`; every event is an entry in a heap. A worker switched off
loses the batch it was rendering (the head queues it again once its lease lapses); one whose
working hours end hands back the samples it finished, and the rest is queued first.
"""

from __future__ import annotations

import heapq
import itertools
import math
import random
from collections import deque
from dataclasses import dataclass, field, replace
from typing import NamedTuple

from lampyr.scheduler.ready_by import TileState, night_forecast, reached
from lampyr.scheduler.forecast import Forecaster, in_window
from lampyr.scheduler.planner import first_pass_samples, plan_batches, sample_ranges


class Tile(NamedTuple):
    x0: int
    y0: int
    w: int
    h: int


@dataclass
class SimWorker:
    """slots: batches at once; speed: pixel-samples per second of one slot; windows: the
    working windows its heartbeat announces; online: (on, off) while its heartbeat exists."""

    name: str
    slots: int
    speed: float
    windows: tuple
    online: tuple
    busy: dict = field(default_factory=dict)  # slot index → (batch, start, end)

    def present(self, t: float) -> bool:
        return self.online[0] <= t < self.online[1]


@dataclass
class SimJob:
    frames: int = 24
    width: int = 256
    height: int = 256
    tile: int = 64
    samples: int = 256
    batch: int = 8
    sigma_median: float = 0.4  # relative noise of one sample, median over tiles
    sigma_spread: float = 0.6  # log-normal spread of σ between tiles


@dataclass
class SimResult:
    held: dict  # (frame, tile) → samples at the ready-by time
    target: int
    first_pass: int
    batch: int
    noise: dict  # (frame, tile) → σ/√n at the ready-by time
    forecasts: list  # [(t, forecast fields)] every recompute
    finished_at: float | None  # when every tile reached its target (None: not by the ready-by time)
    start: float
    ready_by: float
    work_full: float  # pixel-samples of the whole job

    @property
    def levels(self) -> list:
        return sorted(set(self.held.values()))

    def first_infeasible(self) -> float | None:
        return next((t for t, f in self.forecasts if not f["feasible"]), None)

    def final_forecast(self) -> dict:
        return self.forecasts[-1][1]


def make_workers(n: int, rng: random.Random, start: float, night: float,
                 surprises: float = 0.1) -> list[SimWorker]:
    """`n` workers of a small studio's night: office PCs that work from some time after
    `start` until some time before the morning, a few servers always on, laptops that stay a
    few hours; `surprises` of them are switched off early without notice or join unannounced."""
    out = []
    for i in range(n):
        kind = rng.random()
        speed = rng.lognormvariate(math.log(800.0), 0.5)  # pixel-samples/s per slot
        if kind < 0.1:  # a server: always, never gone
            slots, windows, online = rng.choice((8, 16)), (), (start, start + 2 * night)
        elif kind < 0.8:  # an office PC: after hours until the morning
            slots = rng.choice((2, 4, 4, 8))
            a = start + rng.uniform(0.0, 0.3) * night
            b = start + rng.uniform(0.8, 1.2) * night
            windows, online = ((a, b),), (start, b + 0.5 * night)  # left on after its hours
        else:  # a laptop left on for a while
            slots = rng.choice((1, 2, 4))
            a = start + rng.uniform(0.0, 0.5) * night
            b = a + rng.uniform(0.1, 0.4) * night
            windows, online = ((a, b),), (start, b + 0.5 * night)
        if rng.random() < surprises:
            if rng.random() < 0.5:  # switched off without notice half way through its night
                on, off = online
                online = (on, on + (off - on) * rng.uniform(0.3, 0.9))
            else:  # unannounced: its heartbeat appears only when it joins
                online = (start + rng.uniform(0.1, 0.6) * night, online[1])
        out.append(SimWorker(f"w{i:02d}", slots, speed, windows, online))
    return out


class FarmSim:
    """One job on a farm of `workers` from `start` to `ready_by` (see the module docstring).

    every: seconds between the head's recomputes; lease: seconds before a lost batch is queued
    again; seed: σ of every tile and the speed jitter a slot reports."""

    def __init__(self, job: SimJob, workers, start: float, ready_by: float, seed: int = 1,
                 every: float = 60.0, lease: float = 120.0):
        self.job, self.workers = job, list(workers)
        self.start, self.ready_by = start, ready_by
        self.every, self.lease = every, lease
        self.rng = random.Random(seed)
        self.tiles = [Tile(x, y, min(job.tile, job.width - x), min(job.tile, job.height - y))
                      for y in range(0, job.height, job.tile) for x in range(0, job.width, job.tile)]
        self.frames = list(range(1, job.frames + 1))
        self.first = first_pass_samples(job.samples, job.batch)
        self.ranges = sample_ranges(0, job.samples, job.batch, self.first)
        self.steps = tuple(sorted({a + c for a, c in self.ranges}))
        self.pending = deque(plan_batches("sim", self.frames, self.tiles, self.ranges))
        self.deferred: list = []
        self.held = {(f, i): 0 for f in self.frames for i in range(len(self.tiles))}
        self.flying: dict = {}  # batch id → (worker, slot)
        self.sigma = {k: self.rng.lognormvariate(math.log(job.sigma_median), job.sigma_spread)
                      for k in self.held}
        self.fc = Forecaster()
        self.fc.prior = job.tile ** 2 * job.batch / 20.0  # as the head: a batch ≈ 20 s
        self.plan = None
        self.forecasts: list = []
        self.speeds_seen: list = []
        self.events: list = []
        self.seq = itertools.count()
        self.finished_at = None

    # -- the head's side ----------------------------------------------------------------------

    def tile_states(self) -> list[TileState]:
        flying = {}
        for bid, (b, _w, _s) in self.flying.items():
            flying[(b.frame, b.tile)] = flying.get((b.frame, b.tile), 0) + b.count
        out = []
        for (f, i), n in self.held.items():
            t = self.tiles[i]
            noise = self.sigma[(f, i)] / math.sqrt(n) if n >= 2 else None
            out.append(TileState((f, i), t.w * t.h, n + flying.get((f, i), 0), self.steps,
                                 noise, n if n >= 2 else 0))
        return out

    def recompute(self, now: float) -> None:
        hosts = [(w.name, w.slots, w.windows) for w in self.workers if w.present(now)]
        waiting = any(self.pending)
        self.fc.update(now, hosts, self.speeds_seen, saturated=waiting)
        self.speeds_seen = []
        flying = sum(b.w * b.h * b.count for b, _w, _s in self.flying.values())
        self.plan, fields = night_forecast(self.tile_states(), self.fc, now, self.ready_by,
                                           self.job.tile ** 2 * self.job.batch, flying)
        self.forecasts.append((now, fields))
        back = [b for b in self.deferred if self.plan.admits((b.frame, b.tile), b.first, b.count)]
        if back:
            gone = {b.id for b in back}
            self.deferred = [b for b in self.deferred if b.id not in gone]
            self.pending = deque(sorted(list(self.pending) + back,
                                        key=lambda b: (b.first, b.frame, b.tile)))

    def next_batch(self):
        while self.pending:
            b = self.pending.popleft()
            if self.plan is not None and not self.plan.admits((b.frame, b.tile), b.first,
                                                              b.count):
                self.deferred.append(b)
                continue
            return b
        return None

    # -- the world ----------------------------------------------------------------------------

    def push(self, t: float, kind: str, data=None) -> None:
        heapq.heappush(self.events, (t, next(self.seq), kind, data))

    def fill(self, now: float) -> None:
        for w in self.workers:
            if not (w.present(now) and in_window(w.windows, now)):
                continue
            for s in range(w.slots):
                if s in w.busy:
                    continue
                b = self.next_batch()
                if b is None:
                    return
                end = now + b.w * b.h * b.count / w.speed
                w.busy[s] = (b, now, end)
                self.flying[b.id] = (b, w, s)
                self.push(end, "done", (w, s, b))

    def run(self) -> SimResult:
        for w in self.workers:
            for t in (w.online[0], w.online[1], *[e for win in w.windows for e in win]):
                if self.start <= t < self.ready_by:
                    self.push(t, "edge", w)
        t = self.start
        while t < self.ready_by:
            self.push(t, "tick")
            t += self.every
        self.push(self.ready_by, "ready_by")
        self.recompute(self.start)
        self.fill(self.start)
        while self.events:
            now, _, kind, data = heapq.heappop(self.events)
            if kind == "ready_by" or reached(now, self.ready_by):
                break
            if kind == "tick":
                self.recompute(now)
            elif kind == "edge":
                self.leave_if_gone(data, now)
            elif kind == "done":
                self.done(now, *data)
            elif kind == "requeue":
                if data.id not in self.flying:
                    self.pending.appendleft(data)
            self.fill(now)
        work = sum(self.tiles[i].w * self.tiles[i].h for _, i in self.held) * self.job.samples
        noise = {k: self.sigma[k] / math.sqrt(n) if n else math.inf for k, n in self.held.items()}
        return SimResult(dict(self.held), self.job.samples, self.first, self.job.batch, noise,
                         self.forecasts, self.finished_at, self.start, self.ready_by, work)

    def done(self, now: float, w: SimWorker, s: int, b) -> None:
        if w.busy.get(s, (None,))[0] is not b:
            return  # the worker left meanwhile: this batch was lost
        del w.busy[s]
        self.flying.pop(b.id, None)
        self.held[(b.frame, b.tile)] += b.count
        self.fc.merged(now, b.w * b.h * b.count)
        jitter = self.rng.uniform(0.9, 1.1)  # a slot's speed report is a noisy measurement
        self.speeds_seen.append((w.name, w.speed * jitter))
        if self.finished_at is None and all(n >= self.job.samples for n in self.held.values()):
            self.finished_at = now

    def leave_if_gone(self, w: SimWorker, now: float) -> None:
        if w.present(now) and in_window(w.windows, now):
            return
        for s, (b, began, _e) in list(w.busy.items()):
            del w.busy[s]
            self.flying.pop(b.id, None)
            if not w.present(now):  # switched off: the batch is lost until its lease lapses
                self.push(now + self.lease, "requeue", b)
                continue
            # its working hours ended: a polite worker hands back the samples it finished and
            # the head queues the rest first
            done = min(b.count - 1, int((now - began) * w.speed / (b.w * b.h)))
            if done > 0:
                self.held[(b.frame, b.tile)] += done
                self.fc.merged(now, b.w * b.h * done)
            self.pending.appendleft(replace(b, first=b.first + done, count=b.count - done))
