"""Scene files on a worker (and on the head): a content-addressed file cache kept across jobs, and
per process the shots and compiled geometry of the scenes it renders.

Layout under `$LAMPYR_CACHE/files/` (see `lampyr.engine.cache_root`):

    objects/<ab>/<sha256>   a file's bytes, named by their sha256, read-only
    scenes/<sha256>/        a scene's folder (named by its manifest's hash): hard links into
                            objects/, or copies where a link cannot be made
    tmp/                    downloads in progress, renamed into objects/ once checked
    locks/<ab>              lock files, one per first two hex digits of a file's hash
    prune.lock

Only the files the cache lacks are fetched (scheduler/transfer.py checks every chunk and the
whole file). Several processes may fetch at once: a file is fetched and linked while its lock
file is held, so the pool processes of one worker wait for one download instead of making
several; a scene folder is built beside its final name and renamed into place, and the loser of
two renames drops its copy (the contents are identical by construction).

Pruning, after a fetch that brought new bytes: while the objects take more than the limit
(`LAMPYR_CACHE_LIMIT_GB`, default 20 — rule of thumb: a few textured scenes on a workstation's
disk), objects no scene folder links to go first, least recently used first; then the least
recently used scene folder, unless used within the last hour (a process may be reading it), and
so on. A file linked from outside the cache (the head's job folders) holds its bytes until that
link goes, and is not counted against anything else.
"""

from __future__ import annotations

import contextlib
import errno
import fcntl
import hashlib
import json
import os
import secrets
import shutil
import time
from dataclasses import dataclass
from pathlib import Path, PurePosixPath

from ..scheduler.transfer import check_sha, fetch_file, read_manifest

DEFAULT_LIMIT_GB = 20.0
IN_USE_SECONDS = 3600  # a scene folder used this recently is never pruned
STALE_SECONDS = 24 * 3600  # leftovers of killed processes in tmp/ go after this


def cache_limit() -> int:
    """The file cache's size limit in bytes: `LAMPYR_CACHE_LIMIT_GB` or 20 GB."""
    raw = os.environ.get("LAMPYR_CACHE_LIMIT_GB", "")
    try:
        gb = float(raw) if raw.strip() else DEFAULT_LIMIT_GB
    except ValueError:
        gb = DEFAULT_LIMIT_GB
    return int(max(gb, 0.0) * 1e9)


def files_root() -> Path:
    from ..engine import cache_root

    return cache_root() / "files"


@dataclass
class Fetched:
    """A materialised scene: its folder, the files and bytes fetched from Redis to make it, and
    the manifest's bytes (None when the folder was already there)."""

    path: Path
    files: int = 0
    bytes: int = 0
    manifest: bytes | None = None


class FileCache:
    """The content-addressed files under `root` (default `files_root()`); limit in bytes."""

    def __init__(self, root: Path | None = None, limit: int | None = None):
        self.root = Path(root) if root is not None else files_root()
        self.limit = cache_limit() if limit is None else int(limit)
        for sub in ("objects", "scenes", "tmp", "locks"):
            (self.root / sub).mkdir(parents=True, exist_ok=True)

    def object(self, sha: str) -> Path:
        return self.root / "objects" / sha[:2] / sha

    def scene_dir(self, sha: str) -> Path:
        return self.root / "scenes" / check_sha(sha, "scene")

    @contextlib.contextmanager
    def _locked(self, name: str, wait: bool = True):
        """Hold the lock file `locks/<name[:2]>` (or `name` itself when it ends in .lock);
        yields False when `wait` is off and another process holds it."""
        path = self.root / name if name.endswith(".lock") else self.root / "locks" / name[:2]
        with open(path, "a+b") as fh:
            try:
                fcntl.flock(fh, fcntl.LOCK_EX | (0 if wait else fcntl.LOCK_NB))
            except BlockingIOError:
                yield False
                return
            try:
                yield True
            finally:
                fcntl.flock(fh, fcntl.LOCK_UN)

    def _fetch(self, r, entry, chunk_bytes: int, obj: Path) -> None:
        """Stream one file from Redis into tmp/, check it, and rename it to `obj`."""
        tmp = self.root / "tmp" / f"{entry.sha256}.{os.getpid()}.{secrets.token_hex(4)}"
        try:
            with open(tmp, "wb") as out:
                fetch_file(r, entry, chunk_bytes, out)
                out.flush()
                os.fsync(out.fileno())  # never a short file under a checked name
            os.chmod(tmp, 0o444)
            obj.parent.mkdir(parents=True, exist_ok=True)
            os.replace(tmp, obj)
        finally:
            tmp.unlink(missing_ok=True)

    def materialise(self, r, sha: str, dest: Path | None = None) -> Fetched:
        """The folder of scene `sha` (default `scenes/<sha>`; the head passes its job folder),
        fetching only the files the cache lacks. TransferError when Redis lacks or garbles one."""
        dest = Path(dest) if dest is not None else self.scene_dir(sha)
        if dest.is_dir():
            _touch(dest)
            return Fetched(dest)
        m, raw = read_manifest(r, sha)
        out = Fetched(dest, manifest=raw)
        tree = dest.with_name(f"{dest.name}.part-{os.getpid()}-{secrets.token_hex(4)}")
        try:
            for e in m.files:
                target = tree.joinpath(*PurePosixPath(e.path).parts)
                target.parent.mkdir(parents=True, exist_ok=True)
                with self._locked(e.sha256):
                    obj = self.object(e.sha256)
                    if obj.exists():
                        _touch(obj)
                    else:
                        self._fetch(r, e, m.chunk_bytes, obj)
                        out.files += 1
                        out.bytes += e.size
                    _link_or_copy(obj, target)
            try:
                os.rename(tree, dest)
            except OSError as err:  # another process made it first: theirs is the same
                if err.errno not in (errno.EEXIST, errno.ENOTEMPTY) or not dest.is_dir():
                    raise
        finally:
            if tree.exists():
                shutil.rmtree(tree, ignore_errors=True)
        if out.files:
            self.prune(keep=(dest,))
        return out

    def _objects(self) -> list:
        """(last use, size, link count, path) of every object."""
        out = []
        for sub in (self.root / "objects").iterdir():
            for p in sub.iterdir():
                try:
                    st = p.stat()
                except FileNotFoundError:
                    continue
                out.append((st.st_mtime, st.st_size, st.st_nlink, p))
        return out

    def size(self) -> int:
        """Bytes the objects take (each file counted once, however many folders link it)."""
        return sum(size for _, size, _, _ in self._objects())

    def prune(self, keep=()) -> int:
        """Bring the objects under the limit (see the module docstring); `keep`: scene folders
        never removed now. Returns the bytes freed; 0 when another process is pruning."""
        with self._locked("prune.lock", wait=False) as mine:
            if not mine:
                return 0
            self._sweep()
            objs = self._objects()
            total = sum(o[1] for o in objs)
            if total <= self.limit:
                return 0
            keep = {Path(k).resolve() for k in keep}
            now = time.time()
            scenes = sorted((p.stat().st_mtime, p) for p in (self.root / "scenes").iterdir()
                            if ".part-" not in p.name and p.resolve() not in keep)
            scenes = [p for at, p in scenes if now - at > IN_USE_SECONDS]
            freed = 0
            while True:
                for _, size, nlink, path in sorted(objs, key=lambda o: o[0]):
                    if total <= self.limit:
                        break
                    if nlink > 1:
                        continue
                    with self._locked(path.name, wait=False) as got:
                        if got and path.exists() and path.stat().st_nlink == 1:
                            path.unlink()
                            total -= size
                            freed += size
                if total <= self.limit or not scenes:
                    return freed
                _remove_tree(scenes.pop(0), self.root / "tmp")
                objs = self._objects()
                total = sum(o[1] for o in objs)

    def _sweep(self) -> None:
        """Remove what killed processes left: downloads and half-built scene folders."""
        now = time.time()
        for folder in (self.root / "tmp", self.root / "scenes"):
            for p in folder.iterdir():
                if folder.name == "scenes" and ".part-" not in p.name:
                    continue
                try:
                    old = now - p.lstat().st_mtime > STALE_SECONDS
                except FileNotFoundError:
                    continue
                if old and p.is_dir():
                    shutil.rmtree(p, ignore_errors=True)
                elif old:
                    p.unlink(missing_ok=True)


def _touch(path: Path) -> None:
    try:
        os.utime(path)
    except OSError:
        pass


def _link_or_copy(src: Path, dst: Path) -> None:
    try:
        os.link(src, dst)
    except OSError:  # another filesystem, or links not allowed there
        shutil.copyfile(src, dst)


def _remove_tree(path: Path, tmp: Path) -> None:
    """Rename away first, so no process finds a half-removed scene folder under its name."""
    gone = tmp / f"gone-{path.name}-{secrets.token_hex(4)}"
    try:
        os.rename(path, gone)
    except OSError:
        return
    shutil.rmtree(gone, ignore_errors=True)


class SceneCache:
    """Shots and renderers of the scenes this process has seen, over a shared FileCache.

    r: a redis client; root: the file cache's folder (default `files_root()`).
    fetches / fetched_bytes: files and bytes this process fetched from Redis.
    """

    def __init__(self, r, root: Path | None = None, limit: int | None = None):
        self.r = r
        self.files = FileCache(root, limit)
        self.fetches = 0
        self.fetched_bytes = 0
        self._shots: dict = {}
        self._geometry: dict = {}
        self._renderer = None
        self._renderer_key = None

    def folder(self, sha: str) -> Path:
        got = self.files.materialise(self.r, sha)
        self.fetches += got.files
        self.fetched_bytes += got.bytes
        return got.path

    def shot(self, sha: str, member: str, overrides: dict):
        from ..engine.shot import load_shot
        from ..scheduler.transfer import safe_name

        key = (sha, member, json.dumps(overrides, sort_keys=True))
        if key not in self._shots:
            spec = load_shot(self.folder(sha).joinpath(*safe_name(member).parts))
            o = dict(overrides)
            if "frames" in o:
                o["frames"] = tuple(o["frames"])
            self._shots[key] = spec.with_overrides(**o) if o else spec
        else:
            _touch(self.files.scene_dir(sha))  # in use: not pruned
        return key, self._shots[key]

    def renderer(self, sha: str, member: str, overrides: dict, frame: int):
        """A FrameRenderer for this frame, reusing the process's compiled geometry."""
        from ..engine.compiler import compile_geometry
        from ..engine.render import FrameRenderer

        key, spec = self.shot(sha, member, overrides)
        if (key, frame) != self._renderer_key:
            # geometry depends on the scene's files and objects, not on image size, samples or
            # frame range: jobs of one scene with other overrides share it
            gkey = (sha, member)
            if gkey not in self._geometry:
                # one scene at a time in memory; its texels in one file that every pool process
                # of this machine maps (named by the scene's hash: same content, same file)
                member_key = hashlib.sha256(member.encode()).hexdigest()[:16]
                texels = self.files.scene_dir(sha) / f".texels-{member_key}.rgba8"
                self._geometry = {gkey: compile_geometry(spec, texture_file=texels)}
            self._renderer = FrameRenderer(spec, frame, self._geometry[gkey])
            self._renderer_key = (key, frame)
        return self._renderer
