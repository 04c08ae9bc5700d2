"""Serving the page from the head process: waitress (a production WSGI server) in a thread.

DEFAULT_PORT 7361 is not listed in this machine's /etc/services and, to our knowledge, is the
default of no render-farm or queue product. When the default port is taken (a second head on
the same machine) a free port is used instead; a port asked for explicitly must be free.
"""

from __future__ import annotations

import errno
import logging
import socket
import threading
from pathlib import Path

from ..errors import UsageError

DEFAULT_PORT = 7361
THREADS = 8  # waitress worker threads: polling clients are short requests

log = logging.getLogger("lampyr.web")


class WebServer:
    """The page on `listen:port` for the farm at `redis_url`; `start()` returns at once."""

    def __init__(self, state: Path, redis_url: str, listen: str = "127.0.0.1",
                 port: int | None = None, max_upload_bytes: int | None = None):
        from .app import create_app

        config = {"STATE": Path(state), "REDIS_URL": redis_url}
        if max_upload_bytes:
            config["MAX_UPLOAD_BYTES"] = max_upload_bytes
        self.app = create_app(config)
        self.listen = listen
        self.port = DEFAULT_PORT if port is None else port
        self.explicit = port is not None
        self.server = None
        self.thread = None

    def start(self) -> "WebServer":
        from .doorway import make_server

        limit = self.app.config["MAX_CONTENT_LENGTH"]
        try:  # waitress with the checks on headers and connections of doorway.py
            self.server = make_server(self.app, self.listen, self.port, THREADS, limit)
        except OSError as err:
            if err.errno != errno.EADDRINUSE:
                raise
            if self.explicit:
                raise UsageError(f"--web-port: port {self.port} on {self.listen} is in use; "
                                 "choose another or 0 for any free port") from None
            log.warning("web port %d is in use; using a free one", self.port)
            self.server = make_server(self.app, self.listen, 0, THREADS, limit)
        self.port = int(self.server.effective_port)
        self.thread = threading.Thread(target=self._run, name="lampyr-web", daemon=True)
        self.thread.start()
        return self

    def _run(self) -> None:
        try:
            self.server.run()
        except Exception:  # closed at shutdown
            pass

    @property
    def url(self) -> str:
        host = self.listen
        if host in ("0.0.0.0", "::", ""):
            host = _lan_address()
        if ":" in host:
            host = f"[{host}]"
        return f"http://{host}:{self.port}/"

    @property
    def password_file(self) -> str:
        from .auth import password_file

        return str(password_file(self.app.config["STATE"]))

    def stop(self) -> None:
        if self.server is not None:
            try:
                self.server.close()
            except Exception:
                pass


def _lan_address() -> str:
    try:  # the address this machine uses to reach the LAN; nothing is sent
        with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as s:
            s.connect(("192.0.2.1", 9))  # TEST-NET-1 (RFC 5737)
            return s.getsockname()[0]
    except OSError:
        return socket.gethostname()
