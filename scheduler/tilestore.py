"""The head's tile accumulators in memory, written to disk in groups (group commit).

Merging a batch used to read its tile's float64 file, add the film and rewrite the file with an
fsync of its own: about 12 ms a batch on a 64 × 64 tile, most of it the read, the rewrite and the
fsync. A `TileStore` keeps recently merged tiles in memory (bounded by `cap_bytes`, least
recently used first out), so a merge is an addition in memory, and `commit()` writes every tile
merged into since the last commit together: each file written over a spare file beside it,
fsynced and exchanged with it in one step (`file_swap.py`: no blocks allocated or freed, which
was most of a write's cost), several files at once on threads (they mostly wait on the disk),
then each folder fsynced once. The caller (the results owner, `results.py`) removes the
workers' notices only after `commit()` has returned with their tiles on disk, so
docs/design.md, invariant 4 holds per group: a head killed at any moment finds every notice
whose tile is not on disk still in `results:processing`, and replays it; a tile that was
replaced before the kill already holds the notice's range, so the replay
changes nothing (docs/design.md, invariant 3). Every file is replaced whole (an exchange of names
or a rename), never half.

A tile keeps its spare file while it is in memory; the spare goes when the tile leaves memory and
at `close()`. The frame writer's thread may read a tile file not in memory (`film()`) while the
loop merges into that tile and writes it: a write finishing while such a read is on drops its
spare, as the spare is then the file being read (`file_swap.py`).

A tile whose file could not be written (an OSError: a full disk, a folder become a file) is
dropped from memory, so its next merge starts again from what its file holds; `commit()` returns
those tiles with their errors and the caller keeps their notices.

`noise` (the tile's mean relative noise, `accumulator.tile_noise`) is computed once per tile and
commit, not at every merge, and handed to the owner's `on_commit` callback.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

from . import file_swap
from .accumulator import TileAccumulator, fsync_folder, tile_noise

# bytes of tile films kept in memory (rule of thumb: ~250 64 × 64 float64 tiles of 688 KB, a
# 1024 × 1024 frame's worth; a farm head has memory to spare, a render machine has the workers)
CAP_BYTES = 192 * 2**20
# tile files written at once: writing, fsyncing and renaming mostly wait on the disk (measured
# here: fsyncs 1.4–2 ms a file side by side against 5 ms one after the other)
WRITE_THREADS = 8


class TileStore:
    """Tile accumulators by path, kept in memory, written in groups.

    fsync: False skips every fsync (a scratch state folder no crash needs to find);
    spares: False writes each tile file new and renames it over the old one, keeping no spare
    (`file_swap.py`). `get`, `stage`, `commit` and `forget` are called from one thread (the
    head's loop); `film` may be called from another (the frame writer) at any time."""

    def __init__(self, cap_bytes: int = CAP_BYTES, fsync: bool = True, spares: bool = True):
        self.cap_bytes = int(cap_bytes)
        self.fsync = fsync
        self.spares = spares
        self._spared: set[Path] = set()  # tiles with a spare file beside them
        self._reading: dict[Path, int] = {}  # tile files being read by `film()` now
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
            if acc is None:  # a write meanwhile keeps no spare: it could be this file
                self._reading[path] = self._reading.get(path, 0) + 1
        if acc is not None:
            return acc.film
        try:
            return TileAccumulator.load(path, w, h).film
        finally:
            with self._lock:
                self._reading[path] -= 1
                if not self._reading[path]:
                    del self._reading[path]

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
            done = list(self._pool.map(self._write, items))
        else:
            done = [self._write(items[0])]
        failed: dict[Path, OSError] = {}
        noises, folders = {}, set()
        for (path, _), (noise, err) in zip(items, done):
            noises[path] = noise
            if err is None:
                folders.add(path.parent)
            else:
                failed[path] = err
        unsynced = set()
        if self.fsync:
            # a folder whose fsync failed may name the old files after a power cut: its tiles'
            # spares (those old files) must not be written over in place
            unsynced = {folder for folder in folders if not fsync_folder(folder)}
        with self._lock:
            for path in failed:
                self._drop(path)
            for path in [p for p in self._spared if p.parent in unsynced]:
                self._drop_spare(path)
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
        """Stop the writer threads and remove the spare files (the tiles stay in memory)."""
        if self._pool is not None:
            self._pool.shutdown(wait=True)
            self._pool = None
        with self._lock:
            spared, self._spared = self._spared, set()
        for path in spared:
            file_swap.drop_spare(path)

    def _write(self, item) -> tuple:
        """One tile of a commit, on a writer thread: (noise, None or the OSError)."""
        path, acc = item
        noise, err, kept = _write_tile(path, acc, self.fsync, self.spares)
        if kept:
            with self._lock:
                # a reader may hold the file that became the spare: it must not be written over
                kept = path not in self._reading and path in self._tiles
                if kept:
                    self._spared.add(path)
            if not kept:
                file_swap.drop_spare(path)
        return noise, err

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
        """Forget a tile (its file is the truth); its spare goes: a tile not in memory is not
        written until it is read again, and a spare kept meanwhile would only take disk."""
        if self._tiles.pop(path, None) is not None:
            self._bytes -= self._sizes.pop(path)
        self._drop_spare(path)

    def _drop_spare(self, path: Path) -> None:
        if path in self._spared:
            self._spared.discard(path)
            file_swap.drop_spare(path)


def _size(acc: TileAccumulator) -> int:
    film = acc.film
    if film is None:
        return 0
    return sum(getattr(film, f).nbytes for f in film.__dataclass_fields__
               if hasattr(getattr(film, f), "nbytes"))


def _write_tile(path: Path, acc: TileAccumulator, fsync: bool, use_spare: bool):
    """Replace one tile file (`file_swap.replace`); (noise, None, spare kept) or (noise, the
    OSError, False) when the disk refused it."""
    noise = tile_noise(acc.film)
    try:
        parts = acc.to_parts(noise)
        path.parent.mkdir(parents=True, exist_ok=True)
        kept = _replace(path, parts, fsync, use_spare)
    except OSError as err:
        return noise, err, False
    return noise, None, kept


_replace = file_swap.replace  # one name for the step the crash tests hold (tests/harness.py)
