"""`lampyr head` with a Redis of its own: the address (user `head`, every right, a password in
it) comes from LAMPYR_REDIS, so that no command line shows it (/proc/PID/cmdline is readable by
every user of the machine: proc(5)); given with --redis it still works, with a warning."""

from __future__ import annotations

import os
import signal
import subprocess
import time
from pathlib import Path
from urllib.parse import urlsplit

import pytest

from ..conftest import lampyr_cmd

pytestmark = pytest.mark.skipif(not Path("/proc/self/cmdline").exists(), reason="needs /proc")


def start_head(tmp_path: Path, args=(), env=None) -> subprocess.Popen:
    base = {k: v for k, v in os.environ.items() if k not in ("LAMPYR_REDIS", "LAMPYR_HEAD")}
    return subprocess.Popen(lampyr_cmd("head", "--state", tmp_path / "state", "--no-web", *args),
                            stdout=open(tmp_path / "head.log", "wb"), stderr=subprocess.STDOUT,
                            env=dict(base, PYTHONUNBUFFERED="1", **(env or {})),
                            start_new_session=True)


def wait_until_up(proc: subprocess.Popen, log: Path) -> str:
    give_up_at = time.monotonic() + 60
    while "Workers join with:" not in (text := log.read_text(errors="replace")):
        assert proc.poll() is None and time.monotonic() < give_up_at, text
        time.sleep(0.2)
    return text


def stop(proc: subprocess.Popen) -> None:
    os.killpg(proc.pid, signal.SIGTERM)
    proc.wait(timeout=60)


def test_the_address_in_lampyr_redis_reaches_the_head_and_no_command_line(tmp_path, redis_url):
    password = urlsplit(redis_url).password
    assert password  # the embedded server's users all have one
    proc = start_head(tmp_path, env={"LAMPYR_REDIS": redis_url})
    try:
        text = wait_until_up(proc, tmp_path / "head.log")
        cmdline = Path(f"/proc/{proc.pid}/cmdline").read_bytes().decode(errors="replace")
        assert password not in cmdline and "redis://" not in cmdline
        assert "readable by every user" not in text
    finally:
        stop(proc)


def test_a_password_given_with_the_redis_option_is_warned_about(tmp_path, redis_url):
    proc = start_head(tmp_path, ["--redis", redis_url])
    try:
        text = wait_until_up(proc, tmp_path / "head.log")
        assert "the password in --redis is readable by every user" in text
        assert "LAMPYR_REDIS" in text and urlsplit(redis_url).password not in text
    finally:
        stop(proc)


def test_a_malformed_lampyr_redis_is_one_line_naming_it(tmp_path):
    res = subprocess.run(lampyr_cmd("head", "--state", tmp_path / "state", "--no-web"),
                         env=dict(os.environ, LAMPYR_REDIS="not an address"),
                         capture_output=True, text=True, timeout=60)
    assert res.returncode == 2
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("lampyr: LAMPYR_REDIS: expected a farm address")
