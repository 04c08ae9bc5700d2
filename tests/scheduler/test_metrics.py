"""The head's Prometheus endpoint: counters, the text format, and a real head serving it.

The text is checked with prometheus_client's own parser (the reference implementation of the
exposition format, from PyPI), so a line it cannot read fails here.
"""

from __future__ import annotations

import os
import signal
import time
import urllib.request

import pytest
from prometheus_client.parser import text_string_to_metric_families

from lampyr.scheduler import protocol as P
from lampyr.scheduler.metrics import RATE_WINDOW, HeadCounters, exposition
from lampyr.scheduler.redis_server import free_port

from .farmtools import LAYOUT


def parse(text: str) -> dict:
    """{(sample name, frozenset(labels)): value} as the reference parser reads the text."""
    out = {}
    for fam in text_string_to_metric_families(text):
        for s in fam.samples:
            out[(s.name, frozenset(s.labels.items()))] = s.value
    return out


SNAP = {
    "batches_merged": 41, "pixel_samples_merged": 123456, "batch_errors": 3,
    "batches_failed": 1, "lease_expiries": 2, "batches_pending": 7, "batches_queued": 4,
    "batches_rendering": 2, "batches_per_second": 0.5, "pixel_samples_per_second": 2048.0,
    "jobs": {"running": 1, "done": 2}, "updated": 1000.0,
}
WORKERS = [
    {"name": "desk-07", "host": "desk-07", "cores": 4,
     "slots": [{"pixel_samples_per_second": 100.0}, {"pixel_samples_per_second": 50.5}]},
    {"name": "laptop \"A\"", "host": "laptop", "cores": 2, "slots": []},
]


@pytest.mark.parametrize("name, labels, value", [
    ("lampyr_head_up", {}, 1.0),
    ("lampyr_batches_merged_total", {}, 41.0),
    ("lampyr_pixel_samples_merged_total", {}, 123456.0),
    ("lampyr_batch_errors_total", {}, 3.0),
    ("lampyr_batches_failed_total", {}, 1.0),
    ("lampyr_lease_expiries_total", {}, 2.0),
    ("lampyr_batches_pending", {}, 7.0),
    ("lampyr_batches_queued", {}, 4.0),
    ("lampyr_batches_rendering", {}, 2.0),
    ("lampyr_batches_per_second", {}, 0.5),
    ("lampyr_pixel_samples_per_second", {}, 2048.0),
    ("lampyr_jobs", {"state": "running"}, 1.0),
    ("lampyr_jobs", {"state": "paused"}, 0.0),
    ("lampyr_workers_online", {}, 2.0),
    ("lampyr_worker_cores_online", {}, 6.0),
    ("lampyr_worker_pixel_samples_per_second", {"worker": "desk-07"}, 150.5),
    ("lampyr_worker_pixel_samples_per_second", {"worker": 'laptop "A"'}, 0.0),
])
def test_the_text_reads_back_through_the_reference_parser(name, labels, value):
    got = parse(exposition(SNAP, WORKERS, now=1001.0))
    assert got[(name, frozenset(labels.items()))] == value


def test_a_head_that_stopped_publishing_reads_as_down():
    got = parse(exposition(SNAP, [], now=1000.0 + 60))
    assert got[("lampyr_head_up", frozenset())] == 0.0


def test_before_any_head_published_only_the_head_and_worker_gauges_appear():
    got = parse(exposition(None, []))
    assert got[("lampyr_head_up", frozenset())] == 0.0
    assert ("lampyr_batches_merged_total", frozenset()) not in got


def test_rates_average_over_the_last_window_only():
    c = HeadCounters(born=0.0)
    for t in range(0, 120):  # one 10-pixel-sample batch a second for two minutes
        c.merged(10, now=float(t))
    # the gauges average over the last minute (as their HELP text says): the 60 batches
    # at t = 60 … 119 remain, one a second, 10 pixel-samples each
    assert RATE_WINDOW == 60.0
    batches, samples = c.rates(now=120.0)
    assert batches == pytest.approx(1.0)
    assert samples == pytest.approx(10.0)
    assert c.batches_merged == 120 and c.pixel_samples_merged == 1200


def test_rates_of_a_young_head_average_over_its_life():
    c = HeadCounters(born=100.0)
    for t in (101.0, 102.0, 103.0, 104.0):
        c.merged(5, now=t)
    assert c.rates(now=105.0) == (pytest.approx(4 / 5), pytest.approx(20 / 5))


def scrape(url: str) -> dict:
    with urllib.request.urlopen(url, timeout=10) as resp:
        assert resp.headers["Content-Type"].startswith("text/plain; version=0.0.4")
        return parse(resp.read().decode())


def wait_metric(url: str, name: str, test, timeout: float = 60) -> dict:
    give_up_at = time.monotonic() + timeout
    while True:
        got = scrape(url)
        if test(got.get((name, frozenset()), 0.0)):
            return got
        if time.monotonic() > give_up_at:
            raise AssertionError(f"{name} never satisfied the test: {got}")
        time.sleep(0.2)


def test_a_real_head_counts_every_batch_of_a_job(farm, tiny_shot):
    port = free_port()
    farm.start_head(extra=["--metrics-port", port])
    url = f"http://127.0.0.1:{port}/metrics"
    farm.start_worker("a")
    job = farm.submit(tiny_shot, *LAYOUT)
    farm.wait(job)
    # the plan written out from docs/farm.md ("What happens to a job", step 2): 16 × 12 px in
    # 8 px tiles is 2 × 2 = 4 tiles; 8 spp in batches of 3 after a first pass of 1/16 of the
    # samples (at least 1) is the ranges [0, 1), [1, 4), [4, 7), [7, 8): 4 batches a tile;
    # 2 frames → 2 × 4 × 4 = 32 batches and 2 × 16 × 12 × 8 = 3072 pixel-samples
    got = wait_metric(url, "lampyr_batches_merged_total", lambda v: v >= 32)
    assert got[("lampyr_batches_merged_total", frozenset())] == 32
    assert got[("lampyr_pixel_samples_merged_total", frozenset())] == 3072
    assert got[("lampyr_workers_online", frozenset())] == 1
    assert got[("lampyr_jobs", frozenset({("state", "done")}))] == 1
    assert got[("lampyr_lease_expiries_total", frozenset())] == 0


def test_a_worker_switched_off_mid_batch_shows_as_a_lease_expiry(farm, tiny_shot):
    import redis

    port = free_port()
    farm.start_head(lease=2.0, extra=["--metrics-port", port])
    url = f"http://127.0.0.1:{port}/metrics"
    slow = farm.start_worker("slow", fakes={"sample_delay": 0.5})
    farm.submit(tiny_shot)
    r = redis.Redis.from_url(farm.url)
    give_up_at = time.monotonic() + 60
    while not any(True for _ in r.scan_iter(match=P.key("lease", "*"))):
        assert time.monotonic() < give_up_at, farm.logs()
        time.sleep(0.05)
    os.killpg(slow.pid, signal.SIGKILL)
    wait_metric(url, "lampyr_lease_expiries_total", lambda v: v >= 1)


def test_the_endpoint_serves_nothing_but_metrics(farm):
    port = free_port()
    farm.start_head(extra=["--metrics-port", port])
    with pytest.raises(urllib.error.HTTPError) as err:
        urllib.request.urlopen(f"http://127.0.0.1:{port}/../head.json", timeout=10)
    assert err.value.code == 404
