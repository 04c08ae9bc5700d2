"""The worker's Celery app (built by a factory, never at import) and the `lampyr worker` run.

Pool: `prefork` with one process per core, each rendering one batch at a time with a single numba
thread, on numba's `workqueue` threading layer. The parent never runs a kernel, so no OpenMP
runtime is forked (seen with numba 0.68: a child forked after GNU OpenMP ran is killed), and each child has
one Python thread calling kernels (workqueue aborts when two do). On Windows, where nothing
forks, the pool is `solo`: one process, one batch at a time, with `cores` numba threads.

This module is the Celery worker process that `lampyr worker` (worker/supervisor.py) starts
inside working hours and stops at their end: `python -m lampyr.worker.app CONFIG-JSON`. It
takes the lowest CPU priority before the pool starts (the pool processes inherit it), and a
warm shutdown (SIGTERM, Ctrl-C) raises the gate's `stop` flag so that batches in progress hand
back what they have finished instead of running to their end. The supervisor keeps the host
heartbeat.
"""

from __future__ import annotations

import json
import logging
import os
import socket
import sys
import time

from ..allocator import keep_large_blocks
from ..scheduler import protocol as P

_CTX = {}


def default_pool() -> str:
    return "solo" if sys.platform == "win32" else "prefork"


def prepare_environment(pool: str, cores: int) -> None:
    """Set numba's threading before numba is imported anywhere in this process."""
    threads = cores if pool == "solo" else 1
    os.environ["NUMBA_NUM_THREADS"] = str(threads)
    os.environ.setdefault("NUMBA_THREADING_LAYER", "workqueue")


def make_app(url: str, name: str, settings: dict | None = None, gate_folder: str | None = None):
    """A Celery app bound to the farm at `url` with TASK_RENDER registered.

    settings: extra Celery settings over `protocol.celery_settings(url)`; gate_folder: the
    supervisor's gate (worker/gate.py), consulted by every batch between chunks.
    """
    import redis
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
        from .gate import Gate
        from .tasks import Context, run_batch

        ctx = _CTX.get(os.getpid())
        if ctx is None:
            gate = Gate(gate_folder) if gate_folder else None
            ctx = _CTX[os.getpid()] = Context(url, name, gate)
        try:
            return run_batch(ctx, payload)
        except (redis.exceptions.ConnectionError, redis.exceptions.TimeoutError) as err:
            # the head went away mid-batch: the supervisor says so in one line; this start's
            # lease lapses and the head queues the batch again — no stack trace in the log
            from .connect import reason

            return {"outcome": "head lost", "error": reason(err)}

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


def quiet_connection_logs() -> None:
    """Celery logs a lost broker connection with a stack trace, and every retry on several
    lines; the supervisor says it in one line instead (worker/connect.py)."""
    for logger in ("celery.worker.consumer.consumer", "celery.worker.consumer.connection",
                   "celery.worker.consumer.gossip", "celery.worker.consumer.mingle",
                   "kombu.connection", "celery.bootsteps"):
        logging.getLogger(logger).setLevel(logging.CRITICAL)


def run_celery(url: str, cores: int, pool: str, name: str, gate_folder: str | None = None,
               normal_priority: bool = False, loglevel: str = "WARNING") -> None:
    """Render batches from the farm at `url` until a warm shutdown (SIGTERM / Ctrl-C)."""
    from celery.signals import worker_process_init, worker_shutting_down

    from .gate import Gate
    from .politeness import lower_priority

    prepare_environment(pool, cores)
    keep_large_blocks()  # before the pool starts: its processes inherit it (lampyr/allocator.py)
    if not normal_priority:
        lower_priority()  # before the pool starts: its processes inherit it
    quiet_connection_logs()
    app = make_app(url, name, gate_folder=gate_folder)
    warm = _warm_and_report(url, name)
    if pool == "prefork":
        worker_process_init.connect(warm, weak=False)
    else:
        warm()

    def hand_back(**_):
        if gate_folder:
            Gate(gate_folder).set_stop(True)

    worker_shutting_down.connect(hand_back, weak=False)
    _stop_with_supervisor()
    # --quiet: no start-up banner; the supervisor says what matters in its own lines
    argv = ["--quiet", "worker", "-P", pool, "-c", str(cores if pool == "prefork" else 1), "-Q", P.QUEUE,
            "-n", f"{name}@{socket.gethostname()}", "--without-gossip", "--without-mingle",
            "--without-heartbeat", "-l", loglevel]
    app.worker_main(argv)


def _stop_with_supervisor(every: float = 0.5) -> None:
    """Warm shutdown (and so a hand-back) when the supervisor that started this process is
    gone: Linux says so with PR_SET_PDEATHSIG, other systems do not."""
    import signal
    import threading

    import psutil

    parent = psutil.Process(os.getppid())

    def watch():
        while True:
            time.sleep(every)
            if not parent.is_running():
                os.kill(os.getpid(), signal.SIGTERM)
                return

    threading.Thread(target=watch, name="lampyr-parent-watch", daemon=True).start()


if __name__ == "__main__":
    # the farm's address comes from the environment (the supervisor sets LAMPYR_HEAD), so its
    # password is not on this process's command line
    if not os.environ.get("LAMPYR_HEAD") or len(sys.argv) != 2:
        print("lampyr.worker.app: started without LAMPYR_HEAD or its CONFIG-JSON; this process is the "
              "render process `lampyr worker` starts, with both: run `lampyr worker`", file=sys.stderr)
        sys.exit(2)
    run_celery(url=os.environ["LAMPYR_HEAD"], **json.loads(sys.argv[1]))
