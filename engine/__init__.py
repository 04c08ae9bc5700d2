"""lampyr.engine: the path tracer every worker runs (pure: arrays in, arrays out).

Importing this package points numba's on-disk cache at a stable per-user folder keyed on a hash
of the engine's own sources. numba's cache does not notice when a jitted function in another
module changes, so a key over all sources is what keeps a stale kernel from being loaded.
"""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

_HERE = Path(__file__).resolve().parent


def _source_key() -> str:
    digest = hashlib.sha256()
    for path in sorted(_HERE.glob("*.py")):
        digest.update(path.name.encode())
        digest.update(path.read_bytes())
    return digest.hexdigest()[:16]


def cache_root() -> Path:
    """The folder under which compiled kernels are kept (`LAMPYR_CACHE` overrides)."""
    base = os.environ.get("LAMPYR_CACHE")
    if base:
        return Path(base)
    xdg = os.environ.get("XDG_CACHE_HOME")
    return (Path(xdg) if xdg else Path.home() / ".cache") / "lampyr"


SOURCE_KEY = _source_key()
NUMBA_CACHE_DIR = cache_root() / "numba" / SOURCE_KEY

if "NUMBA_CACHE_DIR" not in os.environ:
    os.environ["NUMBA_CACHE_DIR"] = str(NUMBA_CACHE_DIR)
    try:  # numba may already be imported (by a test runner, say): make it re-read the folder
        import sys

        if "numba" in sys.modules:
            from numba.core import config as _numba_config

            _numba_config.reload_config()
    except Exception:  # pragma: no cover - numba not importable is reported at first use
        pass
