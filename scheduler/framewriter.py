"""Frame rewrites off the merge path: one thread writes the frames the head's loop asks for.

Writing a frame (assembling its tiles, the EXR, the PNG preview and, once complete, the denoised
layer) takes from a tenth of a second to many seconds; done inside the head's turn it held every
worker's notices back meanwhile. The loop now hands the frames that grew to a `FrameWriter` and
goes on merging; the writer's thread calls the job run's own writer (`JobRun.write_frames`,
`JobRun.write_due`, still the one writer of frame files: docs/design.md, invariant 11) and the
frames of one job are written one at a time (`assembler.frame_lock`).

Requests coalesce: while a job's frames are being written, later requests for that job wait as
one set of frames. A job counts as `busy` while a request of its is queued or being written; the
head reports a job ended (done, failed, cancelled) only once it is not busy, so whoever waits
for the end finds every merged sample in the frame files.

Nothing here needs to survive a crash: the tile files are the truth, and at start a frame file
older than a tile of its frame is written again (`JobRun.settle_written`).
"""

from __future__ import annotations

import logging
import threading

log = logging.getLogger("lampyr.head")


class FrameWriter:
    """threaded: False writes at once in the caller's thread (as the head did before)."""

    def __init__(self, threaded: bool = True):
        self.threaded = threaded
        self._work: dict[str, dict] = {}  # job → {"run", "frames": set, "due": None | bool}
        self._busy: set[str] = set()  # jobs being written now
        self._cond = threading.Condition()
        self._thread: threading.Thread | None = None
        self._closed = False
        self.finished = 0  # requests written so far (the head publishes a job's end on change)

    def write(self, run, frames) -> None:
        """Write `frames` of `run` that grew (`JobRun.write_frames`)."""
        self._add(run, frames=frames)

    def write_due(self, run, all_now: bool) -> None:
        """Write `run`'s held-back rewrites that are due (`JobRun.write_due`)."""
        self._add(run, due=all_now)

    def busy(self, run) -> bool:
        with self._cond:
            return run.rec.id in self._work or run.rec.id in self._busy

    def wait(self, timeout: float | None = None) -> bool:
        """Until nothing is queued or being written; False when `timeout` passed first."""
        with self._cond:
            return self._cond.wait_for(lambda: not self._work and not self._busy, timeout)

    def close(self, timeout: float | None = None) -> None:
        """Write what is queued, then stop the thread."""
        self.wait(timeout)
        with self._cond:
            self._closed = True
            self._cond.notify_all()

    # -- the thread -------------------------------------------------------------------------

    def _add(self, run, frames=(), due=None) -> None:
        if not self.threaded:
            _write(run, set(frames), due)
            self.finished += 1
            return
        with self._cond:
            job = run.rec.id
            item = self._work.setdefault(job, {"run": run, "frames": set(), "due": None})
            item["run"] = run  # the newest run object of the job (a refine replaces it)
            item["frames"].update(frames)
            if due is not None:
                item["due"] = bool(item["due"]) or due
            if self._thread is None or not self._thread.is_alive():
                self._thread = threading.Thread(target=self._loop, name="frame-writer",
                                                daemon=True)
                self._thread.start()
            self._cond.notify_all()

    def _loop(self) -> None:
        while True:
            with self._cond:
                self._cond.wait_for(lambda: self._work or self._closed)
                if not self._work:
                    return  # closed, nothing left
                job = next(iter(self._work))
                item = self._work.pop(job)
                self._busy.add(job)
            try:
                _write(item["run"], item["frames"], item["due"])
            except Exception:  # noqa: BLE001 — JobRun.write_frames stops the job on its errors
                log.exception("job %s: writing its frames failed", job)
            finally:
                with self._cond:
                    self._busy.discard(job)
                    self.finished += 1
                    self._cond.notify_all()


def _write(run, frames: set, due) -> None:
    if frames:
        run.write_frames(sorted(frames))
    if due is not None:
        run.write_due(all_now=due)
