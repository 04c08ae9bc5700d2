"""The demo's committed assets are exactly what the asset script makes."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
ASSETS = ROOT / "examples" / "courtyard" / "assets"


@pytest.fixture(scope="module")
def fresh(tmp_path_factory):
    out = tmp_path_factory.mktemp("assets")
    subprocess.run([sys.executable, str(ROOT / "examples" / "make_assets.py"), "--out", str(out)],
                   check=True, capture_output=True)
    return out


@pytest.mark.parametrize("name", sorted(p.name for p in ASSETS.glob("*.obj")))
def test_committed_mesh_matches_the_script(fresh, name):
    assert (fresh / name).read_bytes() == (ASSETS / name).read_bytes()


def test_committed_sky_matches_the_script(fresh):
    import numpy as np
    import OpenEXR

    def pixels(path):
        with OpenEXR.File(str(path), separate_channels=True) as f:
            return {k: np.array(v.pixels) for k, v in f.channels().items()}

    a, b = pixels(fresh / "dusk_sky.exr"), pixels(ASSETS / "dusk_sky.exr")
    assert a.keys() == b.keys() == {"R", "G", "B"}
    for k in a:
        assert np.array_equal(a[k], b[k])
