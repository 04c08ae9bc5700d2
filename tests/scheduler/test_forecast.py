"""The farm's throughput forecast: working windows, measured speeds, merged rate."""

from __future__ import annotations

import json

import numpy as np
import pytest
import redis

from lampyr.scheduler import protocol as P
from lampyr.scheduler.forecast import (Forecaster, HostView, RateMeter, SpeedBook,
                                       available_seconds, capacity, finish_time, read_hosts)


def grid_seconds(windows, start, end, step=0.01):
    """Seconds of [start, end) inside any window, by counting the points of a fine grid: an
    independent check of the interval arithmetic (a Riemann sum of the indicator function)."""
    t = np.arange(start, end, step) + step / 2
    inside = np.zeros(t.shape, bool)
    for a, b in windows:
        inside |= (t >= a) & (t < b)
    return inside.sum() * step


@pytest.mark.parametrize("windows", [
    [(10, 20)],
    [(10, 20), (15, 30)],  # overlapping
    [(40, 50), (0, 5), (22, 23)],  # unsorted, one before the start
    [(-10, 200)],  # covers everything
    [(60, 70)],  # entirely after the end
    [(10, 20), (10, 20), (12, 18)],  # duplicates and one inside another
])
def test_available_seconds_is_the_union_of_windows_inside_the_span(windows):
    assert available_seconds(windows, 3.0, 55.0) == pytest.approx(grid_seconds(windows, 3, 55),
                                                                  abs=0.02)


def test_a_host_without_windows_is_always_available():
    assert available_seconds((), 100.0, 160.0) == 60.0


def test_a_host_counts_only_inside_its_windows_before_the_ready_by_time():
    always = HostView("server", slots=2, speed=100.0)
    evening = HostView("pc", slots=4, speed=50.0, windows=((500.0, 900.0),))
    morning = HostView("late", slots=8, speed=50.0, windows=((1200.0, 2000.0),))
    got = capacity([always, evening, morning], now=0.0, until=1000.0)
    # 2 × 100 × 1000 + 4 × 50 × 400; the morning host works only after the ready-by time
    assert got == pytest.approx(200_000 + 80_000)


def test_an_unmeasured_host_counts_at_the_default_speed():
    hosts = [HostView("a", 1, 10.0), HostView("new", 3, None)]
    assert capacity(hosts, 0.0, 100.0, default_speed=20.0) == pytest.approx(1_000 + 6_000)


def test_finish_time_is_when_the_capacity_reaches_the_work():
    hosts = [HostView("pc", 2, 50.0, windows=((100.0, 300.0), (400.0, 1000.0)))]
    t = finish_time(hosts, 0.0, 30_000.0, horizon=5000.0)
    # 200 s in the first window give 20 000; the other 10 000 take 100 s of the second
    assert t == pytest.approx(500.0, abs=1e-3)
    assert capacity(hosts, 0.0, t) == pytest.approx(30_000.0, rel=1e-6)


def test_work_beyond_the_horizon_has_no_finish_time():
    assert finish_time([HostView("pc", 1, 1.0)], 0.0, 1e9, horizon=3600.0) is None


def test_speed_book_follows_a_host_that_slows_down():
    book = SpeedBook()
    for _ in range(3):
        book.observe("pc", 1000.0)
    for _ in range(20):
        book.observe("pc", 400.0)  # the user came back and works beside the render
    assert book.get("pc") == pytest.approx(400.0, rel=0.01)
    assert book.get("other") is None


def test_efficiency_is_merged_over_promised_while_the_queue_stays_full():
    meter = RateMeter()
    for t in range(0, 200, 5):
        meter.promise(float(t), rate=100.0, saturated=True)
        meter.merged(float(t), 80.0 * 5)  # 80 of the promised 100 per second arrive
    assert meter.efficiency(195.0) == pytest.approx(0.8, abs=0.03)


def test_efficiency_is_not_judged_when_the_queue_ran_dry():
    meter = RateMeter()
    for t in range(0, 200, 5):
        meter.promise(float(t), rate=100.0, saturated=t < 100)
        meter.merged(float(t), 10.0)  # little arrives, because little was asked
    assert meter.efficiency(195.0) == 1.0


def test_efficiency_measured_before_the_queue_ran_dry_is_kept():
    meter = RateMeter()
    for t in range(0, 200, 5):
        meter.promise(float(t), rate=100.0, saturated=True)
        meter.merged(float(t), 60.0 * 5)  # 60 of the promised 100 per second arrive
        meter.efficiency(float(t))  # the head asks at every forecast
    for t in range(200, 400, 5):  # the plan holds work back: nothing waits in the queue
        meter.promise(float(t), rate=100.0, saturated=False)
        meter.merged(float(t), 10.0)
    assert meter.efficiency(395.0) == pytest.approx(0.6, abs=0.03)


def test_a_heartbeat_without_cores_counts_one_slot(redis_url):
    r = redis.Redis.from_url(redis_url)
    r.set(P.k_host("odd"), json.dumps({"name": "odd", "cores": None}))
    hosts, _ = read_hosts(r)
    assert hosts == [("odd", 1, ())]


def test_without_any_slot_speed_the_merged_rate_is_shared_among_the_slots():
    fc = Forecaster()
    for t in range(0, 130, 10):
        fc.update(float(t), [("a", 2, ()), ("b", 2, ())], [], saturated=True)
        fc.merged(float(t), 4000.0)  # 400 pixel-samples/s over 4 slots
    assert fc.default_speed(130.0) == pytest.approx(100.0, rel=0.1)


def test_hosts_and_slot_speeds_are_read_from_the_heartbeats(redis_url):
    r = redis.Redis.from_url(redis_url)
    r.set(P.k_host("pc"), json.dumps({"name": "pc", "cores": 4,
                                      "windows": [[100.0, 200.0], [300.0, 400.0]]}))
    r.set(P.k_host("server"), json.dumps({"name": "server", "cores": 16}))
    r.set(P.k_slot("pc", 11), json.dumps({"worker": "pc", "pid": 11, "batch": "j/1/0/0/1",
                                          "pixel_samples_per_second": 2500.0}))
    hosts, speeds = read_hosts(r)
    assert sorted(hosts) == [("pc", 4, [[100.0, 200.0], [300.0, 400.0]]), ("server", 16, ())]
    assert speeds == [("pc", 2500.0)]
