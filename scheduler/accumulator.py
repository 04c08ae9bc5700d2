"""Per-tile accumulators on the head's disk: the truth about which batches are counted.

One file per (frame, tile) under `<job>/tiles/<frame>/<tile>.acc` holds the tile's merged film
and the sample ranges merged into it. A file is replaced atomically (written beside, fsynced,
renamed or exchanged with its spare: `file_swap.py`), so after a crash it holds either the ranges
before a merge or after it, never half.
A batch whose range the file already holds — or overlaps — is dropped: every batch counts once.

File layout: 8 bytes magic `LAMPACC1`, 4 bytes little-endian header length n, n bytes JSON header
`{"ranges": [[first, count], ...], "w": w, "h": h, "noise": e}`, then
`engine.film.to_bytes(film, MIXED)` (float64 radiance sums, float32 counts and guides; files
written before it hold float64 throughout and are still read).
`noise` (the tile's mean relative noise, see `tile_noise`; absent in files written before it
existed) lets a head start read only the headers (`read_header`), never the films.
"""

from __future__ import annotations

import json
import math
import os
import struct
from pathlib import Path

from ..errors import LampyrError

MAGIC = b"LAMPACC1"


class AccumulatorError(LampyrError):
    """A tile accumulator file that cannot be read."""


def overlaps(ranges, first: int, count: int) -> bool:
    return any(f < first + count and first < f + c for f, c in ranges)


def samples_held(ranges) -> int:
    return sum(c for _, c in ranges)


def fsync_folder(folder: Path) -> bool:
    """Make the renames inside `folder` durable; False when the system refused."""
    try:
        dfd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(dfd)
        finally:
            os.close(dfd)
    except OSError:
        return False
    return True


def write_atomic(path: Path, data: bytes, sync_folder: bool = True, mode: int = 0o644,
                 fsync: bool = True) -> None:
    """Replace `path` with `data` so readers see the old or the new bytes, never a mix.

    sync_folder=False leaves the folder's fsync to the caller (one for many files); fsync=False
    skips the file's fsync too (a file no crash needs to find: `lampyr render`'s scratch state)."""
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(path.name + ".tmp")
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, mode)
    try:
        with os.fdopen(fd, "wb") as f:
            if os.name == "posix":  # os.open's mode is for a new file only, not a stale .tmp
                os.fchmod(fd, mode)
            f.write(data)
            f.flush()
            if fsync:
                os.fsync(f.fileno())
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    os.replace(tmp, path)
    if sync_folder:
        fsync_folder(path.parent)


def tile_noise(film) -> float | None:
    """Mean over a tile's pixels of the relative standard error of its luminance
    (`Film.rel_noise`, what `refine --noise` compares with); None when unknown."""
    if film is None:
        return None
    from ..engine.film_noise import film_mean_rel_noise  # np.mean(film.rel_noise()), one pass

    value = film_mean_rel_noise(film)
    return round(value, 6) if math.isfinite(value) else None


def load_noise_kernel() -> None:
    """Load `tile_noise`'s compiled kernel now. A head renders nothing, so this is its process's
    first numba call, which sets up numba's compiler first (its typing registries, a BLAS
    check): in a profiled `lampyr render`, 1.7 s of the head's loop inside its first group
    commit, with no batch merged or sent meanwhile. The head's start pays it instead."""
    from ..engine.film import Film

    tile_noise(Film.zeros(2, 2))


_UNKNOWN = object()


def read_header(path: Path):
    """(ranges, noise) of a tile file from its header alone; ([], None) when it does not exist.
    noise is `_UNKNOWN` for a file written before headers carried it (the caller reads the film)."""
    try:
        with open(path, "rb") as f:
            start = f.read(12)
            if not start:
                return [], None
            if start[:8] != MAGIC or len(start) < 12:
                raise AccumulatorError(f"{path}: not a lampyr tile accumulator")
            (n,) = struct.unpack("<I", start[8:12])
            head = json.loads(f.read(n))
    except FileNotFoundError:
        return [], None
    except (ValueError, OSError) as err:
        raise AccumulatorError(f"{path}: unreadable tile accumulator ({err})") from None
    ranges = sorted((int(a), int(c)) for a, c in head["ranges"])
    return ranges, head.get("noise", _UNKNOWN)


def header_noise_known(noise) -> bool:
    return noise is not _UNKNOWN


class TileAccumulator:
    """The merged film of one tile and the sample ranges (first, count) it holds."""

    def __init__(self, path: Path, w: int, h: int, film=None, ranges=()):
        self.path = Path(path)
        self.w, self.h = int(w), int(h)
        self.film = film
        self.ranges: list[tuple[int, int]] = sorted((int(f), int(c)) for f, c in ranges)

    @classmethod
    def load(cls, path: Path, w: int, h: int) -> "TileAccumulator":
        """Read `path`, or an empty accumulator when it does not exist."""
        path = Path(path)
        try:
            data = path.read_bytes()
        except FileNotFoundError:
            return cls(path, w, h)
        return cls.from_bytes(path, data)

    @classmethod
    def from_bytes(cls, path: Path, data: bytes) -> "TileAccumulator":
        from ..engine.film import from_bytes

        if data[:8] != MAGIC:
            raise AccumulatorError(f"{path}: not a lampyr tile accumulator")
        (n,) = struct.unpack("<I", data[8:12])
        head = json.loads(data[12:12 + n])
        film = from_bytes(data[12 + n:])
        return cls(path, head["w"], head["h"], film, head["ranges"])

    def to_bytes(self, noise=_UNKNOWN) -> bytes:
        """noise: the film's `tile_noise` when the caller has it (else computed here)."""
        return b"".join(self.to_parts(noise))

    def to_parts(self, noise=_UNKNOWN) -> list:
        """`to_bytes` in pieces, the film's arrays uncopied (`engine.film.to_parts`)."""
        from ..engine.film import MIXED, to_parts  # float64 radiance sums, float32 the rest

        noise = tile_noise(self.film) if noise is _UNKNOWN else noise
        head = json.dumps({"ranges": self.ranges, "w": self.w, "h": self.h,
                           "noise": noise}).encode()
        return [MAGIC + struct.pack("<I", len(head)) + head] + to_parts(self.film, MIXED)

    def holds(self, first: int, count: int) -> bool:
        return overlaps(self.ranges, first, count)

    @property
    def samples(self) -> int:
        return samples_held(self.ranges)

    def add(self, film, first: int, count: int) -> bool:
        """Merge a batch's film in memory; False (and no change) when its range is held already."""
        from ..engine.film import merge

        if self.holds(first, count):
            return False
        self.film = film if self.film is None else merge(self.film, film)
        self.ranges = sorted(self.ranges + [(int(first), int(count))])
        return True

    def save(self, sync_folder: bool = True, noise=_UNKNOWN, fsync: bool = True) -> None:
        write_atomic(self.path, self.to_bytes(noise), sync_folder and fsync, fsync=fsync)
