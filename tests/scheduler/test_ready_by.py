"""Ready by a time: the spending policy, `--until`, the farm simulation of a night, and a real farm
that stops a job at its ready-by time."""

from __future__ import annotations

import functools
import json
import math
import os
import random
import statistics
import time
from datetime import datetime

import pytest

from lampyr.errors import UsageError
from lampyr.scheduler.ready_by import (TileState, ready_by_line, forecast_fields, parse_until,
                                       plan_night, predicted_noise, work_to)

from .farmsim import FarmSim, SimJob, make_workers

STEPS = (2, 4, 6, 8, 10, 12, 14, 16)  # a first pass of 2, then batches of 2, to 16 spp


def tiles(n=4, pixels=100, noise=0.2, held=0):
    return [TileState((1, i), pixels, held, STEPS, noise, 2 if noise else 0) for i in range(n)]


# -- the policy -------------------------------------------------------------------------------

def test_when_the_work_fits_every_tile_goes_to_its_full_target():
    plan = plan_night(tiles(), capacity=4 * 100 * 16)
    assert plan.feasible and set(plan.targets.values()) == {16}


def test_when_it_does_not_fit_every_tile_rises_to_the_highest_level_that_fits():
    plan = plan_night(tiles(), capacity=4 * 100 * 9)  # 9 spp of work: the ladder's 8 fits
    assert not plan.feasible and plan.level == 8
    assert set(plan.targets.values()) >= {8} and min(plan.targets.values()) == 8
    assert plan.work <= plan.capacity


def test_the_first_pass_is_kept_when_nothing_fits():
    plan = plan_night(tiles(), capacity=0.0)
    assert not plan.feasible and set(plan.targets.values()) == {2}


def test_samples_already_held_are_not_counted_again():
    held = tiles(held=10)
    assert plan_night(held, capacity=4 * 100 * 6).feasible  # 6 more spp to 16


def test_the_leftover_goes_to_the_noisiest_tile():
    ts = [TileState((1, 0), 100, 0, STEPS, 0.1, 2), TileState((1, 1), 100, 0, STEPS, 0.4, 2)]
    # the uniform level 8 costs 1600; 200 more pay for one more step of one tile
    plan = plan_night(ts, capacity=1800)
    assert plan.targets == {(1, 0): 8, (1, 1): 10}


def test_the_leftover_evens_out_the_noise():
    rng = random.Random(5)
    ts = [TileState((1, i), 100, 2, STEPS, rng.lognormvariate(math.log(0.2), 0.7), 2)
          for i in range(40)]
    uniform = plan_night(ts, capacity=work_to(ts, lambda t: 8))
    spent = plan_night(ts, capacity=work_to(ts, lambda t: 8) + 40 * 100 * 1.5)
    spread = [statistics.pstdev(predicted_noise(t, p.targets[t.key]) for t in ts)
              for p in (uniform, spent)]
    assert spent.level == uniform.level == 8
    assert spread[1] < spread[0]


@pytest.mark.parametrize("n", [4, 16, 100])
def test_noise_falls_as_one_over_the_root_of_the_samples(n):
    # the standard error of a mean of n independent samples is σ/√n (Monte Carlo error law)
    t = TileState((1, 0), 1, 1, (1,), noise=0.3, noise_at=1)
    assert predicted_noise(t, n) == pytest.approx(0.3 / math.sqrt(n))


# -- --until ----------------------------------------------------------------------------------

def at(text):
    return datetime.fromisoformat(text).timestamp()


@pytest.mark.parametrize("now, text, expected", [
    ("2026-12-02T22:30", "07:00", "2026-12-03T07:00"),  # after tonight's 07:00: tomorrow's
    ("2026-12-02T05:10", "07:00", "2026-12-02T07:00"),  # before it: today's
    ("2026-12-02T22:30", "2026-12-04T06:15", "2026-12-04T06:15"),
    ("2026-12-02T22:30", "23:00:30", "2026-12-02T23:00:30"),
])
def test_until_takes_the_next_local_time_or_a_date_time(now, text, expected):
    assert parse_until(text, at(now)) == at(expected)


@pytest.mark.parametrize("text, problem", [("25:00", "expected a time"),
                                           ("tomorrow", "expected a time"),
                                           ("2026-12-01T07:00", "in the past")])
def test_a_bad_or_past_until_is_a_usage_error_naming_it(text, problem):
    with pytest.raises(UsageError) as err:
        parse_until(text, at("2026-12-02T22:30"))
    assert str(err.value).startswith("--until:") and problem in str(err.value)
    assert "\n" not in str(err.value) and err.value.exit_code == 2


def test_submit_refuses_a_past_until_with_exit_status_2(tiny_shot):
    import subprocess

    from ..conftest import lampyr_cmd

    res = subprocess.run(lampyr_cmd("submit", tiny_shot, "--until", "2020-01-01T07:00",
                                    "--head", "redis://127.0.0.1:1/0"),
                         capture_output=True, text=True, timeout=60)
    assert res.returncode == 2
    assert res.stderr.strip().count("\n") == 0 and "--until" in res.stderr


def test_a_job_record_written_before_ready_by_times_still_loads():
    from lampyr.scheduler.jobs import JobRecord

    old = {"id": "j", "name": "n", "bundle": "b", "shot": "s.toml", "overrides": {}, "out": "o",
           "priority": 0, "submitted": 1.0, "tile_size": 8, "batch_samples": 3, "samples": 8,
           "ranges": [[0, 1], [1, 3]], "paused": False, "cancelled": False, "failed": {},
           "extra": {}}
    rec = JobRecord.from_json(json.dumps(old))
    assert rec.ready_by is None and rec.ready_by_reached is False


def test_a_job_record_with_the_earlier_key_names_keeps_its_ready_by_time():
    from lampyr.scheduler.jobs import JobRecord

    old = {"id": "j", "name": "n", "bundle": "b", "shot": "s.toml", "overrides": {}, "out": "o",
           "priority": 0, "submitted": 1.0, "tile_size": 8, "batch_samples": 3, "samples": 8,
           "ranges": [[0, 1]], "deadline": 1234.5, "deadline_reached": True}
    rec = JobRecord.from_json(json.dumps(old))
    assert (rec.ready_by, rec.ready_by_reached) == (1234.5, True)


@pytest.mark.parametrize("feasible, words", [(True, "will finish"),
                                             (False, "cannot finish: expect 96 of 256 spp")])
def test_status_line_says_whether_the_job_will_finish(feasible, words):
    plan = plan_night(tiles(), capacity=4 * 100 * 16)
    plan.feasible, plan.spp_expected = feasible, (256.0 if feasible else 96.0)
    st = {"ready_by": time.time() + 3600, "samples": 256, "ready_by_reached": False,
          "forecast": forecast_fields(plan, time.time(), time.time() + 1800)}
    line = ready_by_line(st)
    assert line.startswith("ready by ") and words in line and "noise" in line


# -- the simulated night ----------------------------------------------------------------------

NIGHT_SHORT = 1800.0  # the whole job needs about an hour of this farm: cannot finish
NIGHT_LONG = 3 * 3600.0  # about three times what it needs


@functools.lru_cache(maxsize=None)  # a night is deterministic for its seed: simulate it once
def night(seconds, seed):
    workers = make_workers(50, random.Random(seed), 0.0, seconds)
    sim = FarmSim(SimJob(), workers, 0.0, seconds, seed=seed)
    return sim, sim.run()


def frame_levels(res):
    out = {}
    for (f, _), n in res.held.items():
        out[f] = min(out.get(f, n), n)
    return out


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_a_feasible_ready_by_time_finishes_every_frame_before_it(seed):
    _, res = night(NIGHT_LONG, seed)
    assert res.finished_at is not None and res.finished_at <= res.ready_by
    assert set(res.held.values()) == {res.target}


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_a_feasible_ready_by_time_is_forecast_feasible_after_the_first_tenth(seed):
    _, res = night(NIGHT_LONG, seed)
    late = [f["feasible"] for t, f in res.forecasts if t >= 0.1 * NIGHT_LONG]
    assert late and all(late)


@pytest.mark.parametrize("seed", [1, 2, 3, 4])
def test_an_infeasible_ready_by_time_leaves_every_frame_at_the_same_best_level(seed):
    _, res = night(NIGHT_SHORT, seed)
    assert res.finished_at is None
    assert min(res.held.values()) >= res.first_pass  # every frame exists, whole
    levels = frame_levels(res).values()
    level = res.final_forecast()["level"]
    assert all(level - res.batch <= v <= level + res.batch for v in levels)
    # best: what the farm rendered would not have raised every tile two batches higher
    pixels = 64 * 64
    rendered = sum(res.held.values()) * pixels
    assert rendered < len(res.held) * pixels * (min(levels) + 2 * res.batch)


@pytest.mark.parametrize("seed", [1, 2, 3, 4])
def test_an_infeasible_ready_by_time_is_forecast_within_the_first_tenth(seed):
    _, res = night(NIGHT_SHORT, seed)
    first = res.first_infeasible()
    assert first is not None and first <= 0.1 * NIGHT_SHORT
    assert not any(f["feasible"] for t, f in res.forecasts if t >= first)


@pytest.mark.parametrize("seed", [1, 2])
def test_the_night_spends_its_leftover_on_the_noisiest_tiles(seed):
    sim, res = night(NIGHT_SHORT, seed)
    level = min(res.held.values())
    at_level = [sim.sigma[k] / math.sqrt(level) for k in res.held]  # σ/√n, all at the level
    assert statistics.pstdev(res.noise.values()) < statistics.pstdev(at_level)
    assert max(res.noise.values()) < max(at_level)


# -- a real farm ------------------------------------------------------------------------------

def test_a_real_job_stops_at_its_ready_by_time_done_with_every_frame(farm, tiny_shot, tmp_path):
    farm.start_head()
    farm.start_worker("slow", fakes={"sample_delay": 0.3})
    until = datetime.fromtimestamp(time.time() + 8).isoformat(timespec="seconds")
    # 8 tiles × 8 samples at ≥ 0.3 s a sample need about 20 s: more than the night
    job = farm.submit(tiny_shot, "--out", tmp_path / "out", "--tile", 8, "--batch", 3,
                      "--until", until)
    running = ""
    while "cannot finish" not in running and farm.status(job)["state"] != "done":
        running = farm.cli("status", job, "--head", farm.url).stdout
    assert "cannot finish: expect" in running and "of 8 spp" in running  # said before the end
    st = farm.wait(job, timeout=90)
    assert st["state"] == "done" and st["ready_by_reached"] is True
    assert st["ready_by"] == pytest.approx(datetime.fromisoformat(until).timestamp())
    assert st["forecast"]["feasible"] is False and st["forecast"]["spp_expected"] < 8
    for f in (1, 2):
        assert (tmp_path / "out" / f"tiny.{f:04d}.exr").exists()
    text = farm.cli("status", job, "--head", farm.url).stdout
    assert "ready by" in text and "reached" in text


def held_matches_frames(state, job, out):
    """True when every frame file holds, tile by tile, the samples its accumulators hold."""
    from lampyr.engine.exr import read_frame
    from lampyr.engine.render import tiles_for
    from lampyr.scheduler.accumulator import TileAccumulator
    from lampyr.scheduler.jobs import JobFolder

    folder = JobFolder(state, job)
    for f in (1, 2):
        film, _ = read_frame(out / f"tiny.{f:04d}.exr")
        spp = film.n + film.dropped
        for i, t in enumerate(tiles_for(16, 12, 8)):
            held = TileAccumulator.load(folder.tile(f, i), t.w, t.h).samples
            if not (spp[t.y0:t.y0 + t.h, t.x0:t.x0 + t.w] == held).all():
                return False
    return True


def test_a_real_job_with_time_to_spare_finishes_before_its_ready_by_time(farm, tiny_shot, tmp_path):
    farm.start_head()
    farm.start_worker("a")
    until = datetime.fromtimestamp(time.time() + 600).isoformat(timespec="seconds")
    job = farm.submit(tiny_shot, "--out", tmp_path / "out", "--tile", 8, "--batch", 3,
                      "--until", until)
    st = farm.wait(job, timeout=90)
    assert (st["state"], st["frames_done"], st["ready_by_reached"]) == ("done", 2, False)
    assert st["forecast"]["feasible"] is True
    assert "finished before it" in farm.cli("status", job, "--head", farm.url).stdout


# -- the head's own decisions, in this process against a real Redis (no workers) --------------

@pytest.fixture
def head(redis_url, tmp_path):
    from lampyr.scheduler import protocol as P
    from lampyr.scheduler.head import Head

    h = Head(tmp_path / "state", redis_url, lease_seconds=5)
    h.start()
    # a big idle host: the head would queue far ahead if the plan let it
    h.r.set(P.k_host("big"), json.dumps({"name": "big", "cores": 64}))
    return h


def submit_ready_by(head, shot, seconds):
    from lampyr.scheduler.submit import submit_request

    job = submit_request(head.r, shot, {}, None, 0, tile_size=8, batch_samples=3,
                         ready_by=time.time() + seconds)
    head.take_commands()
    return job


def queued(head):
    from .test_head import queued_batches

    return queued_batches(head.r)


def test_what_the_night_cannot_afford_is_not_queued(head, tiny_shot):
    job = submit_ready_by(head, tiny_shot, 3.0)  # far less than one batch of any host
    head.ready_by.tick()
    head.dispatch()
    assert {(b.first, b.count) for b in queued(head)} == {(0, 1)}  # the first pass only
    assert len(queued(head)) == 2 * 4
    assert head.job_state(head.jobs[job]) != "done"  # the rest waits for a better forecast


def test_at_the_ready_by_time_every_frame_is_written_and_the_job_is_done(head, tiny_shot, tmp_path):
    from lampyr.scheduler.store import job_status

    job = submit_ready_by(head, tiny_shot, 0.5)
    head.ready_by.tick()
    head.dispatch()
    time.sleep(0.6)
    head.step()
    st = job_status(head.r, job)
    assert (st["state"], st["ready_by_reached"]) == ("done", True)
    out = head.state / "jobs" / job / "frames"
    assert sorted(p.name for p in out.glob("*.exr")) == ["tiny.0001.exr", "tiny.0002.exr"]
    assert not head.r.hlen("lampyr:inflight")  # its queued batches were dropped


def test_a_restarted_head_keeps_a_job_stopped_at_its_ready_by_time(head, tiny_shot, redis_url, tmp_path):
    from lampyr.scheduler.head import Head

    job = submit_ready_by(head, tiny_shot, 0.2)
    time.sleep(0.3)
    head.step()
    again = Head(tmp_path / "state", redis_url, lease_seconds=5)
    again.start()
    again.step()
    assert again.job_state(again.jobs[job]) == "done" and not again.jobs[job].pending
    assert again.jobs[job].rec.ready_by_reached


def test_a_head_killed_while_writing_the_ready_by_frames_writes_them_after_restart(
        farm, tiny_shot, tmp_path):
    import signal

    from .farmtools import wait_for

    marker = tmp_path / "holding"
    out = tmp_path / "out"
    # a real head that, at the ready-by stop, writes frame 1 and then waits before frame 2
    # (tests/harness.py) — where the test kills it with a real SIGKILL
    # (no worker: no frame file is written before the stop)
    farm.start_head(fakes={"hold_frame_write": {"after": 1, "marker": str(marker)}})
    until = datetime.fromtimestamp(time.time() + 3).isoformat(timespec="seconds")
    job = farm.submit(tiny_shot, "--out", out, "--tile", 8, "--batch", 3, "--until", until)
    wait_for(marker.exists, timeout=60, what="the head to stop the job and write frame 1")
    assert (out / "tiny.0001.exr").exists() and not (out / "tiny.0002.exr").exists()
    assert farm.status(job)["ready_by_reached"] is False  # the stop is not saved yet
    os.kill(farm.head_proc.pid, signal.SIGKILL)
    farm.head_proc.wait()
    farm.start_head()  # the plain head, on the same state folder and Redis
    st = wait_for(lambda: (s := farm.status(job))["state"] == "done" and s, timeout=60,
                  what="the restarted head to stop the job again")
    assert st["ready_by_reached"] is True
    assert (out / "tiny.0002.exr").exists()
    assert held_matches_frames(farm.state, job, out)  # both frames, tile by tile as held


def test_refine_after_the_ready_by_time_lifts_it(head, tiny_shot):
    job = submit_ready_by(head, tiny_shot, 0.2)
    time.sleep(0.3)
    head.step()
    head.command("refine", job=job, samples=12)
    head.step()
    run = head.jobs[job]
    assert run.rec.ready_by is None and not run.rec.ready_by_reached
    assert run.pending or head.leases.table  # the refine's batches go out


def capacity_now(head, job, now=None):
    head.ready_by.recompute(now)
    fc = head.ready_by.fields[job]
    return fc["capacity_pixel_samples"], fc["hosts"]


def test_the_forecast_counts_a_joining_worker_only_inside_its_windows(head, tiny_shot):
    from lampyr.scheduler import protocol as P

    job = submit_ready_by(head, tiny_shot, 600.0)
    alone, n = capacity_now(head, job)
    assert n == 1 and alone > 0
    now = time.time()
    late = {"name": "late", "cores": 64, "windows": [[now + 900, now + 4000]]}  # after it
    head.r.set(P.k_host("late"), json.dumps(late))
    assert capacity_now(head, job) == (pytest.approx(alone, rel=0.01), 2)
    head.r.set(P.k_host("pc"), json.dumps({"name": "pc", "cores": 64}))  # always available
    assert capacity_now(head, job) == (pytest.approx(2 * alone, rel=0.01), 3)


def test_a_job_queued_before_takes_its_work_out_of_the_capacity(head, tiny_shot):
    from lampyr.scheduler.submit import submit_request

    job = submit_ready_by(head, tiny_shot, 600.0)
    now = time.time()
    alone, _ = capacity_now(head, job, now)
    first = submit_request(head.r, tiny_shot, {}, None, 5, tile_size=8, batch_samples=3)
    head.take_commands()
    ahead = 2 * 16 * 12 * 8  # its every pixel-sample: 2 frames of 16 × 12 at 8 spp
    assert capacity_now(head, job, now)[0] == pytest.approx(alone - ahead, abs=2)
    assert first != job


def test_a_job_ahead_with_all_its_work_in_flight_still_takes_it_out_of_the_capacity(
        head, tiny_shot):
    from lampyr.scheduler.submit import submit_request

    job = submit_ready_by(head, tiny_shot, 600.0)
    now = time.time()
    alone, _ = capacity_now(head, job, now)
    first = submit_request(head.r, tiny_shot, {}, None, 5, tile_size=8, batch_samples=3)
    head.take_commands()
    head.dispatch()  # the big host's room takes every batch of the job ahead
    assert not head.jobs[first].pending
    own = sum(e.batch.w * e.batch.h * e.batch.count for e in head.leases.table.values()
              if e.batch.job == job)
    ahead = 2 * 16 * 12 * 8  # its every pixel-sample, all queued now
    assert capacity_now(head, job, now)[0] == pytest.approx(alone - ahead - own, abs=2)


def test_the_simulated_forecast_follows_workers_coming_and_going():
    sim, res = night(NIGHT_SHORT, 1)
    present = [sum(1 for w in sim.workers if w.online[0] <= t < w.online[1])
               for t, _ in res.forecasts]
    assert [f["hosts"] for _, f in res.forecasts] == present
    assert len(set(present)) > 1  # some joined or left during the night


def test_a_batch_delivered_after_the_ready_by_time_is_kept_in_the_frame(head, tiny_shot,
                                                                    compiled_kernels):
    from lampyr.engine.film import to_bytes
    from lampyr.engine.render import FrameRenderer, Tile
    from lampyr.engine.shot import load_shot

    job = submit_ready_by(head, tiny_shot, 0.3)
    head.dispatch()
    late = queued(head)[0]  # a worker had taken it and renders on past the ready-by time
    time.sleep(0.4)
    head.step()
    assert head.jobs[job].rec.ready_by_reached
    film = FrameRenderer(load_shot(tiny_shot), late.frame).render(
        Tile(late.x0, late.y0, late.w, late.h), late.first, late.count)
    head.r.set(f"lampyr:result:{late.id}:1", to_bytes(film))
    head.r.rpush("lampyr:results", json.dumps({"kind": "result", "batch": late.id, "ticket": 1,
                                               "worker": "w", "seconds": 0.1}))
    head.step()
    time.sleep(0.6)  # the head looks for late merges every half second
    head.step()
    out = head.state / "jobs" / job / "frames"
    assert held_matches_frames(head.state, job, out)
