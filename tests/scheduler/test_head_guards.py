"""What Redis refusing a write, a full disk, or values a client or a worker wrote can do to the
head: nothing that loses a batch, a result or a command, and nothing that stops its loop. A real
Redis and a real head object in this process, as in test_head_faults.py (its fixtures)."""

from __future__ import annotations

import json
from contextlib import contextmanager

import pytest
import redis

from lampyr.scheduler import protocol as P
from lampyr.scheduler.store import job_status

from .test_head_faults import head, submit  # noqa: F401  (the fixture and the helper)


@contextmanager
def redis_full(r):
    """Redis at its memory cap: with `maxmemory-policy noeviction` (redis_server.py) every
    command that may grow the data is refused with an OOM error (Redis documentation, "Key
    eviction": noeviction returns errors when the memory limit is reached)."""
    old = r.config_get("maxmemory")["maxmemory"]
    r.config_set("maxmemory", 1)
    try:
        yield
    finally:
        r.config_set("maxmemory", old)


def big_worker(head) -> None:
    """A live heartbeat of 64 cores: room to queue the whole first pass at once."""
    head.r.set(P.k_host("big"), json.dumps({"name": "big", "cores": 64}), ex=30)


def batches_held_by_head(head, job) -> set[str]:
    run = head.jobs[job]
    return {b.id for b in run.pending} | {e.batch.id for e in head.dispatcher.inflight(job)}


# -- 1. a send Redis refuses -------------------------------------------------------------------

def test_a_batch_redis_refuses_to_queue_stays_pending(head, tiny_shot):
    job = submit(head, tiny_shot)
    planned = batches_held_by_head(head, job)
    assert len(planned) == 2 * 4 * 4  # 2 frames × 4 tiles (16 × 12 px, 8 px) × 4 ranges
    big_worker(head)
    with redis_full(head.r), pytest.raises(redis.exceptions.OutOfMemoryError):
        head.dispatch()
    assert batches_held_by_head(head, job) == planned
    assert head.dispatch() > 0  # Redis has room again: the same batches go out
    assert batches_held_by_head(head, job) == planned


def test_a_batch_redis_refuses_to_queue_again_keeps_its_lease(head, tiny_shot):
    job = submit(head, tiny_shot)
    head.dispatch()
    entry = next(iter(head.leases.table.values()))
    entry.leased = True  # a worker held it, and its lease key is gone: the worker went silent
    with redis_full(head.r), pytest.raises(redis.exceptions.OutOfMemoryError):
        head.reap(every=0)
    assert head.leases.get(entry.batch.id) is entry  # the next reap tries again
    head.reap(every=0)
    assert head.leases.get(entry.batch.id).ticket > entry.ticket  # sent again, a new ticket
    assert entry.batch.id in batches_held_by_head(head, job)


def test_a_job_whose_batches_were_lost_is_not_done_but_planned_again(head, tiny_shot):
    job = submit(head, tiny_shot)
    planned = batches_held_by_head(head, job)
    head.jobs[job].pending.clear()  # as a send that failed used to leave it: in neither list
    head.publish(force=True)
    assert job_status(head.r, job)["state"] == "queued"
    assert batches_held_by_head(head, job) == planned
