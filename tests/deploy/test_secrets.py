"""No password on any command line, in a LAN-style farm of real processes.

A head listening beyond loopback (`--listen 0.0.0.0`, web page on), a worker given the workers'
address in its environment as the systemd unit gives it (LAMPYR_HEAD from worker.env), and the
artists' commands on "another PC" (a config folder of their own) that got the address once
through `lampyr farm` on standard input. While the job renders, every process's command line on
this machine (/proc/*/cmdline, readable by every user: proc(5)) is read and searched for the
three passwords. The same run shows that the restricted Redis users suffice: the job finishes,
and Redis's ACL LOG lists no refusal but redis-py's CLIENT SETINFO at connect, which redis-py
ignores.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
import redis

pytestmark = pytest.mark.skipif(not Path("/proc/self/cmdline").exists(), reason="needs /proc")


def lampyr(*args) -> list[str]:
    return [sys.executable, "-m", "lampyr.cli", *map(str, args)]


def command_lines() -> dict[int, str]:
    out = {}
    for p in Path("/proc").iterdir():
        if p.name.isdigit():
            try:
                out[int(p.name)] = (p / "cmdline").read_bytes().replace(b"\0", b" ").decode(
                    errors="replace")
            except OSError:  # gone meanwhile
                pass
    return out


def wait_for(cond, timeout, what):
    give_up_at = time.monotonic() + timeout
    while not (value := cond()):
        if time.monotonic() > give_up_at:
            raise AssertionError(f"timed out waiting for {what}")
        time.sleep(0.2)
    return value


def test_no_password_on_any_command_line(tmp_path, tiny_shot, compiled_kernels):
    state = tmp_path / "state"
    base = {k: v for k, v in os.environ.items() if k not in ("LAMPYR_HEAD", "LAMPYR_STATE")}
    head_env = dict(base, XDG_CONFIG_HOME=str(tmp_path / "head-config"), PYTHONUNBUFFERED="1")
    procs = []

    def spawn(args, env, log):
        proc = subprocess.Popen(lampyr(*args), env=env, stdout=open(tmp_path / log, "wb"),
                                stderr=subprocess.STDOUT, start_new_session=True, cwd=tmp_path)
        procs.append(proc)
        return proc

    try:
        head = spawn(["head", "--state", state, "--listen", "0.0.0.0", "--web-port", 0,
                      "--lease", 10], head_env, "head.log")
        wait_for(lambda: "Web page:" in (tmp_path / "head.log").read_text() or head.poll(),
                 60, "the head")
        assert head.poll() is None, (tmp_path / "head.log").read_text()
        folder = state / "redis"
        passwords = {n: (folder / n).read_text().strip()
                     for n in ("password", "worker-password", "head-password")}
        addresses = json.loads((state / "addresses.json").read_text())
        assert (state / "addresses.json").stat().st_mode & 0o077 == 0

        # the worker PC: the address in the environment, as systemd hands over worker.env
        worker_env = dict(base, XDG_CONFIG_HOME=str(tmp_path / "worker-config"),
                          LAMPYR_HEAD=addresses["workers"], PYTHONUNBUFFERED="1")
        worker = spawn(["worker", "--cores", 1, "--name", "lan"], worker_env, "worker.log")
        admin = redis.Redis.from_url(json.loads((state / "head.json").read_text())["address"])
        admin.acl_log_reset()
        wait_for(lambda: admin.scard("lampyr:warm:lan") or worker.poll() is not None, 600,
                 "the worker's kernels")
        assert worker.poll() is None, (tmp_path / "worker.log").read_text()[-2000:]

        # an artist's PC: the address given once to `lampyr farm`, on standard input
        pc = dict(base, XDG_CONFIG_HOME=str(tmp_path / "artist-config"))
        res = subprocess.run(lampyr("farm"), input=addresses["commands"] + "\n", env=pc,
                             capture_output=True, text=True, timeout=60)
        assert res.returncode == 0, res.stderr
        saved = tmp_path / "artist-config" / "lampyr" / "farm"
        assert saved.stat().st_mode & 0o777 == 0o600
        assert saved.parent.stat().st_mode & 0o777 == 0o700
        assert passwords["password"] not in res.stdout  # said back redacted
        res = subprocess.run(lampyr("submit", tiny_shot, "--out", tmp_path / "out", "--tile", 8,
                                    "--batch", 3), env=pc, capture_output=True, text=True,
                             timeout=300)
        assert res.returncode == 0, res.stderr
        job = res.stdout.strip().splitlines()[-1]

        seen: dict[int, str] = {}

        def finished():
            seen.update(command_lines())
            st = json.loads(subprocess.run(lampyr("status", job, "--json"), env=pc,
                                           capture_output=True, text=True, timeout=60).stdout)
            return st if st["state"] in ("done", "failed") else None

        st = wait_for(finished, 600, "the job")
        assert st["state"] == "done", st
        seen.update(command_lines())
        # the scan saw the farm's processes: head, its redis-server, the worker, its Celery
        # worker and pool process
        lines = "\n".join(seen.values())
        assert "redis-server" in lines and "lampyr.worker.app" in lines and " head " in lines
        for name, word in passwords.items():
            leaks = [f"{pid}: {line}" for pid, line in seen.items() if word in line]
            assert not leaks, f"{name} on a command line: {leaks}"
        # nothing the farm's code sent was refused under the restricted users
        refused = [(e["username"], e["object"]) for e in admin.acl_log()]
        assert all(obj == "client" for _, obj in refused), refused
    finally:
        for proc in reversed(procs):
            if proc.poll() is None:
                os.killpg(proc.pid, signal.SIGTERM)
                try:
                    proc.wait(60)
                except subprocess.TimeoutExpired:
                    os.killpg(proc.pid, signal.SIGKILL)
                    proc.wait()
