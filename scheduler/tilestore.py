"""The head's tile accumulators in memory, written to disk in groups (group commit).

Merging a batch used to read its tile's float64 file, add the film and rewrite the file with an
fsync of its own: about 12 ms a batch on a 64 × 64 tile, most of it the read, the rewrite and the
fsync. A `TileStore` keeps recently merged tiles in memory (bounded by `cap_bytes`, least
recently used first out), so a merge is an addition in memory, and `commit()` writes every tile
merged into since the last commit together: each file written beside its old one, fsynced and
renamed over it, several files at once on threads (they mostly wait on the disk), then each
folder fsynced once. The caller (the
results owner, `results.py`) removes the workers' notices only after `commit()` has returned
with their tiles on disk, so docs/design.md, invariant 4 holds per group: a head killed at any
moment finds every notice whose tile is not on disk still in `results:processing`, and replays
it; a tile that was renamed before the kill already holds the notice's range, so the replay
changes nothing (docs/design.md, invariant 3). Every file is replaced whole (rename), never half.

A tile whose file could not be written (an OSError: a full disk, a folder become a file) is
dropped from memory, so its next merge starts again from what its file holds; `commit()` returns
those tiles with their errors and the caller keeps their notices.

`noise` (the tile's mean relative noise, `accumulator.tile_noise`) is computed once per tile and
commit, not at every merge, and handed to the owner's `on_commit` callback.
"""

from __future__ import annotations

import os
import threading
from collections import OrderedDict
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

from .accumulator import TileAccumulator, fsync_folder, tile_noise

# bytes of tile films kept in memory (rule of thumb: ~250 64 × 64 float64 tiles of 688 KB, a
# 1024 × 1024 frame's worth; a farm head has memory to spare, a render machine has the workers)
CAP_BYTES = 192 * 2**20
# tile files written at once: writing, fsyncing and renaming mostly wait on the disk (measured
# here: fsyncs 1.4–2 ms a file side by side against 5 ms one after the other)
WRITE_THREADS = 8


class TileStore:
    """Tile accumulators by path, kept in memory, written in groups.

    fsync: False skips every fsync (a scratch state folder no crash needs to find)."""

    def __init__(self, cap_bytes: int = CAP_BYTES, fsync: bool = True):
        self.cap_bytes = int(cap_bytes)
        self.fsync = fsync
        self._tiles: OrderedDict[Path, TileAccumulator] = OrderedDict()
        self._dirty: dict[Path, object] = {}  # path → on_commit(noise) of its owner, or None
        self._sizes: dict[Path, int] = {}
        self._bytes = 0
        self._lock = threading.Lock()  # a frame writer thread may read while the merger merges
        self._pool: ThreadPoolExecutor | None = None

    # -- reading --------------------------------------------------------------------------

    def get(self, path: Path, w: int, h: int) -> TileAccumulator:
        """The tile's accumulator: from memory, else read from its file (or empty)."""
        path = Path(path)
        with self._lock:
            acc = self._tiles.get(path)
            if acc is not None:
                self._tiles.move_to_end(path)
                return acc
        acc = TileAccumulator.load(path, w, h)
        with self._lock:
            if path not in self._tiles:  # a merge may have put it there meanwhile
                self._keep(path, acc)
            return self._tiles[path]

    def film(self, path: Path, w: int, h: int):
        """The tile's film for reading (a frame's assembly): from memory when it is there, else
        from its file, without keeping it (a frame's tiles would push the hot ones out)."""
        path = Path(path)
        with self._lock:
            acc = self._tiles.get(path)
        if acc is None:
            acc = TileAccumulator.load(path, w, h)
        return acc.film

    # -- merging and committing -------------------------------------------------------------

    def stage(self, acc: TileAccumulator, on_commit=None) -> None:
        """`acc` was merged into in memory: written at the next `commit()`, then
        `on_commit(noise)` is called."""
        with self._lock:
            if self._tiles.get(acc.path) is not acc:
                self._drop(acc.path)
                self._keep(acc.path, acc)
            else:  # its film may have grown from nothing (a tile's first merge)
                self._bytes += _size(acc) - self._sizes[acc.path]
                self._sizes[acc.path] = _size(acc)
                self._tiles.move_to_end(acc.path)
            self._dirty[acc.path] = on_commit

    @property
    def dirty(self) -> int:
        return len(self._dirty)

    def commit(self) -> dict[Path, OSError]:
        """Write every tile merged into since the last commit (see the module docstring).
        Returns the tiles that could not be written, with their errors (dropped from memory)."""
        with self._lock:
            dirty, self._dirty = self._dirty, {}
            accs = {p: self._tiles[p] for p in dirty}
        if not accs:
            return {}
        items = list(accs.items())
        if len(items) > 1:  # writes, fsyncs and renames wait on the disk: side by side
            if self._pool is None:
                self._pool = ThreadPoolExecutor(WRITE_THREADS, thread_name_prefix="tile-write")
            done = list(self._pool.map(lambda item: _write_tile(*item, self.fsync), items))
        else:
            done = [_write_tile(*items[0], self.fsync)]
        failed: dict[Path, OSError] = {}
        noises, folders = {}, set()
        for (path, _), (noise, err) in zip(items, done):
            noises[path] = noise
            if err is None:
                folders.add(path.parent)
            else:
                failed[path] = err
        if self.fsync:
            for folder in folders:
                fsync_folder(folder)
        with self._lock:
            for path in failed:
                self._drop(path)
            self._shrink()  # tiles kept past the cap while they waited for this commit
        for path, on_commit in dirty.items():
            if path not in failed and on_commit is not None:
                on_commit(noises[path])
        return failed

    def forget(self, path: Path) -> None:
        """Drop a tile from memory (its file is the truth again); never one not yet written."""
        with self._lock:
            if Path(path) not in self._dirty:
                self._drop(Path(path))

    def close(self) -> None:
        if self._pool is not None:
            self._pool.shutdown(wait=True)
            self._pool = None

    # -- memory -----------------------------------------------------------------------------

    def _keep(self, path: Path, acc: TileAccumulator) -> None:
        self._tiles[path] = acc
        self._sizes[path] = _size(acc)
        self._bytes += self._sizes[path]
        self._shrink(keep=path)

    def _shrink(self, keep: Path | None = None) -> None:
        """Least recently used first, down to the cap; never a tile not yet written."""
        while self._bytes > self.cap_bytes and self._tiles:
            victim = next((p for p in self._tiles if p not in self._dirty and p != keep), None)
            if victim is None:
                break  # every tile kept is waiting for its commit
            self._drop(victim)

    def _drop(self, path: Path) -> None:
        if self._tiles.pop(path, None) is not None:
            self._bytes -= self._sizes.pop(path)


def _size(acc: TileAccumulator) -> int:
    film = acc.film
    if film is None:
        return 0
    return sum(getattr(film, f).nbytes for f in film.__dataclass_fields__
               if hasattr(getattr(film, f), "nbytes"))


def _write_tile(path: Path, acc: TileAccumulator, fsync: bool):
    """Replace one tile file (written beside, fsynced, renamed); (noise, None) or (noise, the
    OSError) when the disk refused it."""
    noise = tile_noise(acc.film)
    tmp = path.with_name(path.name + ".tmp")
    try:
        parts = acc.to_parts(noise)
        path.parent.mkdir(parents=True, exist_ok=True)
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
        try:
            _write_parts(fd, parts)
            if fsync:
                os.fsync(fd)
        finally:
            os.close(fd)
        _rename(tmp, path)
    except OSError as err:
        _unlink(tmp)
        return noise, err
    return noise, None


def _write_parts(fd: int, parts) -> None:
    """Write the byte pieces in order: one writev(2) where there is one (no joined copy of a
    tile's 491 KB), else one write at a time; a short write goes on where it stopped."""
    views = [v for v in (memoryview(p).cast("B") for p in parts) if len(v)]
    if not hasattr(os, "writev"):
        for view in views:
            while view:
                view = view[os.write(fd, view):]
        return
    while views:
        done = os.writev(fd, views[:_IOV_MAX])
        while views and done >= len(views[0]):
            done -= len(views.pop(0))
        if done:
            views[0] = views[0][done:]


def _iov_max() -> int:
    """Pieces one writev(2) takes: the system's IOV_MAX (1024 on Linux), at least POSIX's 16
    (_XOPEN_IOV_MAX) where the system does not say."""
    try:
        return max(16, os.sysconf("SC_IOV_MAX"))
    except (AttributeError, ValueError, OSError):
        return 16


_IOV_MAX = _iov_max()


def _rename(tmp: Path, path: Path) -> None:
    os.replace(tmp, path)  # atomic on POSIX and Windows: readers see the old file or the new


def _unlink(path: Path) -> None:
    try:
        path.unlink()
    except OSError:
        pass
