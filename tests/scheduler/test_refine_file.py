"""More samples from a frame file and its shot alone: equal to rendering them all at once."""

from __future__ import annotations

import numpy as np
import pytest

from lampyr.engine.exr import read_frame, write_frame
from lampyr.engine.render import render_frame
from lampyr.engine.shot import load_shot
from lampyr.errors import FrameFileError
from lampyr.scheduler.refine_file import refine_frame_file


@pytest.fixture
def frame_file(tiny_shot, tmp_path):
    shot = load_shot(tiny_shot)
    path = tmp_path / "tiny.0001.exr"
    write_frame(path, render_frame(shot, 1, 0, 4, tile_size=8), {"frame": 1, "samples": 4})
    return path


def test_refining_4_to_8_equals_rendering_8(frame_file, tiny_shot):
    res = refine_frame_file(frame_file, tiny_shot, 8, tile_size=8)
    assert res == {"tiles": 4, "of": 4, "errors": None}  # no denoised-noise goal: no errors estimated
    film, attrs = read_frame(frame_file)
    direct = render_frame(load_shot(tiny_shot), 1, 0, 8, tile_size=8)
    assert ((film.n + film.dropped) == 8).all() and attrs["samples"] == "8"
    # the file holds float32 means and variances: equal to float32 rounding (IEEE 754)
    np.testing.assert_allclose(film.mean(), direct.mean(), rtol=2e-5, atol=1e-6)


def test_a_frame_at_the_target_is_left_alone(frame_file, tiny_shot):
    before = frame_file.read_bytes()
    assert refine_frame_file(frame_file, tiny_shot, 4, tile_size=8)["tiles"] == 0
    assert frame_file.read_bytes() == before


def test_a_huge_noise_goal_refines_nothing(frame_file, tiny_shot):
    assert refine_frame_file(frame_file, tiny_shot, 8, noise=1e9, tile_size=8)["tiles"] == 0


def test_tiles_of_mixed_sample_counts_are_refused(frame_file, tiny_shot):
    refine_frame_file(frame_file, tiny_shot, 8, tile_size=8)
    film, attrs = read_frame(frame_file)
    shot = load_shot(tiny_shot)
    from lampyr.engine.film import merge
    from lampyr.engine.render import FrameRenderer, Tile

    extra = type(film).zeros(12, 16)
    extra.add_into(FrameRenderer(shot, 1).render(Tile(0, 0, 8, 8), 8, 2), 0, 0)
    attrs.pop("format", None)
    write_frame(frame_file, merge(film, extra), attrs)
    with pytest.raises(FrameFileError, match="hold 8 to 10 samples"):
        refine_frame_file(frame_file, tiny_shot, 16, tile_size=16)
