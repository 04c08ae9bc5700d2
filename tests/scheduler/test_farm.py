"""The farm end to end: a real redis-server, a real `lampyr head`, real Celery worker processes.

Batches are kept tiny (16 × 12 px shots, a few samples) and leases short (3 s) so that faults
resolve in seconds; every wait is bounded.
"""

from __future__ import annotations

import json
import os
import signal
import time

import pytest
import redis

from .farmtools import (BIG_COUNT, HEAVY_LAYOUT, HEAVY_LEASE, LAYOUT, assert_same_image,
                        big_batch_under_way, big_chunks, frame_mean, reference_mean, wait_for)

def busy_slot(url, worker):
    """The first batch `worker` renders now, as its slot record (batch, pid)."""
    r = redis.Redis.from_url(url)
    for k in r.scan_iter(match=f"lampyr:slot:{worker}:*"):
        raw = r.get(k)
        if raw:
            return json.loads(raw)
    return None


def assert_frames_match_engine(out, shot, frames=(1, 2)):
    for f in frames:
        assert_same_image(frame_mean(out, "tiny", f), reference_mean(shot, f))


def test_farm_render_equals_engine_render(farm, tiny_shot, tmp_path):
    farm.start_head()
    farm.start_worker("a")
    farm.start_worker("b")
    job = farm.submit(tiny_shot, "--out", tmp_path / "out", *LAYOUT)
    st = farm.wait(job)
    assert (st["state"], st["frames"], st["frames_done"]) == ("done", 2, 2)
    assert_frames_match_engine(tmp_path / "out", tiny_shot)


def test_status_json_has_the_core_fields(farm, tiny_shot):
    farm.start_head()
    job = farm.submit(tiny_shot, *LAYOUT)
    st = wait_for(lambda: farm.status(job), what="status")
    assert st["state"] == "queued"  # no worker yet
    assert (st["frames"], st["frames_done"], st["job"]) == (2, 0, job)


def test_frames_default_to_a_folder_per_job_under_the_state(farm, tiny_shot):
    farm.start_head()
    farm.start_worker("a")
    job = farm.submit(tiny_shot, *LAYOUT)
    farm.wait(job)
    assert (farm.state / "jobs" / job / "frames" / "tiny.0001.exr").exists()


def test_a_head_stopped_cleanly_leaves_no_spare_file_beside_its_tiles(farm, tiny_shot):
    """The group commit writes each tile over a spare kept beside it (scheduler/file_swap.py);
    the spares are scratch, and a head stopped with SIGTERM removes them."""
    from lampyr.scheduler import file_swap
    from lampyr.scheduler.accumulator import read_header

    farm.start_head()
    farm.start_worker("a")
    job = farm.submit(tiny_shot, *LAYOUT)
    farm.wait(job)
    tiles = farm.state / "jobs" / job / "tiles"
    if file_swap.exchange_available():  # tiles written more than once kept a spare
        assert list(tiles.rglob("*.acc.spare"))
    farm.head_proc.send_signal(signal.SIGTERM)
    assert farm.head_proc.wait(60) == 0
    assert not list(tiles.rglob("*.spare"))
    files = sorted(tiles.rglob("*.acc"))
    assert len(files) == 8 and all(sum(c for _, c in read_header(f)[0]) == 8 for f in files)


def assert_heavy_frame_matches_engine(out, shot):
    assert_same_image(frame_mean(out, "heavy", 1), reference_mean(shot, 1))


@pytest.mark.parametrize("victim", ["process", "whole worker"])
def test_sigkill_mid_batch_job_completes_with_equal_frames(farm, heavy_shot, tmp_path, victim):
    # production chunking (no delay) on the heavy shot: killed in the middle of a chunk of
    # about 2 s, after at least one lease renewal
    log = tmp_path / "chunks.jsonl"
    farm.start_head(lease=HEAVY_LEASE)
    slow = farm.start_worker("slow", fakes={"chunk_log": str(log)})
    job = farm.submit(heavy_shot, "--out", tmp_path / "out", *HEAVY_LAYOUT)
    pid = wait_for(lambda: big_batch_under_way(log), timeout=120, what="the big batch under way")
    if victim == "process":
        os.kill(pid, signal.SIGKILL)  # the Celery pool process rendering the batch
    else:
        os.killpg(slow.pid, signal.SIGKILL)  # the machine is switched off
    done_before = sum(c["count"] for c in big_chunks(log, pid))
    assert 0 < done_before < BIG_COUNT
    farm.start_worker("b")
    st = farm.wait(job, timeout=240)
    assert st["state"] == "done" and not st["failed"]
    assert big_chunks(log, pid)[-1]["count"] > 1  # it did render multi-sample chunks
    assert_heavy_frame_matches_engine(tmp_path / "out", heavy_shot)


def test_sigstop_lease_expires_and_late_result_changes_nothing(farm, heavy_shot, tmp_path):
    log = tmp_path / "chunks.jsonl"
    farm.start_head(lease=HEAVY_LEASE)
    frozen = farm.start_worker("frozen", fakes={"chunk_log": str(log)})
    job = farm.submit(heavy_shot, "--out", tmp_path / "out", *HEAVY_LAYOUT)
    pid = wait_for(lambda: big_batch_under_way(log), timeout=120, what="the big batch under way")
    os.killpg(frozen.pid, signal.SIGSTOP)  # frozen in the middle of a chunk
    slot = busy_slot(farm.url, "frozen")
    farm.start_worker("b")
    st = farm.wait(job, timeout=240)
    assert st["state"] == "done"
    before = frame_mean(tmp_path / "out", "heavy", 1)
    from ..harness import read_log

    mine = lambda: [o for o in read_log(log, "outcome")  # noqa: E731
                    if o["pid"] == pid and o["batch"] == slot["batch"]]
    assert not mine()  # the frozen process has not finished that batch
    thawed = time.time()
    os.killpg(frozen.pid, signal.SIGCONT)
    # it finishes the chunk it was in, then finds its lease gone (or, if that was its last
    # chunk, delivers a result under a ticket the head has replaced)
    (late,) = wait_for(mine, what="the thawed process to end its batch")
    assert late["end"] > thawed and late["outcome"] in ("lease lost", "done")
    r = redis.Redis.from_url(farm.url)
    wait_for(lambda: r.llen("lampyr:results") == 0 and r.llen("lampyr:results:processing") == 0,
             what="the head to take any late notice")
    assert not r.keys(f"lampyr:result:{slot['batch']}:*")  # a late film is dropped, not kept
    time.sleep(1.0)
    assert (frame_mean(tmp_path / "out", "heavy", 1) == before).all()
    assert_heavy_frame_matches_engine(tmp_path / "out", heavy_shot)


def test_a_result_delivered_twice_counts_once(farm, tiny_shot, tmp_path):
    farm.start_head()
    farm.start_worker("a")
    job = farm.submit(tiny_shot, "--out", tmp_path / "out", *LAYOUT)
    farm.wait(job)
    r = redis.Redis.from_url(farm.url)
    # deliver a finished batch's notice again, with a film of other samples under its name:
    # merged, it would change the frame
    from lampyr.engine.film import to_bytes
    from lampyr.engine.render import FrameRenderer, Tile
    from lampyr.engine.shot import load_shot

    other = FrameRenderer(load_shot(tiny_shot), 1).render(Tile(0, 0, 8, 8), 100, 3)
    bid = f"{job}/1/0/1/3"
    r.set(f"lampyr:result:{bid}:1", to_bytes(other))
    r.rpush("lampyr:results", json.dumps({"kind": "result", "batch": bid, "ticket": 1,
                                          "worker": "test", "seconds": 0.0}))
    wait_for(lambda: r.llen("lampyr:results") == 0 and r.llen("lampyr:results:processing") == 0,
             what="the head to take the notice")
    assert not r.exists(f"lampyr:result:{bid}:1")
    assert_frames_match_engine(tmp_path / "out", tiny_shot)


def test_a_message_delivered_twice_counts_once(farm, tiny_shot, tmp_path):
    farm.start_head()
    job = farm.submit(tiny_shot, "--out", tmp_path / "out", *LAYOUT)
    r = redis.Redis.from_url(farm.url)
    wait_for(lambda: r.llen("lampyr") >= 2, what="queued messages")
    for raw in r.lrange("lampyr", 0, -1):  # every queued Celery message twice
        r.lpush("lampyr", raw)
    farm.start_worker("a")
    st = farm.wait(job)
    assert st["state"] == "done"
    assert_frames_match_engine(tmp_path / "out", tiny_shot)


def test_poison_batch_fails_after_the_limit_and_retry_requeues_it(farm, tiny_shot, tmp_path):
    farm.start_head(attempts=2)
    poisoned = farm.start_worker("p", fakes={"poison": "1/0"})
    job = farm.submit(tiny_shot, "--out", tmp_path / "out", *LAYOUT)
    st = farm.wait(job)
    assert st["state"] == "failed"
    assert st["frames_done"] == 1  # frame 2 is whole; frame 1 lacks its first tile
    assert {f["batch"].split("/", 1)[1].rsplit("/", 2)[0] for f in st["failed"]} == {"1/0"}
    assert all("poisoned batch" in f["error"] and "2 attempt" in f["error"] for f in st["failed"])
    text = farm.cli("status", job, "--head", farm.url).stdout
    assert "poisoned batch" in text
    os.killpg(poisoned.pid, signal.SIGKILL)
    farm.start_worker("healthy")
    farm.cli("retry", job, "--head", farm.url)
    st = farm.wait(job, states=("done",))
    assert st["frames_done"] == 2 and not st["failed"]
    assert_frames_match_engine(tmp_path / "out", tiny_shot)


def test_a_frame_whose_tile_failed_is_written_with_that_tile_empty(farm, tiny_shot, tmp_path):
    import numpy as np
    import OpenEXR

    farm.start_head(attempts=1)
    farm.start_worker("p", fakes={"poison": "1/0"})
    job = farm.submit(tiny_shot, "--out", tmp_path / "out", *LAYOUT)
    assert farm.wait(job)["state"] == "failed"
    with OpenEXR.File(str(tmp_path / "out" / "tiny.0001.exr"), separate_channels=True) as f:
        spp = np.array(f.channels()["spp"].pixels)
    empty = np.zeros_like(spp, dtype=bool)
    empty[0:8, 0:8] = True  # tile 0 with LAYOUT's 8 px tiles
    assert np.all(spp[empty] == 0)
    assert np.all(spp[~empty] == 8)


def test_head_killed_and_restarted_completes_with_equal_frames(farm, tiny_shot, tmp_path):
    farm.start_head()
    farm.start_worker("a", fakes={"sample_delay": 0.02})
    job = farm.submit(tiny_shot, "--out", tmp_path / "out", "--tile", 8, "--batch", 2)
    wait_for(lambda: farm.status(job)["pixel_samples_done"] > 0, what="merging to start")
    os.kill(farm.head_proc.pid, signal.SIGKILL)
    farm.head_proc.wait()
    farm.start_head()
    st = farm.wait(job, timeout=90)
    assert st["state"] == "done"
    assert_frames_match_engine(tmp_path / "out", tiny_shot)


def test_redis_restart_during_a_job_resumes(embedded_farm, tiny_shot, tmp_path):
    farm = embedded_farm
    farm.start_head(embedded=True)
    farm.start_worker("a", fakes={"sample_delay": 0.05})
    job = farm.submit(tiny_shot, "--out", tmp_path / "out", *LAYOUT)
    r = redis.Redis.from_url(farm.url)
    wait_for(lambda: farm.status(job)["pixel_samples_done"] > 0, what="progress")
    time.sleep(1.1)  # appendfsync everysec
    os.kill(r.info("server")["process_id"], signal.SIGKILL)
    # clients are refused until the head has started its Redis again (that is the behaviour)
    try:
        wait_for(lambda: _answers(r), timeout=60, what="the head to start Redis again")
    except AssertionError as err:
        raise AssertionError(f"{err}\n{farm.logs()}") from None
    st = farm.wait(job, timeout=120)
    assert st["state"] == "done"
    assert_frames_match_engine(tmp_path / "out", tiny_shot)


def _answers(r) -> bool:
    try:
        return bool(r.ping())
    except redis.exceptions.ConnectionError:
        return False


def test_refine_adds_samples_equal_to_rendering_them_directly(farm, tiny_shot, tmp_path):
    farm.start_head()
    farm.start_worker("a")
    job = farm.submit(tiny_shot, "--out", tmp_path / "out", "--samples", 4, *LAYOUT)
    farm.wait(job)
    farm.cli("refine", job, "--samples", 8, "--head", farm.url)
    wait_for(lambda: farm.status(job)["samples"] == 8, what="the refine command")
    st = farm.wait(job)
    assert st["state"] == "done" and st["frames_done"] == 2
    assert_frames_match_engine(tmp_path / "out", tiny_shot)


def test_a_worker_of_another_protocol_version_is_refused(farm):
    farm.start_head()
    redis.Redis.from_url(farm.url).set("lampyr:protocol", 999)
    res = farm.cli("worker", farm.url, "--cores", 1, check=False)
    assert res.returncode != 0
    assert "protocol 999" in res.stderr and "same lampyr version" in res.stderr


def tile_noise(out, frame):
    """Mean relative standard error of each 8 × 8 tile of a frame file, as the head judges it."""
    from lampyr.engine.exr import read_frame

    film, _ = read_frame(out / f"tiny.{frame:04d}.exr")
    noise = film.rel_noise()
    return {(x0 // 8 + 2 * (y0 // 8)): float(noise[y0:y0 + 8, x0:x0 + 8].mean())
            for y0 in (0, 8) for x0 in (0, 8)}


def test_refine_with_a_noise_goal_adds_only_to_noisy_tiles(farm, tiny_shot, tmp_path):
    from lampyr.engine.exr import read_frame

    farm.start_head()
    farm.start_worker("a")
    job = farm.submit(tiny_shot, "--out", tmp_path / "out", "--frames", 1, *LAYOUT)
    farm.wait(job)
    noise = tile_noise(tmp_path / "out", 1)
    ordered = sorted(noise.values())
    assert ordered[0] < ordered[-1]
    goal = (ordered[0] + ordered[-1]) / 2
    farm.cli("refine", job, "--samples", 16, "--noise", goal, "--head", farm.url)
    wait_for(lambda: farm.status(job)["pixel_samples_total"] > 16 * 12 * 8, what="the refine")
    farm.wait(job)
    film, _ = read_frame(tmp_path / "out" / "tiny.0001.exr")
    spp = film.n + film.dropped
    for tile, value in noise.items():
        y0, x0 = 8 * (tile // 2), 8 * (tile % 2)
        expected = 16 if value > goal else 8
        assert (spp[y0:y0 + 8, x0:x0 + 8] == expected).all(), (tile, value, goal)


def test_pause_holds_a_job_and_resume_finishes_it(farm, tiny_shot):
    farm.start_head()
    job = farm.submit(tiny_shot, *LAYOUT)
    farm.cli("pause", job, "--head", farm.url)
    wait_for(lambda: farm.status(job)["state"] == "paused", what="paused")
    farm.start_worker("a")
    r = redis.Redis.from_url(farm.url)
    # the batches queued before the pause (the head queues cores + 2 ahead) still run, and are
    # merged; after that nothing is queued, so the samples stay where they are
    wait_for(lambda: r.hlen("lampyr:inflight") == 0, what="the batches queued before the pause")
    time.sleep(0.5)  # the head publishes status every 0.25 s
    held = farm.status(job)["pixel_samples_done"]
    # 5 s: the worker renders a 3-sample batch of 8 × 8 px in well under a second
    time.sleep(5.0)
    st = farm.status(job)
    assert st["state"] == "paused" and st["pixel_samples_done"] == held
    assert held < 2 * 16 * 12 * 8  # 2 frames of 16 × 12 px at 8 spp: most of it still to come
    assert r.hlen("lampyr:inflight") == 0 and not busy_slot(farm.url, "a")
    farm.cli("resume", job, "--head", farm.url)
    st = farm.wait(job)
    assert st["state"] == "done" and st["pixel_samples_done"] == 2 * 16 * 12 * 8


def test_cancel_drops_the_remaining_work(farm, tiny_shot):
    farm.start_head()
    job = farm.submit(tiny_shot, *LAYOUT)
    farm.cli("cancel", job, "--head", farm.url)
    st = farm.wait(job)
    assert st["state"] == "cancelled" and st["frames_done"] == 0


def test_status_lists_workers_with_host_cores_and_version(farm):
    import lampyr

    farm.start_head()
    farm.start_worker("a")
    res = farm.cli("status", "--json", "--head", farm.url)
    (w,) = json.loads(res.stdout)["workers"]
    assert (w["name"], w["cores"], w["engine_version"]) == ("a", 1, lampyr.__version__)
    assert w["host"]


def test_a_client_without_the_password_is_refused(embedded_farm, tmp_path):
    farm = embedded_farm
    farm.state.mkdir(parents=True)
    farm.head_proc = farm._spawn(["head", "--state", farm.state, "--listen", "0.0.0.0"], "head.log")
    url = wait_for(lambda: "Workers join with:" in (tmp_path / "head.log").read_text()
                   and (tmp_path / "head.log").read_text().split("lampyr worker ", 1)[1].split()[0],
                   what="the head")
    assert "@" in url  # the printed address carries the password
    assert (farm.state / "head.json").stat().st_mode & 0o077 == 0  # and so does head.json
    # the commands' address, printed beside the workers' one
    commands = (tmp_path / "head.log").read_text().split("give it ", 1)[1].split()[0]
    bare = "redis://" + commands.split("@", 1)[1]
    res = farm.cli("status", "--head", bare, check=False)
    assert res.returncode != 0 and "requires a password" in res.stderr
    assert farm.cli("status", "--head", commands).returncode == 0
    res = farm.cli("status", "--head", url, check=False)  # the workers' address: not for commands
    assert res.returncode != 0 and "the workers' address" in res.stderr


def test_a_redis_that_lost_its_data_is_rebuilt_from_the_heads_disk(farm, tiny_shot, tmp_path):
    farm.start_head()
    farm.start_worker("a", fakes={"sample_delay": 0.05})
    job = farm.submit(tiny_shot, "--out", tmp_path / "out", *LAYOUT)
    wait_for(lambda: farm.status(job)["pixel_samples_done"] > 0, what="progress")
    redis.Redis.from_url(farm.url).flushdb()  # queue, scene files, leases, status: all gone
    time.sleep(1.5)  # the head notices within a second
    st = farm.wait(job, timeout=90)
    assert st["state"] == "done"
    assert_frames_match_engine(tmp_path / "out", tiny_shot)
