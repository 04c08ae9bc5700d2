"""The render kernels never read or write outside their arrays: small scenes of the suite are
rendered by a debug build of the kernels (numba's NUMBA_BOUNDSCHECK=1, which turns every array
access into a checked one raising IndexError) in a subprocess with a cache folder of its own, so
that the checked build never mixes with the normal one (numba's cache index does not record the
flag).

The scenes cover the empty ends of every table: no instance at all (an empty top level), no
light (an empty light list), no texture (an empty image list), the environment alone, punctual
lights with nothing to light, and the demo's glTF scene (textures, animation, lights, glass).
The first run compiles the checked kernels (a few minutes on two busy cores); later runs load
them from `<LAMPYR_CACHE>/numba-boundscheck/<source key>`.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from tests.conftest import TINY_SHOT

ROOT = Path(__file__).resolve().parents[2]

HEAD = """name = "bounds"
frames = 1
[image]
width = 12
height = 8
[sampling]
samples = 2
bounces = 4
[camera]
position = [0.0, 1.0, 4.0]
target = [0.0, 0.8, 0.0]
"""
SCENES = {
    "nothing at all": HEAD,
    "environment only": HEAD + "[environment]\ncolor = [0.2, 0.25, 0.3]\n",
    "a point light and nothing to light": HEAD + '[[light]]\nname = "p"\ntype = "point"\nposition = [0, 2, 0]\n'
                                                 "intensity = 5.0\n",
    "a sphere and no light": HEAD + '[[material]]\nname = "w"\ntype = "diffuse"\n'
                                    '[[object]]\nname = "b"\nmaterial = "w"\nsphere = { center = [0, 0.8, 0], radius = 0.8 }\n',
    "a textured mesh under a sky map": HEAD + '[environment]\nmap = "sky.exr"\n'
                                              '[[object]]\nname = "m"\nmesh = "m.obj"\n',
}

RENDER = """
import sys
import numpy as np
from lampyr.engine.render import render_frame
from lampyr.engine.shot import load_shot

for path in sys.argv[1:]:
    shot = load_shot(path)
    film = render_frame(shot, shot.first_frame, tile_size=8)
    assert np.isfinite(film.rgb_sum).all(), path
    print("rendered", path, flush=True)
"""


def _assets(folder: Path) -> None:
    import numpy as np
    import OpenEXR

    from examples.gltf_builder import png_bytes

    (folder / "m.obj").write_text("mtllib m.mtl\nv -1 0 -1\nv 1 0 -1\nv 1 0 1\nv -1 0 1\nvt 0 0\nvt 1 0\nvt 1 1\n"
                                  "vt 0 1\nvn 0 1 0\nusemtl paint\nf 1/1/1 3/3/1 2/2/1\nf 1/1/1 4/4/1 3/3/1\n")
    (folder / "m.mtl").write_text("newmtl paint\nmap_Kd t.png\nKe 0.5 0.5 0.5\nmap_Ke t.png\n")
    (folder / "t.png").write_bytes(png_bytes(np.arange(4 * 4 * 4, dtype=np.uint8).reshape(4, 4, 4) * 3))
    sky = np.linspace(0.1, 2.0, 8 * 16 * 3).reshape(8, 16, 3).astype(np.float32)
    with OpenEXR.File({"compression": OpenEXR.ZIP_COMPRESSION, "type": OpenEXR.scanlineimage},
                      {"RGB": sky}) as f:
        f.write(str(folder / "sky.exr"))


@pytest.mark.boundscheck
def test_small_scenes_render_inside_their_arrays(tmp_path):
    from lampyr.engine import SOURCE_KEY, cache_root

    shots = []
    for i, (name, text) in enumerate({**SCENES, "the tiny farm shot": TINY_SHOT}.items()):
        folder = tmp_path / f"scene{i}"
        folder.mkdir()
        _assets(folder)
        (folder / "shot.toml").write_text(text)
        shots.append(folder / "shot.toml")
    demo = tmp_path / "demo"  # the demo's glTF courtyard, made tiny
    (demo / "assets").mkdir(parents=True)
    for f in (ROOT / "examples" / "courtyard" / "assets").iterdir():
        (demo / "assets" / f.name).write_bytes(f.read_bytes())
    text = (ROOT / "examples" / "courtyard" / "courtyard.toml").read_text()
    for old, new in (("width = 256", "width = 16"), ("height = 144", "height = 9"), ("samples = 8", "samples = 1"),
                     ("frames = [1, 48]", "frames = [1, 2]")):
        assert old in text
        text = text.replace(old, new)
    (demo / "courtyard.toml").write_text(text)
    shots.append(demo / "courtyard.toml")

    env = dict(os.environ, NUMBA_BOUNDSCHECK="1",
               NUMBA_CACHE_DIR=str(cache_root() / "numba-boundscheck" / SOURCE_KEY))
    res = subprocess.run([sys.executable, "-c", RENDER, *map(str, shots)], env=env, capture_output=True,
                         text=True, timeout=1800, cwd=tmp_path)
    # a kernel reading past an array raises IndexError here (exit 1), or crashes (a negative status)
    assert res.returncode == 0, res.stderr[-3000:]
    assert res.stdout.count("rendered") == len(shots), res.stdout
