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


def _install_checkout_free_locator() -> None:
    """Make numba keep the engine's kernels in one folder per source key, whatever the checkout.

    numba's own locator for a user-given cache folder adds a subfolder named by a hash of the
    source file's absolute path, so a fresh clone of the same sources compiled everything again
    (about three minutes). numba's freshness stamp is already a hash of the file's contents, and
    the folder above is keyed on every engine source, so the path adds nothing but misses.
    """
    try:
        from numba.core import caching, config
    except ImportError:  # pragma: no cover - reported at first use
        return

    class EngineCacheLocator(caching.UserProvidedCacheLocator):
        def __init__(self, py_func, py_file):
            super().__init__(py_func, py_file)
            self._cache_path = os.path.join(config.CACHE_DIR, "engine")

        @classmethod
        def from_function(cls, py_func, py_file):
            if Path(py_file).resolve().parent != _HERE:
                return None
            return super().from_function(py_func, py_file)

    classes = caching.CacheImpl._locator_classes
    if not any(c.__name__ == "EngineCacheLocator" for c in classes):
        classes.insert(0, EngineCacheLocator)


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

_install_checkout_free_locator()
