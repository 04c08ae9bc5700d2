"""deploy/: the systemd units, the system user, the worker's env file, the macOS launchd job and
the LAN Redis config.

The units are checked by systemd's own `systemd-analyze verify` (where it exists), the user file
by `systemd-sysusers` into a scratch root, and the Redis config by a real redis-server started
with it. The options the units pass to lampyr must be options lampyr has.
"""

from __future__ import annotations

import re
import shlex
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import pytest

from lampyr.cli import cli

DEPLOY = Path(__file__).resolve().parents[2] / "deploy"
UNITS = ["lampyr-head.service", "lampyr-worker.service"]


def env_file(path: Path) -> dict:
    out = {}
    for line in path.read_text().splitlines():
        if line.strip() and not line.startswith("#"):
            k, v = line.split("=", 1)
            out[k] = v
    return out


def launchd_arguments() -> list[str]:
    import plistlib  # Python's reader of Apple's property-list format

    with open(DEPLOY / "lampyr-worker.plist", "rb") as f:
        return plistlib.load(f)["ProgramArguments"]


def exec_start(unit: str) -> list[str]:
    """The unit's ExecStart with the worker.env template's values put in (as systemd expands:
    ${X} as one word, $X split at spaces)."""
    line = next(l for l in (DEPLOY / unit).read_text().splitlines() if l.startswith("ExecStart="))
    env = env_file(DEPLOY / "worker.env")
    words = []
    for w in shlex.split(line.split("=", 1)[1]):
        if m := re.fullmatch(r"\$\{(\w+)\}", w):
            words.append(env[m.group(1)])
        elif m := re.fullmatch(r"\$(\w+)", w):
            words += env[m.group(1)].split()
        else:
            words.append(w)
    return words


@pytest.mark.skipif(shutil.which("systemd-analyze") is None, reason="no systemd-analyze here")
@pytest.mark.parametrize("unit", UNITS)
def test_unit_passes_systemd_analyze_verify(unit, tmp_path):
    lampyr = Path(sys.executable).with_name("lampyr")
    assert lampyr.exists(), "the lampyr command is not installed beside this Python"
    env = tmp_path / "worker.env"
    shutil.copy(DEPLOY / "worker.env", env)
    text = (DEPLOY / unit).read_text().replace("/opt/lampyr/bin/lampyr", str(lampyr))
    text = text.replace("EnvironmentFile=/etc/lampyr/worker.env", f"EnvironmentFile={env}")
    (tmp_path / unit).write_text(text)
    res = subprocess.run(["systemd-analyze", "verify", str(tmp_path / unit)],
                         capture_output=True, text=True, timeout=60)
    # verify exits 0 on unknown keys and out-of-range values but prints them: both must be empty
    assert res.returncode == 0 and res.stderr.strip() == "" and res.stdout.strip() == "", (
        res.stdout + res.stderr)


@pytest.mark.parametrize("unit", UNITS + ["lampyr-worker.plist"])
def test_unit_passes_only_options_lampyr_has(unit):
    import click

    words = launchd_arguments() if unit.endswith(".plist") else exec_start(unit)
    assert Path(words[0]).name == "lampyr"
    command, args = words[1], words[2:]
    # parsed for real, not run: click raises on an unknown option or a bad value
    try:
        cli.commands[command].make_context(command, list(args))
    except click.UsageError as err:
        pytest.fail(f"{unit}: {err.format_message()}")


@pytest.mark.skipif(shutil.which("systemd-sysusers") is None, reason="no systemd-sysusers here")
def test_sysusers_file_makes_a_system_user_without_login(tmp_path):
    (tmp_path / "etc").mkdir()
    res = subprocess.run(["systemd-sysusers", f"--root={tmp_path}",
                          str(DEPLOY / "lampyr.sysusers.conf")],
                         capture_output=True, text=True, timeout=60)
    assert res.returncode == 0, res.stderr
    name, _, uid, _, _, home, shell = (tmp_path / "etc" / "passwd").read_text().split(":")
    assert (name, home, shell.strip()) == ("lampyr", "/var/lib/lampyr", "/usr/sbin/nologin")
    assert int(uid) < 1000  # a system user (rule of thumb: Debian's SYS_UID_MAX is 999)


LAN_PASSWORDS = {"head": "head-horse-battery-staple", "worker": "worker-horse-battery-staple",
                 "artist": "artist-horse-battery-staple"}


@pytest.fixture
def lan_redis(tmp_path):
    """redis-server started with deploy/redis-lan.conf as its only argument, moved to loopback,
    a scratch folder and a free port, with the template's three passwords replaced."""
    from lampyr.scheduler.redis_server import free_port, server_binary

    conf = (DEPLOY / "redis-lan.conf").read_text()
    for user, word in LAN_PASSWORDS.items():
        assert f">CHANGE-ME-{user}-password" in conf
        conf = conf.replace(f">CHANGE-ME-{user}-password", f">{word}")
    port = free_port()
    conf = re.sub(r"^dir .*$", f"dir {tmp_path}", conf, flags=re.M)
    conf = re.sub(r"^port .*$", f"port {port}", conf, flags=re.M)
    conf = re.sub(r"^bind .*$", "bind 127.0.0.1", conf, flags=re.M)
    (tmp_path / "redis.conf").write_text(conf)
    proc = subprocess.Popen([str(server_binary()), str(tmp_path / "redis.conf")],
                            stdout=subprocess.DEVNULL, stderr=subprocess.STDOUT)
    yield port
    proc.kill()
    proc.wait(10)


def _client(port, password=None, username=None):
    import redis

    r = redis.Redis(port=port, username=username, password=password, socket_timeout=5)
    give_up_at = time.monotonic() + 20
    while True:
        try:
            r.ping()
            return r
        except redis.exceptions.ConnectionError:
            if time.monotonic() > give_up_at:
                raise
            time.sleep(0.05)
        except (redis.exceptions.AuthenticationError, redis.exceptions.ResponseError):
            return r


def test_lan_redis_refuses_a_client_without_the_password(lan_redis):
    import redis

    with pytest.raises((redis.exceptions.AuthenticationError, redis.exceptions.ResponseError)):
        _client(lan_redis).set("x", 1)


@pytest.mark.parametrize("setting, value", [
    ("appendonly", "yes"),
    ("appendfsync", "everysec"),
    ("maxmemory-policy", "noeviction"),
    ("protected-mode", "yes"),
    ("auto-aof-rewrite-min-size", str(256 << 20)),
])
def test_lan_redis_keeps_the_settings_the_farm_relies_on(lan_redis, setting, value):
    r = _client(lan_redis, LAN_PASSWORDS["head"], "head")
    assert r.config_get(setting)[setting] == value


def test_lan_redis_has_the_users_of_the_embedded_server(lan_redis):
    """The template's users are the ones scheduler/acl.py gives the embedded server: the same
    rules, as Redis itself lists them (ACL LIST), whatever the passwords."""
    from lampyr.scheduler import acl
    from lampyr.scheduler.redis_server import EmbeddedRedis

    def rules(r):
        # Redis lists a user's rules in no fixed order: compare them as sets of words
        return sorted(tuple(sorted(re.sub(r" #[0-9a-f]{64}", "", line).split())) for line in
                      (x.decode() if isinstance(x, bytes) else x for x in r.acl_list()))

    embedded = EmbeddedRedis(Path(lan_redis_tmp := tempfile.mkdtemp()) / "redis").start()
    try:
        import redis

        mine = rules(redis.Redis.from_url(embedded.url))
    finally:
        embedded.stop()
        shutil.rmtree(lan_redis_tmp, ignore_errors=True)
    assert rules(_client(lan_redis, LAN_PASSWORDS["head"], "head")) == mine
    import redis

    w = _client(lan_redis, LAN_PASSWORDS["worker"], "worker")
    with pytest.raises(redis.exceptions.NoPermissionError):
        w.config_set("dir", "/tmp")
    assert acl.WORKER == "worker"


def test_worker_env_template_is_the_format_systemd_reads():
    env = env_file(DEPLOY / "worker.env")
    assert set(env) == {"LAMPYR_HEAD", "LAMPYR_WORKER_ARGS"}
    assert env["LAMPYR_HEAD"].startswith("redis://worker:")


@pytest.mark.parametrize("unit", UNITS)
def test_no_address_or_password_on_a_command_line(unit):
    """The address reaches the worker in its environment (EnvironmentFile), never in ExecStart:
    a command line is readable by every user of the machine (/proc/PID/cmdline)."""
    text = (DEPLOY / unit).read_text()
    line = next(l for l in text.splitlines() if l.startswith("ExecStart="))
    assert "LAMPYR_HEAD" not in line and "redis://" not in line and "PASSWORD" not in line
    if unit == "lampyr-worker.service":
        assert "EnvironmentFile=/etc/lampyr/worker.env" in text


def test_launchd_job_carries_no_address():
    words = launchd_arguments()
    assert not any("redis://" in w for w in words)


def test_head_unit_keeps_its_state_folder_to_itself():
    text = (DEPLOY / "lampyr-head.service").read_text()
    assert "StateDirectoryMode=0700" in text


def test_compose_head_runs_a_command_lampyr_has():
    import click
    import yaml  # PyYAML reads the compose file as Docker Compose would read its YAML

    spec = yaml.safe_load((DEPLOY / "compose.yaml").read_text())
    words = spec["services"]["head"]["command"]
    assert words[:2] == ["lampyr", "head"]
    try:
        cli.commands["head"].make_context("head", list(words[2:]))
    except click.UsageError as err:
        pytest.fail(f"compose.yaml: {err.format_message()}")
