"""A shot with nothing in it renders its environment (the kernels used to crash on an empty
scene: see engine/compiler.py, compile_frame, and the guards in scene.py and bvh.py)."""

from __future__ import annotations

import numpy as np

from lampyr.engine.render import render_frame
from lampyr.engine.shot import load_shot

SHOT = """name = "nothing"
frames = 1
[image]
width = 9
height = 7
[sampling]
samples = 3
[camera]
position = [0.0, 1.0, 4.0]
target = [0.0, 0.8, 0.0]
[environment]
color = [0.2, 0.25, 0.3]
"""


def test_an_empty_shot_renders_its_environment_everywhere(tmp_path):
    path = tmp_path / "nothing.toml"
    path.write_text(SHOT)
    film = render_frame(load_shot(path), 1, tile_size=4)
    mean = film.rgb_sum / film.n[..., None]
    # docs/shot-file.md, "Units": a camera ray that sees radiance L records L; every ray here
    # sees the constant environment, so every sample is exactly its colour (no noise to allow for)
    assert np.all(film.n == 3)
    assert np.allclose(mean, [0.2, 0.25, 0.3], rtol=0, atol=1e-12)
    assert np.all(film.alpha_sum == 0)  # nothing was hit


def test_punctual_lights_with_nothing_to_light_render_black(tmp_path):
    path = tmp_path / "lights.toml"
    path.write_text(SHOT.replace("color = [0.2, 0.25, 0.3]", "color = [0.0, 0.0, 0.0]")
                    + '[[light]]\nname = "p"\ntype = "point"\nposition = [0, 2, 0]\nintensity = 5.0\n')
    film = render_frame(load_shot(path), 1, tile_size=4)
    # delta lights are reached only by next-event estimation (docs/shot-file.md, [[light]]):
    # with no surface to shade, no sample gathers anything
    assert np.all(film.n == 3) and np.all(film.rgb_sum == 0)
