"""Throughput per minute and workers last seen, as the head records them (real Redis)."""

from __future__ import annotations

import json

import pytest

from lampyr.scheduler import history
from lampyr.scheduler import protocol as P

T0 = 1_800_000_000.0  # a minute boundary (divisible by 60)


class FakeRun:
    """Only the counter a HistoryRecorder reads from a JobRun."""

    def __init__(self, merged=0):
        self.samples_merged = merged


class HeadView:
    def __init__(self, r, runs):
        self.r = r
        self.jobs = runs


@pytest.fixture
def r(redis_url):
    from lampyr.scheduler.store import connect

    return connect(redis_url)


def record(rec, head, now):
    pipe = head.r.pipeline()
    rec.record(head, pipe, now=now)
    pipe.execute()


def test_merged_samples_land_in_the_minute_they_were_merged(r):
    run = FakeRun()
    head, rec = HeadView(r, {"a": run}), history.HistoryRecorder()
    run.samples_merged = 500
    record(rec, head, T0 + 5)
    run.samples_merged = 800
    record(rec, head, T0 + 65)
    th = history.throughput(r, hours=1, now=T0 + 70)
    assert th["values"][-2:] == [500, 300] and th["start"] == T0 + 60 - 59 * 60


def test_a_run_replaced_by_a_new_one_counts_from_zero(r):
    head, rec = HeadView(r, {"a": FakeRun(1000)}), history.HistoryRecorder()
    record(rec, head, T0)
    head.jobs["a"] = FakeRun(40)  # refine makes a new JobRun
    record(rec, head, T0 + 1)
    assert history.throughput(r, hours=1, now=T0 + 1)["values"][-1] == 1040


def test_minutes_older_than_a_day_are_dropped(r):
    r.hset(P.K_THROUGHPUT, mapping={int(T0 - history.KEEP_SECONDS - 60): 7, int(T0 - 60): 9})
    record(history.HistoryRecorder(), HeadView(r, {}), T0)
    assert r.hkeys(P.K_THROUGHPUT) == [str(int(T0 - 60)).encode()]


def test_a_worker_not_heard_from_for_a_week_is_forgotten(r):
    old = {"name": "old-pc", "last_seen": T0 - history.FORGET_SECONDS - 1}
    recent = {"name": "desk-2", "last_seen": T0 - 3600}
    r.hset(P.K_SEEN, mapping={"old-pc": json.dumps(old), "desk-2": json.dumps(recent)})
    record(history.HistoryRecorder(), HeadView(r, {}), T0)
    assert [w["name"] for w in history.roster(r, now=T0)["offline"]] == ["desk-2"]


def test_offline_workers_are_listed_newest_first(r):
    r.hset(P.K_SEEN, mapping={n: json.dumps({"name": n, "last_seen": t})
                              for n, t in (("a", T0 - 50), ("b", T0 - 10), ("c", T0 - 30))})
    assert [w["name"] for w in history.roster(r, now=T0)["offline"]] == ["b", "c", "a"]


def test_a_heartbeat_without_its_name_is_seen_by_its_key_s_name(r):
    r.set(P.k_host("desk-9"), json.dumps({"cores": 4}), ex=60)
    record(history.HistoryRecorder(), HeadView(r, {}), T0)
    assert json.loads(r.hget(P.K_SEEN, "desk-9"))["cores"] == 4
