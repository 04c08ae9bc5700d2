"""The render task against a real Redis: idempotent, leased, counted, refusing skew."""

from __future__ import annotations

import json

import numpy as np
import pytest

from lampyr.engine.shot import load_shot
from lampyr.scheduler import protocol as P
from lampyr.worker.tasks import Context, run_batch

from ..harness import install_task_fakes
from ..scheduler.farmtools import queue_one_batch


@pytest.fixture
def setup(redis_url, tiny_shot, tmp_path, monkeypatch):
    """The shot's files in Redis, a queued batch (ticket 1) and a worker context; returns
    (r, ctx, task)."""
    monkeypatch.setenv("LAMPYR_CACHE", str(tmp_path / "cache"))
    r, task = queue_one_batch(redis_url, tiny_shot, lease_seconds=5)
    return r, Context(redis_url, "w"), task


def test_a_batch_renders_into_its_result_key(setup, tiny_shot):
    from lampyr.engine.film import from_bytes
    from lampyr.engine.render import FrameRenderer, Tile

    r, ctx, task = setup
    assert run_batch(ctx, task.to_json())["outcome"] == "done"
    film = from_bytes(r.get(P.k_result(task.batch.id, 1)))
    from lampyr.engine.film import to_bytes

    direct = FrameRenderer(load_shot(tiny_shot), 1).render(Tile(0, 0, 8, 8), 2, 3)
    direct = from_bytes(to_bytes(direct, bits=32))  # the wire's float32 (docs/design.md, film bytes)
    np.testing.assert_array_equal(film.mean(), direct.mean())  # docs/design.md, invariant 1: same five numbers
    note = json.loads(r.lpop(P.K_RESULTS))
    assert (note["kind"], note["batch"], note["ticket"]) == ("result", task.batch.id, 1)
    assert not r.exists(P.k_lease(task.batch.id))
    assert int(r.hget(P.K_ATTEMPTS, task.batch.id)) == 1


def test_a_replaced_message_is_skipped(setup):
    r, ctx, task = setup
    r.hset(P.K_INFLIGHT, task.batch.id, 2)  # the head queued the batch again
    assert run_batch(ctx, task.to_json())["outcome"] == "stale"
    assert r.llen(P.K_RESULTS) == 0 and not r.hexists(P.K_ATTEMPTS, task.batch.id)


def test_a_batch_leased_elsewhere_is_skipped(setup):
    r, ctx, task = setup
    assert P.lease_acquire(r, task.batch.id, "someone-else", 5)
    assert run_batch(ctx, task.to_json())["outcome"] == "held elsewhere"
    assert r.get(P.k_lease(task.batch.id)) == b"someone-else"
    assert r.llen(P.K_RESULTS) == 0


def test_past_the_attempt_limit_the_batch_is_reported_not_run(setup):
    r, ctx, task = setup
    r.hset(P.K_ATTEMPTS, task.batch.id, 2)  # two starts already died
    assert run_batch(ctx, task.to_json())["outcome"] == "gave up"
    note = json.loads(r.lpop(P.K_RESULTS))
    assert note["kind"] == "error" and "gave up after 2 start(s)" in note["error"]
    assert not r.exists(P.k_result(task.batch.id, 1))


def test_an_error_is_reported_with_its_message(setup, monkeypatch):
    r, ctx, task = setup
    install_task_fakes({"poison": "1/0"}, monkeypatch.setattr)
    assert run_batch(ctx, task.to_json())["outcome"] == "error"
    note = json.loads(r.lpop(P.K_RESULTS))
    assert "RuntimeError: poisoned batch" in note["error"]
    assert not r.exists(P.k_lease(task.batch.id))


def test_a_lapsed_lease_stops_the_batch(setup, monkeypatch):
    r, ctx, task = setup
    r.hset(P.K_CONFIG, "lease_seconds", 0.3)
    # 0.5 s a sample: the first chunk (one sample) outlasts the 0.3 s lease
    install_task_fakes({"sample_delay": 0.5}, monkeypatch.setattr)
    assert run_batch(ctx, task.to_json())["outcome"] == "lease lost"
    assert r.llen(P.K_RESULTS) == 0


def test_a_message_of_another_protocol_version_is_refused(setup):
    r, ctx, task = setup
    d = json.loads(task.to_json())
    d["protocol"] = P.PROTOCOL_VERSION + 1
    out = run_batch(ctx, json.dumps(d))
    assert out["outcome"] == "refused" and "same lampyr version" in out["error"]
    assert "protocol" in json.loads(r.lpop(P.K_RESULTS))["error"]


def test_the_scene_is_fetched_once_and_kept_on_disk(setup, redis_url):
    r, ctx, task = setup
    run_batch(ctx, task.to_json())
    other = P.Batch("job", 2, 1, 0, 1, 8, 0, 8, 8)
    r.hset(P.K_INFLIGHT, other.id, 1)
    run_batch(ctx, P.RenderTask(P.PROTOCOL_VERSION, other, 1, task.bundle, task.shot, {}).to_json())
    assert ctx.cache.fetches == 1  # the tiny shot is one file: the shot itself
    for k in r.scan_iter(match=P.key("blob", "*")):  # a fresh process finds the files on disk
        r.delete(k)
    r.delete(P.k_scene(task.bundle))
    fresh = Context(redis_url, "w2")
    r.hset(P.K_INFLIGHT, other.id, 2)
    again = P.RenderTask(P.PROTOCOL_VERSION, other, 2, task.bundle, task.shot, {})
    assert run_batch(fresh, again.to_json())["outcome"] == "done"
    assert fresh.cache.fetches == 0

