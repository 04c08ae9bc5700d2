"""What no client or worker can do to the head: stop its loop, lose a command's error, show a job
half-published. A real Redis and a real head object in this process (the faults that need a
killed head process are in test_head_crash.py)."""

from __future__ import annotations

import json
import threading

import pytest

from lampyr.engine.film import to_bytes
from lampyr.engine.render import FrameRenderer, Tile
from lampyr.engine.shot import load_shot
from lampyr.scheduler import protocol as P
from lampyr.scheduler.head import Head
from lampyr.scheduler.jobs import JobFolder
from lampyr.scheduler.store import job_status, send_command
from lampyr.scheduler.submit import submit_request


@pytest.fixture
def head(redis_url, tmp_path):
    h = Head(tmp_path / "state", redis_url, lease_seconds=5)
    h.start()
    return h


def submit(head, shot, out=None):
    job = submit_request(head.r, shot, {}, None if out is None else str(out), 0, tile_size=8,
                         batch_samples=3)
    head.take_commands()
    return job


def deliver(head, b: P.Batch, data: bytes) -> None:
    """A worker's result for the current dispatch of `b`: its bytes and its notice."""
    ticket = head.leases.get(b.id).ticket
    head.r.set(P.k_result(b.id, ticket), data)
    head.r.rpush(P.K_RESULTS, P.result_notice(b.id, ticket, "w", 0.1))


def first_pass_of_frame_1(head, job) -> list[P.Batch]:
    """Queue the job's first pass (a worker of 64 cores makes room) → frame 1's batches."""
    head.r.set(P.k_host("big"), json.dumps({"name": "big", "cores": 64}), ex=30)
    head.dispatch()
    return [e.batch for e in head.leases.table.values()
            if e.batch.job == job and e.batch.frame == 1 and e.batch.first == 0]


def render(shot, b: P.Batch) -> bytes:
    return to_bytes(FrameRenderer(load_shot(shot), b.frame).render(
        Tile(b.x0, b.y0, b.w, b.h), b.first, b.count))


def test_a_result_that_cannot_be_merged_fails_its_batch_and_the_head_goes_on(head, tiny_shot):
    job = submit(head, tiny_shot)
    head.dispatch()
    bad, good = [e.batch for e in head.leases.table.values()][:2]
    deliver(head, bad, b"not a film")
    head.r.rpush(P.K_RESULTS, b"{not json")  # a notice with no batch at all
    deliver(head, good, render(tiny_shot, good))
    assert head.take_results() == 3  # nothing raised out of the loop's step
    head.publish(force=True)
    st = job_status(head.r, job)
    failed = {f["batch"]: f["error"] for f in st["failed"]}
    assert list(failed) == [bad.id] and "could not be merged" in failed[bad.id]
    assert head.jobs[job].is_done(good)  # the good result in the same group was merged
    aside = [json.loads(x) for x in head.r.lrange(P.K_ASIDE, 0, -1)]
    assert [a["notice"] for a in aside] == ["{not json"] and "not JSON" in aside[0]["reason"]
    assert head.r.llen(P.K_PROCESSING) == 0
    head.command("retry", job=job)  # retry works: the batch is queued again
    assert bad.id in {b.id for b in head.jobs[job].pending}


def test_a_head_starting_over_undecodable_notices_sets_them_aside(head, tiny_shot, redis_url,
                                                                    tmp_path):
    submit(head, tiny_shot)
    head.r.rpush(P.K_PROCESSING, b"\xff\xfe garbage")  # what a killed head was merging
    head.r.rpush(P.K_RESULTS, json.dumps({"kind": "result", "batch": "x"}))
    again = Head(tmp_path / "state", redis_url, lease_seconds=5)
    again.start()
    again.step()
    reasons = [json.loads(x)["reason"] for x in again.r.lrange(P.K_ASIDE, 0, -1)]
    assert len(reasons) == 2 and "not JSON" in reasons[0] and "batch id" in reasons[1]
    assert again.r.llen(P.K_RESULTS) == again.r.llen(P.K_PROCESSING) == 0


def test_an_out_the_head_cannot_make_fails_the_job_with_the_reason(head, tiny_shot, tmp_path):
    from lampyr.scheduler.transfer import upload_shot

    (tmp_path / "plain").write_text("a file")
    sha, member, _ = upload_shot(head.r, load_shot(tiny_shot))
    # as a client on another machine sends it: it could not tell
    head.r.hset(P.k_job("j-0a0b0c"), mapping={"job": '"j-0a0b0c"', "state": '"queued"'})
    send_command(head.r, "submit", job="j-0a0b0c", bundle=sha, shot=member, overrides={},
                 out=str(tmp_path / "plain" / "frames"), tile_size=8, batch_samples=3)
    other = submit(head, tiny_shot)
    head.step()
    st = job_status(head.r, "j-0a0b0c")
    assert st["state"] == "failed" and "--out" in st["error"] and "plain" in st["error"]
    assert head.jobs[other].pending or head.leases.table  # the head went on with the next job


def test_frames_that_cannot_be_written_stop_the_job_and_retry_writes_them(head, tiny_shot,
                                                                          tmp_path):
    out = tmp_path / "out"
    job = submit(head, tiny_shot, out)
    batches = first_pass_of_frame_1(head, job)
    out.rmdir()
    out.write_text("the folder became a file")
    for b in batches:
        deliver(head, b, render(tiny_shot, b))
    head.take_results()
    head.publish(force=True)
    st = job_status(head.r, job)
    assert st["state"] == "failed" and "cannot write frame" in st["error"]
    assert head.jobs[job].is_done(b)  # the merged tile is kept on disk
    out.unlink()
    head.command("retry", job=job)
    head.publish(force=True)
    st = job_status(head.r, job)
    assert st["error"] is None and st["state"] != "failed"
    assert (out / "tiny.0001.exr").exists()


def test_a_command_error_stays_in_the_status_after_later_publishes(head, tiny_shot):
    job = submit(head, tiny_shot)
    send_command(head.r, "priority", job=job, priority="high")
    send_command(head.r, "pause", job="no-such-job")
    for _ in range(3):
        head.step()
        head.publish(force=True)
    err = job_status(head.r, job)["command_error"]
    assert err["op"] == "priority" and "high" in err["error"]
    send_command(head.r, "priority", job=job, priority=2)  # a later command that works clears it
    head.step()
    head.publish(force=True)
    assert job_status(head.r, job)["command_error"] is None


def test_a_job_that_cannot_be_loaded_shows_as_failed_with_the_reason(head, tiny_shot, redis_url,
                                                                     tmp_path):
    job = submit(head, tiny_shot)
    JobFolder(tmp_path / "state", job).record.write_text('{"id": ')  # a torn record
    again = Head(tmp_path / "state", redis_url, lease_seconds=5)
    again.start()
    st = job_status(again.r, job)
    assert st["state"] == "failed" and "cannot be resumed" in st["error"]


def test_a_status_is_never_seen_missing_while_it_is_replaced(head, tiny_shot, redis_url):
    import redis

    job = submit(head, tiny_shot)
    run = head.jobs[job]
    # a status far larger than Redis reads from a client at once (16 KiB), so that without a
    # transaction its replacement is carried out across several reads
    run.rec.failed = {f"{job}/1/0/{i}/1": "x" * 200 for i in range(2000)}
    missing, stop = [], threading.Event()

    def read():
        r = redis.Redis.from_url(redis_url)
        while not stop.is_set():
            if not r.exists(P.k_job(job)):
                missing.append(1)

    reader = threading.Thread(target=read)
    reader.start()
    try:
        for _ in range(60):
            head.publish(force=True)
    finally:
        stop.set()
        reader.join()
    assert not missing


def test_an_ended_job_clears_its_attempts_and_its_scene_files(head, tiny_shot):
    job = submit(head, tiny_shot)
    keep = submit(head, tiny_shot)  # the same scene: its files stay while this job runs
    head.dispatch()
    b = next(e.batch for e in head.leases.table.values() if e.batch.job == job)
    head.r.hset(P.K_ATTEMPTS, mapping={b.id: 1, f"{keep}/1/0/0/1": 1})
    head.command("cancel", job=job)
    head.publish(force=True)
    assert head.r.hkeys(P.K_ATTEMPTS) == [f"{keep}/1/0/0/1".encode()]
    assert head.r.exists(P.k_scene(head.jobs[job].rec.bundle))  # still needed by `keep`
    head.command("cancel", job=keep)
    head.publish(force=True)
    assert not head.r.exists(P.k_scene(head.jobs[job].rec.bundle))
    assert not list(head.r.scan_iter(match=P.key("blob", "*")))


def test_a_restart_does_not_rewrite_frames_already_written(head, tiny_shot, redis_url, tmp_path):
    out = tmp_path / "out"
    job = submit(head, tiny_shot, out)
    for b in first_pass_of_frame_1(head, job):
        deliver(head, b, render(tiny_shot, b))
    head.take_results()
    frame = out / "tiny.0001.exr"
    before = frame.stat().st_mtime_ns
    again = Head(tmp_path / "state", redis_url, lease_seconds=5)
    again.start()
    assert frame.stat().st_mtime_ns == before
    assert again.jobs[job].written.get(1) == head.jobs[job].written.get(1)


def test_an_ended_job_folds_into_the_archive_after_its_age(redis_url, tmp_path, tiny_shot):
    head = Head(tmp_path / "state", redis_url, lease_seconds=5, archive_after=0.0)
    head.start()
    job = submit(head, tiny_shot)
    head.command("cancel", job=job)
    head.publish(force=True)  # the end is noted, and (older than 0 s) the job folds away
    assert job not in head.jobs
    folder = JobFolder(tmp_path / "state", job)
    assert (folder.root / "archived.json").exists() and not folder.record.exists()
    st = job_status(head.r, job)
    assert st["state"] == "cancelled" and st["archived"] is True
    again = Head(tmp_path / "state", redis_url, lease_seconds=5)
    again.start()
    assert job not in again.jobs and job_status(again.r, job)["archived"] is True
