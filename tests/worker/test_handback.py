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
def one_batch(redis_url, tiny_shot, tmp_path, monkeypatch, gate):
    """The shot's files in Redis, a queued batch of 3 samples (ticket 1) and a worker context with a
    gate; returns (r, ctx, task)."""
    monkeypatch.setenv("LAMPYR_CACHE", str(tmp_path / "cache"))
    r, task = queue_one_batch(redis_url, tiny_shot, lease_seconds=2)
    return r, Context(redis_url, "w", gate), task


def raise_after_first_chunk(r, flag, worker="w"):
    """Raise `flag` (a gate method) once the worker's slot reports speed, i.e. after its first
    chunk; runs in a thread."""
    def watch():
        give_up_at = time.monotonic() + 60
        while time.monotonic() < give_up_at:
            for k in r.scan_iter(match=f"lampyr:slot:{worker}:*"):
                raw = r.get(k)
                if raw and json.loads(raw)["pixel_samples_per_second"] > 0:
                    flag(True)
                    return
            time.sleep(0.01)

    t = threading.Thread(target=watch, daemon=True)
    t.start()
    return t


def direct(shot, frame, tile, first, count):
    from lampyr.engine.render import FrameRenderer, Tile

    return FrameRenderer(load_shot(shot), frame).render(Tile(*tile), first, count)


def test_a_stop_between_chunks_hands_back_the_finished_samples(one_batch, gate, tiny_shot, monkeypatch):
    from lampyr.engine.film import from_bytes

    r, ctx, task = one_batch
    monkeypatch.setenv("LAMPYR_TEST_CHUNK_DELAY", "0.3")  # one-sample chunks, 0.3 s apart
    raise_after_first_chunk(r, gate.set_stop)
    out = run_batch(ctx, task.to_json())
    assert out["outcome"] == "handed back" and 0 < out["done"] < 3
    note = json.loads(r.lpop(P.K_RESULTS))
    assert (note["kind"], note["done"], note["ticket"]) == ("partial", out["done"], 1)
    film = from_bytes(r.get(P.k_result(task.batch.id, 1)))
    # samples [2, 2 + done) of the batch, exactly as rendered alone (docs/design.md, invariant 1)
    np.testing.assert_array_equal(film.mean(), direct(tiny_shot, 1, (0, 0, 8, 8), 2, out["done"]).mean())
    assert not r.exists(P.k_lease(task.batch.id))


def test_a_message_taken_while_stopping_goes_back_untouched(one_batch, gate):
    r, ctx, task = one_batch
    gate.set_stop(True)
    assert run_batch(ctx, task.to_json()) == {"batch": task.batch.id, "outcome": "handed back",
                                              "done": 0}
    assert json.loads(r.lpop(P.K_RESULTS))["done"] == 0
    assert not r.exists(P.k_result(task.batch.id, 1)) and not r.hexists(P.K_ATTEMPTS, task.batch.id)


def test_a_paused_batch_keeps_its_lease_and_finishes_after_resume(one_batch, gate, tiny_shot,
                                                                   monkeypatch):
    from lampyr.engine.film import from_bytes

    r, ctx, task = one_batch
    monkeypatch.setenv("LAMPYR_TEST_CHUNK_DELAY", "0.1")
    raise_after_first_chunk(r, gate.set_pause)
    seen = {}

    def resume_later():
        time.sleep(0.2)
        while not gate.paused():
            time.sleep(0.05)
        time.sleep(3.0)  # longer than the 2 s lease: only renewals keep it
        seen["lease"] = r.exists(P.k_lease(task.batch.id))
        seen["slot"] = [json.loads(r.get(k)) for k in r.scan_iter(match="lampyr:slot:w:*")]
        gate.set_pause(False)

    t = threading.Thread(target=resume_later)
    t.start()
    out = run_batch(ctx, task.to_json())
    t.join()
    assert out["outcome"] == "done"
    assert seen["lease"] and seen["slot"][0]["paused"] is True
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
def head_and_job(redis_url, tiny_shot, tmp_path, monkeypatch):
    monkeypatch.setenv("LAMPYR_CACHE", str(tmp_path / "cache"))
    head = Head(tmp_path / "state", redis_url, lease_seconds=5)
    head.start()
    job = submit_request(head.r, tiny_shot, {}, str(tmp_path / "out"), 0, tile_size=8,
                         batch_samples=3)
    head.take_commands()
    return head, job


def drive(head, job, ctx, interrupt=None, timeout=120):
    """Run the farm in this process until the job is done: the head's loop, and `ctx` rendering
    every queued message; `interrupt(batch)` → True renders that one with a stop after its first
    chunk. Returns the raw notices of the hand-backs."""
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
            raise_after_first_chunk(head.r, ctx.gate.set_stop, ctx.name)
            out = run_batch(ctx, payload)
            ctx.gate.set_stop(False)
            assert out["outcome"] == "handed back"
            partials.append(head.r.lindex(P.K_RESULTS, -1))
        else:
            run_batch(ctx, payload)
    return partials


def test_partial_results_and_their_remainders_equal_an_uninterrupted_render(
        head_and_job, redis_url, gate, tiny_shot, tmp_path, monkeypatch):
    head, job = head_and_job
    monkeypatch.setenv("LAMPYR_TEST_CHUNK_DELAY", "0.05")
    ctx = Context(redis_url, "w", gate)
    cut = lambda b: b.count == 3 and b.tile in (0, 3)  # noqa: E731  (full batches of two tiles)
    partials = drive(head, job, ctx, interrupt=cut)
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
    monkeypatch.setenv("LAMPYR_TEST_CHUNK_DELAY", "0.05")
    ctx = Context(redis_url, "w", gate)
    (raw, *_) = drive(head, job, ctx, interrupt=lambda b: b.count == 3 and b.frame == 1
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
