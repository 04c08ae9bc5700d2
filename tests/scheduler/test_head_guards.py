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


# -- 5. values workers and clients wrote ---------------------------------------------------------

def test_malformed_heartbeats_and_slot_records_are_left_out_and_the_loop_goes_on(head, tiny_shot):
    from lampyr.scheduler import heartbeats
    from lampyr.scheduler.forecast import read_hosts
    from lampyr.scheduler.history import note_hosts
    from lampyr.scheduler.store import workers

    job = submit(head, tiny_shot)
    r = head.r
    bad_beats = {"many": {"name": "many", "cores": "many"}, "zero": {"name": "zero", "cores": 0},
                 "yes": {"name": "yes", "cores": True}, "num": {"name": 5, "cores": 2},
                 "st": {"name": "st", "cores": 2, "state": ["idle"]},
                 "win": {"name": "win", "cores": 2, "windows": [[1, "x"]]},
                 "list": [1, 2]}
    for key, info in bad_beats.items():
        r.set(P.k_host(key), json.dumps(info), ex=30)
    r.set(P.k_host("good"), json.dumps({"name": "good", "cores": 4, "state": "idle",
                                        "windows": [[1.0, 2.5]]}), ex=30)
    r.set(P.k_slot("good", 11), json.dumps({"worker": "good", "pid": 11, "batch": f"{job}/1/0/0/1",
                                            "pixel_samples_per_second": 10.0}), ex=30)
    r.set(P.k_slot("good", 12), json.dumps({"worker": 3, "batch": 7}), ex=30)
    r.set(P.k_slot("good", 13), json.dumps({"worker": "good", "pixel_samples_per_second": "x"}),
          ex=30)
    assert [h["name"] for h in heartbeats.hosts(r)] == ["good"]
    assert head.worker_cores() == 4
    assert head.dispatch() == 4 + 2  # cores + 2 queued (dispatch.py)
    head.step()
    assert [(w["name"], [s["pid"] for s in w["slots"]]) for w in workers(r)] == [("good", [11])]
    assert read_hosts(r) == ([("good", 4, [[1.0, 2.5]])], [("good", 10.0)])
    pipe = r.pipeline()
    note_hosts(r, pipe, 1000.0)
    pipe.execute()
    assert r.hkeys(P.K_SEEN) == [b"good"]


def test_a_ticket_in_inflight_that_is_not_a_number_does_not_keep_the_head_down(
        head, tiny_shot, redis_url, tmp_path):
    from lampyr.scheduler.head import Head

    job = submit(head, tiny_shot)
    bid = next(b.id for b in head.jobs[job].pending)
    head.r.hset(P.K_INFLIGHT, bid, "not a ticket")
    again = Head(tmp_path / "state", redis_url, lease_seconds=5)
    again.start()
    assert not again.r.hexists(P.K_INFLIGHT, bid)
    assert bid in batches_held_by_head(again, job)  # pending again


def test_an_attempt_count_that_is_not_a_number_starts_counting_again(head, tiny_shot):
    job = submit(head, tiny_shot)
    head.dispatch()
    entry = next(iter(head.leases.table.values()))
    entry.leased = True  # its worker went silent
    head.r.hset(P.K_ATTEMPTS, entry.batch.id, "lots")
    head.reap(every=0)
    assert head.leases.get(entry.batch.id).ticket > entry.ticket  # queued again
    assert not head.r.hexists(P.K_ATTEMPTS, entry.batch.id)
    assert not head.jobs[job].rec.failed


@pytest.mark.parametrize("op", [[1], {"a": 1}])
def test_a_command_whose_op_is_not_a_name_is_recorded_and_removed(head, op):
    from lampyr.scheduler.commands import errors

    head.r.rpush(P.K_CONTROL, json.dumps({"op": op, "job": "j"}))
    assert head.take_commands()
    assert head.r.llen(P.K_CONTROL) == head.r.llen(P.K_CONTROL_PROCESSING) == 0
    assert "unknown command" in errors(head.r)["j"]["error"]


# -- 3. a disk that refuses a merge ------------------------------------------------------------

def test_a_result_the_disk_refuses_stops_the_job_and_is_merged_after_retry(head, tiny_shot,
                                                                           tmp_path):
    from .test_head_faults import deliver, first_pass_of_frame_1, render

    job = submit(head, tiny_shot, tmp_path / "out")
    run = head.jobs[job]
    b = first_pass_of_frame_1(head, job)[0]
    folder = run.folder.tile(b.frame, b.tile).parent
    folder.parent.mkdir(parents=True, exist_ok=True)
    folder.write_text("the tiles' folder became a file")  # every write into it: OSError
    deliver(head, b, render(tiny_shot, b))
    ticket = head.leases.get(b.id).ticket
    head.take_results()
    head.publish(force=True)
    st = job_status(head.r, job)
    assert st["state"] == "failed" and "cannot merge batch" in st["error"]
    assert st["failed"] == []  # the batch itself did not fail
    assert head.r.llen(P.K_PROCESSING) == 1 and head.r.exists(P.k_result(b.id, ticket))
    assert head.leases.get(b.id).ticket == ticket  # still its, with no attempt counted
    assert not head.r.hexists(P.K_ATTEMPTS, b.id)
    head.take_results()  # not taken again while the job is stopped
    assert head.r.llen(P.K_PROCESSING) == 1
    folder.unlink()
    head.command("retry", job=job)
    head.take_results()
    assert run.is_done(b)  # the kept result merged: the samples were not rendered twice
    assert head.r.llen(P.K_PROCESSING) == 0 and not head.r.exists(P.k_result(b.id, ticket))
    head.publish(force=True)
    assert job_status(head.r, job)["error"] is None


def test_a_notice_whose_handling_redis_refuses_is_taken_again_at_the_next_turn(head, tiny_shot,
                                                                               monkeypatch):
    job = submit(head, tiny_shot)
    head.dispatch()
    b = next(iter(head.leases.table.values())).batch
    ticket = head.leases.get(b.id).ticket
    # a notice whose result is gone (expired): the head queues the batch again; Redis refuses
    # that send once, as at its memory cap (the refusal itself: see redis_full above)
    head.r.rpush(P.K_RESULTS, P.result_notice(b.id, ticket, "w", 0.1))
    send = head.dispatcher.sender.send_task

    def refuse_once(*a, **k):
        monkeypatch.setattr(head.dispatcher.sender, "send_task", send)
        raise redis.exceptions.OutOfMemoryError("OOM command not allowed")

    monkeypatch.setattr(head.dispatcher.sender, "send_task", refuse_once)
    head.take_results()
    assert head.r.llen(P.K_PROCESSING) == 1 and head.leases.get(b.id).ticket == ticket
    assert not head.jobs[job].rec.failed and head.jobs[job].rec.error is None
    head.take_results()
    assert head.r.llen(P.K_PROCESSING) == 0 and head.leases.get(b.id).ticket > ticket
