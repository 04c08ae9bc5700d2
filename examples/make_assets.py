"""Make the demo's assets procedurally: courtyard walls, a hanging lantern, a dusk sky.

    python examples/make_assets.py [--out examples/courtyard/assets]

Everything is built from boxes and cylinders with trimesh and written as OBJ; the sky is a small
latitude-longitude OpenEXR made from a few gradients. The output is deterministic, so the
committed files can be checked against a fresh run.
"""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np
import trimesh


def _box(extents, center) -> trimesh.Trimesh:
    return trimesh.creation.box(extents=extents, transform=trimesh.transformations.translation_matrix(center))


def _cylinder(radius, height, center, sections=16) -> trimesh.Trimesh:
    m = trimesh.creation.cylinder(radius=radius, height=height, sections=sections)
    m.apply_transform(trimesh.transformations.rotation_matrix(np.pi / 2, [1, 0, 0]))  # axis → +y
    m.apply_translation(center)
    return m


def courtyard_walls() -> trimesh.Trimesh:
    """Three stone walls with a doorway in the left one, a low step and a bench."""
    parts = [
        _box([8.0, 3.6, 0.3], [0.0, 1.8, -3.15]),  # back wall
        _box([0.3, 3.6, 2.4], [-3.15, 1.8, -1.8]),  # left wall, behind the doorway
        _box([0.3, 3.6, 3.2], [-3.15, 1.8, 2.4]),  # left wall, in front of it
        _box([0.3, 1.0, 1.6], [-3.15, 3.1, 0.2]),  # lintel over the doorway
        _box([0.3, 3.6, 7.0], [3.15, 1.8, 0.5]),  # right wall
        _box([2.4, 0.45, 0.5], [0.9, 0.225, -2.6]),  # bench
        _box([8.0, 0.12, 0.8], [0.0, 0.06, -2.6]),  # step along the back wall
    ]
    return trimesh.util.concatenate(parts)


def courtyard_floor() -> trimesh.Trimesh:
    """Flagstones: a grid of slightly separated slabs, so the floor catches light unevenly."""
    rng = np.random.default_rng(7)
    slabs = []
    for i in range(8):
        for j in range(8):
            h = 0.04 + 0.015 * rng.random()
            slabs.append(_box([0.96, h, 0.96], [-3.5 + i, h / 2, -3.0 + j]))
    base = _box([8.0, 0.02, 8.0], [0.0, 0.01, 0.5])
    return trimesh.util.concatenate([base] + slabs)


def lantern_frame() -> trimesh.Trimesh:
    """A four-post brass lantern; its origin is the hook it swings from (y = 0 at the top)."""
    parts = [
        _cylinder(0.015, 0.25, [0.0, -0.125, 0.0], 8),  # hanger rod
        _box([0.34, 0.03, 0.34], [0.0, -0.27, 0.0]),  # roof plate
        _box([0.22, 0.05, 0.22], [0.0, -0.23, 0.0]),  # roof cap
        _box([0.30, 0.03, 0.30], [0.0, -0.66, 0.0]),  # base plate
    ]
    for sx in (-0.14, 0.14):
        for sz in (-0.14, 0.14):
            parts.append(_box([0.025, 0.38, 0.025], [sx, -0.465, sz]))  # posts
    return trimesh.util.concatenate(parts)


def lantern_core() -> trimesh.Trimesh:
    """The glowing candle inside the lantern, in the same object space as the frame.

    Its foot is sunk into the base plate: an emitter a hair above a surface makes a thin gap
    that traps paths and sparkles with fireflies (seen in the demo before this was done)."""
    return _cylinder(0.045, 0.17, [0.0, -0.565, 0.0], 12)


def wall_bracket() -> trimesh.Trimesh:
    return trimesh.util.concatenate([
        _box([0.06, 0.06, 0.9], [1.6, 2.62, -2.55]),
        _box([0.1, 0.3, 0.04], [1.6, 2.55, -2.98]),
    ])


def dusk_sky(width: int = 128, height: int = 64) -> np.ndarray:
    """(height, width, 3) float32 radiance: deep blue zenith, a warm glow low in the west."""
    v = (np.arange(height) + 0.5) / height  # 0 at the zenith, 1 straight down
    u = (np.arange(width) + 0.5) / width
    elev = (0.5 - v)[:, None] * np.pi  # radians above the horizon
    phi = (u - 0.5)[None, :] * 2 * np.pi  # 0 looks towards -z
    zenith = np.array([0.015, 0.025, 0.07])
    horizon = np.array([0.16, 0.09, 0.05])
    t = np.clip(np.sin(np.maximum(elev, 0.0)), 0, 1) ** 0.5
    sky = horizon * (1 - t[..., None]) + zenith * t[..., None]
    glow = np.exp(-((phi + 1.2) ** 2) / 0.5) * np.exp(-np.maximum(elev, 0) / 0.12)
    sky = sky + glow[..., None] * np.array([0.5, 0.22, 0.08])
    ground = np.array([0.02, 0.018, 0.016])
    sky = np.where((elev < 0)[..., None], ground, sky)
    return np.ascontiguousarray(np.broadcast_to(sky, (height, width, 3)), dtype=np.float32)


def write_exr(path: Path, rgb: np.ndarray) -> None:
    import OpenEXR

    channels = {c: np.ascontiguousarray(rgb[..., i]) for i, c in enumerate("RGB")}
    header = {"compression": OpenEXR.ZIP_COMPRESSION, "type": OpenEXR.scanlineimage}
    OpenEXR.File(dict(header), dict(channels)).write(str(path))


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, default=Path(__file__).parent / "courtyard" / "assets")
    args = ap.parse_args(argv)
    args.out.mkdir(parents=True, exist_ok=True)
    meshes = {
        "walls.obj": courtyard_walls(),
        "floor.obj": courtyard_floor(),
        "lantern_frame.obj": lantern_frame(),
        "lantern_core.obj": lantern_core(),
        "bracket.obj": wall_bracket(),
    }
    for name, mesh in meshes.items():
        text = trimesh.exchange.obj.export_obj(mesh, include_normals=False, include_texture=False,
                                               include_color=False, digits=5, header=None)
        (args.out / name).write_text(text)
    write_exr(args.out / "dusk_sky.exr", dusk_sky())
    print(f"wrote {len(meshes)} meshes and a sky map to {args.out}")


if __name__ == "__main__":
    main()
