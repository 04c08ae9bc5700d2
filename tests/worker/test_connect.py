"""Waiting for the head against a real Redis: what mends by waiting is retried with growing
waits, one line each; a wrong password or another protocol version stops at once."""

from __future__ import annotations

import threading

import pytest
import redis

from lampyr.scheduler import protocol as P
from lampyr.scheduler.store import FarmError, redact
from lampyr.worker.connect import Backoff, wait_for_head


def test_a_redis_without_a_head_is_waited_for_until_the_head_sets_it_up(redis_url):
    lines = []

    def say(line):
        lines.append(line)
        if len(lines) == 2:  # the head comes up during the second wait
            redis.Redis.from_url(redis_url).set(P.K_PROTOCOL, P.PROTOCOL_VERSION)

    r = wait_for_head(redis_url, say, first=0.2)
    assert r is not None and r.ping()
    shown = redact(redis_url)  # the test Redis has passwords too: never said
    assert "***@" in shown
    assert lines == [f"waiting for the head at {shown} (Redis answers, but no lampyr head has "
                     f"set it up yet); retrying in {w} s" for w in ("0.2", "0.4")]


def test_a_stop_ends_the_wait(redis_url):
    stop = threading.Event()
    assert wait_for_head(redis_url, lambda line: stop.set(), stop) is None


def test_a_head_of_another_protocol_version_stops_the_wait_at_once(redis_url):
    redis.Redis.from_url(redis_url).set(P.K_PROTOCOL, P.PROTOCOL_VERSION + 1)
    lines = []
    with pytest.raises(P.ProtocolSkew):
        wait_for_head(redis_url, lines.append)
    assert lines == []


@pytest.mark.parametrize("auth, expected", [
    (":not-it@", "refused the password"),
    ("", "requires a password"),
])
def test_a_password_problem_stops_the_wait_at_once(tmp_path, auth, expected):
    from lampyr.scheduler.redis_server import EmbeddedRedis

    server = EmbeddedRedis(tmp_path / "locked").start()  # every farm has passwords
    try:
        lines = []
        with pytest.raises(FarmError, match=expected):
            wait_for_head(f"redis://{auth}127.0.0.1:{server.port}/0", lines.append)
        assert lines == []
    finally:
        server.stop()


def test_waits_double_up_to_a_minute_and_start_afresh_after_a_success():
    b = Backoff()
    assert [b.next() for _ in range(8)] == [1, 2, 4, 8, 16, 32, 60, 60]
    b.reset()
    assert not b.failing and b.next() == 1
