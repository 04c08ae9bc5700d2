"""What the head publishes for the page: per-frame and per-tile progress, only when it changes."""

from __future__ import annotations

import base64
import json

from lampyr.scheduler import progress
from lampyr.scheduler import protocol as P

from .conftest import work_off


def submitted(head, shot):
    from lampyr.scheduler.submit import submit_request

    job = submit_request(head.r, shot, {}, None, 0, tile_size=8, batch_samples=4)
    head.take_commands()
    head.publish(force=True)
    return job


def test_a_job_nothing_was_rendered_of_waits_with_its_noise_unknown(head, tiny_shot):
    job = submitted(head, tiny_shot)
    d = progress.frame_tiles(head.r, job, 1)
    assert (d["state"], d["held"], d["target"], d["noise"]) == ("waiting", 0, 8, None)
    assert {t["state"] for t in d["tiles"]} == {"waiting"}


def test_a_tile_whose_batch_a_worker_leased_is_rendering(head, tiny_shot):
    job = submitted(head, tiny_shot)
    head.dispatch()
    body = json.loads(base64.b64decode(json.loads(head.r.rpop(P.QUEUE))["body"]))
    b = P.RenderTask.from_json(body[0][0]).batch
    assert P.lease_acquire(head.r, b.id, "someone:1", 30)  # as a worker takes it
    head.reap(every=0)
    head.publish(force=False, every=0)
    d = progress.frame_tiles(head.r, job, b.frame)
    assert d["state"] == "rendering"
    assert [t["state"] for t in d["tiles"]].count("rendering") == 1
    assert d["tiles"][b.tile]["state"] == "rendering"


def test_an_unchanged_frame_is_not_written_again(head, tiny_shot, compiled_kernels):
    job = submitted(head, tiny_shot)
    work_off(head, job)
    head.r.delete(P.k_progress(job), P.k_tiles(job))
    head.publish(every=0)
    assert head.r.hlen(P.k_progress(job)) == 0 and head.r.hlen(P.k_tiles(job)) == 0


def test_a_merge_republishes_only_its_frame(head, tiny_shot, compiled_kernels):
    job = submitted(head, tiny_shot)
    work_off(head, job)
    head.r.delete(P.k_progress(job))
    head.command("refine", job=job, samples=12, frames=[2])
    head.publish(every=0)  # the refined job's runs are new: every frame once
    head.r.delete(P.k_progress(job), P.k_tiles(job))
    work_off(head, job)
    assert head.r.hkeys(P.k_progress(job)) == [b"2"] and head.r.hkeys(P.k_tiles(job)) == [b"2"]


def test_redis_losing_its_data_gets_the_progress_back(head, tiny_shot, compiled_kernels):
    job = submitted(head, tiny_shot)
    work_off(head, job)
    head.r.flushdb()
    head.reconcile()
    assert progress.frame_tiles(head.r, job, 1)["state"] == "done"
    assert progress.job_layout(head.r, job)["frames"] == [1, 2]
