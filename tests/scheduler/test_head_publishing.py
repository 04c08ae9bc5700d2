"""What the head writes and when, driven in this process against a real Redis (no workers):
frames with or without their tiles' denoised errors (docs/denoising.md), and status published on
change or once a second (docs/design.md, step 8)."""

from __future__ import annotations

import json
import time as real_time

import pytest

from lampyr.scheduler import protocol as P
from lampyr.scheduler.head import Head, submit_request


def _complete_frame(head, job):
    """Render every pending batch of `job` here, merge it as a worker's result would be, and
    write the frame (complete, so denoised)."""
    from lampyr.engine.render import FrameRenderer, Tile

    run = head.jobs[job]
    renderer = FrameRenderer(run.shot, 1)
    for b in list(run.pending):
        assert run.merge(b, renderer.render(Tile(b.x0, b.y0, b.w, b.h), b.first, b.count), 0.0)
    run.pending.clear()
    assert run.frame_complete(1)
    assert run.write_frames([1])


def _header_and_channels(path):
    import OpenEXR  # the OpenEXR project's own reader, not lampyr's

    with OpenEXR.File(str(path), separate_channels=True) as exr:
        header = dict(exr.header())
        channels = set(exr.channels())
    return header, channels


@pytest.mark.parametrize("errors, ready_by, expect", [
    (True, None, True),  # a farm head: measured for refine --denoised-noise
    (False, None, False),  # lampyr render's head: not measured
    (False, 4_000_000_000.0, True),  # ... unless the job has a ready-by time (its planner)
])
def test_denoised_errors_are_written_only_where_something_reads_them(
        redis_url, tmp_path, tiny_shot, errors, ready_by, expect):
    head = Head(tmp_path / "state", redis_url, lease_seconds=5, denoised_errors=errors)
    head.start()
    out = tmp_path / "out"
    job = submit_request(head.r, tiny_shot, {"frames": (1, 1)}, str(out), 0, tile_size=8,
                         batch_samples=8, ready_by=ready_by)
    head.take_commands()
    _complete_frame(head, job)
    header, channels = _header_and_channels(out / "tiny.0001.exr")
    # the frame is denoised either way (as the engine alone writes it)
    assert {"denoised.R", "denoised.G", "denoised.B"} <= channels
    assert ("lampyr.denoised_error" in header) is expect
    if expect:
        value = json.loads(str(header["lampyr.denoised_error"]))
        assert len(value["errors"]) == len(head.jobs[job].tiles)


class Clock:
    """The head's clock, moved by the test (time.time stays the real one)."""

    def __init__(self):
        self.t = 1000.0

    def monotonic(self):
        return self.t

    def time(self):
        return real_time.time()

    def sleep(self, seconds):
        self.t += seconds


def test_status_is_published_on_change_and_else_once_a_second(redis_url, tmp_path, tiny_shot,
                                                              monkeypatch):
    from lampyr.scheduler import head as head_module

    clock = Clock()
    monkeypatch.setattr(head_module, "time", clock)
    head = Head(tmp_path / "state", redis_url, lease_seconds=5)
    head.start()
    job = submit_request(head.r, tiny_shot, {}, None, 0, tile_size=8, batch_samples=3)
    for _ in range(4):  # the submit, then the first batches queued (no worker takes them)
        clock.t += 0.3
        head.step()
    key = P.k_job(job)
    assert head.r.exists(key)

    def published_after(seconds: float) -> bool:
        head.r.delete(key)
        clock.t += seconds
        head.step()
        return bool(head.r.exists(key))

    published_after(1.1)  # a publish now: the quiet time starts here
    # nothing changes: no publish sooner than PUBLISH_IDLE_EVERY (1 s) after the last
    assert not published_after(0.3)
    assert not published_after(0.3)
    assert published_after(0.5)  # 1.1 s since the last
    # a change (a command) is published at the next turn 0.25 s or more after the last
    head.r.rpush(P.K_CONTROL, json.dumps({"op": "pause", "job": job}))
    assert not published_after(0.1)  # taken now, published when 0.25 s have passed
    assert published_after(0.2)
    assert json.loads(head.r.hget(key, "state")) == "paused"
