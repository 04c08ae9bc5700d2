"""The embedded Redis: persistent, never evicting, loopback by default, a password beyond it."""

from __future__ import annotations

import sys

import pytest
import redis

from lampyr.scheduler.redis_server import EmbeddedRedis


@pytest.fixture
def server(tmp_path):
    s = EmbeddedRedis(tmp_path / "redis").start()
    yield s
    s.stop()


@pytest.mark.parametrize("setting, value", [
    ("appendonly", "yes"), ("appendfsync", "everysec"), ("maxmemory-policy", "noeviction"),
    ("bind", "127.0.0.1"),
])
def test_embedded_redis_configuration(server, setting, value):
    r = redis.Redis.from_url(server.url, decode_responses=True)
    assert r.config_get(setting)[setting] == value


def test_data_survives_a_restart(tmp_path):
    s = EmbeddedRedis(tmp_path / "redis").start()
    r = redis.Redis.from_url(s.url)
    r.rpush("lampyr:test", b"kept")
    import time

    time.sleep(1.2)  # appendfsync everysec: a write is on disk within about a second
    s.proc.kill()  # SIGKILL: no shutdown save, only the append-only file
    s.proc.wait()
    s.start()
    assert redis.Redis.from_url(s.url).lrange("lampyr:test", 0, -1) == [b"kept"]
    s.stop()


@pytest.fixture
def lan_server(tmp_path):
    s = EmbeddedRedis(tmp_path / "redis", bind="0.0.0.0").start()
    yield s
    s.stop()


def test_beyond_loopback_a_password_is_generated_and_kept(lan_server, tmp_path):
    word = (tmp_path / "redis" / "password").read_text().strip()
    assert len(word) >= 24
    assert (tmp_path / "redis" / "password").stat().st_mode & 0o077 == 0
    assert EmbeddedRedis(tmp_path / "redis", bind="0.0.0.0").password == word


def test_an_unauthenticated_client_is_refused(lan_server):
    r = redis.Redis(host=lan_server.public_host(), port=lan_server.port)
    with pytest.raises(redis.exceptions.AuthenticationError):
        r.get("lampyr:protocol")


def test_the_printed_address_carries_the_password(lan_server):
    assert redis.Redis.from_url(lan_server.url).ping()


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="PR_SET_PDEATHSIG is Linux's")
def test_the_embedded_redis_dies_with_a_head_killed_outright(tmp_path):
    import os
    import signal
    import subprocess
    import time

    # a head stand-in: starts the embedded server, prints its pid, then waits to be killed
    code = ("import sys, time; from lampyr.scheduler.redis_server import EmbeddedRedis; "
            f"s = EmbeddedRedis({str(tmp_path / 'redis')!r}).start(); "
            "print(s.proc.pid, flush=True); time.sleep(60)")
    head = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, text=True)
    pid = int(head.stdout.readline())
    os.kill(head.pid, signal.SIGKILL)
    head.wait()
    give_up_at = time.monotonic() + 10
    while time.monotonic() < give_up_at:
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            break
        if open(f"/proc/{pid}/stat").read().split()[2] == "Z":  # exited, not yet reaped
            break
        time.sleep(0.05)
    else:
        os.kill(pid, signal.SIGKILL)
        raise AssertionError("redis-server outlived its head")
