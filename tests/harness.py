"""Test-only behaviour for lampyr's real processes: installed by the tests, never read by lampyr.

lampyr itself reads no test switch (tests/test_no_test_switches.py checks it). A farm test that
needs a fault or a fake starts `lampyr worker` or `lampyr head` through this script:

    python tests/harness.py FAKES-JSON ARGS...      # the fakes installed, then `lampyr ARGS...`

A worker's supervisor then starts its Celery worker through the same script
(`--celery FAKES-JSON CONFIG-JSON`, in place of `python -m lampyr.worker.app CONFIG-JSON`), so
the fakes reach the pool processes, which prefork forks from it. In-process tests use the same
helpers through pytest's monkeypatch (`install_task_fakes(fakes, monkeypatch.setattr)`).

FAKES-JSON is an object with any of:
- "poison": "frame/tile" — every batch of that tile raises RuntimeError("poisoned batch …");
- "sample_delay": seconds — the renderer sleeps this long for every sample it renders (a slow
  machine; the production chunking sizes its chunks to it as to any renderer);
- "chunk_log": path — every render call appends a JSON line {"kind": "chunk", "pid",
  "tile": [x0, y0, w, h], "first", "count", "start", "end"} (time.time() around the call), and
  every batch the task ends one {"kind": "outcome", "pid", "batch", "outcome", "end"}, so a test
  sees which samples a worker rendered, when, and how each batch ended;
- "clock_file": path — the supervisor's clock is time.time() plus the seconds written in that
  file (re-read at every look);
- "user_pids": [pid, …] — only these processes (and their children) count as the machine's
  user's CPU load;
- "hold_frame_write": {"after": n, "marker": path} — the head writes n frame files at a ready-by
  stop, then creates `marker` and waits there forever (for the test's SIGKILL);
- "hold_commit": {"after": n, "marker": path} — the head renames n tile files of a group commit
  into place (scheduler/tilestore.py); at the next rename it creates `marker` and waits there
  forever (every thread of the commit with it), before the group's other tiles and before
  removing any notice.
"""

from __future__ import annotations

import json
import os
import sys
import threading
import time
from pathlib import Path

HERE = Path(__file__).resolve()


def command(fakes: dict, *args) -> list[str]:
    """The command line of `lampyr ARGS...` with these fakes installed."""
    return [sys.executable, str(HERE), json.dumps(fakes), *map(str, args)]


# -- the render task (in the pool processes, or in this process) ------------------------------

def _log(path: str, record: dict) -> None:
    with open(path, "a") as f:  # one short append per line: lines do not interleave
        f.write(json.dumps(record) + "\n")


class _Slowed:
    """A FrameRenderer that sleeps `delay` per sample after rendering and logs each call."""

    def __init__(self, inner, delay: float, log: str | None):
        self.inner, self.delay, self.log = inner, delay, log

    def render(self, tile, first, count, film=None):
        start = time.time()
        out = self.inner.render(tile, first, count, film)
        if self.delay:
            time.sleep(self.delay * count)
        if self.log:
            _log(self.log, {"kind": "chunk", "pid": os.getpid(),
                            "tile": [tile.x0, tile.y0, tile.w, tile.h], "first": first,
                            "count": count, "start": start, "end": time.time()})
        return out

    def __getattr__(self, name):
        return getattr(self.inner, name)


def install_task_fakes(fakes: dict, setattr=setattr) -> None:
    """Poison, sample delay and chunk log in this process's render task (worker/tasks.py).

    setattr: pytest's monkeypatch.setattr in process (undone after the test), or the builtin."""
    from lampyr.worker import cache, tasks

    poison = fakes.get("poison")
    if poison:
        real_render = tasks._render

        def poisoned(ctx, task, lease):
            b = task.batch
            if f"{b.frame}/{b.tile}" == poison:
                raise RuntimeError(f"poisoned batch {b.id} (tests/harness.py)")
            return real_render(ctx, task, lease)

        setattr(tasks, "_render", poisoned)
    delay, log = float(fakes.get("sample_delay") or 0), fakes.get("chunk_log")
    if delay or log:
        real_renderer = cache.SceneCache.renderer

        def renderer(self, *args, **kw):
            return _Slowed(real_renderer(self, *args, **kw), delay, log)

        setattr(cache.SceneCache, "renderer", renderer)
    if log:
        real_run = tasks.run_batch

        def logged_run(ctx, payload):
            out = real_run(ctx, payload)
            _log(log, {"kind": "outcome", "pid": os.getpid(), "batch": out.get("batch"),
                       "outcome": out.get("outcome"), "end": time.time()})
            return out

        setattr(tasks, "run_batch", logged_run)


def read_log(path, kind: str = "chunk") -> list[dict]:
    """The records of one kind ("chunk" or "outcome") a chunk_log holds so far."""
    p = Path(path)
    if not p.exists():
        return []
    lines = p.read_text().splitlines()
    return [d for line in lines if line.endswith("}") and (d := json.loads(line))["kind"] == kind]


# -- the supervisor (`lampyr worker`) ----------------------------------------------------------

def file_clock(path: str):
    def clock() -> float:
        try:
            return time.time() + float(Path(path).read_text().strip() or 0)
        except (OSError, ValueError):
            return time.time()

    return clock


def install_worker_fakes(fakes: dict) -> None:
    from lampyr.worker import supervisor
    from lampyr.worker.politeness import LoadMeter

    real = supervisor.Supervisor

    class Harnessed(real):
        def __init__(self, opts, clock=None, say=supervisor.say):
            if clock is None and fakes.get("clock_file"):
                clock = file_clock(fakes["clock_file"])
            super().__init__(opts, clock, say)

        def child_command(self, config: dict) -> list[str]:
            return [sys.executable, str(HERE), "--celery", json.dumps(fakes), json.dumps(config)]

        def load_meter(self):
            if fakes.get("user_pids"):
                return LoadMeter(os.getpid(), user_pids=[int(p) for p in fakes["user_pids"]])
            return super().load_meter()

    supervisor.Supervisor = Harnessed


# -- the head ----------------------------------------------------------------------------------

def install_head_fakes(fakes: dict) -> None:
    hold_in_commit(fakes.get("hold_commit"))
    hold = fakes.get("hold_frame_write")
    if not hold:
        return
    from lampyr.scheduler import ready_by_keeper

    real = ready_by_keeper.write_held_frame
    written = []

    def write_then_hold(run, frame):
        if len(written) >= int(hold["after"]):
            Path(hold["marker"]).write_text(f"holding before frame {frame}\n")
            while True:
                time.sleep(3600)
        real(run, frame)
        written.append(frame)

    ready_by_keeper.write_held_frame = write_then_hold


def hold_in_commit(hold: dict | None) -> None:
    """A head that stops for good in the middle of a group commit of tile files: after
    `after` tiles are replaced on disk, before the others and before any notice is removed."""
    if not hold:
        return
    from lampyr.scheduler import tilestore

    real = tilestore._replace
    replaced = []
    lock = threading.Lock()  # the group's files are written on several threads

    def replace_then_hold(path, *args):
        with lock:  # the other threads wait here too: no file replaced after the n-th
            if len(replaced) >= int(hold["after"]):
                Path(hold["marker"]).write_text(f"holding after {len(replaced)} tile(s)\n")
                while True:
                    time.sleep(3600)
            kept = real(path, *args)
            replaced.append(path)
            return kept

    tilestore._replace = replace_then_hold


def main(argv: list[str]) -> None:
    if argv[0] == "--celery":
        fakes, config = json.loads(argv[1]), json.loads(argv[2])
        install_task_fakes(fakes)
        from lampyr.worker.app import run_celery

        # the supervisor hands the farm's address over in LAMPYR_HEAD, not in argv
        run_celery(url=os.environ["LAMPYR_HEAD"], **config)
        return
    fakes = json.loads(argv[0])
    install_worker_fakes(fakes)
    install_head_fakes(fakes)
    from lampyr.cli import main as lampyr_main

    lampyr_main(argv[1:])


if __name__ == "__main__":
    main(sys.argv[1:])
