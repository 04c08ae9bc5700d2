"""The gate between a worker's supervisor and its render processes: two flags in a folder.

`stop` asks every batch in progress to hand back what it has finished at its next sample
boundary (working hours over, the worker stopping, its user busy for too long); `pause` asks it
to wait at its next sample boundary, keeping its lease, until the flag is lowered. A flag is a
file's existence: cheap to test between chunks (a stat), atomic to raise and lower, and shared by
processes that have nothing else in common (the supervisor, the Celery worker it starts, that
worker's pool processes) on every platform.
"""

from __future__ import annotations

import os
from pathlib import Path

from ..scratch import OWNER, scratch_folder


class Gate:
    """Flags under `folder` (made if missing); a new private folder when `folder` is None."""

    def __init__(self, folder: str | os.PathLike | None = None):
        # a new folder records its owner, and sweeps the ones killed workers left (lampyr/scratch.py)
        self.folder = Path(folder) if folder else scratch_folder("lampyr-gate-")
        self.folder.mkdir(parents=True, exist_ok=True)

    def _set(self, name: str, on: bool) -> None:
        path = self.folder / name
        if on:
            path.touch()
        else:
            path.unlink(missing_ok=True)

    def set_stop(self, on: bool = True) -> None:
        self._set("stop", on)

    def set_pause(self, on: bool = True) -> None:
        self._set("pause", on)

    def stop_requested(self) -> bool:
        return (self.folder / "stop").exists()

    def paused(self) -> bool:
        return (self.folder / "pause").exists()

    def remove(self) -> None:
        for name in ("stop", "pause", OWNER):
            (self.folder / name).unlink(missing_ok=True)
        try:
            self.folder.rmdir()
        except OSError:
            pass
