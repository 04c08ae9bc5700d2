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


# -- 2. a submit that plans too much, a command that stops the head -----------------------------

def send_submit(head, tiny_shot, job, **layout):
    from lampyr.engine.shot import load_shot
    from lampyr.scheduler.store import send_command
    from lampyr.scheduler.transfer import upload_shot

    sha, member, _ = upload_shot(head.r, load_shot(tiny_shot))
    head.r.hset(P.k_job(job), mapping={"job": json.dumps(job), "state": '"queued"'})
    overrides = layout.pop("overrides", {})
    send_command(head.r, "submit", job=job, bundle=sha, shot=member, overrides=overrides,
                 out=None, **layout)
    head.take_commands()
    return job_status(head.r, job)


@pytest.mark.parametrize("layout, field", [
    ({"tile_size": 1, "batch_samples": 3}, "tile_size 1 "),
    ({"tile_size": 4097, "batch_samples": 3}, "tile_size 4097 "),
    ({"tile_size": "64", "batch_samples": 3}, "tile_size '64' "),
    ({"tile_size": True, "batch_samples": 3}, "tile_size True "),
    ({"tile_size": 8, "batch_samples": 0}, "batch_samples 0 "),
    ({"tile_size": 8, "batch_samples": 2.5}, "batch_samples 2.5 "),
])
def test_a_submit_with_a_tile_or_batch_out_of_range_is_refused_in_one_line(head, tiny_shot,
                                                                           layout, field):
    st = send_submit(head, tiny_shot, "tiny-0a0b0c", **layout)
    assert st["state"] == "failed" and field in st["error"] and "\n" not in st["error"]
    assert "expected a whole number" in st["error"]
    assert "tiny-0a0b0c" not in head.jobs


def test_a_submit_planning_more_batches_than_the_cap_is_refused_before_planning(head,
                                                                                 tiny_shot):
    from lampyr.scheduler.commands import MAX_BATCHES

    # 16 × 12 px in 8 px tiles: 4 tiles; 64 spp in batches of 1: 64 ranges; 10 000 frames (the
    # most a shot may have) → 10 000 × 4 × 64 = 2 560 000 batches, past the cap of 2 000 000
    st = send_submit(head, tiny_shot, "tiny-0a0b0d", tile_size=8, batch_samples=1,
                     overrides={"frames": [0, 9999], "samples": 64})
    assert MAX_BATCHES == 2_000_000
    assert st["state"] == "failed" and "2560000 batches" in st["error"]
    assert "\n" not in st["error"] and "tiny-0a0b0d" not in head.jobs
    # at the cap exactly (50 spp: 10 000 × 4 × 50 = 2 000 000) the count passes; only the count
    # is checked here (commands.check_batch_count), not two million batches planned
    from lampyr.engine.shot import load_shot
    from lampyr.scheduler.commands import check_batch_count

    at_cap = load_shot(tiny_shot).with_overrides(frames=(0, 9999), samples=50)
    check_batch_count(at_cap, 8, 1, 1)
    with pytest.raises(Exception, match="2040000 batches"):  # one more range: 10 000 × 4 × 51
        check_batch_count(at_cap.with_overrides(samples=51), 8, 1, 1)


def test_a_command_that_stopped_the_head_at_three_starts_is_set_aside(head, tiny_shot,
                                                                      redis_url, tmp_path):
    from lampyr.scheduler.commands import K_CONTROL_ASIDE, K_REPLAYS
    from lampyr.scheduler.head import Head

    job = submit(head, tiny_shot)
    raw = json.dumps({"op": "pause", "job": job}).encode()
    head.r.rpush(P.K_CONTROL_PROCESSING, raw)  # taken by a head that was then killed
    for start in (1, 2, 3):
        Head(tmp_path / "state", redis_url, lease_seconds=5).start()
        assert head.r.lrange(P.K_CONTROL, 0, -1) == [raw]  # carried out again …
        head.r.lmove(P.K_CONTROL, P.K_CONTROL_PROCESSING, "LEFT", "RIGHT")  # … and killed again
    again = Head(tmp_path / "state", redis_url, lease_seconds=5)
    again.start()
    assert again.r.llen(P.K_CONTROL) == again.r.llen(P.K_CONTROL_PROCESSING) == 0
    aside = [json.loads(x) for x in again.r.lrange(K_CONTROL_ASIDE, 0, -1)]
    assert [a["command"] for a in aside] == [raw.decode()] and "3 start-ups" in aside[0]["reason"]
    assert not again.r.exists(K_REPLAYS)
    # a command replayed once and then carried out leaves no count behind
    again.r.rpush(P.K_CONTROL_PROCESSING, raw)
    Head(tmp_path / "state", redis_url, lease_seconds=5).start()
    assert again.r.hlen(K_REPLAYS) == 1
    again.take_commands()
    assert not again.r.exists(K_REPLAYS) and again.r.llen(P.K_CONTROL) == 0


# -- 4. job ids ------------------------------------------------------------------------------------

@pytest.mark.parametrize("job", ["../../x-0a0b0c", "../escape", "a/b-0a0b0c", "x-0A0B0C", "x-0a0b0",
                                 "x" * 25 + "-0a0b0c", "-0a0b0c", ""])
def test_a_submit_whose_job_id_is_not_one_lampyr_makes_is_refused(head, tiny_shot, tmp_path,
                                                                  job):
    st = send_submit(head, tiny_shot, job, tile_size=8, batch_samples=3)
    assert st["state"] == "failed" and "is not one lampyr makes" in st["error"]
    assert list(tmp_path.rglob("scene.json")) == []  # no job folder made, in or out of state


def test_job_ids_new_job_id_makes_are_taken(head, tiny_shot):
    from lampyr.scheduler.jobs import is_job_id, new_job_id

    for name in ("tiny", "my shot/2 ..", "café", "x" * 40, ""):
        assert is_job_id(new_job_id(name)), name
    job = new_job_id("../../tiny")
    assert send_submit(head, tiny_shot, job, tile_size=8, batch_samples=3)["state"] == "queued"
    assert job in head.jobs


def test_a_submit_cannot_take_the_id_of_an_archived_or_broken_job(redis_url, tmp_path, tiny_shot):
    from lampyr.scheduler.head import Head
    from lampyr.scheduler.jobs import JobFolder

    head = Head(tmp_path / "state", redis_url, lease_seconds=5, archive_after=0.0)
    head.start()
    old = submit(head, tiny_shot)
    broken = submit(head, tiny_shot)
    head.command("cancel", job=old)
    head.publish(force=True)  # folds `old` away
    archived = JobFolder(tmp_path / "state", old).archived
    before = archived.read_bytes()
    torn = JobFolder(tmp_path / "state", broken).record
    torn.write_text('{"id": ')
    again = Head(tmp_path / "state", redis_url, lease_seconds=5)
    again.start()
    assert old not in again.jobs and broken in again.broken
    for job in (old, broken):
        st = send_submit(again, tiny_shot, job, tile_size=8, batch_samples=3)
        assert "already exists on this head" in st["error"] and job not in again.jobs
    assert archived.read_bytes() == before
    assert not JobFolder(tmp_path / "state", old).record.exists()
    assert torn.read_text() == '{"id": '


# -- 12. what folded jobs and bad notices leave in Redis ----------------------------------------

def test_a_folded_job_leaves_only_its_status_in_redis(redis_url, tmp_path, tiny_shot):
    from lampyr.scheduler.head import Head

    head = Head(tmp_path / "state", redis_url, lease_seconds=5, archive_after=0.0)
    head.start()
    job = submit(head, tiny_shot)
    head.publish(force=True)
    progress = [P.k_layout(job), P.k_progress(job), P.k_tiles(job)]
    assert head.r.exists(*progress) == 3
    head.command("cancel", job=job)
    head.publish(force=True)  # ended, and older than 0 s: folded
    assert job not in head.jobs
    assert head.r.exists(*progress) == 0
    st = job_status(head.r, job)
    assert st["archived"] is True and st["state"] == "cancelled"


def test_results_aside_keeps_the_newest_thousand(head):
    for i in range(1005):
        head.r.rpush(P.K_RESULTS, f"bad notice {i}")
    while head.take_results():
        pass
    aside = head.r.lrange(P.K_ASIDE, 0, -1)
    assert len(aside) == 1000
    assert [json.loads(aside[k])["notice"] for k in (0, -1)] == ["bad notice 5", "bad notice 1004"]
