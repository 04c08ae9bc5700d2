"""The worker's Celery app (built by a factory, never at import) and the `lampyr worker` run.

Pool: `prefork` with one process per core, each rendering one batch at a time with a single numba
thread, on numba's `workqueue` threading layer. The parent never runs a kernel, so no OpenMP
runtime is forked (LIBRARY-NOTES: forking after OpenMP ran kills the child), and each child has
one Python thread calling kernels (workqueue aborts when two do). On Windows, where nothing
forks, the pool is `solo`: one process, one batch at a time, with `cores` numba threads.

A heartbeat thread in the parent keeps `host:<name>` alive: host, cores, engine version, pid.
"""

from __future__ import annotations

import json
import os
import socket
import sys
import threading

from ..scheduler import protocol as P

_CTX = {}


def default_pool() -> str:
    return "solo" if sys.platform == "win32" else "prefork"


def prepare_environment(pool: str, cores: int) -> None:
    """Set numba's threading before numba is imported anywhere in this process."""
    threads = cores if pool == "solo" else 1
    os.environ["NUMBA_NUM_THREADS"] = str(threads)
    os.environ.setdefault("NUMBA_THREADING_LAYER", "workqueue")


def make_app(url: str, name: str, settings: dict | None = None):
    """A Celery app bound to the farm at `url` with TASK_RENDER registered.

    settings: extra Celery settings over `protocol.celery_settings(url)`.
    """
    from celery import Celery

    app = Celery("lampyr-worker", set_as_current=False)
    app.conf.update(P.celery_settings(url))
    # a pool process loads (or, the first time, compiles) the kernels before it reports up:
    # Celery's default of 4 s would kill it in the middle of that
    app.conf.worker_proc_alive_timeout = 900
    if settings:
        app.conf.update(settings)

    @app.task(name=P.TASK_RENDER, acks_late=True, reject_on_worker_lost=True, ignore_result=True)
    def render_batch(payload: str) -> dict:
        from .tasks import Context, run_batch

        ctx = _CTX.get(os.getpid())
        if ctx is None:
            ctx = _CTX[os.getpid()] = Context(url, name)
        return run_batch(ctx, payload)

    return app


def _warm_and_report(url: str, name: str):
    def warm(**_):
        from ..engine.render import warm_up
        from ..scheduler.store import connect

        warm_up()
        r = connect(url, check=False)
        r.sadd(P.key("warm", name), os.getpid())
        r.expire(P.key("warm", name), 24 * 3600)

    return warm


def heartbeat(url: str, info: dict, stop: threading.Event) -> None:
    from ..scheduler.store import connect

    r = connect(url, check=False)
    while not stop.is_set():
        try:
            r.set(P.k_host(info["name"]), json.dumps(info), ex=P.HEARTBEAT_TTL)
        except Exception:  # Redis restarting: the next beat will do
            pass
        stop.wait(P.HEARTBEAT_EVERY)


def run_worker(url: str, cores: int, pool: str | None = None, name: str | None = None,
               loglevel: str = "WARNING") -> None:
    """Join the farm at `url` and render until stopped (Ctrl-C / SIGTERM: warm shutdown)."""
    from celery.signals import worker_process_init

    from ..scheduler.store import check_protocol, connect
    from .tasks import host_info

    pool = pool or default_pool()
    prepare_environment(pool, cores)
    r = connect(url)
    check_protocol(r)
    name = name or f"{socket.gethostname()}-{os.getpid()}"
    app = make_app(url, name)
    warm = _warm_and_report(url, name)
    if pool == "prefork":
        worker_process_init.connect(warm, weak=False)
    else:
        warm()
    stop = threading.Event()
    beat = threading.Thread(target=heartbeat, args=(url, host_info(name, cores, pool), stop),
                            daemon=True)
    beat.start()
    argv = ["worker", "-P", pool, "-c", str(cores if pool == "prefork" else 1), "-Q", P.QUEUE,
            "-n", f"{name}@{socket.gethostname()}", "--without-gossip", "--without-mingle",
            "--without-heartbeat", "-l", loglevel]
    try:
        app.worker_main(argv)
    finally:
        stop.set()
        try:
            r.delete(P.k_host(name))
        except Exception:
            pass
