"""The embedded Redis: persistent, never evicting, capped, passwords always, least privilege.

The ACL checks use real clients (redis-py) against the real redis-server, logged in as each of
the three users scheduler/acl.py defines; Redis answers NOPERM (redis-py's NoPermissionError) to
a command or key a user lacks (Redis 6 ACL documentation, "ACL rules")."""

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
    ("bind", "127.0.0.1"), ("protected-mode", "yes"), ("auto-aof-rewrite-min-size", str(256 << 20)),
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


def test_the_memory_cap_is_set(tmp_path):
    s = EmbeddedRedis(tmp_path / "redis", maxmemory=300 << 20).start()
    try:
        r = redis.Redis.from_url(s.url, decode_responses=True)
        assert int(r.config_get("maxmemory")["maxmemory"]) == 300 << 20
    finally:
        s.stop()


@pytest.mark.parametrize("text, size", [("4G", 4 << 30), ("512M", 512 << 20), ("1.5GiB", 3 << 29),
                                        ("67108864", 64 << 20), ("64m", 64 << 20)])
def test_redis_memory_sizes_read_in_binary_units(text, size):
    from lampyr.scheduler.redis_server import parse_size

    assert parse_size(text) == size


@pytest.mark.parametrize("text", ["-1G", "0", "1048576", "63M", "0.06G", "infG", "nanM", "4X", ""])
def test_a_redis_memory_below_64M_or_not_a_size_is_one_line_exit_2(tmp_path, text):
    """The project's rule for bad input: one line naming the option, exit status 2, before the
    head starts anything (the state folder is not even made)."""
    import subprocess

    res = subprocess.run([sys.executable, "-m", "lampyr.cli", "head", "--state",
                          str(tmp_path / "state"), f"--redis-memory={text}"],
                         capture_output=True, text=True, timeout=60)
    assert res.returncode == 2, res.stderr
    assert res.stderr.strip().splitlines() == [
        f"lampyr: --redis-memory: expected a size of 64M or more, like 4G or 512M, got {text!r}"]
    assert not (tmp_path / "state").exists()


# ---------------------------------------------------------------------------------------------
# least privilege: three users, the default one off, passwords on loopback too


def as_user(server, user):
    from lampyr.scheduler import acl

    return redis.Redis.from_url({acl.HEAD: server.url, acl.WORKER: server.worker_url,
                                 acl.ARTIST: server.artist_url}[user], socket_timeout=5)


def test_a_loopback_farm_refuses_a_client_without_a_password(server):
    r = redis.Redis(host="127.0.0.1", port=server.port)
    with pytest.raises((redis.exceptions.AuthenticationError, redis.exceptions.ResponseError)):
        r.get("lampyr:protocol")


def test_the_default_user_is_off(server):
    # AUTH with a password alone logs in as `default`; whatever the password, it is refused
    for word in server.passwords.values():
        r = redis.Redis(host="127.0.0.1", port=server.port, password=word)
        with pytest.raises((redis.exceptions.AuthenticationError, redis.exceptions.ResponseError)):
            r.ping()


def test_state_files_are_the_owners_alone(server, tmp_path):
    r = as_user(server, "head")
    r.set("lampyr:x", 1)
    r.bgrewriteaof()
    import time

    time.sleep(1.2)  # the AOF reaches the disk within a second (appendfsync everysec)
    folder = tmp_path / "redis"
    assert folder.stat().st_mode & 0o777 == 0o700
    names = {p.name for p in folder.iterdir()}
    assert {"appendonly.aof", "redis.log", "redis.conf", "password", "worker-password",
            "head-password"} <= names
    for p in folder.iterdir():
        assert p.stat().st_mode & 0o077 == 0, f"{p.name} is {oct(p.stat().st_mode)}"


def test_files_an_older_head_left_open_are_closed(tmp_path):
    folder = tmp_path / "redis"
    folder.mkdir(mode=0o755)
    (folder / "appendonly.aof").write_bytes(b"")
    (folder / "appendonly.aof").chmod(0o644)
    s = EmbeddedRedis(folder).start()
    try:
        assert (folder / "appendonly.aof").stat().st_mode & 0o777 == 0o600
        assert folder.stat().st_mode & 0o777 == 0o700
    finally:
        s.stop()


def test_no_password_on_the_command_line_or_in_the_config(server, tmp_path):
    cmdline = open(f"/proc/{server.proc.pid}/cmdline", "rb").read().decode()
    conf = (tmp_path / "redis" / "redis.conf").read_text()
    for word in server.passwords.values():
        assert word not in cmdline
        assert word not in conf  # the config holds SHA-256 digests only


@pytest.mark.parametrize("user", ["worker", "artist"])
@pytest.mark.parametrize("command", [
    ("CONFIG", "SET", "dir", "/tmp"), ("CONFIG", "GET", "requirepass"), ("FLUSHALL",),
    ("FLUSHDB",), ("DEBUG", "SLEEP", "0"), ("MODULE", "LIST"), ("ACL", "LIST"), ("KEYS", "*"),
    ("SHUTDOWN", "NOSAVE"), ("MONITOR",), ("SAVE",), ("BGREWRITEAOF",), ("SLAVEOF", "NO", "ONE"),
    ("SUBSCRIBE", "lampyr"), ("PUBLISH", "lampyr", "x"),
])
def test_only_the_head_may_run_administrative_commands(server, user, command):
    r = as_user(server, user)
    with pytest.raises(redis.exceptions.NoPermissionError):
        r.execute_command(*command)
    assert as_user(server, "head").ping()  # still up


def test_the_head_may_do_anything(server):
    r = as_user(server, "head")
    assert r.config_get("maxmemory")
    r.set("lampyr:job:x", "1")
    assert r.keys("lampyr:job:*") == [b"lampyr:job:x"]


def test_a_worker_reads_only_the_keys_its_work_needs(server):
    head, w = as_user(server, "head"), as_user(server, "worker")
    head.set("lampyr:protocol", 4)
    head.set("lampyr:scene:" + "a" * 64, b"manifest")
    for key in ("lampyr:job:j1", "lampyr:progress:j1", "lampyr:tiles:j1", "lampyr:layout:j1"):
        head.hset(key, "1", "{}")
    head.rpush("lampyr:control", "{}")
    assert w.get("lampyr:protocol") == b"4"  # scheduler/protocol.py, PROTOCOL_VERSION
    # a scene named by a message it took: the sha256 is its only way in
    assert w.get("lampyr:scene:" + "a" * 64) == b"manifest"
    with pytest.raises(redis.exceptions.NoPermissionError):  # no listing of key names
        w.scan(0, match="lampyr:scene:*")
    for key in ("lampyr:job:j1", "lampyr:progress:j1", "lampyr:tiles:j1", "lampyr:layout:j1"):
        with pytest.raises(redis.exceptions.NoPermissionError):
            w.hgetall(key)
    for read in (lambda: w.lrange("lampyr:control", 0, -1), lambda: w.get("lampyr:epoch"),
                 lambda: w.zrange("lampyr:jobs", 0, -1), lambda: w.get("lampyr:metrics"),
                 lambda: w.hgetall("lampyr:seen"), lambda: w.get("other:key")):
        with pytest.raises(redis.exceptions.NoPermissionError):
            read()
    with pytest.raises(redis.exceptions.NoPermissionError):  # no commands to the head
        w.rpush("lampyr:control", '{"op": "cancel", "job": "j1"}')
    with pytest.raises(redis.exceptions.NoPermissionError):  # queue contents: not by peeking
        w.lrange("lampyr", 0, -1)
    # Redis 6.2 cannot tell reading a key from writing it: a worker may delete a scene it can
    # read (DEL is in its list for its own slot and heartbeat keys); the head puts lost scene
    # files back from its disk (transfer.hold)


def test_a_worker_writes_what_its_work_writes(server):
    w = as_user(server, "worker")
    from lampyr.scheduler import protocol as P

    assert P.lease_acquire(w, "j/1/0/0/1", "me", 5)
    assert P.lease_renew(w, "j/1/0/0/1", "me", 5)  # a script: its keys are checked too
    w.set(P.k_result("j/1/0/0/1", 1), b"film", ex=60)
    w.rpush(P.K_RESULTS, "{}")
    w.hincrby(P.K_ATTEMPTS, "j/1/0/0/1", 1)
    w.set(P.k_host("pc"), "{}", ex=15)
    w.set(P.k_slot("pc", 1), "{}", ex=15)
    w.sadd(P.key("warm", "pc"), 1)
    P.lease_release(w, "j/1/0/0/1", "me")
    with pytest.raises(redis.exceptions.NoPermissionError):  # a script reaching past its keys
        w.eval("return redis.call('get', KEYS[1])", 1, "lampyr:job:j1")


def test_artists_send_shots_and_commands_but_touch_no_work_in_progress(server):
    a = as_user(server, "artist")
    a.set("lampyr:blob:" + "b" * 64, b"chunk", ex=60)
    a.rpush("lampyr:control", '{"op": "pause", "job": "j1"}')
    a.hset("lampyr:job:j1", "state", '"queued"')
    assert a.hgetall("lampyr:job:j1") == {b"state": b'"queued"'}
    assert a.info("memory")["maxmemory"] > 0  # the room left, read before sending a scene
    a.scan(0, match="lampyr:host:*")
    for key in ("lampyr", "lampyr:inflight", "lampyr:attempts", "lampyr:results", "unacked",
                "lampyr:lease:j/1/0/0/1", "lampyr:result:j/1/0/0/1:1", "lampyr:epoch"):
        with pytest.raises(redis.exceptions.NoPermissionError):
            a.delete(key)
    with pytest.raises(redis.exceptions.NoPermissionError):
        a.lpop("lampyr:control")  # the head's queue of commands: artists only add to it


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


# ---------------------------------------------------------------------------------------------
# a full farm: the submitter is told, in one line, before Redis refuses the queue's writes


@pytest.fixture
def small_server(tmp_path):
    s = EmbeddedRedis(tmp_path / "redis", maxmemory=16 << 20).start()
    yield s
    s.stop()


def test_a_scene_that_would_fill_the_farm_is_refused_before_sending(small_server):
    import hashlib
    import os

    from lampyr.scheduler import transfer

    artist = as_user(small_server, "artist")
    data = os.urandom(14 << 20)  # 14 MiB new bytes: past 80 % of a 16 MiB cap
    sha = hashlib.sha256(data).hexdigest()
    sender = transfer._Sender(artist, 60, 1 << 30, transfer.Sent(files=1))
    sender.add(sha, data)
    with pytest.raises(transfer.FarmFull) as err:
        sender.flush()
    text = str(err.value)
    assert text.startswith("the farm is full: its Redis holds ") and "\n" not in text
    assert "of 0.02 GiB" in text and "needs 0.01 GiB more" in text  # 16 MiB cap, 14 MiB asked
    assert not artist.exists(f"lampyr:blob:{sha}")  # nothing sent
    small = os.urandom(1 << 20)  # what fits still goes
    sender.add(hashlib.sha256(small).hexdigest(), small)
    sender.waiting = [(hashlib.sha256(small).hexdigest(), small)]
    sender.flush()
    assert artist.exists(f"lampyr:blob:{hashlib.sha256(small).hexdigest()}")


def test_redis_refusing_a_write_for_memory_reads_as_the_farm_being_full(small_server):
    import os

    from lampyr.scheduler import transfer

    head, artist = as_user(small_server, "head"), as_user(small_server, "artist")
    # the head fills Redis past its cap (noeviction): Redis refuses a write once the memory in
    # use is above maxmemory, so the last write that fits takes it over
    for i in range(2000):
        try:
            head.set(f"lampyr:blob:{i:064x}", os.urandom(64 << 10))
        except redis.exceptions.OutOfMemoryError:  # Redis's refusal past maxmemory ("OOM …")
            break
    else:
        raise AssertionError("Redis took 125 MiB under a 16 MiB cap")
    with pytest.raises(redis.exceptions.ResponseError) as err:
        artist.set("lampyr:scene:" + "c" * 64, b"x" * 4096)
    full = transfer._refused_for_memory(artist, err.value, 4096)
    assert isinstance(full, transfer.FarmFull) and str(full).startswith("the farm is full")
