"""Scene bundles on a worker: fetched from Redis once, unpacked (with escape checks) into a
folder named by their hash, and kept; compiled geometry is kept per process.

Folder: `$LAMPYR_CACHE/bundles/<sha256>/` (see `lampyr.engine.cache_root`). Two processes that
fetch the same bundle at once both unpack into private folders and rename; the loser's copy is
discarded, the contents being identical by construction.
"""

from __future__ import annotations

import json
from pathlib import Path

from ..scheduler import protocol as P
from ..scheduler.bundle import unpack


def bundle_root() -> Path:
    from ..engine import cache_root

    return cache_root() / "bundles"


class BundleCache:
    """Shots and renderers of the bundles this process has seen.

    r: a redis client; root: where unpacked bundles live.
    """

    def __init__(self, r, root: Path | None = None):
        self.r = r
        self.root = Path(root) if root is not None else bundle_root()
        self.fetches = 0
        self._shots: dict = {}
        self._geometry: dict = {}
        self._renderer = None
        self._renderer_key = None

    def folder(self, sha: str) -> Path:
        path = self.root / sha
        if not path.exists():
            data = self.r.get(P.k_bundle(sha))
            if data is None:
                raise LookupError(f"bundle {sha[:12]} is not in Redis")
            self.fetches += 1
            self.root.mkdir(parents=True, exist_ok=True)
            unpack(data, path, sha=sha)
        return path

    def shot(self, sha: str, member: str, overrides: dict):
        from ..engine.shot import load_shot

        key = (sha, member, json.dumps(overrides, sort_keys=True))
        if key not in self._shots:
            spec = load_shot(self.folder(sha) / member)
            o = dict(overrides)
            if "frames" in o:
                o["frames"] = tuple(o["frames"])
            self._shots[key] = spec.with_overrides(**o) if o else spec
        return key, self._shots[key]

    def renderer(self, sha: str, member: str, overrides: dict, frame: int):
        """A FrameRenderer for this frame, reusing the process's compiled geometry."""
        from ..engine.compiler import compile_geometry
        from ..engine.render import FrameRenderer

        key, spec = self.shot(sha, member, overrides)
        if (key, frame) != self._renderer_key:
            # geometry depends on the scene's files and objects, not on image size, samples or
            # frame range: jobs of one bundle with other overrides share it
            gkey = (sha, member)
            if gkey not in self._geometry:
                self._geometry = {gkey: compile_geometry(spec)}  # one scene at a time in memory
            self._renderer = FrameRenderer(spec, frame, self._geometry[gkey])
            self._renderer_key = (key, frame)
        return self._renderer
