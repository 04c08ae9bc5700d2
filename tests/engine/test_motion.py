"""Motion blur: a moving edge smears into the convolution of a step with the pixel and the
shutter (both box functions), and a moving camera does the same as moving the world."""

from __future__ import annotations

import numpy as np
import pytest
import trimesh

from lampyr.engine.render import render_frame

from .scenes import load, shot_text

WIDTH, HEIGHT = 32, 4


def _sheet(path):
    """An emissive half-plane x < 0 at z = −10, facing +z."""
    v = np.array([[-100.0, -50.0, -10.0], [0.0, -50.0, -10.0], [0.0, 50.0, -10.0], [-100.0, 50.0, -10.0]])
    trimesh.Trimesh(v, np.array([[0, 1, 2], [0, 2, 3]]), process=False).export(path)


def _expected_coverage(e0, e1, n=2000):
    """Mean of [s < e(t)] over pixel s ∈ [x, x+1) and shutter t ∈ [0, 1), e(t) = e0 + (e1 − e0) t:
    the step convolved with the two boxes, by a fine midpoint rule (error ≤ 1/n)."""
    t = (np.arange(n) + 0.5) / n
    s = (np.arange(n) + 0.5) / n
    edge = e0 + (e1 - e0) * t
    left = -WIDTH / 2 + np.arange(WIDTH)  # world x of each pixel's left border (1 unit per pixel)
    return np.array([np.mean((x + s)[None, :] < edge[:, None]) for x in left])


# tan(fov/2) = 0.2 at distance 10 → 4 world units over 4 rows: one unit per pixel
CAMERA = "position = [0, 0, 0]\ntarget = [0, 0, -10]\nfov = 22.619864948040426\nshutter = 1.0"


@pytest.mark.parametrize("move", ["object", "camera"])
def test_moving_edge_blurs_into_a_ramp(tmp_path, move):
    _sheet(tmp_path / "sheet.obj")
    # shutter 1.0 centred on frame 1: open at 0.5, close at 1.5; keys at frames 0 and 2
    if move == "object":
        body = """
[[object.key]]
frame = 0
translate = [-8, 0, 0]
[[object.key]]
frame = 2
translate = [8, 0, 0]
"""
        camera = CAMERA
    else:  # the camera moving left makes the world edge move right in the image
        body = ""
        camera = CAMERA + """
[[camera.key]]
frame = 0
position = [8, 0, 0]
target = [8, 0, -10]
[[camera.key]]
frame = 2
position = [-8, 0, 0]
target = [-8, 0, -10]
"""
    shot = load(tmp_path, shot_text("""
[[material]]
name = "glow"
type = "diffuse"
color = [0, 0, 0]
emission = [1, 1, 1]
[[object]]
name = "sheet"
material = "glow"
mesh = "sheet.obj"
""" + body, width=WIDTH, height=HEIGHT, samples=256, bounces=0, camera=camera))
    film = render_frame(shot, 1)
    per_sample = film.mean()[..., 1]  # each sample is 0 or 1: the coverage
    col = per_sample.mean(axis=0)
    # a Bernoulli mean's standard error, per column over its HEIGHT × spp samples
    se = np.sqrt(col * (1 - col) / (HEIGHT * 256))
    expected = _expected_coverage(-4.0, 4.0)
    assert np.all(np.abs(col - expected) <= 3.5 * se + 1e-3), np.c_[col, expected, se]
    # far from the edge's path the sheet is solid or absent at every instant
    assert np.all(col[:10] == 1.0) and np.all(col[-10:] == 0.0)
