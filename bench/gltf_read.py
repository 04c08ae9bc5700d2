"""glTF reading benchmark: how long read_gltf takes on a big scene file.

    python bench/gltf_read.py [--small] [--textures N]

Writes (into a temporary folder, with examples/gltf_builder.py) one .glb holding a grid mesh of
1 M vertices and 2 M triangles with normals and UVs, split into N primitives that share the
vertex accessors, one material and texture of 2048² each (default N = 20; PNG of blocky noise),
then prints the wall time of read_gltf (best of 3) and the size of the decoded images (RGBA,
8 bits per channel).
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
from tables import print_table  # noqa: E402  (bench/ is run as scripts, not a package)

from examples.gltf_builder import GltfBuilder, tex  # noqa: E402
from lampyr.engine.gltf_read import read_gltf  # noqa: E402


def grid(n: int):
    """An n x n vertex grid: positions (n², 3), normals, uvs, faces (2 (n-1)², 3)."""
    u, v = np.meshgrid(np.linspace(0.0, 1.0, n), np.linspace(0.0, 1.0, n))
    pos = np.stack([u.ravel(), v.ravel(), 0.1 * np.sin(9.0 * u.ravel())], axis=1)
    i = np.arange(n * n).reshape(n, n)
    faces = np.stack([i[:-1, :-1], i[:-1, 1:], i[1:, 1:], i[:-1, :-1], i[1:, 1:], i[1:, :-1]], -1).reshape(-1, 3)
    return pos, np.tile([0.0, 0.0, 1.0], (n * n, 1)), pos[:, :2].copy(), faces


def write_scene(folder: Path, n: int, textures: int, size: int) -> Path:
    rng = np.random.default_rng(1)
    b = GltfBuilder()
    pos, nrm, uv, faces = grid(n)
    mats = []
    for k in range(textures):
        img = np.repeat(np.repeat(rng.integers(0, 256, (size // 16, size // 16, 3)), 16, 0), 16, 1).astype(np.uint8)
        mats.append(b.add_material(f"m{k}", base_color_tex=tex(b.add_texture(b.add_image(img)))))
    # one set of vertex accessors, one primitive (own indices and material) per texture
    parts = np.array_split(faces, max(len(mats), 1))
    first = b.primitive(pos, nrm, uv, indices=parts[0], material=mats[0] if mats else None)
    prims = [first]
    for k, part in enumerate(parts[1:], start=1):
        prims.append(dict(first, indices=b.add_accessor(part.ravel(), 5125, "SCALAR"), material=mats[k]))
    b.add_node("grid", mesh=b.add_mesh(prims))
    return b.save(folder / "big.glb")


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--small", action="store_true", help="a 200x200 grid and 2 textures of 512²")
    ap.add_argument("--textures", type=int, default=None)
    args = ap.parse_args()
    n, textures, size = (200, 2, 512) if args.small else (1001, 20, 2048)
    textures = args.textures if args.textures is not None else textures
    with tempfile.TemporaryDirectory() as tmp:
        path = write_scene(Path(tmp), n, textures, size)
        best = None
        for _ in range(3):
            t0 = time.perf_counter()
            scene = read_gltf(path, "scene")
            took = time.perf_counter() - t0
            best = took if best is None else min(best, took)
        mesh = scene.meshes[0]
        held = sum(im.rgba.nbytes for im in scene.images)
        print_table("read_gltf on one .glb (wall time, best of 3)",
                    ["file MB", "vertices", "triangles", "images", "decoded images MB", "read s"],
                    [[f"{path.stat().st_size / 1e6:.0f}", len(mesh.positions), len(mesh.faces), len(scene.images),
                      f"{held / 1e6:.0f}", f"{best:.2f}"]])


if __name__ == "__main__":
    main()
