"""Temporary folders that outlive a killed process only until the next start of the same kind.

`lampyr render` keeps its farm's state in a `lampyr-render-*` folder and a worker its gate flags
in a `lampyr-gate-*` folder, both under the system's temporary folder, removed when the process
ends. A process killed outright (SIGKILL, a power cut) cannot remove its folder, so each
`scratch_folder` records its owner — pid and the process's start time, so a recycled pid is not
taken for the owner — and the next start of the same kind sweeps the folders of that kind whose
owner has died. A folder without an owner record, or of another user, is left alone.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from pathlib import Path

OWNER = "owner"  # the record inside each folder: "<pid> <start time>"


def _start_time(pid: int) -> float | None:
    """When process `pid` started (seconds since the epoch), or None when it does not exist."""
    import psutil

    try:
        return psutil.Process(pid).create_time()
    except (psutil.NoSuchProcess, psutil.ZombieProcess):
        return None
    except psutil.Error:  # exists, but cannot be inspected (another user's): treat as alive
        return -1.0


def owner_alive(folder: Path) -> bool:
    """True unless `folder`'s owner record names a process that has ended (no record: True)."""
    try:
        pid_text, start_text = (folder / OWNER).read_text().split()
        pid, start = int(pid_text), float(start_text)
    except (OSError, ValueError):
        return True  # no record (or being written): not ours to judge
    now = _start_time(pid)
    if now is None:
        return False
    # the same process, not a later one given its pid (a record without a start time: the pid alone)
    return now < 0 or start <= 0 or abs(now - start) < 1.0


def sweep(prefix: str, base: str | os.PathLike | None = None) -> list[Path]:
    """Remove the folders `<base>/<prefix>*` of this user whose owner has ended; returns them."""
    base = Path(base or tempfile.gettempdir())
    removed = []
    uid = os.getuid() if hasattr(os, "getuid") else None
    for folder in base.glob(prefix + "*"):
        try:
            st = folder.lstat()
        except OSError:
            continue
        if not folder.is_dir() or folder.is_symlink() or (uid is not None and st.st_uid != uid):
            continue
        if not (folder / OWNER).is_file() or owner_alive(folder):
            continue
        shutil.rmtree(folder, ignore_errors=True)
        if not folder.exists():
            removed.append(folder)
    return removed


def scratch_folder(prefix: str, base: str | os.PathLike | None = None) -> Path:
    """A new private folder `<base>/<prefix>XXXX` owned by this process, after sweeping the
    folders of the same prefix whose owners have ended."""
    sweep(prefix, base)
    folder = Path(tempfile.mkdtemp(prefix=prefix, dir=base))
    start = _start_time(os.getpid())
    (folder / OWNER).write_text(f"{os.getpid()} {start if start and start > 0 else 0.0}\n")
    return folder
