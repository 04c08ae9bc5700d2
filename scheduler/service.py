"""Running a head as a service: embedded or given Redis, signals, the address to print."""

from __future__ import annotations

import logging
import signal
import threading
from pathlib import Path

from .address import forget_head, record_head
from .redis_server import LOOPBACK, EmbeddedRedis, private_folder


def run_head(state: Path, redis_url: str | None = None, listen: str = "127.0.0.1",
             port: int = 0, lease_seconds: float = 120.0, max_attempts: int = 3,
             on_ready=None, stop: threading.Event | None = None,
             metrics: tuple[str, int] | None = None,
             web: tuple[str, int | None] | None = None, on_web=None,
             maxmemory: int | None = None, archive_after: float | None = None) -> None:
    """Run a head until SIGTERM/SIGINT (or `stop` is set).

    redis_url: an existing Redis to use; otherwise an embedded one is started under
    `<state>/redis`, bound to `listen` (password-protected beyond loopback).
    on_ready(workers, commands): called once the head serves, with the addresses workers and the
    artists' commands need; both None when `redis_url` is given (that Redis's own `worker` and
    `artist` users' addresses, which the head does not know: deploy/redis-lan.conf).
    maxmemory: bytes the embedded Redis may hold (default: redis_server.default_memory()).
    archive_after: seconds after its end a job folds into the archive (None: head.ARCHIVE_AFTER).
    metrics: (host, port) to serve the Prometheus endpoint on (metrics.py); None: not served.
    web: (host, port) of the web page (lampyr.webui; port None: its default); None: not served.
    on_web(url, password_file): called once the web page serves.
    """
    from .head import Head

    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(name)s %(message)s")
    state = Path(state)
    private_folder(state)
    server = None
    exporter = None
    page = None
    if redis_url is None:
        server = EmbeddedRedis(state / "redis", bind=listen, port=port,
                               maxmemory=maxmemory).start()
        redis_url = server.url
        workers, commands = server.worker_url, server.artist_url
    else:  # the head's address has every right: never handed out nor recorded for others
        workers = commands = None
    record_head(state, commands, workers)
    stop = stop or threading.Event()

    def on_signal(signum, frame):
        stop.set()

    if threading.current_thread() is threading.main_thread():
        signal.signal(signal.SIGTERM, on_signal)
        signal.signal(signal.SIGINT, on_signal)
    try:
        from .head import ARCHIVE_AFTER

        head = Head(state, redis_url, lease_seconds=lease_seconds, max_attempts=max_attempts,
                    archive_after=ARCHIVE_AFTER if archive_after is None else archive_after,
                    redis_server=server, frame_thread=True)
        head.start()
        if metrics is not None:
            from .metrics import MetricsServer

            exporter = MetricsServer(redis_url, *metrics)
            logging.getLogger("lampyr.head").info(
                "metrics: http://%s:%d/metrics", metrics[0], exporter.port)
        if on_ready:
            on_ready(workers, commands)
        if web is not None:
            from ..webui.serve import WebServer

            page = WebServer(state, redis_url, *web).start()
            if on_web:
                on_web(page.url, page.password_file)
        head.run(stop=stop.is_set)
    finally:
        if page is not None:
            page.stop()
        if exporter is not None:
            exporter.close()
        if server is not None:
            server.stop()
    forget_head()  # a clean exit only: after a crash the record stays, naming a dead pid


def is_loopback(listen: str) -> bool:
    return listen in LOOPBACK
