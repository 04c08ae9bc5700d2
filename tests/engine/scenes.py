"""Small test scenes written as shot files, shared by the engine tests."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import trimesh


def write_quad(path: Path, half: float = 10.0, y: float = 0.0) -> Path:
    """A square floor of side 2·half at height y, normal +y, as OBJ."""
    v = np.array([[-half, y, -half], [half, y, -half], [half, y, half], [-half, y, half]])
    f = np.array([[0, 2, 1], [0, 3, 2]])
    trimesh.Trimesh(v, f, process=False).export(path)
    return path


def shot_text(body: str, *, width=8, height=8, samples=16, bounces=8, sampler="random",
              camera="position = [0, 0, 0]\ntarget = [0, 0, -1]", frames="1") -> str:
    return f"""
name = "test"
frames = {frames}
[image]
width = {width}
height = {height}
[sampling]
samples = {samples}
bounces = {bounces}
seed = 3
sampler = "{sampler}"
[camera]
{camera}
{body}
"""


def load(tmp_path: Path, text: str, name: str = "shot.toml"):
    from lampyr.engine.shot import load_shot

    path = tmp_path / name
    path.write_text(text)
    return load_shot(path)


def render_through_exr(shot, tmp_path: Path) -> dict:
    """Render frame 1, write it as a frame file, and read its channels back with the OpenEXR
    library itself: {name: (h, w) float64}. Tests take their standard errors from `var.*`."""
    import OpenEXR

    from lampyr.engine.exr import write_frame
    from lampyr.engine.render import render_frame

    path = tmp_path / "frame.exr"
    write_frame(path, render_frame(shot, 1), {"shot": "test"})
    with OpenEXR.File(str(path), separate_channels=True) as f:
        return {k: np.array(v.pixels, dtype=np.float64) for k, v in f.channels().items()}
