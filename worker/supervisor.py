"""`lampyr worker`: the polite worker. It waits for the head (with back-off), keeps the host's
heartbeat, and runs the Celery worker (worker/app.py, a child process) only while it may:
inside working hours, and while the machine's own user is not busy.

- Outside working hours nothing runs that could take a batch; the heartbeat says
  "outside working hours" and lists the coming windows. At a window's end the gate's `stop`
  flag is raised and the Celery worker gets a warm shutdown: every batch in progress hands back
  the samples it has finished at its next sample boundary, and the head queues the rest.
- With `busy_percent`, a thread measures the CPU load that is not this worker's
  (worker/politeness.py). Busy → `pause` is raised: batches wait at their next sample boundary,
  keeping their leases. Busy for longer than `hand_back_after` → the Celery worker is stopped
  as at a window's end, and started again once the user is quiet.
- A Redis that goes away is said in one line per retry, with growing waits.

Heartbeat `host:<name>` (JSON): name, host, cores, pool, engine_version, protocol, pid,
started, plus `state` — "rendering", "idle", "paused: user busy" or "outside working hours" —
and `windows`, [[start, end], ...] epoch seconds of the next 36 hours (absent when always
available).

`Supervisor` takes its clock as an argument; `child_command` and `load_meter` are the two places
that say how the Celery worker is started and how the user's load is measured.
"""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import threading
import time
from dataclasses import dataclass, field

from ..scheduler import protocol as P
from .connect import Backoff, reason, wait_for_head, waiting_line
from .gate import Gate
from .hours import Schedule

TICK = 0.5  # seconds between looks at the clock, the busy verdict and the Celery worker
STOP_TIMEOUT = 120.0  # seconds a warm shutdown may take before the worker is killed


@dataclass
class WorkerOptions:
    """Everything `lampyr worker` was told. busy_percent: None = never pause for the user."""

    url: str
    cores: int
    pool: str
    name: str
    schedule: Schedule = field(default_factory=Schedule)
    busy_percent: float | None = None
    busy_seconds: float = 10.0
    hand_back_after: float = 300.0
    normal_priority: bool = False
    loglevel: str = "WARNING"


def say(line: str) -> None:
    print(f"lampyr worker: {line}", file=sys.stderr, flush=True)


class Supervisor:
    """Runs one `lampyr worker` until stopped; `clock` gives epoch seconds (injectable)."""

    def __init__(self, opts: WorkerOptions, clock=None, say=say):
        self.opts = opts
        self.clock = clock or time.time
        self.say = say
        self.gate = Gate()
        self.stopping = threading.Event()
        self.wake = threading.Event()  # beat now: the state changed
        self.child: subprocess.Popen | None = None
        self.child_since = 0.0
        self.user_busy = False  # pause raised
        self.busy_too_long = False  # the Celery worker stopped for the user
        self.started = time.time()

    # -- what the heartbeat says ------------------------------------------------------------

    def state(self, r) -> str:
        if not self.opts.schedule.is_open(self.clock()):
            return "outside working hours"
        if self.user_busy or self.busy_too_long:
            return "paused: user busy"
        if self.child is not None and _slots_live(r, self.opts.name):
            return "rendering"
        return "idle"

    def host_info(self, r) -> dict:
        from .tasks import host_info

        info = host_info(self.opts.name, self.opts.cores, self.opts.pool)
        info["started"] = self.started
        info["state"] = self.state(r)
        windows = self.opts.schedule.heartbeat_windows(self.clock())
        if windows:
            info["windows"] = windows
        return info

    def heartbeat(self, r) -> None:
        """Beat every HEARTBEAT_EVERY seconds; a Redis that went away is said once per retry."""
        backoff = Backoff()
        while not self.stopping.is_set():
            try:
                r.set(P.k_host(self.opts.name), json.dumps(self.host_info(r)), ex=P.HEARTBEAT_TTL)
                if backoff.failing:
                    self.say(f"reached the head at {_redacted(self.opts.url)} again")
                backoff.reset()
                wait = P.HEARTBEAT_EVERY
            except Exception as err:  # Redis restarting, network gone: say it, wait longer
                wait = backoff.next()
                self.say(waiting_line(self.opts.url, reason(err), wait, "lost the head"))
            self.wake.wait(wait)
            self.wake.clear()

    # -- the user's load --------------------------------------------------------------------

    def watch_user(self) -> None:
        from .politeness import BusyWatch

        meter = self.load_meter()
        watch = BusyWatch(self.opts.busy_percent / 100.0, self.opts.busy_seconds)
        while not self.stopping.wait(1.0):
            busy = watch.update(time.monotonic(), meter.sample())
            if busy != self.user_busy:
                self.user_busy = busy
                self.gate.set_pause(busy)
                self.wake.set()
                self.say(f"the machine's user is busy (other programs use {100 * watch.mean():.0f} % "
                         f"of the CPU); rendering paused" if busy else
                         "the machine is quiet again; rendering resumes")
            too_long = bool(busy and watch.busy_since is not None and
                            time.monotonic() - watch.busy_since > self.opts.hand_back_after)
            if too_long != self.busy_too_long:
                self.busy_too_long = too_long
                self.wake.set()

    def load_meter(self):
        """The meter of the CPU load that is not this worker's (worker/politeness.py)."""
        from .politeness import LoadMeter

        return LoadMeter(os.getpid())

    # -- the Celery worker ------------------------------------------------------------------

    def child_command(self, config: dict) -> list[str]:
        """The command line of the Celery worker process (worker/app.py). `-P`: the working folder
        stays off the module path, so a folder named lampyr where the worker was started (a
        source checkout after `pip install .`, whose lampyr/ holds no worker package) does not
        hide the installed package (seen: the render process stopped at once, restarted forever)."""
        return [sys.executable, "-P", "-m", "lampyr.worker.app", json.dumps(config)]

    def start_child(self) -> None:
        from ..scheduler.redis_server import die_with_parent

        self.gate.set_stop(False)
        config = {"cores": self.opts.cores, "pool": self.opts.pool,
                  "name": self.opts.name, "gate_folder": str(self.gate.folder),
                  "normal_priority": self.opts.normal_priority, "loglevel": self.opts.loglevel}
        self.child_since = time.monotonic()
        # the address (with its password) travels in the environment, never on a command line
        env = dict(os.environ, LAMPYR_HEAD=self.opts.url)
        self.child = subprocess.Popen(self.child_command(config), stdin=subprocess.DEVNULL,
                                      env=env, preexec_fn=die_with_parent())
        self.wake.set()

    def stop_child(self, why: str) -> None:
        """Hand back what is done and stop the Celery worker (warm shutdown)."""
        child, self.child = self.child, None
        if child is None or child.poll() is not None:
            return
        self.say(f"{why}: handing back the batches in progress")
        self.gate.set_stop(True)
        if sys.platform == "win32":
            # no warm shutdown by signal there: wait for the batches to hand back first
            give_up_at = time.monotonic() + STOP_TIMEOUT
            r = _client(self.opts.url)
            while time.monotonic() < give_up_at and _has_slots(r, self.opts.name):
                time.sleep(TICK)
            child.terminate()
        else:
            child.send_signal(signal.SIGTERM)
        try:
            child.wait(STOP_TIMEOUT)
        except subprocess.TimeoutExpired:
            child.kill()
            child.wait()
        self.wake.set()

    def run(self) -> int:
        """Until SIGTERM / SIGINT; returns the exit status."""
        def on_signal(signum, frame):
            self.stopping.set()

        if threading.current_thread() is threading.main_thread():
            signal.signal(signal.SIGTERM, on_signal)
            signal.signal(signal.SIGINT, on_signal)
        try:
            r = wait_for_head(self.opts.url, self.say, self.stopping)
            if r is None:
                return 0
            threading.Thread(target=self.heartbeat, args=(r,), daemon=True).start()
            if self.opts.busy_percent is not None:
                threading.Thread(target=self.watch_user, daemon=True).start()
            self.loop()
            return 0
        finally:
            self.stop_child("stopping")
            self.stopping.set()
            self.wake.set()
            try:
                _client(self.opts.url).delete(P.k_host(self.opts.name))
            except Exception:
                pass
            self.gate.remove()

    def loop(self) -> None:
        schedule, outside_said, restarts = self.opts.schedule, False, Backoff()
        while not self.stopping.is_set():
            now = self.clock()
            open_ = schedule.is_open(now)
            if not open_ and not outside_said:
                self.say(schedule.waiting_line(now))
            if outside_said == open_:  # the window opened or closed
                self.wake.set()
            outside_said = not open_
            if self.child is not None and time.monotonic() - self.child_since > 60:
                restarts.reset()  # it ran a while: the next failure starts the waits afresh
            if self.child is not None and self.child.poll() is not None:
                wait = restarts.next()
                self.say(f"the render process stopped (exit status {self.child.returncode}); "
                         f"starting it again in {wait:.0f} s")
                self.child = None
                if self.stopping.wait(wait):
                    break
                continue
            if self.child is None and open_ and not self.busy_too_long:
                self.start_child()
            elif self.child is not None and not open_:
                self.stop_child("working hours are over")
            elif self.child is not None and self.busy_too_long:
                self.stop_child(f"the user has been busy for over {self.opts.hand_back_after:.0f} s")
            self.stopping.wait(TICK)


def _redacted(url: str) -> str:
    from ..scheduler.store import redact

    return redact(url)


def _client(url: str):
    from ..scheduler.store import connect

    return connect(url, check=False)


def _slots_live(r, name: str) -> bool:
    """Whether a process of this worker renders a batch now: the slots of the pool processes
    in `warm:<name>` (no SCAN: the farm's `worker` Redis user may not list keys)."""
    pids = r.smembers(P.key("warm", name))
    return bool(pids) and r.exists(*(P.k_slot(name, int(p)) for p in pids)) > 0


def _has_slots(r, name: str) -> bool:
    try:
        return _slots_live(r, name)
    except Exception:
        return False


def default_name() -> str:
    return f"{socket.gethostname()}-{os.getpid()}"


def run_worker(opts: WorkerOptions) -> int:
    """The `lampyr worker` command body."""
    from .app import default_pool

    opts.pool = opts.pool or default_pool()
    opts.name = opts.name or default_name()
    return Supervisor(opts).run()
