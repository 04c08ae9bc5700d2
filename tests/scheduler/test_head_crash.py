"""A real `lampyr head` process against what used to stop it for good: a corrupt result (then a
restart over it), a SIGKILL in the middle of a submit, an `--out` under a regular file, a
command that fails. Real Redis, real head and worker processes, real signals."""

from __future__ import annotations

import json
import os
import signal
import time

import redis

from lampyr.scheduler import protocol as P
from lampyr.scheduler.store import send_command

from .farmtools import LAYOUT, wait_for


def taken(farm, job) -> dict | None:
    """The job's status once the head has taken it (the head's status names its tile size)."""
    st = farm.status(job)
    return st if "tile_size" in st else None


def restart_head(farm, **kw) -> None:
    farm.head_proc.wait(10)
    (farm.tmp / "head.log").rename(farm.tmp / f"head-{time.monotonic_ns()}.log")
    farm.start_head(**kw)


def test_a_corrupt_result_then_a_head_restart_the_head_comes_up_and_goes_on(farm, tiny_shot,
                                                                            tmp_path):
    farm.start_head()
    job = farm.submit(tiny_shot, "--out", tmp_path / "out", *LAYOUT)
    wait_for(lambda: taken(farm, job), what="the head to take the job")
    r = redis.Redis.from_url(farm.url)
    bid, ticket = wait_for(lambda: next(iter(r.hgetall(P.K_INFLIGHT).items()), None),
                           what="a queued batch")
    bid = bid.decode()
    r.set(P.k_result(bid, int(ticket)), b"not a film at all")
    r.rpush(P.K_RESULTS, P.result_notice(bid, int(ticket), "w", 0.1))
    r.rpush(P.K_RESULTS, b"{torn")
    st = wait_for(lambda: (s := farm.status(job))["failed"] and s, timeout=30,
                  what="the corrupt result's batch to fail")
    assert [f["batch"] for f in st["failed"]] == [bid]
    assert "could not be merged" in st["failed"][0]["error"]
    assert farm.head_proc.poll() is None  # the head went on

    # killed while merging notices it cannot read: at its restart they wait in processing
    os.killpg(farm.head_proc.pid, signal.SIGKILL)
    r.rpush(P.K_PROCESSING, b"\x00\x01 not a notice")
    restart_head(farm)
    time.sleep(2)  # several turns of the loop
    assert farm.head_proc.poll() is None, farm.logs()
    reasons = [json.loads(x)["reason"] for x in r.lrange(P.K_ASIDE, 0, -1)]
    assert len(reasons) == 2 and all("not JSON" in x for x in reasons)

    farm.start_worker("a")
    farm.cli("retry", job, "--head", farm.url)
    st = farm.wait(job, timeout=120)
    assert st["state"] == "done" and not st["failed"] and st["frames_done"] == 2


def test_a_head_killed_in_the_middle_of_a_submit_loses_no_job(farm, tiny_shot):
    farm.start_head()
    r = redis.Redis.from_url(farm.url)
    pid = farm.head_proc.pid
    caught = None
    for _ in range(5):  # a try may miss the moment; each is a new submit
        os.kill(pid, signal.SIGSTOP)
        job = farm.submit(tiny_shot, *LAYOUT)  # queued while the head cannot take it
        record = farm.state / "jobs" / job / "job.json"
        give_up_at = time.monotonic() + 30
        while time.monotonic() < give_up_at:
            os.kill(pid, signal.SIGCONT)
            time.sleep(0.001)
            os.kill(pid, signal.SIGSTOP)
            if record.exists():
                break  # the head finished this submit before it was caught inside it
            if r.llen(P.K_CONTROL) == 0:  # taken, not yet recorded: inside the submit
                caught = job
                break
        if caught:
            break
        os.kill(pid, signal.SIGCONT)
    assert caught, "never caught the head inside a submit"
    os.killpg(pid, signal.SIGKILL)
    restart_head(farm)
    st = wait_for(lambda: taken(farm, caught), timeout=60, what="the restarted head to take it")
    assert st["state"] == "queued" and (farm.state / "jobs" / caught / "job.json").exists()
    assert r.llen(P.K_CONTROL_PROCESSING) == 0


def test_an_out_under_a_regular_file_is_refused_at_submit(farm, tiny_shot, tmp_path):
    farm.start_head()
    (tmp_path / "plain").write_text("a file, not a folder")
    res = farm.cli("submit", tiny_shot, "--out", tmp_path / "plain" / "frames", "--head",
                   farm.url, check=False)
    assert res.returncode == 2, res.stderr
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and "--out" in lines[0] and "plain" in lines[0], res.stderr
    assert redis.Redis.from_url(farm.url).llen(P.K_CONTROL) == 0  # nothing queued


def test_a_command_error_stays_in_status_after_later_publishes(farm, tiny_shot):
    farm.start_head()
    job = farm.submit(tiny_shot, *LAYOUT)
    wait_for(lambda: taken(farm, job), what="the head to take the job")
    send_command(redis.Redis.from_url(farm.url), "priority", job=job, priority="high")
    wait_for(lambda: farm.status(job).get("command_error"), what="the command's error")
    time.sleep(1.5)  # the head publishes every 0.25 s: several times since
    err = farm.status(job)["command_error"]
    assert err["op"] == "priority" and "high" in err["error"]
    text = farm.cli("status", job, "--head", farm.url).stdout
    assert "priority" in text and "high" in text
    assert farm.head_proc.poll() is None


def test_a_head_killed_in_the_middle_of_a_group_commit_merges_every_batch_once(farm, tiny_shot,
                                                                               tmp_path):
    """docs/design.md, invariants 3 and 4: the head writes the tiles of a group of results
    together and removes their notices only after; killed (SIGKILL) with half the group's tiles
    replaced on disk, the restarted head merges the others and drops the replays of those on
    disk, so every sample range counts once."""
    from lampyr.engine.exr import read_frame
    from lampyr.engine.render import tiles_for
    from lampyr.engine.shot import load_shot
    from lampyr.scheduler.accumulator import read_header

    from .farmtools import assert_same_image, frame_mean, reference_mean
    from .test_head_faults import render

    marker = tmp_path / "holding"
    farm.start_head(fakes={"hold_commit": {"after": 2, "marker": str(marker)}})
    out = tmp_path / "out"
    job = farm.submit(tiny_shot, "--out", out, *LAYOUT)
    wait_for(lambda: taken(farm, job), what="the head to take the job")
    r = redis.Redis.from_url(farm.url)
    shot = load_shot(tiny_shot)
    tiles = tiles_for(shot.width, shot.height, 8)
    assert len(tiles) == 4
    # frame 1's first pass, the four tiles' results arriving together: one group of four
    batches = [P.Batch(job, 1, i, 0, 1, t.x0, t.y0, t.w, t.h) for i, t in enumerate(tiles)]
    for b in batches:
        r.set(P.k_result(b.id, 1), render(tiny_shot, b))
    r.rpush(P.K_RESULTS, *[P.result_notice(b.id, 1, "w", 0.1) for b in batches])
    wait_for(marker.exists, timeout=60, what="the head to stop inside its group commit")
    folder = farm.state / "jobs" / job / "tiles" / "0001"
    held = [read_header(folder / f"{i:05d}.acc")[0] for i in range(4)]
    assert sorted(map(len, held)) == [0, 0, 1, 1]  # two tiles on disk, two not yet
    assert r.llen(P.K_PROCESSING) == 4 and r.llen(P.K_RESULTS) == 0  # no notice removed yet
    os.killpg(farm.head_proc.pid, signal.SIGKILL)
    restart_head(farm)
    farm.start_worker("a")
    st = farm.wait(job, timeout=180)
    assert st["state"] == "done" and not st["failed"] and st["frames_done"] == 2
    assert r.llen(P.K_PROCESSING) == 0 and r.llen(P.K_RESULTS) == 0
    plan = [(0, 1), (1, 3), (4, 3), (7, 1)]  # LAYOUT: 8 spp as a first pass of 1, then 3s
    for f in (1, 2):
        for i in range(4):
            path = farm.state / "jobs" / job / "tiles" / f"{f:04d}" / f"{i:05d}.acc"
            assert read_header(path)[0] == plan, (f, i)
        film, _ = read_frame(out / f"tiny.{f:04d}.exr")
        assert (film.n == 8).all()  # 8 samples a pixel: none lost, none counted twice
        # the same samples as the engine alone renders (docs/design.md, invariant 1), to float32
        # rounding
        assert_same_image(frame_mean(out, "tiny", f), reference_mean(tiny_shot, f))
