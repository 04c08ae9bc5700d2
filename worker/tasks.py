"""The one task: render a batch, put its film into Redis, tell the head. Thin and idempotent.

`run_batch` decodes the JSON argument, skips a message the head has replaced (its ticket is no
longer the batch's current one) or a batch another worker holds the lease on, counts the start in
lampyr's own attempt counter (a batch that kills its process cannot loop: past `max_attempts`
starts it is reported failed instead of run), renders the samples in chunks — renewing the lease
and reporting speed between chunks, so a long numba call never lets the lease lapse unseen — and
stores the result under `result:<batch>:<ticket>` before it lets the lease go.

Between chunks the task looks at its gate (worker/gate.py): while `pause` is raised it waits,
renewing its lease; when `stop` is raised (working hours over, the worker stopping) it hands
back the samples it has finished — [first, first + done) is a valid result on its own, samples
being deterministic — with a `partial` notice, and the head queues [first + done, first + count)
again. A message that arrives while `stop` is raised goes back untouched (done = 0).

Chunks: the first is one sample; each next one is sized from the last one's speed to take about
`min(CHUNK_SECONDS, lease / 4)` seconds, so the lease is renewed at least four times per lease
period however slow the machine or heavy the shot.
"""

from __future__ import annotations

import json
import os
import socket
import time
import traceback

from ..scheduler import protocol as P

CHUNK_SECONDS = 5.0  # longest render call between lease renewals (and status updates)
PAUSE_POLL = 0.2  # seconds between looks at the gate while paused


class Context:
    """Per-process worker state: Redis client, scene cache, identity."""

    def __init__(self, url: str, name: str, gate=None):
        from ..scheduler.store import connect
        from .cache import SceneCache

        self.r = connect(url, check=False)
        self.name = name
        self.pid = os.getpid()
        self.holder = f"{name}:{self.pid}:{os.urandom(4).hex()}"
        self.gate = gate  # a worker.gate.Gate, or None: never paused or stopped
        self.cache = SceneCache(self.r)
        self.prepare_seconds = 0.0  # fetching the scene's files and compiling it, last batch
        self._config = (0.0, {})

    def config(self) -> dict:
        at, conf = self._config
        if time.monotonic() - at > 5:
            raw = self.r.hgetall(P.K_CONFIG)
            conf = {k.decode(): float(v) for k, v in raw.items()}
            self._config = (time.monotonic(), conf)
        return conf

    def slot(self, batch: str | None, speed: float = 0.0, paused: bool = False) -> None:
        k = P.k_slot(self.name, self.pid)
        if batch is None:
            self.r.delete(k)
        else:
            self.r.set(k, json.dumps({"worker": self.name, "pid": self.pid, "batch": batch,
                                      "pixel_samples_per_second": round(speed, 1),
                                      "paused": paused, "since": time.time()}),
                   ex=P.HEARTBEAT_TTL)


def run_batch(ctx: Context, payload: str) -> dict:
    """Carry out one TASK_RENDER message; returns a small JSON-able summary."""
    try:
        task = P.RenderTask.from_json(payload)
    except P.ProtocolSkew as err:
        d = json.loads(payload)
        b = P.Batch(**d["batch"])
        ctx.r.rpush(P.K_RESULTS, P.error_notice(b.id, int(d["ticket"]), ctx.name, str(err)))
        return {"batch": b.id, "outcome": "refused", "error": str(err)}
    b = task.batch
    r = ctx.r
    current = r.hget(P.K_INFLIGHT, b.id)
    if current is None or int(current) != task.ticket:
        return {"batch": b.id, "outcome": "stale"}
    conf = ctx.config()
    lease = conf.get("lease_seconds", 120.0)
    max_attempts = int(conf.get("max_attempts", 3))
    if not P.lease_acquire(r, b.id, ctx.holder, lease):
        return {"batch": b.id, "outcome": "held elsewhere"}
    try:
        if ctx.gate is not None and ctx.gate.stop_requested():
            # taken as the worker stops: straight back to the queue, no start counted
            r.rpush(P.K_RESULTS, P.partial_notice(b.id, task.ticket, ctx.name, 0.0, 0.0, 0))
            return {"batch": b.id, "outcome": "handed back", "done": 0}
        attempts = r.hincrby(P.K_ATTEMPTS, b.id, 1)
        if attempts > max_attempts:
            r.rpush(P.K_RESULTS, P.error_notice(
                b.id, task.ticket, ctx.name,
                f"gave up after {attempts - 1} start(s): its worker process died or went silent"))
            return {"batch": b.id, "outcome": "gave up"}
        try:
            film, seconds, done = _render(ctx, task, lease)
        except LeaseLost:
            return {"batch": b.id, "outcome": "lease lost"}
        except Exception as err:
            text = "".join(traceback.format_exception_only(type(err), err)).strip()
            r.rpush(P.K_RESULTS, P.error_notice(b.id, task.ticket, ctx.name, text))
            return {"batch": b.id, "outcome": "error", "error": text}
        from ..engine.film import to_bytes  # 32 bits on the wire; the head merges in 64

        pipe = r.pipeline(transaction=True)
        if done < b.count:
            if done:
                pipe.set(P.k_result(b.id, task.ticket), to_bytes(film, bits=32), ex=P.RESULT_TTL)
            else:  # stopped before its first sample: the start does not count against it
                pipe.hincrby(P.K_ATTEMPTS, b.id, -1)
            pipe.rpush(P.K_RESULTS, P.partial_notice(b.id, task.ticket, ctx.name, seconds,
                                                     ctx.prepare_seconds, done))
            pipe.execute()
            return {"batch": b.id, "outcome": "handed back", "done": done,
                    "seconds": round(seconds, 4)}
        pipe.set(P.k_result(b.id, task.ticket), to_bytes(film, bits=32), ex=P.RESULT_TTL)
        pipe.rpush(P.K_RESULTS, P.result_notice(b.id, task.ticket, ctx.name, seconds,
                                                ctx.prepare_seconds))
        pipe.execute()
        return {"batch": b.id, "outcome": "done", "seconds": round(seconds, 4)}
    finally:
        P.lease_release(r, b.id, ctx.holder)
        ctx.slot(None)


class LeaseLost(Exception):
    """Our lease expired while rendering: the head has queued the batch again elsewhere."""


def _hold(ctx: Context, b: P.Batch, lease: float, speed: float) -> tuple[float, bool]:
    """At a sample boundary: wait while the gate says pause (renewing the lease and the slot).
    Returns (seconds spent waiting, whether to stop and hand back)."""
    gate = ctx.gate
    if gate is None:
        return 0.0, False
    if gate.stop_requested() or not gate.paused():
        return 0.0, gate.stop_requested()
    t0 = time.monotonic()
    every = min(lease / 4, P.HEARTBEAT_EVERY)
    renew_at = t0
    while gate.paused() and not gate.stop_requested():
        if time.monotonic() >= renew_at:
            if not P.lease_renew(ctx.r, b.id, ctx.holder, lease):
                raise LeaseLost(b.id)
            ctx.slot(b.id, speed, paused=True)
            renew_at = time.monotonic() + every
        time.sleep(PAUSE_POLL)
    ctx.slot(b.id, speed)
    return time.monotonic() - t0, gate.stop_requested()


def _render(ctx: Context, task: P.RenderTask, lease: float):
    """Render the batch chunk by chunk → (film or None, render seconds, samples done)."""
    from ..engine.render import Tile

    b = task.batch
    t_prep = time.perf_counter()
    renderer = ctx.cache.renderer(task.bundle, task.shot, task.overrides, b.frame)
    ctx.prepare_seconds = time.perf_counter() - t_prep
    tile = Tile(b.x0, b.y0, b.w, b.h)
    budget = min(CHUNK_SECONDS, lease / 4)
    film = None
    done, step, speed, waited = 0, 1, 0.0, 0.0
    start = time.perf_counter()
    ctx.slot(b.id)
    while done < b.count:
        held, stop = _hold(ctx, b, lease, speed)
        waited += held
        if stop:
            break
        n = min(step, b.count - done)
        t0 = time.perf_counter()
        film = renderer.render(tile, b.first + done, n, film)
        took = time.perf_counter() - t0
        done += n
        step = max(1, int(n * budget / max(took, 1e-6)))
        if done < b.count and not P.lease_renew(ctx.r, b.id, ctx.holder, lease):
            raise LeaseLost(b.id)
        speed = b.w * b.h * done / max(time.perf_counter() - start - waited, 1e-9)
        ctx.slot(b.id, speed)
    return film, time.perf_counter() - start - waited, done


def host_info(name: str, cores: int, pool: str) -> dict:
    from .. import __version__

    return {"name": name, "host": socket.gethostname(), "cores": cores, "pool": pool,
            "engine_version": __version__, "protocol": P.PROTOCOL_VERSION, "pid": os.getpid(),
            "started": time.time()}
