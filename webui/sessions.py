"""Sessions the server can end, and password files watched for changes.

`SessionBook` holds every open session: a random id (only its SHA-256 is written down), the role
it opened and when it expires, in `<state>/web/sessions.json` (mode 0600, replaced whole on
every change) so logins survive a head restart. Logging out strikes a session; `end_all` strikes
them all. A book that finds its file changed by someone else (another page on the same state
folder, or the file deleted by hand to log everybody out) reads it again.

`Passwords` keeps the roles' passwords in the app's config (`PASSWORD`, `VIEWER_PASSWORD`) in
step with their files: each request stats the files (inode, size, modification time), and a
file that changed is read again; a password that really changed ends every session.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import secrets
import threading
import time
from pathlib import Path

log = logging.getLogger("lampyr.web")
MAX_SESSIONS = 1000  # open sessions kept at once; the oldest go first (memory and file bound)


def _signature(path: Path):
    try:
        st = os.stat(path)
    except OSError:
        return None
    return (st.st_ino, st.st_size, st.st_mtime_ns)


def _key(sid: str) -> str:
    return hashlib.sha256(sid.encode("utf-8", "surrogatepass")).hexdigest()


class SessionBook:
    """Open sessions by id; `path` None keeps them in memory only."""

    def __init__(self, path: Path | None, lifetime: float):
        self.path = path
        self.lifetime = lifetime
        self.lock = threading.Lock()
        self.open_: dict[str, tuple[str, float]] = {}  # sha256(sid) -> (role, expires)
        self.seen = None
        with self.lock:
            self._reload()

    def _reload(self) -> None:
        if self.path is None:
            return
        sig = _signature(self.path)
        if sig == self.seen:
            return
        self.seen = sig
        try:
            raw = json.loads(self.path.read_text())
            self.open_ = {k: (str(v[0]), float(v[1])) for k, v in raw.items()}
        except FileNotFoundError:
            self.open_ = {}
        except (OSError, ValueError, TypeError, KeyError, IndexError, AttributeError):
            log.warning("%s is unreadable; every session ends", self.path)
            self.open_ = {}

    def _save(self) -> None:
        if self.path is None:
            return
        self.path.parent.mkdir(parents=True, exist_ok=True)
        tmp = self.path.with_name(f".{self.path.name}.{os.getpid()}.{threading.get_ident()}")
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
        with os.fdopen(fd, "w") as f:
            json.dump({k: [who, until] for k, (who, until) in self.open_.items()}, f)
        os.replace(tmp, self.path)
        self.seen = _signature(self.path)

    def open(self, who: str) -> str:
        """A new session for `who`: its id (the cookie carries it)."""
        sid = secrets.token_urlsafe(24)
        now = time.time()
        with self.lock:
            self._reload()
            self.open_ = {k: v for k, v in self.open_.items() if v[1] > now}
            while len(self.open_) >= MAX_SESSIONS:
                del self.open_[min(self.open_, key=lambda k: self.open_[k][1])]
            self.open_[_key(sid)] = (who, now + self.lifetime)
            self._save()
        return sid

    def alive(self, sid: str, who: str) -> bool:
        with self.lock:
            self._reload()
            entry = self.open_.get(_key(sid))
        return entry is not None and entry[0] == who and entry[1] > time.time()

    def end(self, sid: str) -> None:
        with self.lock:
            self._reload()
            if self.open_.pop(_key(sid), None) is not None:
                self._save()

    def end_all(self) -> None:
        with self.lock:
            self.open_ = {}
            self._save()


class Passwords:
    """The passwords of the roles, re-read when their files change. `watch` maps a config key
    (`PASSWORD`, `VIEWER_PASSWORD`) to a function giving (file, read) — its file now and how to
    read it; keys not watched (given to create_app) stay as the config has them."""

    def __init__(self, config: dict, watch: dict, book: SessionBook):
        self.config = config
        self.watch = watch
        self.book = book
        self.lock = threading.Lock()
        self.seen = {key: self._sig(key) for key in watch}

    def _sig(self, key: str):
        path, _ = self.watch[key]()
        return (str(path), _signature(path))

    def current(self) -> dict:
        """Role → password, for the roles this page has now (a role with an empty password
        has none: nobody logs in with an empty word)."""
        with self.lock:
            changed = False
            for key in self.watch:
                sig = self._sig(key)
                if sig == self.seen[key]:
                    continue
                _, read = self.watch[key]()
                word = read()
                self.seen[key] = self._sig(key)  # after reading: a missing file may be made
                if word != self.config.get(key):
                    self.config[key] = word
                    changed = True
            if changed:
                log.warning("a password file changed: every session of the page ends")
                self.book.end_all()
            out = {}
            if self.config.get("PASSWORD"):
                out["farm"] = self.config["PASSWORD"]
            if self.config.get("VIEWER_PASSWORD"):
                out["viewer"] = self.config["VIEWER_PASSWORD"]
            return out
