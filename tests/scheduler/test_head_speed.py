"""The head's rules for speed (docs/farm.md, "Speed"): frames not complete are rewritten at most
once per `rewrite_every` seconds and complete ones at once; `lampyr render` (frames written only
complete) plans no first pass; an idle head sleeps in Redis instead of polling it. Real Redis, a
real `lampyr head` process where the rule is about the process."""

from __future__ import annotations

import subprocess
import time

import numpy as np
import OpenEXR
import pytest
import redis

from lampyr.scheduler.head import Head, submit_request

from ..conftest import lampyr_cmd


def frame_spp(path) -> np.ndarray:
    """The `spp` channel of a frame file, read by the OpenEXR library itself."""
    with OpenEXR.File(str(path), separate_channels=True) as f:
        return np.array(f.channels()["spp"].pixels)


def merge_range(run, frame: int, first: int, count: int) -> None:
    """Render [first, first + count) of every tile of `frame` and merge it, as results would."""
    from lampyr.engine.render import FrameRenderer, Tile
    from lampyr.scheduler.protocol import Batch

    renderer = FrameRenderer(run.shot, frame)
    for i, t in enumerate(run.tiles):
        b = Batch(run.rec.id, frame, i, first, count, t.x0, t.y0, t.w, t.h)
        assert run.merge(b, renderer.render(Tile(t.x0, t.y0, t.w, t.h), first, count), 0.0)
    run.write_frames([frame])


def started_job(redis_url, tmp_path, tiny_shot, rewrite_every: float):
    """(head, job run) of the tiny shot (8 px tiles, batches of 3) on a started in-process head."""
    head = Head(tmp_path / "state", redis_url, rewrite_every=rewrite_every)
    head.start()
    job = submit_request(head.r, tiny_shot, {}, str(tmp_path / "out"), tile_size=8,
                         batch_samples=3)
    head.take_commands()
    return head, head.jobs[job]


def test_a_frame_not_complete_is_rewritten_at_most_once_per_rewrite_every(redis_url, tmp_path,
                                                                          tiny_shot):
    head, run = started_job(redis_url, tmp_path, tiny_shot, rewrite_every=3.0)
    path = tmp_path / "out" / "tiny.0001.exr"
    merge_range(run, 1, 0, 1)  # the first pass: the frame's first file, at once
    assert (frame_spp(path) == 1).all()
    merge_range(run, 1, 1, 3)  # grown again within its 3 s: held back
    assert (frame_spp(path) == 1).all() and 1 in run.due
    run.write_due()  # not due yet
    assert (frame_spp(path) == 1).all()
    time.sleep(max(0.0, run.partial_at[1] + 3.0 - time.monotonic()) + 0.1)
    run.write_due()  # its 3 s are up: written with what the tiles hold
    assert (frame_spp(path) == 4).all() and not run.due
    merge_range(run, 1, 4, 3)
    merge_range(run, 1, 7, 1)  # complete: written at once, whatever the time since the last
    assert (frame_spp(path) == 8).all() and run.frame_complete(1)


@pytest.mark.parametrize("share", [0.1, 0.5])
def test_a_slow_partial_rewrite_holds_the_next_one_back_by_its_duration_over_the_share(
        redis_url, tmp_path, tiny_shot, monkeypatch, share):
    """A partial rewrite's CPU is taken from merging: after one that took t seconds the next
    waits t / rewrite_share (here t >= 0.4 s, made slow by a sleeping writer)."""
    import lampyr.frames

    real = lampyr.frames.write_frame_files

    def slow(*args, **kwargs):
        time.sleep(0.4)
        return real(*args, **kwargs)

    monkeypatch.setattr(lampyr.frames, "write_frame_files", slow)
    head, run = started_job(redis_url, tmp_path, tiny_shot, rewrite_every=0.2)
    run.rewrite_share = share
    merge_range(run, 1, 0, 1)  # the first pass, written at once, slowly
    merge_range(run, 1, 1, 3)
    assert 1 in run.due  # grown, held back well past rewrite_every's 0.2 s
    assert 0.4 / share <= run.due[1] - run.partial_at[1] < 0.4 / share + 1.0
    time.sleep(0.3)
    run.write_due()
    assert (frame_spp(tmp_path / "out" / "tiny.0001.exr") == 1).all()


@pytest.mark.parametrize("partial, ranges", [
    (True, [(0, 1), (1, 3), (4, 3), (7, 1)]),  # docs/farm.md: a first pass of 1/16, at least 1
    (False, [(0, 3), (3, 3), (6, 2)]),  # frames written only complete: no first pass
])
def test_the_first_pass_is_planned_only_when_frames_show_before_complete(redis_url, tmp_path,
                                                                         tiny_shot, partial,
                                                                         ranges):
    head = Head(tmp_path / "state", redis_url, partial_frames=partial)
    head.start()
    job = submit_request(head.r, tiny_shot, {}, None, tile_size=8, batch_samples=3)
    head.take_commands()
    assert [tuple(x) for x in head.jobs[job].rec.ranges] == ranges


def test_an_idle_head_process_sleeps_in_redis_instead_of_polling(redis_url, tmp_path):
    """The head used to move up to 256 notices with as many LMOVEs at every turn, 20 turns a
    second, whether or not a worker had reported."""
    r = redis.Redis.from_url(redis_url)
    log = open(tmp_path / "head.log", "wb")
    head = subprocess.Popen(lampyr_cmd("head", "--state", tmp_path / "state", "--redis",
                                       redis_url, "--no-web"), stdout=log,
                            stderr=subprocess.STDOUT, start_new_session=True)
    try:
        give_up = time.monotonic() + 60
        while "Workers join with:" not in (tmp_path / "head.log").read_text(errors="replace"):
            assert head.poll() is None and time.monotonic() < give_up, \
                (tmp_path / "head.log").read_text()
            time.sleep(0.05)
        time.sleep(0.5)

        def lmoves() -> int:
            return r.info("commandstats").get("cmdstat_lmove", {}).get("calls", 0)

        before = lmoves()
        time.sleep(2.0)
        # one LMOVE per turn is left (the command list); the idle turns come every 0.2 s
        assert lmoves() - before < 100
        assert r.info("commandstats").get("cmdstat_blmove", {}).get("calls", 0) > 0
    finally:
        head.terminate()
        head.wait(20)
        log.close()
