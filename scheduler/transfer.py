"""Scene files in Redis: content-addressed, one by one, large ones in chunks, streamed at both ends.

A submitted scene is a **manifest** plus **blobs**:

- every file the shot uses (`Shot.files()`) and the shot file itself is read from disk
  `CHUNK_BYTES` at a time; each chunk is stored once under `blob:<sha256 of the chunk>`, so equal
  bytes — the same texture in another shot, or submitted again — are stored and sent once;
- the manifest (`scene:<sha256 of its bytes>`, compact sorted JSON) lists every file by its path
  relative to the shot's folder, size, sha256 and chunk hashes, and names the shot file; a job
  names the manifest's hash (`RenderTask.bundle`).

The submitter asks Redis which chunks it already holds (EXPIRE in a pipeline: 1 = held, and its
life is renewed; 0 = absent) and sends only the others, holding at most about two chunks in
memory. A worker (worker/cache.py) fetches only the files its cache lacks, chunk by chunk into a
temporary file, checking every chunk's hash and the whole file's.

Chunk size: 16 MiB. Redis serves one command at a time, so a chunk must be short enough that
the heartbeats and the head's commands queued behind a GET or SET wait a few milliseconds, not
seconds, and small enough that a transfer's memory stays near one chunk; it must be large enough
that a multi-GB texture set costs a few hundred keys and round trips, not tens of thousands.
16 MiB (a 256 MB texture in 16 chunks; 3 GB in about 200) sits well inside both (rule of thumb).

Life of the keys (bounded growth): every `scene:`/`blob:` key carries a TTL (`FILE_TTL`, 6 h).
Whoever needs a key renews it: the submitter while it checks and sends, the head at submit and
then every `FILE_REFRESH` for each job not yet finished (`hold`), restoring any key Redis lost
from its own copy of the job's files. When a job ends, the head deletes the keys no unfinished job
needs (scenes.py), except a key renewed since the head's own last renewal: a submitter may have
just found it present, so it is left to expire `FILE_TTL` after that renewal. A job refined or
retried later gets its keys back from the head's copy at the next refresh.

Escape checks at submit: paths relative to the shot's folder (no absolute names, no `..`),
regular files only, a link only when its target lies inside the shot's folder (sent under the
link's name with the target's bytes), at most `MAX_FILES` files and `MAX_BYTES` in total. The
receiving side checks the same on the manifest before it writes anything.
"""

from __future__ import annotations

import hashlib
import json
import re
import stat
from dataclasses import dataclass
from pathlib import Path, PurePosixPath

from ..errors import LampyrError
from . import protocol as P

CHUNK_BYTES = 16 * 1024**2  # see the module docstring
MAX_CHUNK_BYTES = 64 * 1024**2  # the largest chunk a manifest may declare (memory per fetch)
MAX_FILES = 10_000
MAX_BYTES = 64 * 1024**3  # a scene's total size (rule of thumb: far above a textured set)
MAX_MANIFEST_BYTES = 16 * 1024**2
MANIFEST_VERSION = 1
_HEX = re.compile(r"[0-9a-f]{64}")


class TransferError(LampyrError):
    """A scene that cannot be sent, or whose manifest or bytes are refused when received."""

    exit_code = 2


class FarmFull(LampyrError):
    """The farm's Redis has no room for a scene's files now (its `maxmemory`)."""

    exit_code = 1


ROOM_SHARE = 0.8  # scenes may fill Redis to this share of maxmemory; the rest is for the queue
#                   and the workers' results (rule of thumb), which must never be refused


def _full(used: int, cap: int, need: int) -> FarmFull:
    gib = 1 << 30
    return FarmFull(f"the farm is full: its Redis holds {used / gib:.2f} GiB of "
                    f"{cap / gib:.2f} GiB and this shot needs {need / gib:.2f} GiB more; wait for "
                    f"jobs to finish (their files leave {P.FILE_TTL // 3600} h after), or give the "
                    "head more memory (`lampyr head --redis-memory`)")


def check_room(r, need: int) -> None:
    """Refuse (FarmFull) when `need` more bytes would take Redis past ROOM_SHARE of its cap."""
    info = r.info("memory")
    cap, used = int(info.get("maxmemory") or 0), int(info.get("used_memory") or 0)
    if cap and used + need > ROOM_SHARE * cap:
        raise _full(used, cap, need)


def _refused_for_memory(r, err, need: int):
    """An OOM answer from Redis (past maxmemory, noeviction) as FarmFull; anything else as is.
    redis-py raises OutOfMemoryError for it (the answer's "OOM" prefix removed)."""
    if not (isinstance(err, redis_errors().OutOfMemoryError) or str(err).startswith("OOM")):
        return err
    info = r.info("memory")
    return _full(int(info.get("used_memory") or 0), int(info.get("maxmemory") or 0), need)


def check_sha(sha, what: str = "hash") -> str:
    """`sha` if it is 64 lowercase hex digits (it names files and keys); TransferError otherwise."""
    if not isinstance(sha, str) or not _HEX.fullmatch(sha):
        raise TransferError(f"{what}: expected a sha256 of 64 hex digits, got {str(sha)[:80]!r}")
    return sha


def safe_name(name) -> PurePosixPath:
    """A scene member's shot-relative path, refused when absolute or leaving the shot's folder."""
    if not isinstance(name, str) or not name:
        raise TransferError(f"scene member {name!r}: expected a relative file path")
    path = PurePosixPath(name)
    if path.is_absolute() or name.startswith("\\") or ":" in path.parts[0]:
        raise TransferError(f"scene member {name!r}: absolute paths are refused")
    if ".." in path.parts or not path.parts or "\\" in name or "\0" in name:
        raise TransferError(f"scene member {name!r}: paths leaving the shot's folder are refused")
    return path


# ---------------------------------------------------------------------------------------------
# the manifest


@dataclass(frozen=True)
class Entry:
    """One file of a scene: shot-relative POSIX path, size in bytes, sha256 of the whole file
    and of each chunk (in order; none for an empty file)."""

    path: str
    size: int
    sha256: str
    chunks: tuple


@dataclass(frozen=True)
class Manifest:
    """shot: the shot file's path among `files`; chunk_bytes: every chunk's size but each file's
    last; files: Entries sorted by path."""

    shot: str
    chunk_bytes: int
    files: tuple

    def to_bytes(self) -> bytes:
        d = {"lampyr_scene": MANIFEST_VERSION, "shot": self.shot, "chunk_bytes": self.chunk_bytes,
             "files": [{"path": e.path, "size": e.size, "sha256": e.sha256,
                        "chunks": list(e.chunks)} for e in self.files]}
        return json.dumps(d, sort_keys=True, separators=(",", ":")).encode()

    @property
    def total_bytes(self) -> int:
        return sum(e.size for e in self.files)

    def blobs(self) -> list[str]:
        """Every chunk hash, each once, in file order."""
        return list(dict.fromkeys(c for e in self.files for c in e.chunks))

    @classmethod
    def from_bytes(cls, data: bytes, sha: str | None = None, max_files: int = MAX_FILES,
                   max_bytes: int = MAX_BYTES) -> "Manifest":
        """Parse and check a manifest (`sha`, when given, must be the hash of `data`): member
        names, limits, chunk counts that agree with sizes, no name both a file and a folder."""
        name = f"scene {sha[:12]}" if sha else "scene manifest"
        if sha is not None and hashlib.sha256(data).hexdigest() != sha:
            raise TransferError(f"{name}: the manifest does not match its hash")
        if len(data) > MAX_MANIFEST_BYTES:
            raise TransferError(f"{name}: the manifest is larger than {MAX_MANIFEST_BYTES} bytes")
        try:
            d = json.loads(data)
            if d.get("lampyr_scene") != MANIFEST_VERSION:
                raise TransferError(f"{name}: expected manifest version {MANIFEST_VERSION}, got "
                                    f"{str(d.get('lampyr_scene'))[:20]}")
            step = d["chunk_bytes"]
            rows = d["files"]
            shot = d["shot"]
            if not (isinstance(step, int) and 0 < step <= MAX_CHUNK_BYTES):
                raise TransferError(f"{name}: chunk_bytes must be 1 to {MAX_CHUNK_BYTES}")
            if not isinstance(rows, list) or len(rows) > max_files:
                raise TransferError(f"{name}: more than {max_files} files")
            files, total = [], 0
            for i, row in enumerate(rows):
                path, size = str(safe_name(row["path"])), row["size"]
                if not isinstance(size, int) or size < 0:
                    raise TransferError(f"{name}: files[{i}].size must be a whole number ≥ 0")
                total += size
                if total > max_bytes:
                    raise TransferError(f"{name}: more than {max_bytes} bytes in total")
                chunks = tuple(check_sha(c, f"{name}: files[{i}].chunks") for c in row["chunks"])
                if len(chunks) != -(-size // step):
                    raise TransferError(f"{name}: files[{i}] ({path}) has {len(chunks)} chunks "
                                        f"for {size} bytes in chunks of {step}")
                files.append(Entry(path, size, check_sha(row["sha256"], f"{name}: files[{i}]"),
                                   chunks))
        except TransferError:
            raise
        except (ValueError, KeyError, TypeError, AttributeError, RecursionError) as err:
            raise TransferError(f"{name}: not a readable manifest ({type(err).__name__}: "
                                f"{str(err)[:80]})") from None
        paths = [e.path for e in files]
        if len(set(paths)) != len(paths):
            raise TransferError(f"{name}: a file is listed twice")
        folders = {str(p) for e in files for p in PurePosixPath(e.path).parents}
        clash = set(paths) & folders
        if clash:
            raise TransferError(f"{name}: member {min(clash)!r} is both a file and a folder")
        if shot not in paths:
            raise TransferError(f"{name}: names shot {str(shot)[:80]!r} but does not hold it")
        return cls(shot, step, tuple(sorted(files, key=lambda e: e.path)))


# ---------------------------------------------------------------------------------------------
# sending


def scene_files(shot, max_files: int = MAX_FILES, max_bytes: int = MAX_BYTES) -> list:
    """[(shot-relative POSIX path, absolute resolved path)] of the shot file and every file it
    uses, sorted by path, checked (see the module docstring) before anything is sent."""
    shot_path, root = _shot_and_root(shot)
    rels = [shot_path.relative_to(root).as_posix()] + list(shot.files())
    if len(set(rels)) > max_files:
        raise TransferError(f"{shot_path.name}: the shot uses more than {max_files} files")
    out, total = {}, 0
    for rel in sorted(set(rels)):
        safe_name(rel)
        path = root / rel
        target = path.resolve()
        if not target.is_relative_to(root):
            raise TransferError(f"{rel}: a link to {target}, outside the shot's folder {root}; "
                                "copy the file into the folder instead")
        try:
            st = target.stat()
        except OSError as err:
            raise TransferError(f"{rel}: cannot be read ({err.strerror})") from None
        if not stat.S_ISREG(st.st_mode):
            raise TransferError(f"{rel}: only regular files are sent (not a folder or device)")
        total += st.st_size
        if total > max_bytes:
            raise TransferError(f"{shot_path.name}: the shot's files are more than {max_bytes} "
                                "bytes together")
        out[rel] = target
    return sorted(out.items())


def _shot_and_root(shot) -> tuple[Path, Path]:
    """The shot file and its folder (the folder its asset paths are relative to), resolved."""
    shot_path = Path(shot.path).resolve()
    root = Path(shot.root).resolve() if shot.root is not None else shot_path.parent
    if not shot_path.is_relative_to(root):
        raise TransferError(f"{shot_path}: the shot file lies outside its assets' folder {root}")
    return shot_path, root


@dataclass
class Sent:
    """What an upload did: chunks and bytes of the scene, and how many of them were new to Redis."""

    files: int = 0
    chunks: int = 0
    bytes: int = 0
    new_chunks: int = 0
    new_bytes: int = 0


class _Sender:
    """Chunks waiting to be checked against Redis and sent, a few at a time (one round trip of
    EXPIREs, one of SETs), so that at most `hold` bytes wait in memory."""

    def __init__(self, r, ttl: int, hold: int, sent: Sent):
        self.r, self.ttl, self.hold, self.sent = r, int(ttl), hold, sent
        self.waiting: list[tuple[str, bytes]] = []
        self.size = 0
        self.seen: set[str] = set()

    def add(self, sha: str, data: bytes) -> None:
        self.sent.chunks += 1
        self.sent.bytes += len(data)
        if sha in self.seen:  # the same bytes twice in one scene
            return
        self.seen.add(sha)
        self.waiting.append((sha, data))
        self.size += len(data)
        if self.size >= self.hold or len(self.waiting) >= 512:
            self.flush()

    def flush(self) -> None:
        if not self.waiting:
            return
        pipe = self.r.pipeline(transaction=False)
        for sha, _ in self.waiting:
            pipe.expire(P.k_blob(sha), self.ttl)  # 1: held (and renewed), 0: absent
        held = pipe.execute()
        new = [(sha, data) for (sha, data), there in zip(self.waiting, held) if not there]
        need = sum(len(data) for _, data in new)
        if need:
            check_room(self.r, need)
        pipe = self.r.pipeline(transaction=False)
        for sha, data in new:
            pipe.set(P.k_blob(sha), data, ex=self.ttl)
            self.sent.new_chunks += 1
            self.sent.new_bytes += len(data)
        try:
            pipe.execute()
        except redis_errors().ResponseError as err:
            raise _refused_for_memory(self.r, err, need) from None
        self.waiting, self.size = [], 0


def _read_chunks(path: Path, step: int, rel: str):
    """(sha256 of chunk, chunk) for each `step` bytes of the file, read as it goes."""
    try:
        with open(path, "rb") as fh:
            while data := fh.read(step):
                yield hashlib.sha256(data).hexdigest(), data
    except OSError as err:
        raise TransferError(f"{rel}: cannot be read ({err.strerror})") from None


def _send_file(sender: _Sender, rel: str, path: Path, step: int) -> Entry:
    whole = hashlib.sha256()
    chunks, size = [], 0
    for sha, data in _read_chunks(path, step, rel):
        whole.update(data)
        size += len(data)
        chunks.append(sha)
        sender.add(sha, data)
    return Entry(rel, size, whole.hexdigest(), tuple(chunks))


def upload_shot(r, shot, chunk_bytes: int = CHUNK_BYTES, ttl: int = P.FILE_TTL,
                max_files: int = MAX_FILES, max_bytes: int = MAX_BYTES) -> tuple[str, str, Sent]:
    """Send a loaded `Shot`'s files to Redis → (manifest sha256, shot path in the scene, Sent).

    Files are streamed from disk chunk by chunk; only chunks Redis lacks are sent."""
    files = scene_files(shot, max_files, max_bytes)
    shot_path, root = _shot_and_root(shot)
    shot_rel = shot_path.relative_to(root).as_posix()
    sent = Sent(files=len(files))
    sender = _Sender(r, ttl, chunk_bytes, sent)
    entries = [_send_file(sender, rel, path, chunk_bytes) for rel, path in files]
    sender.flush()
    if sum(e.size for e in entries) > max_bytes:  # a file grew while it was read
        raise TransferError(f"{shot_rel}: the shot's files are more than {max_bytes} bytes "
                            "together")
    data = Manifest(shot_rel, chunk_bytes, tuple(entries)).to_bytes()
    sha = hashlib.sha256(data).hexdigest()
    try:
        r.set(P.k_scene(sha), data, ex=int(ttl))
    except redis_errors().ResponseError as err:
        raise _refused_for_memory(r, err, len(data)) from None
    return sha, shot_rel, sent


def redis_errors():
    import redis

    return redis.exceptions


# ---------------------------------------------------------------------------------------------
# receiving


def read_manifest(r, sha: str) -> tuple[Manifest, bytes]:
    """The checked manifest `scene:<sha>` and its bytes; TransferError when Redis lacks it."""
    check_sha(sha, "scene")
    data = r.get(P.k_scene(sha))
    if data is None:
        raise TransferError(f"scene {sha[:12]} is not in Redis (its files expire "
                            f"{P.FILE_TTL // 3600} h after their last use): submit the shot again")
    return Manifest.from_bytes(data, sha), data


def fetch_file(r, entry: Entry, chunk_bytes: int, out) -> int:
    """Write `entry`'s bytes to the binary file `out`, chunk by chunk, checking each chunk's
    size and hash and then the whole file's; returns the bytes written. One chunk in memory."""
    whole = hashlib.sha256()
    done = 0
    for i, sha in enumerate(entry.chunks):
        data = r.get(P.k_blob(sha))
        where = f"scene file {entry.path}: chunk {i + 1} of {len(entry.chunks)} ({sha[:12]})"
        if data is None:
            raise TransferError(f"{where} is not in Redis (its files expire {P.FILE_TTL // 3600} h "
                                "after their last use): submit the shot again")
        want = min(chunk_bytes, entry.size - done)
        if len(data) != want:
            raise TransferError(f"{where} holds {len(data)} bytes, expected {want}")
        if hashlib.sha256(data).hexdigest() != sha:
            raise TransferError(f"{where} does not match its hash")
        whole.update(data)
        out.write(data)
        done += len(data)
    if whole.hexdigest() != entry.sha256:
        raise TransferError(f"scene file {entry.path}: its bytes do not match its hash")
    return done


def hold(r, manifest_bytes: bytes, folder: Path, ttl: int = P.FILE_TTL) -> int:
    """Renew the life of a scene's keys, and put back any Redis lost from `folder` (the scene as
    materialised on this disk); returns the bytes put back."""
    m = Manifest.from_bytes(manifest_bytes)
    sha = hashlib.sha256(manifest_bytes).hexdigest()
    blobs = m.blobs()
    pipe = r.pipeline(transaction=False)
    pipe.expire(P.k_scene(sha), int(ttl))
    for c in blobs:
        pipe.expire(P.k_blob(c), int(ttl))
    held = pipe.execute()
    missing = {c for c, there in zip(blobs, held[1:]) if not there}
    restored = 0
    for e in m.files:
        if not missing.intersection(e.chunks):
            continue
        for i, (c, data) in enumerate(_read_chunks(Path(folder) / e.path, m.chunk_bytes, e.path)):
            if i >= len(e.chunks) or c != e.chunks[i]:
                raise TransferError(f"{Path(folder) / e.path}: changed on disk since it was "
                                    "submitted; cannot put it back into Redis")
            if c in missing:
                r.set(P.k_blob(c), data, ex=int(ttl))
                missing.discard(c)
                restored += len(data)
    if not held[0]:
        r.set(P.k_scene(sha), manifest_bytes, ex=int(ttl))
        restored += len(manifest_bytes)
    return restored
