"""Handing back part of a batch: the render task against a real Redis, driven by a real head
object in this process (the farm-level test with real worker processes is in test_polite.py).

A batch [a, b) stopped after k samples delivers [a, a + k) — a valid result on its own, because
samples are deterministic (docs/design.md, invariant 9) — and the head queues [a + k, b) again; the
frames then equal an uninterrupted render, and nothing is counted twice.
"""

from __future__ import annotations

import base64
import json
import threading
import time

import numpy as np
import pytest

from lampyr.engine.shot import load_shot
from lampyr.scheduler import protocol as P
from lampyr.scheduler.assembler import _remainders
from lampyr.scheduler.head import Head, submit_request
from lampyr.worker.gate import Gate
from lampyr.worker.tasks import Context, run_batch

from ..scheduler.farmtools import assert_same_image, frame_mean, queue_one_batch, reference_mean


@pytest.fixture
def gate(tmp_path):
    g = Gate(tmp_path / "gate")
    yield g
    g.remove()


@pytest.fixture
def one_batch(redis_url, tiny_shot, tmp_path, monkeypatch, gate, compiled_kernels):
    """The shot's files in Redis, a queued batch of 3 samples (ticket 1) and a worker context with a
    gate; returns (r, ctx, task)."""
    monkeypatch.setenv("LAMPYR_CACHE", str(tmp_path / "cache"))
    r, task = queue_one_batch(redis_url, tiny_shot, lease_seconds=2)
    return r, Context(redis_url, "w", gate), task


class ChunkWatch:
    """Every render call of the task in this process (first, count, start, end on the monotonic
    clock); `then`, when a test sets it, is called once as the next call returns — at a sample
    boundary, before the task looks at its gate again."""

    def __init__(self, monkeypatch):
        from lampyr.worker import cache

        self.calls: list = []
        self.then = None
        real = cache.SceneCache.renderer
        watch = self

        class Watched:
            def __init__(self, inner):
                self.inner = inner

            def render(self, tile, first, count, film=None):
                t0 = time.monotonic()
                out = self.inner.render(tile, first, count, film)
                watch.calls.append((first, count, t0, time.monotonic()))
                then, watch.then = watch.then, None
                if then is not None:
                    then()
                return out

        monkeypatch.setattr(cache.SceneCache, "renderer",
                            lambda self, *a, **kw: Watched(real(self, *a, **kw)))


def direct(shot, frame, tile, first, count):
    """The batch rendered here, as the head receives it: sums rounded to float32 on the wire
    (docs/design.md, film bytes)."""
    from lampyr.engine.film import from_bytes, to_bytes
    from lampyr.engine.render import FrameRenderer, Tile

    return from_bytes(to_bytes(FrameRenderer(load_shot(shot), frame).render(Tile(*tile), first, count),
                               bits=32))


def test_a_stop_between_chunks_hands_back_the_finished_samples(one_batch, gate, tiny_shot, monkeypatch):
    from lampyr.engine.film import from_bytes

    r, ctx, task = one_batch
    watch = ChunkWatch(monkeypatch)  # production chunking: the first chunk is one sample
    watch.then = lambda: gate.set_stop(True)  # the stop comes while that chunk renders
    out = run_batch(ctx, task.to_json())
    assert out["outcome"] == "handed back" and out["done"] == 1
    assert [(f, c) for f, c, *_ in watch.calls] == [(2, 1)]  # nothing rendered after the stop
    note = json.loads(r.lpop(P.K_RESULTS))
    assert (note["kind"], note["done"], note["ticket"]) == ("partial", 1, 1)
    film = from_bytes(r.get(P.k_result(task.batch.id, 1)))
    # sample [2, 3) of the batch, exactly as rendered alone (docs/design.md, invariant 1)
    np.testing.assert_array_equal(film.mean(), direct(tiny_shot, 1, (0, 0, 8, 8), 2, 1).mean())
    assert not r.exists(P.k_lease(task.batch.id))


def test_a_message_taken_while_stopping_goes_back_untouched(one_batch, gate):
    r, ctx, task = one_batch
    gate.set_stop(True)
    assert run_batch(ctx, task.to_json()) == {"batch": task.batch.id, "outcome": "handed back",
                                              "done": 0}
    assert json.loads(r.lpop(P.K_RESULTS))["done"] == 0
    assert not r.exists(P.k_result(task.batch.id, 1)) and not r.hexists(P.K_ATTEMPTS, task.batch.id)


def test_a_paused_batch_renders_nothing_keeps_its_lease_and_finishes_after_resume(
        one_batch, gate, tiny_shot, monkeypatch):
    from lampyr.engine.film import from_bytes

    r, ctx, task = one_batch
    watch = ChunkWatch(monkeypatch)  # production chunking, no delay
    paused_at = {}

    def pause():
        gate.set_pause(True)
        paused_at["t"] = time.monotonic()

    watch.then = pause  # raised while the first chunk (one sample) renders
    seen = {}

    def resume_later():
        while "t" not in paused_at:
            time.sleep(0.01)
        time.sleep(3.0)  # longer than the 2 s lease: only renewals keep it
        seen["lease"] = r.get(P.k_lease(task.batch.id))
        seen["slot"] = [json.loads(r.get(k)) for k in r.scan_iter(match="lampyr:slot:w:*")]
        seen["calls"] = list(watch.calls)
        seen["resumed"] = time.monotonic()
        gate.set_pause(False)

    t = threading.Thread(target=resume_later)
    t.start()
    out = run_batch(ctx, task.to_json())
    t.join()
    assert out["outcome"] == "done"
    # while paused: one sample rendered (the chunk the pause came in), nothing more
    assert [(f, c) for f, c, *_ in seen["calls"]] == [(2, 1)]
    assert all(start > seen["resumed"] for _, _, start, _ in watch.calls[1:])
    assert sum(c for _, c, *_ in watch.calls) == 3
    assert seen["lease"] == ctx.holder.encode() and seen["slot"][0]["paused"] is True
    film = from_bytes(r.get(P.k_result(task.batch.id, 1)))
    np.testing.assert_array_equal(film.mean(), direct(tiny_shot, 1, (0, 0, 8, 8), 2, 3).mean())


# -- the head's side -----------------------------------------------------------------------------

def take_message(r) -> str | None:
    """The JSON argument of the oldest queued TASK_RENDER message (removed from the queue)."""
    raw = r.rpop(P.QUEUE)  # kombu pushes on the left
    if raw is None:
        return None
    return json.loads(base64.b64decode(json.loads(raw)["body"]))[0][0]


@pytest.fixture
def head_and_job(redis_url, tiny_shot, tmp_path, monkeypatch, compiled_kernels):
    monkeypatch.setenv("LAMPYR_CACHE", str(tmp_path / "cache"))
    head = Head(tmp_path / "state", redis_url, lease_seconds=5)
    head.start()
    job = submit_request(head.r, tiny_shot, {}, str(tmp_path / "out"), 0, tile_size=8,
                         batch_samples=3)
    head.take_commands()
    return head, job


def drive(head, job, ctx, watch, interrupt=None, timeout=120):
    """Run the farm in this process until the job is done: the head's loop, and `ctx` rendering
    every queued message; `interrupt(batch)` → True renders that one with a stop raised during
    its first chunk (`watch`: the ChunkWatch). Returns the raw notices of the hand-backs."""
    partials = []
    give_up_at = time.monotonic() + timeout
    while head.job_state(head.jobs[job]) != "done":
        assert time.monotonic() < give_up_at, "the job did not finish"
        head.take_results()
        head.dispatch()
        payload = take_message(head.r)
        if payload is None:
            continue
        batch = P.RenderTask.from_json(payload).batch
        if interrupt and interrupt(batch):
            ctx.gate.set_stop(False)
            watch.then = lambda: ctx.gate.set_stop(True)
            out = run_batch(ctx, payload)
            ctx.gate.set_stop(False)
            assert out["outcome"] == "handed back" and out["done"] == 1
            partials.append(head.r.lindex(P.K_RESULTS, -1))
        else:
            run_batch(ctx, payload)
    return partials


def test_partial_results_and_their_remainders_equal_an_uninterrupted_render(
        head_and_job, redis_url, gate, tiny_shot, tmp_path, monkeypatch):
    head, job = head_and_job
    watch = ChunkWatch(monkeypatch)
    ctx = Context(redis_url, "w", gate)
    cut = lambda b: b.count == 3 and b.tile in (0, 3)  # noqa: E731  (full batches of two tiles)
    partials = drive(head, job, ctx, watch, interrupt=cut)
    assert len(partials) >= 4
    for f in (1, 2):
        assert_same_image(frame_mean(tmp_path / "out", "tiny", f), reference_mean(tiny_shot, f))
    # every tile holds each of its 8 samples once
    run = head.jobs[job]
    assert all(sorted(a + i for a, c in ranges for i in range(c)) == list(range(8))
               for ranges in run.held.values())


def test_a_redelivered_partial_notice_is_skipped(head_and_job, redis_url, gate, tiny_shot, tmp_path,
                                                 monkeypatch):
    from lampyr.engine.film import to_bytes

    head, job = head_and_job
    ctx = Context(redis_url, "w", gate)
    (raw, *_) = drive(head, job, ctx, ChunkWatch(monkeypatch), interrupt=lambda b: b.count == 3 and b.frame == 1
                      and b.tile == 0 and b.first == 1)
    before = frame_mean(tmp_path / "out", "tiny", 1)
    note = json.loads(raw)
    # the same notice again, with a film of other samples under its key: merged, it would
    # change the frame
    head.r.set(P.k_result(note["batch"], note["ticket"]),
               to_bytes(direct(tiny_shot, 1, (0, 0, 8, 8), 100, note["done"])))
    head.r.rpush(P.K_RESULTS, raw)
    assert head.take_results() == 1
    assert not head.r.exists(P.k_result(note["batch"], note["ticket"]))
    assert (frame_mean(tmp_path / "out", "tiny", 1) == before).all()
    assert head.job_state(head.jobs[job]) == "done"


def test_a_restarted_head_queues_the_remainder_of_a_part_held_batch(head_and_job, redis_url,
                                                                    tiny_shot, tmp_path):
    from lampyr.scheduler.accumulator import TileAccumulator
    from lampyr.scheduler.jobs import JobFolder

    head, job = head_and_job
    acc = TileAccumulator(JobFolder(tmp_path / "state", job).tile(1, 0), 8, 8)
    acc.add(direct(tiny_shot, 1, (0, 0, 8, 8), 1, 2), 1, 2)  # batch [1, 4) handed back after 2
    acc.save()
    again = Head(tmp_path / "state", redis_url, lease_seconds=5)
    again.start()
    pending = {b.id for b in again.jobs[job].pending}
    assert f"{job}/1/0/3/1" in pending and f"{job}/1/0/1/3" not in pending
    assert f"{job}/1/0/0/1" in pending  # the first pass of that tile was never held


@pytest.mark.parametrize("held, expected", [
    ([], [(4, 3)]),
    ([(4, 3)], []),
    ([(4, 1)], [(5, 2)]),
    ([(4, 2)], [(6, 1)]),
    ([(5, 1)], [(4, 1), (6, 1)]),
    ([(0, 4), (7, 1)], [(4, 3)]),     # neighbours that do not overlap
    ([(0, 5), (6, 9)], [(5, 1)]),
])
def test_remainders_are_the_samples_no_held_range_covers(held, expected):
    b = P.Batch("job", 1, 0, 4, 3, 0, 0, 8, 8)
    assert [(p.first, p.count) for p in _remainders(b, held)] == expected
