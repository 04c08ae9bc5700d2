"""The scheduler's public state readers, against a real Redis."""

from __future__ import annotations

import json

import redis

from lampyr.scheduler import protocol as P
from lampyr.scheduler.store import list_jobs, workers


def test_list_jobs_gives_every_status_oldest_first_and_skips_a_job_without_one(redis_url):
    r = redis.Redis.from_url(redis_url)
    for job, at in (("b", 2.0), ("a", 1.0), ("gone", 3.0)):
        r.zadd(P.K_JOBS, {job: at})
    for job in ("a", "b"):
        r.hset(P.k_job(job), mapping={"job": json.dumps(job), "state": json.dumps("running")})
    assert [s["job"] for s in list_jobs(r)] == ["a", "b"]


def test_workers_attach_each_slot_to_its_host(redis_url):
    r = redis.Redis.from_url(redis_url)
    r.set(P.k_host("desk-3"), json.dumps({"name": "desk-3", "cores": 4}))
    r.set(P.k_slot("desk-3", 11), json.dumps({"worker": "desk-3", "pid": 11, "batch": "j/1/0/0/4"}))
    r.set(P.k_slot("desk-3", 12), json.dumps({"worker": "desk-3", "pid": 12, "batch": "j/1/1/0/4"}))
    (host,) = workers(r)
    assert host["cores"] == 4 and sorted(s["pid"] for s in host["slots"]) == [11, 12]


def test_a_heartbeat_without_its_name_is_listed_under_its_key_s_name(redis_url):
    r = redis.Redis.from_url(redis_url)
    r.set(P.k_host("laptop"), json.dumps({"cores": 2}))
    assert [h["name"] for h in workers(r)] == ["laptop"]
