"""The farm in one process tree, for `lampyr render`: an embedded Redis, a head thread and one
local `lampyr worker` with a pool process per core — the same path a studio farm takes.

State lives in a temporary folder removed at the end; frames are written only once complete
(as the local render always did), so an interrupted render leaves whole frames only. Redis and
the worker run in their own sessions: Ctrl-C reaches this process alone, which stops them.
"""

from __future__ import annotations

import os
import re
import shutil
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

from ..errors import RenderFailed
from ..scratch import scratch_folder

POLL = 0.25  # seconds between looks at the job's status (this thread competes with the head's)


def first_line(error) -> str:
    """The first line of a worker's or the head's error text, without the exception's class
    (`lampyr.errors.AssetError: object[pot].mesh: ...` -> `object[pot].mesh: ...`)."""
    lines = str(error).strip().splitlines() or ["?"]
    return re.sub(r"^lampyr(?:\.\w+)*\.[A-Z]\w*: ", "", lines[0], count=1)  # errors.py's classes


def render_on_farm(shot_path: Path, shot, out: Path, workers: int, tile_size: int,
                   overrides: dict, on_progress=None, on_frame=None,
                   batch_samples: int | None = None) -> list[Path]:
    """Render every frame of `shot` through a local farm; returns the EXR paths written.

    on_progress(samples_done, samples_total) and
    on_frame(path) are called from this thread, which reads only what the head thread publishes
    to Redis (a job's status and its frames' progress), never the head's own tables.
    """
    from ..frames import frame_path
    from . import protocol as P
    from .head import Head
    from .progress import job_frames
    from .store import connect, job_status
    from .submit import submit_request
    from .redis_server import EmbeddedRedis, die_with_parent

    # a folder owned by this process; the folders of renders that were killed are swept first
    state = scratch_folder("lampyr-render-")
    server = EmbeddedRedis(state / "redis").start()
    stop = threading.Event()
    head_error: list[BaseException] = []
    worker = None
    thread = None
    finished = False
    try:
        r = connect(server.url)
        # the worker first: its processes take longest to be ready (imports, kernels), so they
        # start while the head does; the key it looks for is the one the head's start sets
        r.set(P.K_PROTOCOL, P.PROTOCOL_VERSION)
        with open(state / "worker.log", "wb") as log:  # the worker keeps its own copy
            worker = subprocess.Popen(
                [sys.executable, "-P", "-m", "lampyr.cli", "worker", "--cores", str(workers),
                 "--name", "local", "--normal-priority"],  # the artist asked for this render
                env=dict(os.environ, LAMPYR_HEAD=server.worker_url),  # not on the command line
                stdin=subprocess.DEVNULL, stdout=log, stderr=subprocess.STDOUT,
                start_new_session=True, cwd=state, preexec_fn=die_with_parent())
        # the state folder is scratch, removed at the end: its tile files need no fsync; and no
        # one can ask this head for a refine, so its frames need no denoised errors (two more
        # denoisings a frame; `lampyr refine FRAME.exr --denoised-noise` measures them itself)
        head = Head(state, server.url, lease_seconds=60, redis_server=server, partial_frames=False,
                    durable=False, frame_thread=True, denoised_errors=False)
        head.start()

        def run_head():
            try:
                head.run(stop=stop.is_set)
            except BaseException as err:  # surfaced in the waiting loop below
                head_error.append(err)

        thread = threading.Thread(target=run_head, name="lampyr-head", daemon=True)
        thread.start()
        batch = batch_samples or max(1, shot.samples)
        # `lampyr render` read the shot's files before anything started
        job = submit_request(r, Path(shot_path), overrides, str(out), 0, tile_size, batch, files_checked=True)
        written: list[Path] = []
        seen: set[int] = set()
        while True:
            if head_error:
                err = head_error[0]
                raise RenderFailed(f"the head stopped: {type(err).__name__}: {err}; the frames "
                                   f"written before are kept in {out}")
            if worker.poll() is not None:
                err = (state / "worker.log").read_text(errors="replace").strip().splitlines()
                raise RenderFailed("the local worker stopped: " + (err[-1] if err else "?"))
            # what the head published (Redis), never its tables: they belong to its thread
            st = job_status(r, job)
            if st is not None and "tile_size" not in st and st.get("state") == "failed":
                # the head would not take the job (its submit command failed)
                raise RenderFailed(f"the farm refused the shot: {first_line(st.get('error') or '?')}")
            if st is not None and "tile_size" in st:  # published by the head, not the submit
                if on_progress and st.get("pixel_samples_total"):
                    on_progress(st["pixel_samples_done"], st["pixel_samples_total"])
                # a frame is "done" once written (complete only); the summaries are read only
                # when the status counts a frame more written than this loop has seen
                ready = st.get("frames_done", 0) > len(seen) or st["state"] == "done"
                for d in job_frames(r, job) if ready else ():
                    f = d["frame"]
                    if f not in seen and d["state"] == "done":
                        seen.add(f)
                        path = frame_path(Path(st["out"]), st["name"], f)
                        written.append(path)
                        if on_frame:
                            on_frame(path)
                if st["state"] == "failed":
                    if st.get("error"):  # the job stopped: e.g. its frames cannot be written
                        raise RenderFailed(f"{st['error']}; the frames written before are "
                                           f"kept in {out}")
                    why = next((x["error"] for x in st.get("failed", [])), "?")
                    raise RenderFailed(f"a batch failed for good: {first_line(why)}; the frames written "
                                       f"before it are kept in {out}")
                if st["state"] == "done" and len(seen) == st["frames"]:
                    break
            time.sleep(POLL)
        finished = True
        return written
    finally:
        stop.set()
        if thread is not None:
            thread.join(10)
        if worker is not None and worker.poll() is None and finished:
            # every frame is written: nothing to hand back, no warm shutdown to wait for (its
            # gate folder is swept by the next worker's start, lampyr/scratch.py)
            try:
                os.killpg(worker.pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
            worker.wait()
        elif worker is not None and worker.poll() is None:
            try:
                os.killpg(worker.pid, signal.SIGTERM)  # warm shutdown; then make sure
                worker.wait(5)
            except (ProcessLookupError, subprocess.TimeoutExpired):
                try:
                    os.killpg(worker.pid, signal.SIGKILL)
                except ProcessLookupError:
                    pass
                worker.wait()
        server.stop()
        shutil.rmtree(state, ignore_errors=True)
