"""The compiled kernels are kept by the engine's contents, not by where the checkout lies.

A fresh clone of the same sources at another path must find the kernels a first clone compiled
(otherwise every new checkout, CI run or upgrade in a new folder compiles for minutes).
"""

import os
import subprocess
import sys
import textwrap
from pathlib import Path

from lampyr import engine
from lampyr.engine import sampler


def test_cache_folder_is_the_source_key_folder_not_a_path_hash():
    from numba.core import config

    jitted = [obj for obj in vars(sampler).values() if hasattr(obj, "_cache")]
    assert jitted, "expected cached numba functions in engine/sampler.py"
    for function in jitted:
        path = function._cache._cache_path
        assert path == os.path.join(config.CACHE_DIR, "engine"), path


def test_source_key_names_the_cache_folder():
    assert engine.NUMBA_CACHE_DIR.name == engine.SOURCE_KEY
    assert engine.NUMBA_CACHE_DIR.parent == engine.cache_root() / "numba"


def test_a_copy_of_the_engine_elsewhere_uses_the_same_folder(tmp_path):
    # A copy of engine/ at another path, imported in a fresh interpreter, names the same folder.
    copy = tmp_path / "elsewhere" / "lampyr_copy"
    copy.mkdir(parents=True)
    source = Path(engine.__file__).parent
    for path in source.glob("*.py"):
        (copy / path.name).write_bytes(path.read_bytes())
    script = textwrap.dedent(
        """
        import sys
        sys.path.insert(0, sys.argv[1])
        import lampyr_copy, lampyr_copy.sampler as module
        from numba.core import config
        paths = {f._cache._cache_path for f in vars(module).values() if hasattr(f, "_cache")}
        print(lampyr_copy.NUMBA_CACHE_DIR)
        print(sorted(paths))
        """
    )
    env = {k: v for k, v in os.environ.items() if k != "NUMBA_CACHE_DIR"}
    out = subprocess.run([sys.executable, "-c", script, str(copy.parent)], env=env,
                         capture_output=True, text=True, check=True).stdout.split("\n")
    assert out[0] == str(engine.NUMBA_CACHE_DIR)
    assert out[1] == repr([str(engine.NUMBA_CACHE_DIR / "engine")])
