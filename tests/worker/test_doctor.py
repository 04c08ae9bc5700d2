"""`lampyr doctor` against a real head, a real password-protected Redis, no server at all, and a
head of another protocol version."""

from __future__ import annotations

import pytest
import redis

from ..conftest import lampyr_cmd


def doctor(farm, url, *args):
    import subprocess

    return subprocess.run(lampyr_cmd("doctor", url, *args), capture_output=True, text=True,
                          timeout=300, cwd=farm.tmp)


def verdicts(res) -> dict:
    """check name → (verdict, text) from the doctor's lines."""
    out = {}
    for line in res.stdout.splitlines():
        if line.startswith("["):
            verdict, rest = line[1:].split("] ", 1)
            name, text = rest.split(": ", 1)
            out[name] = (verdict, text)
    return out


def test_a_healthy_farm_passes_every_check(farm):
    farm.start_head()
    res = doctor(farm, farm.url)
    v = verdicts(res)
    assert res.returncode == 0, res.stdout
    assert [k for k in v] == ["address", "network", "password", "protocol", "kernel cache", "render"]
    assert all(verdict == "ok" for verdict, _ in v.values()), res.stdout
    assert "came out right" in v["render"][1]
    assert res.stdout.splitlines()[-1].startswith("everything looks right")


@pytest.mark.parametrize("given, expected", [
    (":wrong-one@", "the farm refused the password"),
    ("", "the farm requires a password"),
])
def test_a_wrong_or_missing_password_is_named(farm, tmp_path, given, expected):
    from lampyr.scheduler.redis_server import EmbeddedRedis

    server = EmbeddedRedis(tmp_path / "locked").start()  # every farm has passwords
    try:
        res = doctor(farm, f"redis://{given}127.0.0.1:{server.port}/0", "--no-render")
    finally:
        server.stop()
    v = verdicts(res)
    assert res.returncode == 1
    assert v["network"][0] == "ok"
    assert v["password"][0] == "problem" and v["password"][1].startswith(expected)
    assert not any(word in res.stdout for word in server.passwords.values())


def test_no_server_says_nothing_listens(farm):
    from lampyr.scheduler.redis_server import free_port

    port = free_port("127.0.0.1")
    res = doctor(farm, f"redis://127.0.0.1:{port}/0", "--no-render")
    v = verdicts(res)
    assert res.returncode == 1
    assert v["network"] == ("problem", f"nothing listens on 127.0.0.1:{port}: is `lampyr head` "
                            "running there, on that port, and listening beyond loopback (--listen)?")
    assert v["password"][0] == "not checked"


def test_a_head_of_another_protocol_version_is_named(farm):
    farm.start_head()
    redis.Redis.from_url(farm.url).set("lampyr:protocol", 999)
    res = doctor(farm, farm.url, "--no-render")
    v = verdicts(res)
    assert res.returncode == 1
    assert v["protocol"][0] == "problem" and "protocol 999" in v["protocol"][1]
    assert "same lampyr version" in v["protocol"][1]


def test_not_an_address_is_named(farm):
    res = doctor(farm, "http://head:8080", "--no-render")
    assert res.returncode == 1
    assert verdicts(res)["address"][1].startswith("'http://head:8080' is not a farm address")
